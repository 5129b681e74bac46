"""The service loop: consumer group in, hour buckets, Engine.step, outbox, checkpoint, XACK.

One Service owns one partition (one input stream). Per closed hour it applies the queued
edge events, steps the engine, and commits the hour's alerts, dead letters and late
counts together with the checkpoint in one MULTI/EXEC; only then are the entries
acknowledged. On start it restores the checkpoint, re-reads its own pending entries,
claims those a dead consumer left idle, and skips every entry at or below the
checkpoint's applied id. The engine stays pure; time comes from an injected clock and
the hourly wake-up from an APScheduler job that only calls ``next_close``.

Entries are applied strictly in stream order, because an edge event takes effect for the
counts that follow it and the skip rule above rests on a rising applied id. So when
another consumer of the group holds entries newer than the applied id (it read them and
died, or is a worker restarted under another name), the service holds back what it reads
after them, stops closing hours by the clock, and claims them with XAUTOCLAIM as soon as
they have been idle ``live.claim_idle_seconds``; then it goes on in order. Besides, every
``live.claim_idle_seconds`` while running it claims whatever another consumer left idle,
so entries a consumer read last before dying are not stranded either.
"""

from __future__ import annotations

import logging
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from types import FrameType
from typing import Any

from . import heap
from .buckets import ClosedHour, close_due, dense_counts, next_close, watermark_due
from .checkpoint import ServiceState, dump, load, peek
from .config import Config, LiveNames
from .constants import ServiceState as Phase
from .constants import partition_name
from .engine import Engine
from .errors import BadEntryError
from .incidents import IncidentUpdate
from .records import Alert, dumps
from .store import Entry, FieldsIn, Pending, Store, check_one_slot, id_key, with_retry
from .sync import ExchangeAbandoned, HourExchange
from .timeaxis import format_hour
from .wire import CountBatch, EdgeChange, decode_entry, fields_text

__all__ = ["Service", "Summary", "Names", "idempotency_key"]

log = logging.getLogger(__name__)


def idempotency_key(alert: Alert) -> str:
    """The outbox key of an alert: node, hour and kind (a sink delivers each key once)."""
    return f"{alert.node}|{alert.hour}|{alert.kind}"


def incident_key(update: IncidentUpdate) -> str:
    """The outbox key of an incident update: incident id and revision (one message each)."""
    return f"incident|{update.incident}|{update.revision}"


@dataclass(frozen=True)
class Names:
    """The concrete Redis names of one partition."""

    input: str
    outbox: str
    dead: str
    late: str
    checkpoint: str
    group: str

    @classmethod
    def of(cls, names: LiveNames, partition: int) -> Names:
        p = partition
        return cls(partition_name(names.input, p), partition_name(names.outbox, p),
                   partition_name(names.dead_letter, p), partition_name(names.late, p),
                   partition_name(names.checkpoint, p), names.group)


@dataclass
class Summary:
    """What one run did (for the CLI and tests)."""

    hours: list[datetime] = field(default_factory=list)
    alerts: list[Alert] = field(default_factory=list)
    incidents: list[IncidentUpdate] = field(default_factory=list)
    counters: dict[str, int] = field(default_factory=dict)


