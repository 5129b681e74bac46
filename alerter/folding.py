"""Rate limiting of one sink: the token bucket and the fold of what goes over the limit.

Over the limit, an outbox entry is folded into a Redis hash (count, hours, states, the top
subjects by excess) and acknowledged in the same MULTI/EXEC; ``flush_fold`` sends the fold
as one summary message as soon as the bucket has a token for it. ``SinkWorker`` (in
``delivery.py``) calls these through its ``_fold`` and ``flush_fold`` methods.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

from .messages import render_fold_summary
from .sinks import Outgoing

if TYPE_CHECKING:
    from .delivery import SinkWorker

__all__ = ["TokenBucket", "fold_entry", "flush_fold"]


@dataclass
class TokenBucket:
    """``per_minute`` messages per minute, bursts up to ``per_minute``; time is passed in."""

    per_minute: int
    tokens: float = -1.0
    last: float | None = None

    def available(self, now: float) -> float:
        """Tokens at ``now`` (refilled at per_minute/60 per second, capped at per_minute)."""
        if self.last is None:
            return float(self.per_minute)
        return min(float(self.per_minute), self.tokens + max(0.0, now - self.last) * self.per_minute / 60.0)

    def take(self, now: float) -> bool:
        """Spend one token if there is one."""
        have = self.available(now)
        self.last = now
        if have >= 1.0:
            self.tokens = have - 1.0
            return True
        self.tokens = have
        return False


def fold_entry(worker: SinkWorker, eid: bytes, msg: Outgoing) -> None:
    """Fold one over-the-limit entry into the sink's fold hash and XACK it, in one MULTI/EXEC."""
    k, top = worker.keys, worker.config.sinks.digest.top
    excess = float(msg.record.get("total_excess", msg.record.get("excess", 0.0)) or 0.0)
    day = datetime.fromtimestamp(worker.clock(), UTC).strftime("%Y%m%d")
    stats = worker.keys.stats.replace("@", day)

    def build(pipe: Any) -> None:
        pipe.hsetnx(k.fold, "id", msg.key)
        pipe.hsetnx(k.fold, "first_hour", msg.hour)
        pipe.hset(k.fold, "last_hour", msg.hour)
        pipe.hincrby(k.fold, "count", 1)
        pipe.hincrby(k.fold, f"state:{msg.state or msg.entry_type}", 1)
        pipe.zadd(k.fold + ":top", {msg.subject or msg.key: abs(excess)}, gt=True)
        pipe.zremrangebyrank(k.fold + ":top", 0, -(top + 1))
        pipe.hincrby(stats, "rate_limit", 1)
        pipe.expire(stats, 3 * 86400)
        pipe.xack(k.outbox, k.group, eid)
    worker.redis.txn("MULTI fold+XACK", build)
    worker.count("folded")


def flush_fold(worker: SinkWorker) -> str | None:
    """Send the held-back summary when the rate limit has a token for it."""
    k = worker.keys
    fold = worker.store.hash_all(k.fold)
    if not fold or worker.bucket.available(worker.clock()) < 1.0:
        return None
    worker.bucket.take(worker.clock())
    f = {a.decode(): b.decode() for a, b in fold.items()}
    top = worker.store.top_scores(k.fold + ":top")
    states = {s[6:]: int(v) for s, v in f.items() if s.startswith("state:")}
    text = render_fold_summary(int(f["count"]), f["first_hour"], f["last_hour"], states,
                               [(n.decode(), v) for n, v in top], worker.target.messages_per_minute, worker.opts)
    msg = Outgoing(f"fold|{f['id']}", "fold", f["last_hour"], "held back", text,
                   record={"count": int(f["count"])})

    def drop(pipe: Any) -> None:
        pipe.delete(k.fold, k.fold + ":top")
    done, flying = worker.redis.state(msg.key)
    if done or (flying and worker.target.uncertain == "dead_letter"):
        worker.redis.txn("DEL fold", drop)
        return "already_delivered" if done else "uncertain"
    return worker._send(None, msg, drop)
