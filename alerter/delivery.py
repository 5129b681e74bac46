"""The delivery loop: outbox -> one consumer group per sink -> rendered messages -> sink.

Per outbox entry and sink (all decisions in pure helpers, Redis calls in ``_Keys``):

1. ``alert`` entries are kept (raw JSON, the last ``join_hours`` hours) to join with the
   incident update of the same hour: the update lists member ids, the alerts carry each
   member's numbers. After a restart a missing hour is read back from the outbox.
2. The idempotency key is looked up in the sink's delivered-set: delivered -> just XACK.
   A key left *in flight* by a crash is uncertain: ``uncertain: dead_letter`` parks it in
   the sink dead-letter stream (never posted twice), ``resend`` posts it again with the
   same Idempotency-Key for endpoints that honour it.
3. Routing (first route whose globs match the root), minimum severity and quiet hours;
   what they hold back is counted for the digest and acknowledged. Spill-over warnings
   join their incident's update of the hour, else go out as one note per incident and
   hour, routed like the incident.
4. Rate limit (token bucket per sink): over the limit, the entry is folded into a Redis
   hash and acknowledged in the same MULTI/EXEC; the fold goes out as one summary message
   as soon as a token is free. Nothing is dropped, memory stays bounded.
5. Send with retries (exponential backoff with jitter, Retry-After on 429); success ->
   delivered-set + XACK in one MULTI/EXEC; give up -> sink dead-letter stream + XACK.
"""

from __future__ import annotations

import json
import logging
import random
import threading
import time
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from typing import Any
from zoneinfo import ZoneInfo

from .config import Config, SinkRoute, SinkTarget
from .constants import (
    DELIVERED_KEY,
    FOLD_KEY,
    INFLIGHT_KEY,
    SINK_DEAD_STREAM,
    SINK_GROUP_PREFIX,
    SINK_MARK,
    SINK_STATS_KEY,
    partition_name,
)
from .delivery_policy import backoff_seconds, in_quiet_hours, pick_route, retry_wait, severity_of
from .errors import SinkError, SinkSendError
from .folding import TokenBucket, flush_fold, fold_entry
from .incidents import IncidentUpdate
from .messages import RenderOptions, render_spill_note, render_update
from .records import Alert, SpillWarning, alert_from_dict
from .sinks import Outgoing, Sent, Sink, build_sink
from .store import check_one_slot, id_key

__all__ = ["TokenBucket", "backoff_seconds", "retry_wait", "severity_of", "in_quiet_hours", "pick_route",
           "SinkWorker", "sink_keys", "stats_bucket", "alert_from_json", "options_of"]

log = logging.getLogger(__name__)
# Defined here, next to its only use (constants.py belongs to the live path): per sink and
# partition, a hash of incident id -> the message id the endpoint answered to the first post.
MESSAGE_IDS_KEY = "alerter:{p#}:msgids:%"
# Outbox entry types that are figures, not messages: acknowledged, counted by the digest.
FIGURE_TYPES = ("suppressed",)
SEVERITY_RANK = {"low": 0, "medium": 1, "high": 2}
# Incident roots remembered to route spill-over notes like their incident (a bound on memory).
ROOTS_KEPT = 10000


def stats_bucket(when: datetime) -> str:
    """The UTC hour a held-back message is counted in (``@`` of the stats key): per hour, so
    the digest's 24 hours sum 24 or 25 buckets, not two whole days.

    >>> stats_bucket(datetime(2026, 11, 20, 12, 30, tzinfo=UTC))
    '2026112012'
    """
    return when.astimezone(UTC).strftime("%Y%m%d%H")


def alert_from_json(text: str | bytes) -> Alert:
    """An Alert back from its outbox JSON."""
    return alert_from_dict(json.loads(text))


def _update_from(text: bytes) -> IncidentUpdate:
    data = json.loads(text)
    return IncidentUpdate(**{**data, "members": tuple(data["members"]), "new_members": tuple(data["new_members"])})


def _spill_from(text: bytes) -> SpillWarning:
    return SpillWarning(**json.loads(text))


def options_of(config: Config, target: SinkTarget) -> RenderOptions:
    s = config.sinks
    return RenderOptions(target.markup, s.max_id_chars, s.max_message_chars, s.top_upstream, s.max_members)


# --- Redis names and commands ----------------------------------------------------------------

@dataclass(frozen=True)
class SinkKeys:
    outbox: str
    group: str
    delivered: str
    inflight: str
    fold: str
    dead: str
    stats: str  # still has '@' for the UTC hour (:func:`stats_bucket`)
    message_ids: str  # thread -> the endpoint's message id, for edits/replies (``updates``)


