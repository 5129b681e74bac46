"""Pure time functions as tables, and the buckets' ordering of edges relative to hours."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest

from alerter.buckets import HourBuckets, close_due, dense_counts, hour_of, next_close, watermark_due
from alerter.nodes import NodeIndex
from alerter.timeaxis import parse_hour, parse_instant
from alerter.wire import CountBatch, EdgeChange

G5 = timedelta(minutes=5)


@pytest.mark.parametrize(("hour", "now", "grace", "due"), [
    ("2026-11-02T07:00:00Z", "2026-11-02T07:59:59Z", G5, False),
    ("2026-11-02T07:00:00Z", "2026-11-02T08:00:00Z", G5, False),
    ("2026-11-02T07:00:00Z", "2026-11-02T08:04:59Z", G5, False),
    ("2026-11-02T07:00:00Z", "2026-11-02T08:05:00Z", G5, True),
    ("2026-11-02T07:00:00Z", "2026-11-03T00:00:00Z", G5, True),
    ("2026-11-02T07:00:00Z", "2026-11-02T08:00:00Z", timedelta(0), True),
    ("2026-11-02T23:00:00Z", "2026-11-03T00:30:00Z", timedelta(minutes=45), False),
    ("2026-11-02T23:00:00Z", "2026-11-03T00:45:00Z", timedelta(minutes=45), True),
])
def test_close_due(hour: str, now: str, grace: timedelta, due: bool) -> None:
    assert close_due(parse_hour(hour), parse_instant(now), grace) is due


@pytest.mark.parametrize(("now", "grace", "expected"), [
    ("2026-11-02T08:03:00Z", G5, "2026-11-02T08:05:00Z"),
    ("2026-11-02T08:05:00Z", G5, "2026-11-02T09:05:00Z"),  # strictly after now
    ("2026-11-02T08:06:00Z", G5, "2026-11-02T09:05:00Z"),
    ("2026-11-02T08:00:00Z", timedelta(0), "2026-11-02T09:00:00Z"),
    ("2026-11-02T23:59:59Z", G5, "2026-11-03T00:05:00Z"),
    ("2026-11-02T00:02:00Z", G5, "2026-11-02T00:05:00Z"),
    ("2026-11-02T08:30:00Z", timedelta(minutes=45), "2026-11-02T08:45:00Z"),
    ("2026-11-02T08:50:00Z", timedelta(minutes=45), "2026-11-02T09:45:00Z"),
    ("2026-12-31T23:10:00Z", timedelta(minutes=15), "2026-12-31T23:15:00Z"),
    ("2026-11-02T08:03:00Z", timedelta(hours=2), "2026-11-02T09:00:00Z"),
])
def test_next_close(now: str, grace: timedelta, expected: str) -> None:
    t = next_close(parse_instant(now), grace)
    assert t == parse_instant(expected)
    assert t > parse_instant(now)
    # at that instant exactly one more hour has become due
    assert close_due(hour_of(t - grace) - timedelta(hours=1), t, grace)


@pytest.mark.parametrize(("hour", "watermark", "due"), [
    ("2026-11-02T07:00:00Z", None, False),
    ("2026-11-02T07:00:00Z", "2026-11-02T07:00:00Z", False),
    ("2026-11-02T07:00:00Z", "2026-11-02T08:00:00Z", True),
    ("2026-11-02T07:00:00Z", "2026-11-02T06:00:00Z", False),
])
def test_watermark_due(hour: str, watermark: str | None, due: bool) -> None:
    assert watermark_due(parse_hour(hour), parse_hour(watermark) if watermark else None) is due


def _b(hour: int, nodes: list[str]) -> CountBatch:
    return CountBatch(parse_hour("2026-11-02T07:00:00Z") + timedelta(hours=hour), nodes, np.ones(len(nodes)))


def test_edges_wait_for_the_hour_after_the_counts_they_follow() -> None:
    b = HourBuckets()
    b.add_edge(EdgeChange("add", "/", "/a"))  # before everything: applies before hour 0
    b.add(_b(0, ["/"]))
    b.add_edge(EdgeChange("add", "/", "/b"))  # after hour 0's counts: applies before hour 1
    b.add(_b(1, ["/"]))
    b.add(_b(0, ["/x"]))  # hour 0 still open: joins its bucket
    b.add_edge(EdgeChange("remove", "/", "/a"))  # after hour 1's counts
    closed = list(b.close_all())
    assert [[e.dst for e in c.edges] for c in closed] == [["/a"], ["/b"]]
    assert [c.entries for c in closed] == [2, 1]
    assert [e.op for e in b.take_trailing_edges()] == ["remove"]
    assert not b.add(_b(1, ["/late"])) and b.is_late(_b(0, []).hour)


def test_dense_counts_interns_in_arrival_order_last_value_wins() -> None:
    idx = NodeIndex()
    idx.intern(["/known"])
    x = dense_counts(idx, [(["/b", "/known"], np.array([1.0, 2.0])), (["/b", "/c"], np.array([3.0, np.nan]))])
    assert idx.ids == ["/known", "/b", "/c"]
    assert np.array_equal(x, [2.0, 3.0, np.nan], equal_nan=True)


def test_hours_leave_their_buckets_one_at_a_time() -> None:
    """A checkpoint taken after stepping the first due hour must still hold the later ones."""
    b = HourBuckets()
    for h in range(4):
        b.add(_b(h, ["/"]))
    ready = b.close_ready(lambda hour: watermark_due(hour, b.watermark))
    first = next(ready)
    assert first.hour == _b(0, []).hour and len(b.open) == 3
    assert [c.hour for c in ready] == [_b(1, []).hour, _b(2, []).hour] and len(b.open) == 1
