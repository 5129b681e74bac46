"""Checkpoints: the service's whole state as one blob, written atomically with its hour.

A checkpoint holds the pickled engine, the open hour buckets (counts read but not yet
stepped, and queued edge events), the counters, the id of the last entry whose effect it
holds, and a commit number (``epoch``). It lives in a Redis key (``live.names.checkpoint``)
and is replaced by SET inside the same MULTI/EXEC as the hour's outbox entries, so the
alerts of an hour exist exactly when the state that produced them does.

The blob starts with one text line, ``alerter-checkpoint/1 epoch=N applied=ID``, so a
retry after a lost EXEC reply can tell from a short GETRANGE whether the commit landed.
Pickle is only read back from the configured Redis server; treat that server as trusted.
"""

from __future__ import annotations

import pickle
from dataclasses import dataclass, field

from .buckets import HourBuckets
from .engine import Engine
from .errors import CheckpointError

__all__ = ["ServiceState", "dump", "load", "peek", "MAGIC"]

MAGIC = b"alerter-checkpoint/1"


@dataclass
class ServiceState:
    """Everything a restarted worker needs to continue as if it had never stopped."""

    engine: Engine
    buckets: HourBuckets = field(default_factory=HourBuckets)
    applied_id: bytes | None = None
    epoch: int = 0
    counters: dict[str, int] = field(default_factory=dict)

    def count(self, name: str, n: int = 1) -> None:
        self.counters[name] = self.counters.get(name, 0) + n


def dump(state: ServiceState) -> bytes:
    """The checkpoint blob: header line, then the pickle."""
    applied = (state.applied_id or b"-").decode()
    head = MAGIC + f" epoch={state.epoch} applied={applied}\n".encode()
    return head + pickle.dumps(state, protocol=pickle.HIGHEST_PROTOCOL)


def peek(head: bytes) -> tuple[int, bytes | None]:
    """(epoch, applied id) from the first bytes of a blob.

    >>> peek(b"alerter-checkpoint/1 epoch=7 applied=1700000000000-0\\n...")
    (7, b'1700000000000-0')
    """
    line = head.split(b"\n", 1)[0]
    parts = line.split(b" ")
    if len(parts) != 3 or parts[0] != MAGIC:
        raise CheckpointError(f"checkpoint header {line[:60]!r} is not {MAGIC.decode()}; "
                              "delete the key to start afresh, or run the version that wrote it")
    epoch = int(parts[1].removeprefix(b"epoch="))
    applied = parts[2].removeprefix(b"applied=")
    return epoch, None if applied == b"-" else applied


def load(blob: bytes) -> ServiceState:
    """The state back from a blob; CheckpointError if it is not one of ours."""
    peek(blob[:256])
    try:
        state = pickle.loads(blob.split(b"\n", 1)[1])
    except (pickle.UnpicklingError, EOFError, AttributeError, ImportError, IndexError) as exc:
        raise CheckpointError(f"checkpoint cannot be read back ({exc}); delete the key to start afresh") from exc
    if not isinstance(state, ServiceState):
        raise CheckpointError(f"checkpoint holds a {type(state).__name__}, not a ServiceState")
    return state
