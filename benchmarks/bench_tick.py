"""Benchmark one full engine tick at production size: 366k nodes, 22M links (``--quick``: 1/20).

Builds a synthetic link graph (power-law in-degree, uniform sources, link ages spread over
a year with some brand-new links) and loads it with ``LinkGraph.from_arrays`` into an
``Engine(Config())`` whose baseline warms up after a few hours. After warm-up hours of
Poisson counts with a daily rhythm it times ``Engine.step_array`` (baseline, joint forecast,
rules, flow learning, attribution, alerts, incidents) as a median over the timed ticks,
and the parts inside those same ticks: ``joint.forecast``, ``joint.observe`` and the
baseline's methods. It prints peak memory (``ru_maxrss``, whole process including the
build; and the peak over the timed ticks alone), an estimate of the bytes the per-edge
flow step moves, a measured memory bandwidth (``np.copyto`` of a 1 GiB float32 array) and
the ratio of the measured flow time to that bandwidth bound. Targets (PASS/MISS): full
tick < 250 ms, peak memory < 2 GiB. The tick is judged twice: whole, and without the
incident grouping (``Engine.track``), since the issue's tick lists baseline, flows, rules
and attribution; the grouping's own time is printed beside it. As the 250 ms was set on
another machine, a plain numpy edge step over the same links is timed too and the target
scaled by its ratio to the issue's 115 ms for that step (both verdicts are printed). A few
extra ticks whose hours also add and remove links (``--changes``) show what the learner's
re-sync with the graph adds to such an hour.

Run: ``.venv/bin/python benchmarks/bench_tick.py [--quick] [--ticks N] [--warm N] [--no-settle]``.
"""

from __future__ import annotations

import argparse
import gc
import platform
import resource
import statistics
import time
from collections import defaultdict
from collections.abc import Callable
from datetime import timedelta
from typing import Any

import numpy as np

from alerter import flows, heap
from alerter.config import BaselineSettings, Config
from alerter.engine import Engine
from alerter.graph import LinkGraph
from alerter.timeaxis import hour_index, parse_hour

N_NODES, N_EDGES = 366_000, 22_000_000
TARGET_TICK_MS = 250.0
TARGET_PEAK_GIB = 2.0
START = parse_hour("2026-11-02T07:00:00Z")
BASELINE_METHODS = ("to_working", "from_working", "forecast", "scale", "warm", "update")
PARTS = ("joint.forecast", "joint.observe", "baseline", "alert records", "incidents")


# -- synthetic data ----------------------------------------------------------------------
def _draw_keys(n: int, e: int, rng: np.random.Generator) -> np.ndarray:
    """About ``e`` sorted distinct ``dst << 32 | src`` keys; Zipf-like in-degree, no self-loops."""
    weights = 1.0 / np.arange(1, n + 1) ** 0.9
    weights = np.minimum(weights / weights.sum() * e, 0.25 * n)  # a hub cannot exceed n sources
    indeg = rng.multinomial(e, rng.permutation(weights / weights.sum()))
    dst = np.repeat(np.arange(n, dtype=np.int64), indeg)
    src = rng.integers(0, n - 1, size=dst.size)
    src += src >= dst  # uniform over the other n - 1 nodes: no self-loop
    keys = (dst << 32) | src
    del dst, src
    keys.sort()
    return keys[np.concatenate([[True], keys[1:] != keys[:-1]])]