def sink_keys(config: Config, sink: str, partition: int = 0) -> SinkKeys:
    def name(t: str) -> str:
        return partition_name(t, partition).replace(SINK_MARK, sink)
    return SinkKeys(partition_name(config.live.names.outbox, partition), SINK_GROUP_PREFIX + sink,
                    name(DELIVERED_KEY), name(INFLIGHT_KEY), name(FOLD_KEY), name(SINK_DEAD_STREAM),
                    name(SINK_STATS_KEY), name(MESSAGE_IDS_KEY))


@dataclass
class _Keys:
    """The delivery loop's Redis commands: named methods of the Store (its error translation)."""

    store: Any
    k: SinkKeys

    def txn(self, what: str, build: Callable[[Any], object]) -> None:
        """Queue ``build``'s commands on a MULTI/EXEC pipeline (its return value is ignored)."""
        self.store.transaction(what, build)

    def state(self, key: str) -> tuple[bool, bool]:
        return self.store.delivery_state(self.k.delivered, self.k.inflight, key)

    def message_id(self, thread: str) -> str | None:
        """The endpoint's id of a thread's first message (``updates.id_field``), if one was kept."""
        got = self.store.hash_get(self.k.message_ids, thread)
        return got.decode() if got else None


# --- the worker ------------------------------------------------------------------------------

