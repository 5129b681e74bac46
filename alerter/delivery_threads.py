"""Running the sink workers: one thread per (enabled sink, partition), riding out Redis outages.

A delivery process lives for weeks; the Redis server under it restarts, or a cluster
master fails over, now and then. A worker that meets an unreachable Redis (a
:class:`~alerter.errors.StoreUnavailableError`) waits with the backoff in ``live.retry``
and starts again as a new worker: it re-reads its own pending entries, exactly as after a
restart of the process, so the delivered set, the in-flight marks and the idempotency keys
decide what is sent, not memory that may be half-updated. Any other error stops every
worker and is raised in the caller, so the process exits instead of running on with one
sink silently dead.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass
from typing import Any

from .config import Config, SinkTarget
from .delivery import SinkWorker
from .errors import StoreUnavailableError

__all__ = ["run_delivery"]

log = logging.getLogger(__name__)


@dataclass
class _Runner:
    """One sink and partition: its current worker, restarted after each Redis outage."""

    worker: SinkWorker
    stop: threading.Event
    drained: bool
    error: BaseException | None = None
    outages: int = 0

    def run(self) -> None:
        retry = self.worker.config.live.retry
        wait, fresh = retry.initial_seconds, False
        while not self.stop.is_set():
            try:
                if fresh:
                    self.worker = self._again()
                    wait = retry.initial_seconds  # Redis answered again
                self.worker.run(drained=self.drained)
                return
            except StoreUnavailableError as exc:
                if self.stop.is_set():
                    return
                self.outages += 1
                w = self.worker
                log.warning("redis unavailable op=deliver sink=%s partition=%d attempt=%d retry_in_s=%.1f "
                            "reason=%s", w.target.name, w.partition, self.outages, wait, str(exc).split(";")[0])
                self.stop.wait(wait)
                wait = min(wait * 2, retry.max_seconds)
                fresh = True
            except BaseException as exc:  # noqa: BLE001 - raised again by run_delivery
                self.error = exc
                self.stop.set()
                return

    def _again(self) -> SinkWorker:
        """A new worker for the same sink and partition (its counters go on adding up)."""
        w = self.worker
        return SinkWorker(w.config, w.target, w.store, sink=w.sink, partition=w.partition, clock=w.clock,
                          sleep=w.sleep, rand=w.rand, stop=self.stop, counters=w.counters)


def run_delivery(config: Config, store: Any, *, drained: bool = False, partitions: list[int] | None = None,
                 stop: threading.Event | None = None) -> list[SinkWorker]:
    """One thread per (enabled sink, partition): a slow sink never holds up another.

    The workers are built here first, so a config the cluster refuses stops the run before
    anything is sent; returns the workers as they ended (their counters cover every restart).
    """
    stop = stop or threading.Event()
    parts = partitions if partitions is not None else list(range(config.live.partitions))
    targets: list[SinkTarget] = [t for t in config.sinks.targets if t.enabled]
    runners = [_Runner(SinkWorker(config, t, store, partition=p, stop=stop), stop, drained)
               for t in targets for p in parts]
    threads = [threading.Thread(target=r.run, name=f"sink-{r.worker.target.name}-p{r.worker.partition}")
               for r in runners]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for r in runners:
        if r.error is not None:
            raise r.error
    return [r.worker for r in runners]