def synthetic_edges(n: int, e: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Exactly ``e`` distinct edges sorted by (dst, src): draw a few percent more, drop the surplus."""
    extra = 1.03
    keys = _draw_keys(n, int(e * extra), rng)
    while keys.size < e:  # duplicates at the hubs ate more than the margin: draw again, larger
        extra *= 1.05
        keys = _draw_keys(n, int(e * extra), rng)
    keys = np.delete(keys, np.sort(rng.choice(keys.size, keys.size - e, replace=False)))
    return keys & 0xFFFFFFFF, keys >> 32


def link_hours(e: int, tick0: int, rng: np.random.Generator) -> np.ndarray:
    """Birth hour per link: uniform over the past year, 1% born in the last two days."""
    born = tick0 - rng.integers(48, 24 * 365, size=e)
    fresh = rng.random(e) < 0.01
    born[fresh] = tick0 - rng.integers(0, 48, size=int(fresh.sum()))
    return born


def hourly_counts(n: int, hours: int, seed: int) -> list[np.ndarray]:
    """Poisson counts with a daily rhythm around log-normal levels, 1% missing (NaN)."""
    rng = np.random.default_rng(seed)
    level = rng.lognormal(3.0, 1.5, n)
    out = []
    for h in range(hours):
        x = rng.poisson(level * (1.0 + 0.5 * np.sin(2 * np.pi * (h % 24) / 24.0))).astype(float)
        x[rng.random(n) < 0.01] = np.nan
        out.append(x)
    return out


def build_engine(n: int, e: int, seed: int, warmup_hours: int) -> Engine:
    """Engine over ``n`` nodes "n0".. with ``e`` bulk-loaded links; baseline and rules sized."""
    rng = np.random.default_rng(seed)
    eng = Engine(Config(baseline=BaselineSettings(warmup_hours=warmup_hours)))
    eng.counts_array({f"n{i}": 0.0 for i in range(n)})  # interns the ids and sizes baseline/rules
    t0 = time.perf_counter()
    src, dst = synthetic_edges(n, e, rng)
    t1 = time.perf_counter()
    born = link_hours(src.size, hour_index(START), rng)
    eng.joint.graph = LinkGraph.from_arrays(eng.nodes, src, dst, born)
    eng.joint._synced = -1  # a new graph object starts at version 0 again: force the next sync
    del src, dst, born
    indeg = eng.joint.graph.in_degree()
    print(f"graph: {eng.joint.graph.n_edges:,} links over {n:,} nodes; synthetic draw "
          f"{(t1 - t0) * 1e3:.0f} ms, from_arrays {(time.perf_counter() - t1) * 1e3:.0f} ms; "
          f"max in-degree {indeg.max():,}, nodes without in-links {(indeg == 0).sum():,}", flush=True)
    return eng


# -- timing ------------------------------------------------------------------------------
class PartTimer:
    """Wraps bound methods of live objects so their wall time accumulates per tick."""

    def __init__(self) -> None:
        self.tick: dict[str, float] = defaultdict(float)
        self.ticks: list[dict[str, float]] = []

    def wrap(self, obj: Any, method: str, part: str) -> None:
        inner: Callable[..., Any] = getattr(obj, method)

        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                return inner(*args, **kwargs)
            finally:
                self.tick[part] += (time.perf_counter() - t0) * 1e3

        setattr(obj, method, timed)

    def close_tick(self, total_ms: float) -> None:
        parts = dict(self.tick)
        parts["tick"] = total_ms
        self.ticks.append(parts)
        self.tick = defaultdict(float)

    def median(self, part: str) -> float:
        return statistics.median(t.get(part, 0.0) for t in self.ticks)


class FullCollections:
    """Full (oldest-generation) collections of the cyclic garbage collector inside a ``with``
    block, with their pauses."""

    def __init__(self) -> None:
        self.pauses: list[float] = []
        self._t0 = 0.0

    def __enter__(self) -> FullCollections:
        gc.callbacks.append(self._seen)
        return self

    def __exit__(self, *_: object) -> None:
        gc.callbacks.remove(self._seen)

    def _seen(self, phase: str, info: dict[str, int]) -> None:
        if info["generation"] != 2:
            return
        if phase == "start":
            self._t0 = time.perf_counter()
        else:
            self.pauses.append((time.perf_counter() - self._t0) * 1e3)


def collection_ms() -> tuple[float, int]:
    """One full collection's time (best of 3) and the objects it walks."""
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        gc.collect()
        times.append((time.perf_counter() - t0) * 1e3)
    return min(times), len(gc.get_objects())


def settle_heap() -> str:
    """Freeze the settled heap as ``alerter run`` does after its first hour; say what it saved."""
    before, n_before = collection_ms()
    frozen, _ = heap.settle()
    after, n_after = collection_ms()
    return (f"heap settled after the warm-up (as alerter run does after its first hour): a full collection "
            f"walked {n_before:,} objects in {before:.1f} ms, now {n_after:,} in {after:.1f} ms "
            f"({frozen:,} frozen)")


def surge(x: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """Every third tick multiplies 50 random nodes by 20 so alerts and incidents are built."""
    x = x.copy()
    if k % 3 == 0:
        x[rng.choice(x.size, 50, replace=False)] *= 20.0
    return x


def run_ticks(eng: Engine, data: list[np.ndarray], warm: int, ticks: int, seed: int,
              settle: bool = True) -> tuple[PartTimer, int]:
    """Warm ``warm`` hours, then time ``ticks`` hours; returns the timer and the alert count."""
    for h in range(warm):
        t0 = time.perf_counter()
        eng.step_array(START + timedelta(hours=h), data[h % len(data)])
        print(f"  warm-up hour {h + 1}/{warm}: {(time.perf_counter() - t0) * 1e3:8.1f} ms", flush=True)
    print(settle_heap() if settle else "heap not settled (--no-settle)", flush=True)
    timer = PartTimer()
    timer.wrap(eng.joint, "forecast", "joint.forecast")
    timer.wrap(eng.joint, "observe", "joint.observe")
    for name in BASELINE_METHODS:
        timer.wrap(eng.baseline, name, "baseline")
    timer.wrap(eng, "_alerts", "alert records")
    timer.wrap(eng, "track", "incidents")
    rng = np.random.default_rng(seed + 1)
    alerts = 0
    with FullCollections() as full:
        for k in range(ticks):
            h = warm + k
            x = surge(data[h % len(data)], k, rng)
            t0 = time.perf_counter()
            res = eng.step_array(START + timedelta(hours=h), x)
            timer.close_tick((time.perf_counter() - t0) * 1e3)
            alerts += len(res.alerts)
    print(f"full collections during the timed ticks: {len(full.pauses)} "
          f"(pauses {', '.join(f'{p:.1f}' for p in full.pauses) or '-'} ms)")
    return timer, alerts


def change_ticks(eng: Engine, data: list[np.ndarray], first: int, ticks: int, changes: int,
                 seed: int) -> PartTimer:
    """Ticks whose hour also brings ``changes`` link events (half removals of random existing
    links, half new links): the learner's re-sync with the graph runs inside the tick. The
    timer holds per tick the whole tick, the re-sync, and inside it the graph's CSR build and
    the learner's re-index."""
    rng = np.random.default_rng(seed + 2)
    ids, n = eng.nodes.ids, len(eng.nodes)
    timer = PartTimer()
    timer.wrap(eng.joint, "sync", "re-sync")
    timer.wrap(eng.joint.graph, "csr", "graph CSR")
    timer.wrap(eng.joint.learner, "resize", "learner re-index")
    for k in range(ticks):
        hour = START + timedelta(hours=first + k)
        st = eng.joint.learner.state
        for p in rng.choice(st.n_edges, changes // 2, replace=False).tolist():
            eng.remove_edge(ids[int(st.src[p])], ids[int(st.dst[p])], hour)
        for s, d in rng.integers(0, n, size=(changes - changes // 2, 2)).tolist():
            if s != d:
                eng.add_edge(ids[s], ids[d], hour)
        t0 = time.perf_counter()
        eng.step_array(hour, data[(first + k) % len(data)])
        timer.close_tick((time.perf_counter() - t0) * 1e3)
    return timer


def peak_gib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # Linux: KiB


def reset_hwm() -> bool:
    """Reset the kernel's peak-RSS mark (VmHWM) so a later read covers only what follows."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def hwm_gib() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 2**20
    return float("nan")


def bandwidth_gbs(repeat: int = 5) -> float:
    """Best copy bandwidth (read + write bytes per second) of a 1 GiB float32 ``np.copyto``."""
    a = np.ones(2**28, np.float32)
    b = np.empty_like(a)
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        np.copyto(b, a)
        best = min(best, time.perf_counter() - t0)
    return 2 * a.nbytes / best / 1e9


# -- the bytes estimate ------------------------------------------------------------------
def edge_passes(eng: Engine) -> list[tuple[str, int]]:
    """Bytes per edge of each pass over per-edge arrays in the default flow path, as implemented.

    Read from the learner's actual array dtypes. With numba: the fused kernels of
    ``alerter.flow_kernels`` (``forecast_runs``, ``observe_runs``, ``scale`` when the cap
    binds); without: the numpy passes of ``FlowLearner._observe_lag0``. Gathers of node
    arrays count the index read only (the node arrays stay in cache); ``observe_runs`` reads
    each destination's rows from memory once (its later loops over the run hit cache for
    all but the hubs), so it counts each per-edge array once.
    """
    st, joint = eng.joint.learner.state, eng.joint
    f = st.beta.dtype.itemsize
    i_src, h_e, born = st.src.dtype.itemsize, st.edge_hours.dtype.itemsize, joint.born.dtype.itemsize
    if flows.KERNEL == "numba":
        return [
            ("forecast_runs: read src, beta", i_src + f),
            ("observe_runs: read src, born; beta, cov, hours read+write; write raw",
             i_src + born + 2 * f + 2 * f + 2 * h_e + f),
            ("scale (cap binds): read src; beta read+write", i_src + 2 * f),
        ]
    return [
        ("forecast: u = take(ehat, src)", i_src + f),
        ("forecast: c = beta * u", 3 * f),
        ("forecast: reduceat(c) over dst runs", f),
        ("observe: age weight from born (sub, mul, exp, min)", born + f + 3 * 2 * f),
        ("observe: take(e, src), take(b, src)", 2 * (i_src + f)),
        ("observe: u = e_src + w * b_src (2 ops)", 2 * 3 * f),
        ("observe: c = beta * u, reduceat(c)", 3 * f + f),
        ("attribution: part = max(c * sign_dst, 0) (repeat sign, mul, max), reduceat(part), reduceat(c)",
         f + 3 * f + 2 * f + 2 * f),
        ("learn: cov += r (u^2 - cov) (mul, sub, mul, add)", 4 * 3 * f),
        ("learn: v = u / (cov (1 + ridge) + tiny) (3 ops)", 3 * 3 * f),
        ("learn: quad = reduceat(u * v)", 3 * f + f),
        ("learn: beta += step * gain_dst * v (repeat, 2 ops)", f + 2 * 3 * f),
        ("learn: prior pull (hours -> exp weight, 3 ops)", h_e + f + 2 * 2 * f + 3 * 3 * f),
        ("learn: clip beta, cap: bincount(src, beta), factor gather, scale", 2 * f + i_src + f
         + i_src + f + 3 * f),
        ("learn: edge_hours += 1", 2 * h_e),
    ]


REFERENCE_STEP_MS = 115.0
"""What the issue measured for a plain numpy edge step at this size on the machine where the
250 ms target was set (its figure; the exact code it timed is not known here)."""


def plain_numpy_step_ms(eng: Engine, repeat: int = 7) -> tuple[float, float]:
    """(median, min) ms of a plain numpy edge step over the benchmark's own links: gather each
    source's excess, multiply by the coefficient, sum per destination (``np.bincount``).

    Our reading of the issue's reference step, timed on this machine so the tick can be set
    against the target on a like-for-like machine speed.
    """
    st = eng.joint.learner.state
    ehat = np.random.default_rng(1).random(st.n_nodes).astype(st.beta.dtype)
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        np.bincount(st.dst, st.beta[0] * ehat[st.src], minlength=st.n_nodes)
        times.append((time.perf_counter() - t0) * 1e3)
    return statistics.median(times), min(times)


def _rest(tick: dict[str, float]) -> float:
    """What a tick spent outside its timed parts (scores, rules, imputation)."""
    return tick["tick"] - sum(tick.get(part, 0.0) for part in PARTS)


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="1/20 of the full size")
    ap.add_argument("--ticks", type=int, default=7, help="timed ticks (>= 5)")
    ap.add_argument("--warm", type=int, default=4, help="warm-up hours before timing")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--changes", type=int, default=1000,
                    help="link events per hour in the extra change ticks (0: none)")
    ap.add_argument("--change-ticks", type=int, default=3, help="extra ticks with link changes")
    ap.add_argument("--per-tick", action="store_true", help="print each timed tick's parts")
    ap.add_argument("--no-settle", action="store_true",
                    help="leave the heap unfrozen after the warm-up (alerter run freezes it after its first hour)")
    args = ap.parse_args()
    scale = 20 if args.quick else 1
    n, e = N_NODES // scale, N_EDGES // scale
    kernel = getattr(flows, "KERNEL", "numpy")
    print(f"python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}; "
          f"flow kernel: {kernel}; {args.warm} warm-up hours, median of {args.ticks} ticks")
    eng = build_engine(n, e, args.seed, warmup_hours=2)
    data = hourly_counts(n, 24, args.seed)
    print(f"peak memory after build: {peak_gib():.2f} GiB", flush=True)
    reset_hwm()
    timer, alerts = run_ticks(eng, data, args.warm, args.ticks, args.seed, settle=not args.no_settle)
    tick_peak, peak = hwm_gib(), peak_gib()
    tick = timer.median("tick")
    fc, ob, bl = timer.median("joint.forecast"), timer.median("joint.observe"), timer.median("baseline")
    print(f"full tick (Engine.step_array): median {tick:8.1f} ms over {args.ticks} ticks "
          f"(min {min(t['tick'] for t in timer.ticks):.1f}, max {max(t['tick'] for t in timer.ticks):.1f}); "
          f"{alerts} alerts  [target < {TARGET_TICK_MS:g} ms: {verdict(tick < TARGET_TICK_MS)}]")
    rest = statistics.median(_rest(t) for t in timer.ticks)
    print(f"  parts (medians): joint.forecast {fc:7.1f} ms | joint.observe {ob:7.1f} ms "
          f"(learn + attribution) | baseline {bl:6.1f} ms | alert records {timer.median('alert records'):6.1f} ms "
          f"| incidents {timer.median('incidents'):6.1f} ms | rest (scores, rules, impute) {rest:6.1f} ms")
    core = statistics.median(t["tick"] - t.get("incidents", 0) for t in timer.ticks)
    print(f"tick without the incident grouping (baseline + flows + rules + attribution + alert records, "
          f"the issue's list): median {core:8.1f} ms  [target < {TARGET_TICK_MS:g} ms: "
          f"{verdict(core < TARGET_TICK_MS)}]")
    if args.per_tick:
        for k, t in enumerate(timer.ticks):
            print(f"  tick {k + 1}: {t['tick']:7.1f} ms = " + " + ".join(
                f"{part} {t.get(part, 0):.1f}" for part in PARTS) + f" + rest {_rest(t):.1f}")
    print(f"peak memory (ru_maxrss, whole process incl. build): {peak:.2f} GiB  "
          f"[target < {TARGET_PEAK_GIB:g} GiB: {verdict(peak < TARGET_PEAK_GIB)}]; "
          f"peak over the ticks alone (VmHWM after reset): {tick_peak:.2f} GiB")
    if args.changes and args.change_ticks:
        ch = change_ticks(eng, data, args.warm + args.ticks, args.change_ticks, args.changes, args.seed)
        print(f"tick with {args.changes} link changes (half removed, half new): median "
              f"{ch.median('tick'):8.1f} ms over {len(ch.ticks)} ticks, of which learner re-sync "
              f"with the graph {ch.median('re-sync'):.1f} ms (graph CSR build {ch.median('graph CSR'):.1f}, "
              f"learner re-index {ch.median('learner re-index'):.1f}); peak memory now {peak_gib():.2f} GiB")
    passes = edge_passes(eng)
    edges = eng.joint.learner.state.n_edges
    ref_med, ref_min = plain_numpy_step_ms(eng) if scale == 1 else (float("nan"), float("nan"))
    per_edge = sum(b for _, b in passes)
    del eng, data
    bw = bandwidth_gbs()
    bound_ms = per_edge * edges / (bw * 1e9) * 1e3
    print(f"edge step estimate for the {flows.KERNEL} path:")
    print(f"  {len(passes)} pass groups, {per_edge} bytes/edge x {edges:,} edges = "
          f"{per_edge * edges / 1e9:.2f} GB per tick")
    for name, b in passes:
        print(f"    {b:3d} B/edge  {name}")
    print(f"memory bandwidth (np.copyto 1 GiB float32, read+write): {bw:.1f} GB/s -> bound "
          f"{bound_ms:.1f} ms; measured flow step (forecast + observe) {fc + ob:.1f} ms = "
          f"{(fc + ob) / bound_ms:.2f}x the bound")
    if scale == 1:
        speed = ref_med / REFERENCE_STEP_MS
        scaled = TARGET_TICK_MS * speed
        print(f"machine speed: plain numpy edge step (bincount(dst, beta * ehat[src]), float32, "
              f"{edges:,} links) median {ref_med:.1f} ms (min {ref_min:.1f}) here vs ~{REFERENCE_STEP_MS:g} ms "
              f"where the target was set -> {speed:.2f}x slower; full tick = {tick / ref_med:.2f}x that step; "
              f"target scaled to this machine {scaled:.0f} ms  [scaled target: {verdict(tick < scaled)}]")


if __name__ == "__main__":
    main()
