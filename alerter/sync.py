"""The per-hour exchange of a partitioned run through Redis (the adapter around exchange.py).

One :class:`HourExchange` per worker and partition. ``step`` closes one hour exactly as the
one-worker engine would: publish this partition's phase-1 rows, wait for the others', fill
the ghosts, step the engine with the conservation-cap totals exchanged mid-step (phase 2),
then publish phase 3; the leader (partition 0) waits for every partition's phase 3 and
groups all alerts into incidents and spill-over warnings, the others leave that to it.

Keys: ``live.names.barrier`` with ``@`` the hour and ``%`` the phase, one hash per hour and
phase, one field per partition (HSET: idempotent when a restarted worker re-closes the
hour), refreshed to ``live.barrier_ttl_seconds`` at every write. A wait gives up after
``live.barrier_timeout_seconds`` with :class:`ExchangeTimeoutError` naming the missing
partitions; the hour is then not committed, and a restarted worker closes it again.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Sequence
from datetime import datetime

import numpy as np

from .config import Config
from .engine import Engine, StepResult
from .errors import StoreError
from .exchange import AFTER, OWN, TOTALS, After, PartitionView, merge_alerts, spill_warnings
from .store import Store
from .timeaxis import HOUR, format_hour, hour_index

__all__ = ["HourExchange", "ExchangeTimeoutError", "ExchangeAbandoned"]

log = logging.getLogger(__name__)


class ExchangeTimeoutError(StoreError):
    """Other partitions did not publish their part of an hour's exchange in time."""


class ExchangeAbandoned(Exception):
    """The service was asked to stop while waiting at an exchange (the hour stays uncommitted)."""


Retry = Callable[[str, Callable[[], object]], object]


class HourExchange:
    """Close hours of one partition in step with the other partitions (see the module doc)."""

    def __init__(self, config: Config, store: Store, partition: int, retry: Retry,
                 stopping: Callable[[], bool], sleep: Callable[[float], None] = time.sleep) -> None:
        self.config, self.live, self.store = config, config.live, store
        self.partition, self.partitions = partition, config.live.partitions
        self.view = PartitionView(partition, self.partitions)
        self.leader = partition == 0
        self.retry, self.stopping, self.sleep = retry, stopping, sleep
        self.spills = config.flows.enabled and bool(config.incidents.capacity)
        self.waited_ms = 0.0

    def key(self, hour: datetime, phase: str) -> str:
        return self.live.names.barrier.replace("@", hour.strftime("%Y%m%d%H")).replace("%", phase)

    # -- the hour ----------------------------------------------------------------------
    def step(self, engine: Engine, hour: datetime, x: np.ndarray) -> StepResult:
        """``engine.step_array`` of one hour in a partitioned run (``x``: dense counts of the
        nodes known here; the ghosts' counts come from their owners)."""
        self.waited_ms = 0.0
        self.view.refresh(engine.nodes, self.config.incidents.capacity)
        own = engine.own_expected(hour)
        self._put(hour, OWN, self.view.own_table(x, own, engine.prev_excess))
        tables = self._gather(hour, OWN, self._others())
        grown = self.view.adopt_ids(engine.nodes, tables)
        if grown:
            engine.ensure_nodes()
            x = np.concatenate([x, np.full(grown, np.nan)])
            self.view.refresh(engine.nodes, self.config.incidents.capacity)
        foreign, prev = self.view.foreign(engine.nodes, x, tables)
        engine.adopt_excess(foreign.mask, prev)
        learner = engine.joint.learner
        learner.source_totals = self._totals_hook(engine, hour)
        try:
            result = engine.step_array(hour, x, foreign=foreign, track=False)
        finally:
            learner.source_totals = None  # never pickled; set again for every hour
        mine = self.view.after(engine, result, self.spills)
        self._put(hour, AFTER, mine.pack())
        if self.leader:
            self._track(engine, result, mine)
        return result

    def _totals_hook(self, engine: Engine, hour: datetime) -> Callable[[np.ndarray], np.ndarray]:
        def hook(totals: np.ndarray) -> np.ndarray:
            self._put(hour, TOTALS, self.view.totals_table(totals))
            tables = self._gather(hour, TOTALS, self._others())
            return self.view.global_totals(engine.nodes, totals, tables)
        return hook

    def _track(self, engine: Engine, result: StepResult, mine: After) -> None:
        """The leader: every partition's alerts and active pairs into incidents, plus spills.

        ``engine.incidents.step`` (what ``Engine.track`` calls) rather than ``Engine.track``:
        the latter's own spill check walks this worker's graph only and would meet incident
        members it has never seen; the merged check below sees every partition's candidates.
        """
        hour = result.hour
        tables = self._gather(hour, AFTER, self._others())
        afters = [mine if p == self.partition else After.unpack(tables[p]) for p in range(self.partitions)]
        alerts = merge_alerts(afters)
        active = {pair for a in afters for pair in a.active}
        result.incidents = engine.incidents.step(hour_index(hour), format_hour(hour), alerts, active)
        if self.spills and engine.incidents.open:
            candidates = [c for a in afters for c in a.candidates]
            result.spills = spill_warnings(format_hour(hour + HOUR), engine.incidents.open.values(), candidates)

    # -- Redis -------------------------------------------------------------------------
    def _others(self) -> list[int]:
        return [p for p in range(self.partitions) if p != self.partition]

    def _put(self, hour: datetime, phase: str, blob: bytes) -> None:
        key, ttl = self.key(hour, phase), self.live.barrier_ttl_seconds
        self.retry(f"HSET {key}", lambda: self.store.exchange_put(key, self.partition, blob, ttl))

    def _gather(self, hour: datetime, phase: str, partitions: Sequence[int]) -> dict[int, bytes]:
        """Wait until every one of ``partitions`` has published ``phase`` of ``hour``."""
        key, t0 = self.key(hour, phase), time.monotonic()
        timeout, wait, told = self.live.barrier_timeout_seconds, 0.0005, False
        while True:
            got = self.retry(f"HMGET {key}", lambda: self.store.exchange_get(key, partitions))
            parts = list(got) if isinstance(got, list) else [None] * len(partitions)
            missing = [p for p, blob in zip(partitions, parts, strict=True) if blob is None]
            if not missing:
                self.waited_ms += (time.monotonic() - t0) * 1000
                return {p: blob for p, blob in zip(partitions, parts, strict=True) if blob is not None}
            waited = time.monotonic() - t0
            if self.stopping():
                raise ExchangeAbandoned(f"stopped waiting at {key} for partitions {missing}")
            if waited > timeout:
                log.error("exchange timeout hour=%s phase=%s partition=%d missing=%s waited_s=%.0f",
                          format_hour(hour), phase, self.partition, missing, waited)
                listed = ",".join(map(str, missing))
                raise ExchangeTimeoutError(
                    f"partition {self.partition} waited {waited:.0f} s at {key} (hour {format_hour(hour)}, phase "
                    f"{phase}) for partitions {missing} of {self.partitions}: start their workers (alerter run "
                    f"--partitions {listed}) or raise live.barrier_timeout_seconds; this hour is not committed "
                    "and is closed again when this worker restarts")
            if waited > 10 and not told:
                log.info("exchange waiting hour=%s phase=%s partition=%d missing=%s", format_hour(hour), phase,
                         self.partition, missing)
                told = True
            self.sleep(wait)
            wait = min(wait * 2, 0.05)
