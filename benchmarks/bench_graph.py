"""Benchmark LinkGraph at production size: 366k nodes, 22M edges (``--quick``: 1/20).

Prints milliseconds for the per-hour helpers (both ``sum_into_dst`` strategies), for 1,000
edge changes plus the next ``csr()``, for a full compaction, and peak memory. Run with
``python benchmarks/bench_graph.py [--quick] [--seed N]``.
"""

from __future__ import annotations

import argparse
import functools
import resource
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from alerter.graph import LinkGraph
from alerter.nodes import NodeIndex

N_NODES, N_EDGES = 366_000, 22_000_000


def timed(fn: Callable[[], Any], repeat: int = 1) -> tuple[float, Any]:
    """Best wall time of ``repeat`` calls in ms, and the last result."""
    best, result = float("inf"), None
    for _ in range(repeat):
        t0 = time.perf_counter()
        result = fn()
        best = min(best, (time.perf_counter() - t0) * 1e3)
    return best, result


def synthetic_edges(n: int, e: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """``e`` distinct non-loop edges; in-degree power-law (Zipf-like weights), sources uniform."""
    weights = 1.0 / np.arange(1, n + 1) ** 0.9
    weights = np.minimum(weights / weights.sum() * e, 0.25 * n)  # a hub cannot exceed n sources
    indeg = rng.multinomial(int(e * 1.05), rng.permutation(weights / weights.sum()))
    dst = np.repeat(np.arange(n, dtype=np.int64), indeg)
    src = rng.integers(0, n, size=dst.size)
    keys = np.sort(((dst << 32) | src)[src != dst])
    keys = keys[np.concatenate([[True], keys[1:] != keys[:-1]])]
    keys = rng.permutation(keys)[:e]  # arrival order is random, as from a crawl
    return (keys & 0xFFFFFFFF).astype(np.int32), (keys >> 32).astype(np.int32)


def churn(g: LinkGraph, changes: int, rng: np.random.Generator, hour: int) -> None:
    """Half removals of random alive edges, half additions of random new edges."""
    ids = g.nodes.ids
    slots = rng.choice(np.flatnonzero(g.alive[: g.n_slots]), size=changes // 2, replace=False)
    for s, d in zip(g.src[slots].tolist(), g.dst[slots].tolist(), strict=True):
        g.remove_edge(ids[s], ids[d])
    pairs = rng.integers(0, len(ids), size=(changes - changes // 2, 2))
    for s, d in pairs.tolist():
        if s != d:
            g.add_edge(ids[s], ids[d], hour)


def naive_csr(src: np.ndarray, dst: np.ndarray, alive: np.ndarray, ns: int, n: int) -> tuple[np.ndarray, ...]:
    """What ``csr()`` would cost without the splice: sort everything again."""
    slots = np.flatnonzero(alive[:ns])
    order = slots[np.argsort(dst[slots], kind="stable")]
    dst_sorted = dst[order]
    return order, src[order], dst_sorted, np.searchsorted(dst_sorted, np.arange(n + 1, dtype=np.int32))


def edge_bytes(g: LinkGraph) -> int:
    arrays = [g.src, g.dst, g.alive, g.born] + [g.array("coef")]
    return sum(a.nbytes for a in arrays)


def sum_bincount(g: LinkGraph, values: np.ndarray) -> np.ndarray:
    """The alternative to ``sum_into_dst``: ``np.bincount`` over slot destinations, dead zeroed."""
    ns = g.n_slots
    weights = np.where(g.alive[:ns], values[:ns], 0.0) if g.n_dead else values[:ns]
    return np.bincount(g.dst[:ns], weights=weights, minlength=len(g.nodes))


def report_sums(g: LinkGraph, label: str) -> None:
    values = np.random.default_rng(1).random(g.n_slots)
    t_ra, a = timed(lambda: g.sum_into_dst(values), repeat=3)
    t_bc, b = timed(lambda: sum_bincount(g, values), repeat=3)
    agree = np.allclose(a, b, rtol=1e-9, atol=1e-6)
    print(f"sum_into_dst [{label}]: reduceat main + add.at tail (kept) {t_ra:7.1f} ms | "
          f"bincount {t_bc:7.1f} ms | agree={agree}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1/20 of the full size")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    scale = 20 if args.quick else 1
    n, e = N_NODES // scale, N_EDGES // scale
    rng = np.random.default_rng(args.seed)

    t0 = time.perf_counter()
    src, dst = synthetic_edges(n, e, rng)
    print(f"synthetic edges: {src.size:,} edges over {n:,} nodes in {(time.perf_counter() - t0) * 1e3:.0f} ms")
    nodes = NodeIndex()
    nodes.intern(f"/page/{i}" for i in range(n))
    t0 = time.perf_counter()
    g = LinkGraph.from_arrays(nodes, src, dst, 0)
    t_load = (time.perf_counter() - t0) * 1e3
    del src, dst
    g.register("coef", np.float32, fill=0.0)
    indeg = g.in_degree()
    print(f"from_arrays (bulk load, one sort): {t_load:8.1f} ms; max in-degree {indeg.max():,}, "
          f"nodes without in-edges {(indeg == 0).sum():,}")

    t_csr, _ = timed(g.csr)
    print(f"csr() right after load (identity view): {t_csr:8.1f} ms")
    report_sums(g, "compacted")
    per_node = rng.random(n)
    out = np.empty(g.n_slots)
    t_gather, _ = timed(lambda: g.gather_src(per_node, out=out), repeat=3)
    print(f"gather_src (np.take clip, out=): {t_gather:8.1f} ms")

    t_full, _ = timed(lambda: naive_csr(g.src, g.dst, g.alive, g.n_slots, n), repeat=3)
    arrival = rng.permutation(g.n_slots)  # the same edges in arrival order: no sorted main segment
    t_arr, _ = timed(lambda: naive_csr(g.src[arrival], g.dst[arrival], g.alive[arrival], g.n_slots, n))
    print(f"naive full CSR rebuild (stable argsort + gathers + indptr): {t_full:8.1f} ms on these slots "
          f"(best of 3), {t_arr:8.1f} ms on slots in arrival order")
    for round_ in range(1, 6):  # the first rounds pay for first-touch page faults of new buffers
        t_churn, _ = timed(functools.partial(churn, g, 1000, rng, hour=round_))
        t_next, _ = timed(g.csr)
        print(f"round {round_}: 1,000 edge changes {t_churn:7.1f} ms; next csr() (splice of "
              f"{g.n_slots - g.main:,} tail / {g.n_dead:,} dead) {t_next:7.1f} ms; generation {g.generation}")
    report_sums(g, "1,000 changes pending")
    hub = nodes.ids[int(indeg.argmax())]
    t_down, reach = timed(lambda: g.hops(hub, 2, "down"))
    t_down2, _ = timed(lambda: g.hops(hub, 2, "down"))
    t_up, reach_up = timed(lambda: g.hops(hub, 1, "up"))
    print(f"hops k=2 down from the top hub: {t_down:8.1f} ms incl. out-CSR build, {t_down2:.1f} ms cached "
          f"({len(reach):,} nodes); k=1 up: {t_up:.1f} ms ({len(reach_up):,} nodes)")

    for round_ in range(1, 3):
        gen = g.generation
        t_compact, _ = timed(g.compact)
        t_after, _ = timed(g.csr)
        print(f"full compaction {round_} (splice, moves 1 registered array): {t_compact:8.1f} ms "
              f"(generation {gen} -> {g.generation}); csr() after: {t_after:.1f} ms")
        churn(g, 1000, rng, hour=10 + round_)
    print(f"edge arrays: {edge_bytes(g) / 2**20:,.0f} MiB for {g.n_edges:,} alive edges "
          f"(capacity {len(g.src):,} slots)")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # Linux: KiB
    print(f"peak memory (ru_maxrss): {peak:.2f} GiB")


if __name__ == "__main__":
    main()
