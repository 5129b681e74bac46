"""Pure decisions of delivery: retry waits, severity, quiet hours and routes (no I/O).

The delivery loop (:mod:`alerter.delivery`) asks these for every message; kept apart so
each rule can be read and tested as plain arithmetic.
"""

from __future__ import annotations

from datetime import datetime

from .config import SinkRoute

__all__ = ["backoff_seconds", "in_quiet_hours", "pick_route", "retry_wait", "severity_of"]


def backoff_seconds(attempt: int, initial: float, ceiling: float, jitter: float, rand: float) -> float:
    """Wait before retry ``attempt`` (1-based): initial * 2^(attempt-1), capped, spread by jitter.

    >>> [round(backoff_seconds(a, 1.0, 10.0, 0.0, 0.5), 2) for a in (1, 2, 3, 4, 5)]
    [1.0, 2.0, 4.0, 8.0, 10.0]
    >>> backoff_seconds(1, 1.0, 10.0, 0.2, 0.0), backoff_seconds(1, 1.0, 10.0, 0.2, 1.0)
    (0.8, 1.2)
    """
    base = min(ceiling, initial * 2.0 ** (attempt - 1))
    return base * (1.0 + jitter * (2.0 * rand - 1.0))


def retry_wait(backoff: float, retry_after: float | None, longest: float = 3600.0) -> float:
    """A 429's Retry-After wins when it asks for longer than the backoff (capped at an hour).

    >>> retry_wait(1.0, None), retry_wait(1.0, 5.0), retry_wait(8.0, 2.0), retry_wait(1.0, 9e9)
    (1.0, 5.0, 8.0, 3600.0)
    """
    return min(longest, max(backoff, retry_after or 0.0))


def severity_of(total_excess: float, medium: float, high: float) -> str:
    """low / medium / high from the incident's absolute excess.

    >>> [severity_of(x, 1000, 10000) for x in (10, -1500, 10000)]
    ['low', 'medium', 'high']
    """
    size = abs(total_excess)
    return "high" if size >= high else "medium" if size >= medium else "low"


def in_quiet_hours(local: datetime, start: str, end: str) -> bool:
    """Whether a local time falls in [start, end); the window may wrap past midnight.

    >>> [in_quiet_hours(datetime(2026, 1, 1, h, 30), "22:00", "07:00") for h in (21, 22, 3, 7)]
    [False, True, True, False]
    """
    minute = local.hour * 60 + local.minute
    a = int(start[:2]) * 60 + int(start[3:])
    b = int(end[:2]) * 60 + int(end[3:])
    return a <= minute < b if a <= b else minute >= a or minute < b


def pick_route(routes: list[SinkRoute], root: str) -> SinkRoute | None:
    """The first route matching the incident's root node; no routes means one catch-all."""
    if not routes:
        return SinkRoute(name="default")
    return next((r for r in routes if r.matches(root)), None)
