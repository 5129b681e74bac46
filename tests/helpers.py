"""Small recordings made by the tests themselves (not the demo scenario)."""

from __future__ import annotations

import gzip
import json
import os
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np

from alerter.store import Store
from alerter.timeaxis import format_hour

START = datetime.fromisoformat("2026-11-02T07:00:00+00:00")


def daily_counts(hours: int, level: float, seed: int) -> np.ndarray:
    """Poisson counts with a daily rhythm (local-time rhythm approximated in UTC-7)."""
    rng = np.random.default_rng(seed)
    t = np.arange(hours)
    rate = level * (1.0 + 0.6 * np.sin(2 * np.pi * ((t - 7) % 24) / 24.0))
    return rng.poisson(rate).astype(float)


def write_recording(path: Path, series: dict[str, np.ndarray], surge: dict[str, tuple[int, float]] | None = None,
                    edges: list[tuple[str, str]] = ()) -> Path:
    """Write series (NaN = missing) as an alerter-recording/1 file; surge = {node: (hour, factor)}."""
    hours = len(next(iter(series.values())))
    lines = [{"type": "header", "format": "alerter-recording/1", "tz": "America/Denver",
              "start": format_hour(START), "hours": hours}]
    lines += [{"type": "edge_add", "ts": format_hour(START), "src": s, "dst": d} for s, d in edges]
    for h in range(hours):
        counts = {}
        for node, values in series.items():
            v = values[h]
            if surge and node in surge and surge[node][0] == h:
                v = v * surge[node][1]
            if not np.isnan(v):
                counts[node] = int(v)
        lines.append({"type": "counts", "hour": format_hour(START + timedelta(hours=h)), "counts": counts})
    text = "".join(json.dumps(line) + "\n" for line in lines)
    if path.suffix == ".gz":
        with gzip.open(path, "wt", encoding="utf-8") as handle:
            handle.write(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def small_recording(tmp_path: Path, name: str = "small.jsonl") -> Path:
    """Three nodes, ten days; '/hot' surges x6 at hour 200."""
    series = {"/": daily_counts(240, 800, 1), "/hot": daily_counts(240, 120, 2), "/cold": daily_counts(240, 60, 3)}
    return write_recording(tmp_path / name, series, surge={"/hot": (200, 6.0)}, edges=[("/", "/hot")])


def split_recording(rec: Path, cut: int) -> tuple[Path, Path]:
    """The recording as two files: hours ``0..cut-1`` (with the link events) and the rest."""
    lines = [json.loads(line) for line in rec.read_text().splitlines()]
    header, body = lines[0], lines[1:]
    counts = [x for x in body if x["type"] == "counts"]
    first = [x for x in body if x["type"] != "counts"] + counts[:cut]
    second_header = {**header, "start": counts[cut]["hour"], "hours": header["hours"] - cut}
    paths = []
    for name, head, rest in (("a", {**header, "hours": cut}, first), ("b", second_header, counts[cut:])):
        path = rec.with_name(f"{rec.stem}-{name}.jsonl")
        path.write_text("".join(json.dumps(x) + "\n" for x in [head, *rest]), encoding="utf-8")
        paths.append(path)
    return paths[0], paths[1]


def run_workers(url: str, config_file: Path, partitions: tuple[int, ...] = (0, 1)) -> list[dict]:
    """Run one ``alerter run --until-drained`` process per partition (consumer ``w<p>``) at once,
    wait for all, and return each one's JSON summary (a failing one shows its log's end)."""
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}
    procs = [subprocess.Popen([sys.executable, "-m", "alerter.cli", "run", "--until-drained", "--redis", url,
                               "--config", str(config_file), "--partitions", str(p), "--consumer", f"w{p}", "--json"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env) for p in partitions]
    out = []
    for proc in procs:
        stdout, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err.decode()[-2000:]
        out.append(json.loads(stdout))
    return out


def outbox_of(store: Store, partition: int, kind: bytes, field: bytes) -> list[str]:
    """The ``field`` of every outbox entry of ``type=kind`` of one partition, in stream order."""
    return [f[field].decode() for _, f in store.entries(f"alerter:{{p{partition}}}:outbox") if f[b"type"] == kind]
