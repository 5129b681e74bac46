"""Benchmark the vectorised seasonal baseline against one river object per node.

Prints, for 366,000 and 1,000,000 nodes (float32, default settings, after warm-up ticks):
* the median over >= 20 ticks of one baseline tick: ``to_working`` + ``step`` (forecast,
  scale and update of the hour, the baseline's share of ``Engine.step_array``), and of the
  core ``step`` alone (input already on the working scale); also the core as the three
  calls ``forecast`` + ``scale`` + ``update`` (as ``Engine.step_array`` makes them today);
* the median of one full ``Engine.step_array`` tick (baseline, scores, bands, rules,
  alert records) on the same data;
and the same per-node work done with one ``river.time_series.HoltWinters`` per node
(``learn_one`` + ``forecast(1)``) on a sample of nodes, as node-updates per second, with
the ratio measured in the same run. Targets are printed beside the figures (PASS/MISS).

Run: ``.venv/bin/python benchmarks/bench_baseline.py [--quick] [--ticks N]``.
"""

from __future__ import annotations

import argparse
import platform
import statistics
import time
from datetime import timedelta

import numpy as np
from river import time_series

from alerter.baseline import KERNEL, SeasonalBaseline
from alerter.config import BaselineSettings, Config
from alerter.engine import Engine
from alerter.timeaxis import parse_hour

TARGET_TICK_MS = 5.0  # one baseline tick at 366k nodes
TARGET_RATIO = 300.0  # vectorised node-updates/s over per-object node-updates/s
START = parse_hour("2026-11-02T07:00:00Z")


def counts(n: int, hours: int, seed: int) -> list[np.ndarray]:
    """Hourly counts with a daily rhythm and 1% missing (NaN), one array per hour."""
    rng = np.random.default_rng(seed)
    level = rng.lognormal(3.0, 2.0, n)
    out = []
    for h in range(hours):
        rate = level * (1.0 + 0.5 * np.sin(2 * np.pi * (h % 24) / 24.0))
        x = rng.poisson(rate).astype(float)
        x[rng.random(n) < 0.01] = np.nan
        out.append(x)
    return out


