"""Incidents: cascades grouped by attribution, one root, a lifecycle, stable ids."""

from __future__ import annotations

from alerter.incidents import IncidentTracker
from alerter.records import Alert, Upstream


def _hour(t: int) -> str:
    return f"2026-11-20T{10 + t:02d}:00:00Z"


def _alert(node: str, t: int, blames: tuple[tuple[str, float], ...] = (), kind: str = "surge",
           excess: float = 800.0) -> Alert:
    ups = tuple(Upstream(n, excess * s, s) for n, s in blames)
    explained = sum(u.visits for u in ups)
    return Alert.build(node=node, hour=_hour(t), kind=kind, observed=100 + excess, expected=100,
                       band_low=50, band_high=200, score=9, rule="r", streak=1, upstream=ups,
                       unexplained=excess - explained)


def test_cascade_over_hours_is_one_incident_with_the_section_as_root() -> None:
    t = IncidentTracker(quiet_hours=2)
    u0 = t.step(0, _hour(0), [_alert("/s", 0)], active={("/s", "surge")})
    # hour 1: the section is still beyond its band (cooldown keeps it from alerting again)
    u1 = t.step(1, _hour(1), [_alert("/s/a", 1, (("/s", 0.9),)), _alert("/s/b", 1, (("/s", 0.7),))],
                active={("/s", "surge"), ("/s/a", "surge"), ("/s/b", "surge")})
    u2 = t.step(2, _hour(2), [_alert("/s/c", 2, (("/s/a", 0.5),), excess=200)],
                active={("/s/c", "surge")})
    assert len({u.incident for u in u0 + u1 + u2}) == 1
    assert [u.state for u in u0 + u1 + u2] == ["open", "growing", "growing"]
    assert u2[-1].root == "/s" and u2[-1].members == ("/s", "/s/a", "/s/b", "/s/c")
    assert u1[-1].new_members == ("/s/a", "/s/b")
    quiet = [t.step(k, _hour(k), [], active=set()) for k in (3, 4)]
    assert [u.state for ups in quiet for u in ups] == ["subsiding", "closed"]
    assert not t.open


def test_unrelated_alerts_make_separate_incidents() -> None:
    t = IncidentTracker()
    ups = t.step(0, _hour(0), [_alert("/bot", 0), _alert("/news/a1", 0), _alert("/x", 0, kind="drop")],
                 active=set())
    assert len(ups) == 3 and len({u.incident for u in ups}) == 3
    assert {u.root for u in ups} == {"/bot", "/news/a1", "/x"}


def test_small_shares_and_stale_upstreams_do_not_link() -> None:
    t = IncidentTracker(link_min_share=0.2, adjacent_hours=1)
    t.step(0, _hour(0), [_alert("/s", 0)], active={("/s", "surge")})
    weak = t.step(1, _hour(1), [_alert("/s/a", 1, (("/s", 0.1),))], active={("/s", "surge")})
    assert any(u.members == ("/s/a",) for u in weak)
    assert all("/s/a" not in u.members or "/s" not in u.members for u in weak)
    stale = t.step(4, _hour(4), [_alert("/s/b", 4, (("/s", 0.9),))], active=set())
    assert any(u.members == ("/s/b",) for u in stale)


def test_two_incidents_joined_by_a_bridge_merge_into_the_older() -> None:
    t = IncidentTracker()
    first = t.step(0, _hour(0), [_alert("/a", 0)], active={("/a", "surge")})
    second = t.step(1, _hour(1), [_alert("/b", 1)], active={("/a", "surge"), ("/b", "surge")})
    bridge = t.step(2, _hour(2), [_alert("/c", 2, (("/a", 0.5), ("/b", 0.4)), excess=300)],
                    active={("/a", "surge"), ("/b", "surge"), ("/c", "surge")})
    older = first[0].incident
    assert second[0].incident != older
    merged = [u for u in bridge if u.incident == older]
    assert merged and merged[-1].members == ("/a", "/b", "/c")
    assert list(t.open) == [older]


def test_ids_are_stable_across_runs() -> None:
    def run() -> list[str]:
        t = IncidentTracker()
        return [u.incident for u in t.step(0, _hour(0), [_alert("/q", 0), _alert("/r", 0)], active=set())]

    assert run() == run()
    assert all(i.startswith("surge-20261120T10-") for i in run())
