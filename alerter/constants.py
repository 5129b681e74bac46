"""Every Redis stream, group and key name of the live path, and its lifecycle states.

Names are templates: ``#`` stands for the partition number. The part between braces is a
Redis Cluster hash tag (``{p3}``), so every key of one partition (its input stream, its
outbox, its dead letters, its checkpoint) hashes to the same slot and a MULTI/EXEC over
them is allowed on a cluster. All of them can be overridden in YAML (``live.names``).
"""

from __future__ import annotations

from enum import StrEnum

__all__ = [
    "PARTITION_MARK", "INPUT_STREAM", "OUTBOX_STREAM", "DEAD_LETTER_STREAM", "LATE_STREAM",
    "CHECKPOINT_KEY", "GROUP", "CONSUMER", "BARRIER_KEY", "PHASE_MARK", "WIRE_VERSION",
    "EntryType", "Encoding", "ServiceState", "partition_name",
]

# Placeholder in a name template replaced by the partition number (0 .. P-1).
PARTITION_MARK = "#"

# Counts and edge events of one partition arrive here; one stream per partition so that a
# worker owning a partition reads only its nodes, and stream order is the order the
# producer meant (edge events take effect for the counts that follow them).
INPUT_STREAM = "alerter:{p#}:in"

# One entry per alert, written in the same MULTI/EXEC as the checkpoint, so an alert is
# published exactly when the engine state that produced it is durable (the outbox pattern).
OUTBOX_STREAM = "alerter:{p#}:outbox"

# Entries that could not be parsed or validated, with the reason and the original fields;
# bad input must never stop the stream nor vanish silently.
DEAD_LETTER_STREAM = "alerter:{p#}:dead"

# Counts that arrived for an hour already closed: kept for the record, never re-applied
# (the engine cannot step an hour twice) and never silently dropped.
LATE_STREAM = "alerter:{p#}:late"

# Pickled engine state, open hour buckets and the last applied entry id, replaced
# atomically with SET inside the close transaction; a Redis key (not a file) so that it
# commits together with the outbox entries of the same hour.
CHECKPOINT_KEY = "alerter:{p#}:checkpoint"

# The consumer group of the service; one group so that W workers share the partitions and
# XAUTOCLAIM can hand a dead worker's pending entries to a live one.
GROUP = "alerter-service"

# Default consumer name inside the group; stable across restarts so a restarted worker
# finds its own pending entries again (XREADGROUP ... 0).
CONSUMER = "worker-1"

# Per-hour exchange of a partitioned run: one hash per hour and phase, field = partition
# number, value = what that partition publishes in the phase (see exchange.py): ``own``
# (counts, own expectations and persisted excess of its nodes, before stepping), ``totals``
# (per-source link-coefficient sums, for the conservation cap) and ``after`` (alerts,
# nodes beyond their band, spill candidates, for the leader's incidents). ``@`` stands for
# the hour (UTC, compact form) and ``%`` for the phase; the hash tag ``{h@}`` keeps one
# hour's keys on one cluster slot. A hash (not a list) so that a restarted worker that
# re-closes the hour overwrites its own field with the same bytes: publishing is
# idempotent, and the number of fields is the number of partitions done. The keys expire
# after ``live.barrier_ttl_seconds``, long after the slowest worker has passed the hour.
BARRIER_KEY = "alerter:{h@}:sync:%"

# Placeholder for the phase name in BARRIER_KEY.
PHASE_MARK = "%"

# Version tag written in every entry (field ``v``) so a reader can refuse what it does
# not understand instead of guessing.
WIRE_VERSION = "1"


class EntryType(StrEnum):
    """The ``type`` field of an input entry."""

    COUNT = "count"
    BATCH = "batch"
    EDGE_ADD = "edge_add"
    EDGE_REMOVE = "edge_remove"


class Encoding(StrEnum):
    """How a batch entry packs its counts (field ``enc``)."""

    JSON = "json"  # nodes: JSON array of ids; counts: JSON array of numbers or null
    F64 = "f64"  # nodes: ids joined by "\n" (UTF-8); counts: little-endian float64, NaN = missing


class ServiceState(StrEnum):
    """Lifecycle of the service loop, logged on every change."""

    STARTING = "starting"
    RECOVERING = "recovering"
    RUNNING = "running"
    DRAINING = "draining"
    STOPPING = "stopping"
    STOPPED = "stopped"


def partition_name(template: str, partition: int) -> str:
    """The concrete key of ``partition`` for a name template.

    >>> partition_name(INPUT_STREAM, 3)
    'alerter:{p3}:in'
    """
    return template.replace(PARTITION_MARK, str(partition))


# --- delivery to sinks (alerter/delivery.py) ------------------------------------------------

# Prefix of each sink's consumer group on the outbox: one group per sink, so a slow or
# failing sink keeps its own position and never holds up another sink or the engine.
SINK_GROUP_PREFIX = "alerter-sink-"

# Sorted set per partition and sink (``%`` = sink name) of idempotency keys already
# delivered, scored by delivery time: checked before every send, so a crash between a
# send and its XACK never posts the message twice; trimmed by age.
DELIVERED_KEY = "alerter:{p#}:delivered:%"

# Hash per partition and sink of idempotency keys whose send has started but not finished;
# after a crash such a key is uncertain (the endpoint may or may not have it).
INFLIGHT_KEY = "alerter:{p#}:inflight:%"

# Messages a sink gave up on (attempts exhausted, rejected, or uncertain after a crash),
# with the sink, the key and the last error: nothing is dropped silently.
SINK_DEAD_STREAM = "alerter:{p#}:sink-dead"

# Hash per partition and sink of what the rate limit held back and has not summarised yet
# (count, hours, states, top nodes), so a fold survives a restart of the delivery loop.
FOLD_KEY = "alerter:{p#}:fold:%"

# Hash per partition, sink and UTC hour (``@``, e.g. 2026112012) of suppression counters
# for the digest.
SINK_STATS_KEY = "alerter:{p#}:sinkstats:%:@"

# Placeholder for the sink name in the delivery key templates above.
SINK_MARK = "%"