class Service:
    """Drive the engine from one partition's stream; ``drained=True`` exits once it is empty."""

    def __init__(self, config: Config, store: Store, *, partition: int = 0, drained: bool = False,
                 consumer: str | None = None, on_alert: Callable[[Alert], None] | None = None,
                 clock: Callable[[], datetime] = lambda: datetime.now(UTC), settle_heap: bool = False) -> None:
        self.config, self.live, self.store = config, config.live, store
        self.partition, self.drained, self.clock = partition, drained, clock
        self.consumer = consumer or config.live.consumer
        self.names = Names.of(config.live.names, partition)
        if store.cluster:  # the hour's commit is one MULTI/EXEC over these: one hash slot
            n = self.names
            check_one_slot(f"partition {partition}", [n.input, n.outbox, n.dead, n.late, n.checkpoint])
        self.on_alert = on_alert
        self.settle_heap = settle_heap  # freeze the settled heap after the first closed hour (see heap)
        self.state = ServiceState(Engine(config))
        self.summary = Summary()
        self.phase = Phase.STARTING
        self._stop = threading.Event()
        self._tick = threading.Event()
        self._to_ack: list[bytes] = []
        self._appends: list[tuple[str, FieldsIn]] = []
        self._dirty = False
        self._held: dict[bytes, dict[bytes, bytes]] = {}  # read, waiting behind another consumer's entries
        self._gap: list[Pending] = []  # another consumer's pending entries above the applied id
        self._claim_at = time.monotonic() + config.live.claim_idle_seconds
        self.exchange = None if config.live.partitions == 1 else HourExchange(
            config, store, partition, self._retry, self._stop.is_set)

    # -- lifecycle -------------------------------------------------------------------------
    def stop(self, *_: object) -> None:
        """Ask the loop to finish the current hour, checkpoint and return."""
        self._stop.set()

    def _set_phase(self, phase: Phase) -> None:
        self.phase = phase
        log.info("service state=%s partition=%d consumer=%s", phase.value, self.partition, self.consumer)

    def _retry(self, what: str, fn: Callable[[], object]) -> object:
        r = self.live.retry
        return with_retry(fn, r.initial_seconds, r.max_seconds, what, stop=self._stop.is_set)

    def run(self, install_signals: bool = True) -> Summary:
        """Recover, then read and close hours until stopped (or drained); returns a summary."""
        if install_signals and threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self._on_signal)
            signal.signal(signal.SIGINT, self._on_signal)
        scheduler = None if self.drained else self._start_scheduler()
        try:
            self._recover()
            self._set_phase(Phase.RUNNING)
            while not self._stop.is_set():
                if not self._step_loop():
                    break
            self._set_phase(Phase.STOPPING)
            self._commit("shutdown")
        except ExchangeAbandoned as exc:  # the hour in hand stays uncommitted: re-closed at restart
            log.info("service stopped mid-hour partition=%d reason=%s", self.partition, exc)
        finally:
            if scheduler is not None:
                scheduler.shutdown(wait=False)
        self._set_phase(Phase.STOPPED)
        self.summary.counters = dict(self.state.counters)
        return self.summary

    def _on_signal(self, signum: int, frame: FrameType | None) -> None:
        log.info("service signal=%s action=finish-hour-checkpoint-exit", signal.Signals(signum).name)
        self.stop()

    def _start_scheduler(self) -> Any:
        from apscheduler.schedulers.background import BackgroundScheduler

        grace = timedelta(seconds=self.live.grace_seconds)
        scheduler = BackgroundScheduler(timezone=UTC)

        def wake() -> None:  # the job only wakes the loop; deciding what is due stays in the loop
            self._tick.set()
            scheduler.add_job(wake, "date", run_date=next_close(datetime.now(UTC), grace), misfire_grace_time=None)

        scheduler.add_job(wake, "date", run_date=next_close(datetime.now(UTC), grace), misfire_grace_time=None)
        scheduler.start()
        self._tick.set()  # hours already due at start close at once
        return scheduler

    # -- recovery ------------------------------------------------------------------------
    def _recover(self) -> None:
        self._set_phase(Phase.RECOVERING)
        t0 = time.perf_counter()
        n = self.names
        blob = self._retry("GET checkpoint", lambda: self.store.get(n.checkpoint))
        if isinstance(blob, bytes):
            self.state = load(blob)
        self._retry("XGROUP CREATE", lambda: self.store.ensure_group(n.input, n.group))
        own = self._own_pending()
        self._take(own)
        self._claim()
        applied = self.state.applied_id.decode() if self.state.applied_id else "-"
        log.info("service recovered partition=%d epoch=%d applied=%s pending=%d held=%d open_hours=%d "
                 "took_ms=%.0f", self.partition, self.state.epoch, applied, len(own), len(self._held),
                 len(self.state.buckets.open), (time.perf_counter() - t0) * 1000)
        self._close_due(backlog=True)

    def _own_pending(self) -> list[Entry]:
        out: list[Entry] = []
        start = "0"
        while True:
            got = self._read(start, block=None)
            if not got:
                return out
            out.extend(got)
            start = got[-1][0].decode()

    # -- other consumers' entries -------------------------------------------------------
    def _foreign(self) -> list[Pending]:
        n = self.names
        got = self._retry("XPENDING", lambda: self.store.foreign_pending(n.input, n.group, self.consumer))
        return got if isinstance(got, list) else []

    def _claim(self) -> None:
        """XAUTOCLAIM what other consumers left idle (only when they hold anything, so our
        own pending entries are not fetched again for nothing), then apply what is in order."""
        n, idle = self.names, int(self.live.claim_idle_seconds * 1000)
        claimed: list[Entry] = []
        if self._foreign():
            got = self._retry("XAUTOCLAIM", lambda: self.store.claim_idle(n.input, n.group, self.consumer, idle,
                                                                          self.live.read_count))
            mine = set(self._to_ack) | self._held.keys()  # our own idle entries come back too
            claimed = [(eid, f) for eid, f in (got if isinstance(got, list) else []) if eid not in mine]
        if claimed:
            self.state.count("claimed", len(claimed))
            log.info("service claimed partition=%d entries=%d idle_s=%g phase=%s", self.partition, len(claimed),
                     self.live.claim_idle_seconds, self.phase.value)
        self._claim_at = time.monotonic() + self.live.claim_idle_seconds
        self._take(claimed)

    def _take(self, entries: list[Entry]) -> None:
        """Apply entries in stream order up to the first one another consumer still holds;
        keep the rest back until that one is claimed."""
        self._held.update(entries)
        applied = self.state.applied_id
        waiting = bool(self._gap)
        self._gap = [p for p in self._foreign() if applied is None or id_key(p.id) > id_key(applied)]
        limit = id_key(self._gap[0].id) if self._gap else None
        ready = sorted((eid for eid in self._held if limit is None or id_key(eid) < limit), key=id_key)
        for eid in ready:  # close as soon as an hour is due: few open hours per checkpoint
            self._ingest([(eid, self._held.pop(eid))])
            self._close_due(backlog=True)
        if not self._gap:
            return
        oldest = max(p.idle_ms for p in self._gap) / 1000  # claim as soon as the oldest may be claimed
        self._claim_at = min(self._claim_at, time.monotonic() + max(0.0, self.live.claim_idle_seconds - oldest))
        if not waiting:
            first = self._gap[0]
            log.warning("service waiting partition=%d for entries held by consumer=%s first=%s count=%d held=%d; "
                        "claimed once idle %g s (live.claim_idle_seconds)", self.partition, first.consumer,
                        first.id.decode(), len(self._gap), len(self._held), self.live.claim_idle_seconds)

    def _read(self, start: str, block: int | None) -> list[Entry]:
        n = self.names
        got = self._retry("XREADGROUP", lambda: self.store.read_group(
            n.input, n.group, self.consumer, start, self.live.read_count, block))
        return got if isinstance(got, list) else []

    # -- the loop ------------------------------------------------------------------------
    def _step_loop(self) -> bool:
        """One read and what follows; False when the drained stream is finished."""
        if time.monotonic() >= self._claim_at:
            self._claim()
        if self._gap:  # another consumer holds older entries: read no further until they are claimed
            self._stop.wait(min(self.live.block_ms / 1000, max(0.0, self._claim_at - time.monotonic())))
            return True
        entries = self._read(">", block=None if self.drained else self.live.block_ms)
        if entries:
            self._take(entries)
            return True
        if self.drained:
            self._take([])  # the stream's last entries may be another consumer's: wait for them
            if self._gap:
                return True
            self._set_phase(Phase.DRAINING)
            for closed in self.state.buckets.close_all():
                self._close(closed)
            for edge in self.state.buckets.take_trailing_edges():
                self._apply_edge(edge)
            return False
        self._close_due()
        if self._dirty:
            self._commit("idle")
        return True

    def _ingest(self, entries: list[Entry]) -> None:
        applied = self.state.applied_id
        for eid, fields in entries:
            self._to_ack.append(eid)
            self._dirty = True
            if applied is not None and id_key(eid) <= id_key(applied):
                self.state.count("skipped")
                continue
            self._apply_entry(eid, fields)
            self.state.applied_id = applied = eid

    def _apply_entry(self, eid: bytes, fields: dict[bytes, bytes]) -> None:
        try:
            decoded = decode_entry(fields, self.live.max_entry_bytes)
        except BadEntryError as exc:
            self._dead_letter(eid, fields, exc.reason)
            return
        if isinstance(decoded, EdgeChange):
            self.state.buckets.add_edge(decoded)
        elif not self.state.buckets.add(decoded):
            self._late(eid, fields, decoded)
        else:
            self.state.count("entries")

    def _dead_letter(self, eid: bytes, fields: dict[bytes, bytes], reason: str) -> None:
        self.state.count("dead")
        out: dict[str, str | bytes] = {"reason": reason, "entry_id": eid.decode(), "stream": self.names.input}
        size = sum(len(k) + len(v) for k, v in fields.items())
        if size > self.live.max_entry_bytes:
            out.update({f"orig.{k}": v for k, v in fields_text(fields).items()})
        else:
            out.update({f"orig.{k.decode('utf-8', 'replace')}": v for k, v in fields.items()})
        self._appends.append((self.names.dead, out))
        log.warning("entry dead-letter id=%s reason=%s", eid.decode(), reason)

    def _late(self, eid: bytes, fields: dict[bytes, bytes], batch: CountBatch) -> None:
        self.state.count("late")
        self.state.count("late_counts", len(batch.nodes))
        closed = self.state.buckets.closed_through
        out: dict[str, str | bytes] = {"entry_id": eid.decode(), "hour": format_hour(batch.hour),
                                       "closed_through": format_hour(closed) if closed else "-",
                                       "counts": str(len(batch.nodes))}
        out.update({f"orig.{k.decode('utf-8', 'replace')}": v for k, v in fields.items()})
        self._appends.append((self.names.late, out))
        log.warning("entry late id=%s hour=%s counts=%d closed_through=%s", eid.decode(),
                    format_hour(batch.hour), len(batch.nodes), out["closed_through"])

    def _close_due(self, backlog: bool = False) -> None:
        """Close what is due: by watermark when draining, else on the scheduler's wake-up (or
        right after reading entries, so a backlog of hours already past closes at once). Not
        by the clock while another consumer holds older entries: their counts would be late."""
        buckets = self.state.buckets
        if self.drained:
            ready = buckets.close_ready(lambda h: watermark_due(h, buckets.watermark))
        elif self._gap:
            return
        elif self._tick.is_set() or backlog:
            self._tick.clear()
            now, grace = self.clock(), timedelta(seconds=self.live.grace_seconds)
            ready = buckets.close_ready(lambda h: close_due(h, now, grace))
        else:
            return
        for closed in ready:  # lazily: the next hour leaves its bucket only after this commit
            self._close(closed)
            if self._stop.is_set():
                return  # shutdown: the hour in hand is finished, the rest stay in the checkpoint

    def _apply_edge(self, edge: EdgeChange) -> None:
        engine = self.state.engine
        (engine.add_edge if edge.op == "add" else engine.remove_edge)(edge.src, edge.dst, edge.ts)

    def _close(self, closed: ClosedHour) -> None:
        """Step the engine over one closed hour, then commit and acknowledge."""
        t0 = time.perf_counter()
        engine = self.state.engine
        for edge in closed.edges:
            self._apply_edge(edge)
        x = dense_counts(engine.nodes, closed.chunks)
        engine.ensure_nodes()
        if self.exchange is None:
            result = engine.step_array(closed.hour, x)
        else:  # partitioned: ghosts from their owners, cap totals across, incidents at the leader
            result = self.exchange.step(engine, closed.hour, x)
        hour = format_hour(closed.hour)
        for alert in result.alerts:
            self._appends.append((self.names.outbox, {"type": "alert", "key": idempotency_key(alert),
                                                      "node": alert.node, "hour": hour, "kind": alert.kind,
                                                      "alert": dumps(alert)}))
        for spill in result.spills:
            self._appends.append((self.names.outbox, {"type": "spill",
                                                      "key": f"spill|{spill.incident}|{spill.node}|{spill.hour}",
                                                      "hour": hour, "spill": dumps(spill)}))
        for update in result.incidents:
            self._appends.append((self.names.outbox, {"type": "incident", "key": incident_key(update),
                                                      "hour": hour, "incident": dumps(update)}))
        if any(result.suppressed.values()):  # for the daily digest: what cooldown held back
            self._appends.append((self.names.outbox, {"type": "suppressed", "key": f"suppressed|{hour}",
                                                      "hour": hour, "reason": "cooldown",
                                                      **{k: str(v) for k, v in result.suppressed.items()}}))
        self.state.count("hours")
        self.state.count("alerts", len(result.alerts))
        self._dirty = True  # the engine moved on: this hour must be checkpointed
        self._commit("hour")
        self.summary.hours.append(closed.hour)
        self.summary.alerts.extend(result.alerts)
        self.summary.incidents.extend(result.incidents)
        log.info("hour closed hour=%s partition=%d entries=%d nodes=%d edges=%d alerts=%d waited_ms=%.1f "
                 "took_ms=%.1f", hour, self.partition, closed.entries, len(engine.nodes), len(closed.edges),
                 len(result.alerts), self.exchange.waited_ms if self.exchange else 0.0,
                 (time.perf_counter() - t0) * 1000)
        if self.on_alert is not None:
            for alert in result.alerts:
                self.on_alert(alert)
        if self.settle_heap:
            self.settle_heap = False
            frozen, ms = heap.settle()
            log.info("service heap settled partition=%d frozen_objects=%d took_ms=%.1f",
                     self.partition, frozen, ms)

    # -- commit ------------------------------------------------------------------------
    def _commit(self, why: str) -> None:
        """Outbox, dead letters, late counts and checkpoint in one MULTI/EXEC, then XACK."""
        if not self._dirty and not self._appends:
            return
        t0 = time.perf_counter()
        self.state.epoch += 1
        blob, appends, epoch, n = dump(self.state), list(self._appends), self.state.epoch, self.names
        tried = False

        def attempt() -> None:
            nonlocal tried
            if tried and peek(self.store.get_head(n.checkpoint))[0] == epoch:
                return  # the EXEC landed before the connection broke: do not write twice
            tried = True
            self.store.commit(n.checkpoint, blob, appends)

        self._retry("commit", attempt)
        ids = list(self._to_ack)
        self._retry("XACK", lambda: self.store.ack(n.input, n.group, ids))
        self._appends, self._to_ack, self._dirty = [], [], False
        log.debug("checkpoint why=%s epoch=%d bytes=%d appends=%d acked=%d took_ms=%.1f", why, epoch, len(blob),
                  len(appends), len(ids), (time.perf_counter() - t0) * 1000)