def slots(h: int) -> tuple[int, int]:
    return h % 24, (h // 24) % 7


def bench_baseline(n: int, warm: int, ticks: int, seed: int) -> dict[str, float]:
    """Median ms of a baseline tick (with and without ``to_working``) and an engine tick."""
    data = counts(n, 48, seed)
    b = SeasonalBaseline(BaselineSettings())
    b.resize(n)
    ys = [b.to_working(x) for x in data]
    for h in range(warm):
        b.update(ys[h % len(ys)], *slots(h))
    full, core, three = [], [], []
    for k in range(2 * ticks):
        h = warm + k
        s, d = slots(h)
        x = data[h % len(data)]
        t0 = time.perf_counter()
        y = b.to_working(x)
        t1 = time.perf_counter()
        if k % 2:  # alternate, so both forms see the same load
            f = b.forecast(s, d)
            b.update(y, s, d, forecast=f, scale=b.scale(yhat=f))
            three.append((time.perf_counter() - t1) * 1e3)
            continue
        b.step(y, s, d)
        t2 = time.perf_counter()
        full.append((t2 - t0) * 1e3)
        core.append((t2 - t1) * 1e3)

    eng = Engine(Config())
    eng.counts_array({f"/n{i}": 1.0 for i in range(n)})  # intern the nodes once
    for h in range(warm):
        eng.step_array(START + timedelta(hours=h), data[h % len(data)])
    step = []
    for k in range(ticks):
        h = warm + k
        x = data[h % len(data)].copy()
        if k % 5 == 0:
            x[: n // 1000] *= 50.0  # some surges, so alert records are built too
        t0 = time.perf_counter()
        eng.step_array(START + timedelta(hours=h), x)
        step.append((time.perf_counter() - t0) * 1e3)
    return {"tick": statistics.median(full), "core": statistics.median(core),
            "three": statistics.median(three), "engine": statistics.median(step)}


def river_models(n: int, hours: int, seed: int) -> tuple[list, list[list[float]], int]:
    """One river HoltWinters per node, started on one season; the data to go on with.

    river's seasonal HoltWinters needs a trend component (``beta=None`` or ``0`` fails in
    ``learn_one``), so ``beta=1e-6`` (a trend that barely moves) is used. Its start-up
    divides by the mean of the first season even in the additive form, so the series fed to
    it is ``log1p(count) + 1`` (a shift; the work per update is the same).
    """
    s = BaselineSettings()
    models = [time_series.HoltWinters(alpha=s.alpha, beta=1e-6, gamma=s.gamma, seasonality=s.season_hours)
              for _ in range(n)]
    data = [(np.log1p(np.nan_to_num(x, nan=0.0)) + 1.0).tolist() for x in counts(n, hours, seed)]
    warm = s.season_hours  # river needs one season of values before it forecasts
    for h in range(warm):
        for m, v in zip(models, data[h], strict=True):
            m.learn_one(v)
    return models, data, warm


def river_hour(models: list, row: list[float]) -> None:
    """The per-object form of one tick: forecast then learn, node by node."""
    for m, v in zip(models, row, strict=True):
        m.forecast(1)
        m.learn_one(v)


BLOCK = 5  # baseline ticks per round of the interleaved measurement
RIVER_BLOCK = 2  # river hours per round


def bench_ratio(n: int, sample: int, warm: int, ticks: int, seed: int) -> tuple[float, float, float]:
    """Node-updates/s of the baseline tick, of its core, and of river, measured interleaved.

    Each round times BLOCK baseline ticks over ``n`` nodes, then RIVER_BLOCK river hours
    over ``sample`` nodes, so both see the same machine load (other processes come and go);
    blocks rather than strict alternation, so that river's Python objects do not evict the
    baseline's arrays from the cache before every tick. Medians over all timed ticks/hours.
    """
    rounds = max(1, ticks // BLOCK)
    data = counts(n, 48, seed)
    b = SeasonalBaseline(BaselineSettings())
    b.resize(n)
    for h in range(warm):
        b.update(b.to_working(data[h % len(data)]), *slots(h))
    models, rdata, rwarm = river_models(sample, 24 + rounds * RIVER_BLOCK, seed)
    full, core, per_obj = [], [], []
    h, rh = warm, rwarm
    for _ in range(rounds):
        for _ in range(BLOCK):
            s, d = slots(h)
            t0 = time.perf_counter()
            y = b.to_working(data[h % len(data)])
            t1 = time.perf_counter()
            b.step(y, s, d)
            t2 = time.perf_counter()
            full.append(t2 - t0)
            core.append(t2 - t1)
            h += 1
        for _ in range(RIVER_BLOCK):
            t0 = time.perf_counter()
            river_hour(models, rdata[rh])
            per_obj.append(time.perf_counter() - t0)
            rh += 1
    return (n / statistics.median(full), n / statistics.median(core),
            sample / statistics.median(per_obj))


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes for a smoke run")
    ap.add_argument("--ticks", type=int, default=30, help="timed ticks per size (>= 20 for the report)")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    sizes = [20_000, 50_000] if args.quick else [366_000, 1_000_000]
    warm = 30 if args.quick else 60
    sample = 200 if args.quick else 2_000
    print(f"python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}, "
          f"dtype float32, default settings, baseline kernel {KERNEL}, warm-up {warm} ticks, "
          f"median of {args.ticks} ticks")
    results = {}
    for n in sizes:
        r = bench_baseline(n, warm, args.ticks, args.seed)
        results[n] = r
        rate = n / (r["tick"] / 1e3)
        line = (f"n={n:>9,}: baseline tick {r['tick']:7.2f} ms (core step {r['core']:6.2f} ms, "
                f"to_working {r['tick'] - r['core']:5.2f} ms; as forecast+scale+update "
                f"{r['three']:6.2f} ms)  "
                f"engine.step_array {r['engine']:7.2f} ms  -> {rate / 1e6:6.1f} M node-updates/s")
        if n == 366_000:
            line += f"  [target tick < {TARGET_TICK_MS:g} ms: {verdict(r['tick'] < TARGET_TICK_MS)}]"
        print(line, flush=True)
    n_ref = sizes[0]
    vec, vec_core, per_object = bench_ratio(n_ref, sample, warm, args.ticks, args.seed)
    ratio = vec / per_object
    print(f"interleaved in blocks: baseline n={n_ref:,} {vec / 1e6:6.1f} M "
          f"node-updates/s (core {vec_core / 1e6:6.1f} M); river HoltWinters, one object per node, "
          f"{sample:,} nodes: {per_object / 1e3:6.1f} k node-updates/s")
    print(f"ratio vectorised (full baseline tick incl. to_working) / per-object: "
          f"{ratio:6.0f}x  [target >= {TARGET_RATIO:g}x: {verdict(ratio >= TARGET_RATIO)}]")
    print(f"ratio vectorised (core step = forecast+scale+update, the same work river does on "
          f"pre-transformed input) / per-object: {vec_core / per_object:6.0f}x  "
          f"[target >= {TARGET_RATIO:g}x: {verdict(vec_core / per_object >= TARGET_RATIO)}]")


if __name__ == "__main__":
    main()
