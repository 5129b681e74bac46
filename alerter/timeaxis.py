"""Hours as pure functions: parsing, formatting and the local slots of an hour.

Hours are stored and exchanged in UTC (``2026-11-02T07:00:00Z``). Seasonality follows the
local clock people live by, so an hour's hour-of-day and day-of-week slots are taken in the
configured time zone.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

__all__ = ["parse_hour", "format_hour", "local_slots", "hour_index", "within", "HOUR"]

HOUR = timedelta(hours=1)


def parse_hour(text: str) -> datetime:
    """Parse an ISO 8601 instant that falls on a whole hour; return it in UTC.

    >>> parse_hour("2026-11-02T07:00:00Z").isoformat()
    '2026-11-02T07:00:00+00:00'
    """
    if not isinstance(text, str):
        raise ValueError(f"an hour must be an ISO 8601 string, got {text!r}")
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as exc:
        raise ValueError(f"not an ISO 8601 time: {text!r} (expected e.g. 2026-11-02T07:00:00Z)") from exc
    if moment.tzinfo is None:
        raise ValueError(f"time {text!r} has no offset; add 'Z' for UTC")
    moment = moment.astimezone(UTC)
    if moment.minute or moment.second or moment.microsecond:
        raise ValueError(f"time {text!r} is not on a whole hour")
    return moment


def parse_instant(text: str) -> datetime:
    """Parse any ISO 8601 instant with an offset, in UTC."""
    try:
        moment = datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError as exc:
        raise ValueError(f"not an ISO 8601 time: {text!r} (expected e.g. 2026-11-02T07:00:00Z)") from exc
    if moment.tzinfo is None:
        raise ValueError(f"time {text!r} has no offset; add 'Z' for UTC")
    return moment.astimezone(UTC)


def format_hour(hour: datetime) -> str:
    """UTC ISO 8601 with a trailing Z, the form used in every file.

    >>> format_hour(datetime(2026, 11, 2, 7, tzinfo=UTC))
    '2026-11-02T07:00:00Z'
    """
    return hour.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def local_slots(hour: datetime, tz: ZoneInfo) -> tuple[int, int]:
    """(hour of day, day of week with Monday 0) of the hour's start in zone ``tz``.

    >>> local_slots(parse_hour("2026-11-02T07:00:00Z"), ZoneInfo("America/Denver"))
    (0, 0)
    """
    local = hour.astimezone(tz)
    return local.hour, local.weekday()


def within(hour: str, since: datetime | None, until: datetime | None = None) -> bool:
    """Whether the hour ``hour`` (as written in records) lies in ``since <= hour <= until``; an
    end given as None is open.

    >>> h = parse_hour("2026-11-18T00:00:00Z")
    >>> within("2026-11-18T05:00:00Z", h), within("2026-11-17T23:00:00Z", h)
    (True, False)
    >>> within("2026-11-18T05:00:00Z", None, until=h)
    False
    """
    moment = parse_hour(hour)
    return (since is None or moment >= since) and (until is None or moment <= until)


def hour_index(hour: datetime) -> int:
    """Whole hours since the Unix epoch: a monotonic tick number for cooldowns."""
    return int(hour.timestamp()) // 3600
