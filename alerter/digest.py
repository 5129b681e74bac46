"""The daily digest: the last 24 hours of the outbox in one message, posted at a local time.

``summarise`` is pure (outbox entries in, figures out); ``post_digest`` reads the outbox
and the delivery counters from Redis and sends through the normal delivery path (same
retries, delivered-set: one digest per sink and day); ``start_digest_job`` schedules it
with APScheduler at ``sinks.digest.local_time`` in ``clock.timezone``.

Suppressions come from two places: the service writes one ``type=suppressed`` outbox entry
per closed hour in which the rules held alerts back by cooldown (fields ``surge`` and
``drop``), counted here as ``cooldown``; delivery counts what it held back itself (rate
limit, quiet hours, severity, no route) in per-sink stats hashes, one per UTC hour, so
the digest's 24 hours add up only the hours they overlap.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

from .config import Config
from .delivery import SinkWorker, options_of, sink_keys, stats_bucket
from .messages import render_digest_text
from .sinks import Outgoing

__all__ = ["DigestFigures", "summarise", "post_digest", "start_digest_job"]


@dataclass
class DigestFigures:
    """What the digest says: incidents and their last state, top surging nodes, suppressions."""

    incidents: int = 0
    states: dict[str, int] = field(default_factory=dict)
    top: list[tuple[str, float]] = field(default_factory=list)
    suppressed: dict[str, int] = field(default_factory=dict)


def summarise(entries: Iterable[tuple[bytes, dict[bytes, bytes]]], top: int) -> DigestFigures:
    """Figures of a span of outbox entries (pure)."""
    last_state: dict[str, str] = {}
    surge: dict[str, float] = {}
    cooldown = 0
    for _, fields in entries:
        kind = fields.get(b"type")
        if kind == b"suppressed" and fields.get(b"reason", b"cooldown") == b"cooldown":
            cooldown += sum(int(fields.get(d, b"0") or 0) for d in (b"surge", b"drop"))
        elif kind == b"incident":
            data = json.loads(fields[b"incident"])
            last_state[data["incident"]] = data["state"]
        elif kind == b"alert" and fields.get(b"kind") == b"surge":
            data = json.loads(fields[b"alert"])
            surge[data["node"]] = max(surge.get(data["node"], 0.0), float(data["excess"]))
    states: dict[str, int] = {}
    for s in last_state.values():
        states[s] = states.get(s, 0) + 1
    ranked = sorted(surge.items(), key=lambda kv: (-kv[1], kv[0]))[:top]
    return DigestFigures(len(last_state), states, ranked, {"cooldown": cooldown} if cooldown else {})


def _hours_between(since: datetime, now: datetime) -> list[datetime]:
    """The UTC hours whose stats buckets overlap ``[since, now]`` (24 or 25 of them).

    >>> [h.hour for h in _hours_between(datetime(2026, 11, 20, 22, 30, tzinfo=UTC),
    ...                                  datetime(2026, 11, 21, 1, 0, tzinfo=UTC))]
    [1, 0, 23, 22]
    """
    hour = now.astimezone(UTC).replace(minute=0, second=0, microsecond=0)
    first = since.astimezone(UTC).replace(minute=0, second=0, microsecond=0)
    out = []
    while hour >= first:
        out.append(hour)
        hour -= timedelta(hours=1)
    return out


def post_digest(config: Config, store: Any, now: datetime | None = None, partition: int = 0) -> dict[str, str]:
    """Send the digest of the 24 hours before ``now`` to the digest sinks; outcome per sink."""
    now = now or datetime.now(UTC)
    since = now - timedelta(hours=24)
    outbox = sink_keys(config, "-", partition).outbox
    start = f"{int(since.timestamp() * 1000)}-0"
    entries = store.entries(outbox, start)
    figures = summarise(entries, config.sinks.digest.top)
    cooldown = dict(figures.suppressed)  # the service's figures; each sink adds its own below
    names = set(config.sinks.digest.sinks)
    out: dict[str, str] = {}
    for target in config.sinks.targets:
        if not target.enabled or (names and target.name not in names) or (not names and target.kind != "webhook"):
            continue
        worker = SinkWorker(config, target, store, partition=partition)
        for bucket in _hours_between(since, now):
            stats = store.hash_all(worker.keys.stats.replace("@", stats_bucket(bucket)))
            for k, v in stats.items():
                figures.suppressed[k.decode()] = figures.suppressed.get(k.decode(), 0) + int(v)
        text = render_digest_text(since.strftime("%Y-%m-%dT%H:%M:%SZ"), now.strftime("%Y-%m-%dT%H:%M:%SZ"),
                                  figures.incidents, figures.states, figures.top, figures.suppressed,
                                  options_of(config, target))
        msg = Outgoing(f"digest|{target.name}|{now.strftime('%Y%m%d')}", "digest",
                       now.strftime("%Y-%m-%dT%H:00:00Z"), "daily digest", text,
                       record={"incidents": figures.incidents})
        out[target.name] = worker.deliver(None, msg)
        figures.suppressed = dict(cooldown)
    return out


def start_digest_job(config: Config, store: Any) -> Any:
    """A running BackgroundScheduler posting the digest daily at the configured local time."""
    from apscheduler.schedulers.background import BackgroundScheduler
    from apscheduler.triggers.cron import CronTrigger

    hh, mm = config.sinks.digest.local_time.split(":")
    scheduler = BackgroundScheduler(timezone=config.clock.timezone)
    scheduler.add_job(post_digest, CronTrigger(hour=int(hh), minute=int(mm), timezone=config.clock.timezone),
                      args=(config, store), id="alerter-digest", misfire_grace_time=3600, coalesce=True)
    scheduler.start()
    return scheduler