@dataclass
class SinkWorker:
    """Deliver one partition's outbox to one sink. Clock, sleep and randomness are injected."""

    config: Config
    target: SinkTarget
    store: Any
    sink: Sink | None = None
    partition: int = 0
    clock: Callable[[], float] = time.time
    sleep: Callable[[float], None] = time.sleep
    rand: Callable[[], float] = random.random
    stop: threading.Event = field(default_factory=threading.Event)
    counters: dict[str, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.keys = k = sink_keys(self.config, self.target.name, self.partition)
        if self.store.cluster:  # its MULTI/EXECs join the outbox's XACK with these
            check_one_slot(f"sink {self.target.name} of partition {self.partition}",
                           [k.outbox, k.delivered, k.inflight, k.dead, k.fold, k.message_ids],
                           f"the sink's own keys carry the partition's hash tag (e.g. {k.delivered}): "
                           "name live.names.outbox with the tag {p#} too, e.g. alerter:{p#}:outbox")
        self.redis = _Keys(self.store, self.keys)
        self.sink = self.sink or build_sink(self.target, self.store)
        self.bucket = TokenBucket(self.target.messages_per_minute)
        self.opts = options_of(self.config, self.target)
        self.joined: OrderedDict[str, dict[str, bytes]] = OrderedDict()
        self.roots: OrderedDict[str, str] = OrderedDict()  # incident -> root of its last update (routes spills)
        self.spills: OrderedDict[str, dict[str, bytes]] = OrderedDict()  # hour -> outbox key -> JSON
        self.look_ahead: tuple[str, dict[str, bytes], list[tuple[bytes, bytes]]] | None = None  # see _ahead
        self.store.ensure_group(self.keys.outbox, self.keys.group)

    def count(self, what: str, n: int = 1) -> None:
        self.counters[what] = self.counters.get(what, 0) + n

    # -- reading --------------------------------------------------------------------------
    def run(self, drained: bool = False, block_ms: int = 1000) -> dict[str, int]:
        """Own pending entries first (a restart), then new ones, until stopped (or drained)."""
        start, backlog = "0", True
        while not self.stop.is_set():
            got = self.store.read_group(self.keys.outbox, self.keys.group, "deliver", start,
                                        self.config.sinks.read_count, None if drained or backlog else block_ms)
            for eid, fields in got:
                self.handle(eid, fields)
            self.flush_fold()
            if backlog:  # go on through this consumer's pending list, then to new entries
                start, backlog = (got[-1][0].decode(), True) if got else (">", False)
            elif drained and not got:
                break
        return self.counters

    def handle(self, eid: bytes, fields: dict[bytes, bytes]) -> None:
        """One outbox entry to its outcome; always ends in exactly one XACK."""
        kind = fields.get(b"type", b"").decode()
        hour = fields.get(b"hour", b"").decode()
        if kind == "alert":
            self._remember(hour, fields)
            if self.target.entries == "all":
                self.deliver(eid, self._alert_message(fields))
            else:
                self._ack(eid, "joined")
            return
        if kind == "spill":
            self._spill(eid, hour, fields)
            return
        if kind in FIGURE_TYPES:  # per-hour figures for the digest, never a message
            self._ack(eid, "figures")
            return
        if kind != "incident":
            self._ack(eid, "ignored")
            return
        update = _update_from(fields[b"incident"])
        self.roots[update.incident] = update.root
        while len(self.roots) > ROOTS_KEPT:
            self.roots.popitem(last=False)
        route = pick_route(self.target.routes, update.root)
        held = self._held_back(route, update.total_excess, update.state == "closed")
        if held:
            self._stat(held)
            self._ack(eid, held)
            return
        alerts, spills = self._joined_for(update.hour, eid, update.members)
        r = render_update(update, alerts, spills, self.opts)
        msg = Outgoing(fields[b"key"].decode(), "incident", hour, r.title, r.text, r.thread, r.revision, r.state,
                       update.root, update.to_dict(), route.url_env if route else None)
        self.deliver(eid, self._in_place(msg))

    def _in_place(self, msg: Outgoing) -> Outgoing:
        """An update of a thread whose first message id is kept goes out as an edit/reply of it."""
        if self.target.updates is None or msg.revision <= 1 or not msg.thread:
            return msg
        known = self.redis.message_id(msg.thread)
        return replace(msg, edit_of=known) if known else msg

    # -- spill-over warnings ----------------------------------------------------------------
    def _spill(self, eid: bytes, hour: str, fields: dict[bytes, bytes]) -> None:
        """Join a spill-over warning to its incident's update of the same hour, if there is one.

        The service writes an hour's entries in one MULTI/EXEC (alerts, spills, incident
        updates), so the update, when there is one, is already in the stream after this
        entry. Without one, the hour's warnings of that incident go out as one short
        follow-up (key ``spill|incident|hour``: its other spill entries find it delivered).
        """
        spill = _spill_from(fields[b"spill"])
        self.spills.setdefault(hour, {})[fields[b"key"].decode()] = fields[b"spill"]
        while len(self.spills) > self.config.sinks.join_hours:
            self.spills.popitem(last=False)
        updated, later = self._ahead(eid, hour)
        if spill.incident in updated and id_key(updated[spill.incident]) > id_key(eid):
            self._ack(eid, "joined")
            return
        same = [_spill_from(v) for v in self.spills[hour].values()]
        same += [_spill_from(v) for i, v in later if id_key(i) > id_key(eid)]
        mine = sorted({(w.node, w.hour): w for w in same if w.incident == spill.incident}.values(),
                      key=lambda w: (w.node, w.hour))
        route = self._spill_route(eid, hour, fields[b"key"].decode(), spill, mine)
        if route is None:
            return
        title, text = render_spill_note(spill.incident, hour, mine, self.opts)
        msg = Outgoing(f"spill|{spill.incident}|{hour}", "spill", hour, title, text, spill.incident, 0, "spill",
                       spill.via, {"incident": spill.incident, "spills": [w.to_dict() for w in mine]},
                       route.url_env)
        self.deliver(eid, msg)

    def _spill_route(self, eid: bytes, hour: str, key: str, spill: SpillWarning, mine: list[SpillWarning]
                     ) -> SinkRoute | None:
        """The route of a spill-over note, or None when routing holds it back (then acknowledged).

        Routed like the incident: by its root when an update of it was seen, else by the member
        it spills from; severity from the visits over capacity (the unit of an update's excess).
        A held note is counted once: the incident's earlier entries of the hour were held already.
        """
        route = pick_route(self.target.routes, self.roots.get(spill.incident, spill.via))
        held = self._held_back(route, sum(w.forecast - w.capacity for w in mine))
        if not held:
            return route
        if not any(_spill_from(v).incident == spill.incident for k, v in self.spills[hour].items() if k != key):
            self._stat(held)
        self._ack(eid, held)
        return None

    def _ahead(self, eid: bytes, hour: str) -> tuple[dict[str, bytes], list[tuple[bytes, bytes]]]:
        """The rest of the hour after ``eid``, read once per hour (not once per spill entry):
        incident id -> entry id of its last update there, and the (entry id, JSON) of the spills."""
        if self.look_ahead is None or self.look_ahead[0] != hour:
            updated: dict[str, bytes] = {}
            spills: list[tuple[bytes, bytes]] = []
            for next_id, f in self._rest_of_hour(eid, hour):
                if f.get(b"type") == b"incident":
                    updated[_update_from(f[b"incident"]).incident] = next_id
                elif f.get(b"type") == b"spill":
                    spills.append((next_id, f[b"spill"]))
            self.look_ahead = (hour, updated, spills)
        return self.look_ahead[1], self.look_ahead[2]

    def _rest_of_hour(self, eid: bytes, hour: str) -> list[tuple[bytes, dict[bytes, bytes]]]:
        """The outbox entries after ``eid`` that belong to the same hour (read ahead)."""
        out: list[tuple[bytes, dict[bytes, bytes]]] = []
        after: bytes = eid
        while True:
            got = self.store.entries_after(self.keys.outbox, after, self.config.sinks.read_count)
            for next_id, fields in got:
                if fields.get(b"hour", b"").decode() != hour:
                    return out
                out.append((next_id, fields))
                after = next_id
            if len(got) < self.config.sinks.read_count:
                return out

    def _held_back(self, route: SinkRoute | None, excess: float, closing: bool = False) -> str | None:
        """Why routing holds a message of this excess back (None = send it); a closing
        message passes the minimum severity (its incident's first message did)."""
        if route is None:
            return "no_route"
        sev = self.config.sinks.severity
        rank = SEVERITY_RANK[severity_of(excess, sev.medium_excess, sev.high_excess)]
        if not closing and rank < SEVERITY_RANK[route.min_severity]:
            return "below_severity"
        if route.quiet is not None:
            local = datetime.fromtimestamp(self.clock(), ZoneInfo(self.config.clock.timezone))
            if in_quiet_hours(local, route.quiet.start, route.quiet.end) and \
                    rank < SEVERITY_RANK[route.quiet.min_severity]:
                return "quiet_hours"
        return None

    # -- the join -------------------------------------------------------------------------
    def _remember(self, hour: str, fields: dict[bytes, bytes]) -> None:
        bucket = self.joined.setdefault(hour, {})
        bucket[fields.get(b"node", b"").decode()] = fields[b"alert"]
        while len(self.joined) > self.config.sinks.join_hours:
            self.joined.popitem(last=False)

    def _joined_for(self, hour: str, eid: bytes, members: tuple[str, ...]
                    ) -> tuple[list[Alert], list[SpillWarning]]:
        """The members' alerts and the spill-over warnings of the same hour (from memory or the outbox)."""
        if hour not in self.joined:
            self._backfill(hour, eid)
        bucket = self.joined.get(hour, {})
        spills = [_spill_from(v) for v in self.spills.get(hour, {}).values()]
        return [alert_from_json(bucket[m]) for m in members if m in bucket], spills

    def _backfill(self, hour: str, before: bytes) -> None:
        """After a restart: read the hour's alerts and spills back from the outbox, newest first."""
        end, n = before, self.config.sinks.read_count
        self.joined.setdefault(hour, {})
        while True:
            got = self.store.entries_before(self.keys.outbox, end, n)
            for _eid, fields in got:
                if fields.get(b"hour", b"").decode() != hour:
                    return
                if fields.get(b"type") == b"alert":
                    self.joined[hour].setdefault(fields[b"node"].decode(), fields[b"alert"])
                elif fields.get(b"type") == b"spill":
                    self.spills.setdefault(hour, {}).setdefault(fields[b"key"].decode(), fields[b"spill"])
            if len(got) < n:
                return
            end = got[-1][0]

    def _alert_message(self, fields: dict[bytes, bytes]) -> Outgoing:
        from .messages import render_alert

        alert = alert_from_json(fields[b"alert"])
        title, text = render_alert(alert, self.opts)
        return Outgoing(fields[b"key"].decode(), "alert", alert.hour, title, text, alert.node, 0, alert.kind,
                        alert.node, alert.to_dict())

    # -- delivering -----------------------------------------------------------------------
    def deliver(self, eid: bytes | None, msg: Outgoing, extra: Callable[[Any], None] | None = None) -> str:
        """Deliver one message at most once; returns the outcome (also counted)."""
        done, flying = self.redis.state(msg.key)
        if done:
            return self._finish(eid, "already_delivered", extra)
        if flying and self.target.uncertain == "dead_letter":
            self._dead(eid, msg, "uncertain: a send was in flight when the delivery loop stopped; not resent "
                       "so the endpoint never gets it twice (set uncertain: resend if it honours Idempotency-Key)",
                       "uncertain")
            return "uncertain"
        if eid is not None and not self.bucket.take(self.clock()):
            fold_entry(self, eid, msg)  # over the rate limit (folding.py)
            return "folded"
        return self._send(eid, msg, extra)

    def _send(self, eid: bytes | None, msg: Outgoing, extra: Callable[[Any], None] | None) -> str:
        retry = self.config.sinks.retry
        assert self.sink is not None
        for attempt in range(1, retry.max_attempts + 1):
            self.store.hash_set(self.keys.inflight, msg.key, str(self.clock()))
            try:
                sent = self.sink.send(msg)
            except SinkError as exc:
                retryable = isinstance(exc, SinkSendError) and exc.retryable
                if not retryable or attempt == retry.max_attempts:
                    self._dead(eid, msg, f"{exc} (attempt {attempt} of {retry.max_attempts})")
                    return "dead"
                wait = retry_wait(backoff_seconds(attempt, retry.initial_seconds, retry.max_seconds, retry.jitter,
                                                  self.rand()), getattr(exc, "retry_after", None))
                log.warning("sink retry sink=%s key=%s attempt=%d wait_s=%.2f reason=%s", self.target.name,
                            msg.key, attempt, wait, exc)
                self.count("retries")
                self.sleep(wait)
                continue
            log.info("sink delivered sink=%s key=%s status=%s edit_of=%s", self.target.name, msg.key, sent.status,
                     msg.edit_of or "-")
            return self._finish(eid, "summary" if msg.entry_type == "fold" else "delivered",
                                self._keep_message_id(msg, sent, extra), msg.key)
        return "dead"  # pragma: no cover - the loop always returns

    def _keep_message_id(self, msg: Outgoing, sent: Sent, extra: Callable[[Any], None] | None
                         ) -> Callable[[Any], None] | None:
        """With ``updates`` set: the first post's message id joins the delivered-set transaction,
        so it survives a restart (a crash before it loses only the edit: later updates follow up);
        the closing message drops it again, so the hash holds open incidents only."""
        if self.target.updates is None or msg.entry_type != "incident":
            return extra
        keep = sent.message_id if not msg.edit_of and msg.state != "closed" else None
        if keep is None and msg.state != "closed":
            return extra

        def build(pipe: Any) -> None:
            if keep is not None:
                pipe.hsetnx(self.keys.message_ids, msg.thread, keep)
            else:
                pipe.hdel(self.keys.message_ids, msg.thread)
            if extra is not None:
                extra(pipe)
        return build

    def _finish(self, eid: bytes | None, outcome: str, extra: Callable[[Any], None] | None,
                delivered: str | None = None) -> str:
        """Delivered-set, in-flight cleared and XACK in one MULTI/EXEC."""
        k, now = self.keys, self.clock()
        keep = now - self.config.sinks.delivered_retention_hours * 3600.0

        def build(pipe: Any) -> None:
            if delivered is not None:
                pipe.zadd(k.delivered, {delivered: now})
                pipe.hdel(k.inflight, delivered)
                pipe.zremrangebyscore(k.delivered, "-inf", keep)
            if extra is not None:
                extra(pipe)
            if eid is not None:
                pipe.xack(k.outbox, k.group, eid)
        self.redis.txn("MULTI delivered+XACK", build)
        self.count(outcome)
        return outcome

    def _dead(self, eid: bytes | None, msg: Outgoing, reason: str, outcome: str = "dead") -> None:
        k = self.keys
        entry = {"sink": self.target.name, "key": msg.key, "type": msg.entry_type, "hour": msg.hour,
                 "error": reason, "entry_id": eid.decode() if eid else "-"}

        def build(pipe: Any) -> None:
            pipe.xadd(k.dead, entry)
            pipe.hdel(k.inflight, msg.key)
            if eid is not None:
                pipe.xack(k.outbox, k.group, eid)
        self.redis.txn("MULTI sink dead letter", build)
        log.warning("sink dead-letter sink=%s key=%s reason=%s", self.target.name, msg.key, reason)
        self.count(outcome)

    def _ack(self, eid: bytes, outcome: str) -> None:
        self.store.ack(self.keys.outbox, self.keys.group, [eid])
        self.count(outcome)

    def _stat(self, why: str) -> None:
        key = self.keys.stats.replace("@", stats_bucket(datetime.fromtimestamp(self.clock(), UTC)))
        self.redis.txn("HINCRBY stats", lambda p: (p.hincrby(key, why, 1), p.expire(key, 3 * 86400)))

    # -- folding over the rate limit ------------------------------------------------------
    def flush_fold(self) -> str | None:
        """Send the held-back summary when the rate limit has a token for it."""
        return flush_fold(self)
