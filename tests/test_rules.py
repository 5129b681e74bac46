"""Alert rules, table-driven: thresholds, persistence, cooldown, drops mirroring surges."""

from __future__ import annotations

import numpy as np
import pytest

from alerter.config import DirectionRule, RuleSettings
from alerter.rules import RuleBook


def _book(**surge: float) -> RuleBook:
    book = RuleBook(RuleSettings(surge=DirectionRule(**surge), drop=DirectionRule(**surge)))
    book.add_nodes(["/n"])
    return book


def _run(book: RuleBook, rows: list[tuple[float, float, float]]) -> list[str]:
    """Feed (observed, expected, score) per hour; return '', 'S' or 'D' per hour."""
    out = []
    for tick, (obs, exp, score) in enumerate(rows):
        up, down = book.evaluate(np.array([obs]), np.array([exp]), np.array([score]), np.array([True]), tick)
        out.append("S" if up[0] else "D" if down[0] else "")
    return out


@pytest.mark.parametrize(("settings", "row", "fires"), [
    ({}, (500, 100, 9.0), "S"),
    ({}, (500, 100, 3.9), ""),            # below z
    ({"min_excess": 500}, (500, 100, 9.0), ""),   # excess 400 < 500
    ({"min_ratio": 6.0}, (500, 100, 9.0), ""),    # ratio 4.96 < 6
    ({"min_expected": 200}, (500, 100, 9.0), ""),  # too little expected volume
    ({"enabled": False}, (500, 100, 9.0), ""),
    ({}, (10, 100, -9.0), "D"),
    ({"min_ratio": 10.0}, (10, 100, -9.0), ""),   # (100+1)/(10+1) = 9.2 < 10
])
def test_single_hour(settings: dict[str, float], row: tuple[float, float, float], fires: str) -> None:
    assert _run(_book(**settings), [row]) == [fires]


def test_persistence_needs_consecutive_hours() -> None:
    hot, calm = (500, 100, 9.0), (100, 100, 0.0)
    assert _run(_book(persistence=3, cooldown_hours=0), [hot, hot, calm, hot, hot, hot, hot]) == \
        ["", "", "", "", "", "S", "S"]


def test_cooldown_silences_repeats() -> None:
    hot = (500, 100, 9.0)
    assert _run(_book(cooldown_hours=3), [hot] * 7) == ["S", "", "", "S", "", "", "S"]


def test_ineligible_nodes_never_fire() -> None:
    book = _book()
    up, down = book.evaluate(np.array([500.0, np.nan]), np.array([100.0, 100.0]), np.array([9.0, np.nan]),
                             np.array([False, False]), 0)
    assert not up.any() and not down.any()


def test_names_and_streaks_of_many_nodes_match_one_at_a_time() -> None:
    """The alert builder reads rule names and streaks for all firing nodes at once; they must
    be what the one-node reads give, override names and per-node streaks included."""
    from alerter.config import PartialDirectionRule, RuleOverride

    settings = RuleSettings(overrides=[
        RuleOverride(name="shop", match=["/shop/*"], surge=PartialDirectionRule(persistence=2)),
        RuleOverride(name="news", match=["/news/*"]),
    ])
    book = RuleBook(settings)
    ids = ["/a", "/shop/x", "/news/y", "/shop/z", "/b"]
    book.add_nodes(ids)
    hot = np.full(len(ids), 500.0)
    for tick in range(3):  # three hot hours: streaks grow, /shop/* fires from its second hour
        up, _ = book.evaluate(hot, np.full(len(ids), 100.0), np.full(len(ids), 9.0), np.ones(len(ids), bool), tick)
    nodes = np.array([4, 1, 2, 0, 3])
    names = book.rule_names_of("surge", nodes)
    assert names == [book.rule_name("surge", int(i)) for i in nodes]
    assert names == ["surge:default", "surge:shop", "surge:news", "surge:default", "surge:shop"]
    assert book.streaks_of("surge", nodes) == [book.streak("surge", int(i)) for i in nodes]
    assert set(book.streaks_of("surge", nodes)) == {3}
    assert book.rule_names_of("drop", nodes[:0]) == [] and book.streaks_of("drop", nodes[:0]) == []
