"""Properties of the baseline and engine that must hold on any input (hypothesis)."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from alerter.baseline import SeasonalBaseline
from alerter.config import BaselineSettings, Config
from alerter.engine import Engine
from alerter.timeaxis import parse_hour

START = parse_hour("2026-03-01T00:00:00Z")  # the Denver DST change (2026-03-08) falls inside

_count = st.one_of(st.just(np.nan), st.just(0.0), st.just(1e9), st.floats(0.0, 1e9),
                   st.floats(0.0, 10.0))


@settings(max_examples=150, deadline=None)
@given(dtype=st.sampled_from(["float32", "float64"]),
       x=hnp.arrays(np.float64, st.tuples(st.integers(1, 120), st.integers(1, 5)), elements=_count),
       start=st.integers(0, 24 * 7 - 1))
def test_state_and_forecasts_stay_finite(dtype, x, start):
    """Property: for default settings (float32 or float64) and any counts in [0, 1e9] with
    NaN gaps (nodes may start late), after every update every state array (level, season,
    week, var, run_sum) is finite, and the forecast and scale of every node are finite,
    with scale > 0.

    Common practice, no source: a streaming learner must never turn finite input into
    NaN/inf state, since that state can never recover.
    """
    b = SeasonalBaseline(BaselineSettings(dtype=dtype))
    b.resize(x.shape[1])
    for t in range(x.shape[0]):
        h = start + t
        slot, day = h % 24, (h // 24) % 7
        b.update(b.to_working(x[t]), slot, day)
        st_ = b.state
        for name in ("level", "season", "week", "var", "run_sum"):
            assert np.isfinite(getattr(st_, name)).all(), (name, t)
        nxt = h + 1
        fc = b.forecast(nxt % 24, (nxt // 24) % 7)
        assert np.isfinite(fc).all()
        assert np.isfinite(b.from_working(fc)).all()
        sc = b.scale()
        assert np.isfinite(sc).all() and (sc > 0).all()


@settings(max_examples=25, deadline=None)
@given(value=st.one_of(st.just(0.0), st.floats(0.0, 10.0), st.floats(0.0, 1e9), st.integers(0, 10**6).map(float)),
       offset=st.integers(0, 24 * 7 - 1))
def test_constant_series_never_alerts(value, offset):
    """Property: with default ``Config()``, one node whose count is the same value c >= 0
    (any float in [0, 1e9]) every hour for 300 consecutive hours raises no alert at all.

    Common practice, no source: a flat series carries no anomaly.
    """
    eng = Engine(Config())
    t0 = START + timedelta(hours=offset)
    for h in range(300):
        res = eng.step(t0 + timedelta(hours=h), {"/flat": value})
        assert res.alerts == [], (h, value, res.alerts)


def _rhythm(hours: int, level: float, seed: int) -> np.ndarray:
    """Poisson counts with a daily rhythm (UTC hours)."""
    rng = np.random.default_rng(seed)
    t = np.arange(hours)
    return rng.poisson(level * (1.0 + 0.5 * np.sin(2 * np.pi * (t % 24) / 24.0))).astype(float)


FACTOR_END = 1.5


@settings(max_examples=25, deadline=None)
@given(level=st.floats(30.0, 1e6), factor=st.floats(5.0, 20.0), seed=st.integers(0, 2**16),
       warm_days=st.integers(7, 14))
def test_lasting_step_up_is_adopted(level, factor, seed, warm_days):
    """Property: with default ``Config()``, one node with a daily-rhythm Poisson series at
    ``level`` (30 to 1e6) for ``warm_days`` days, then ``factor`` (5 to 20) times as much for
    the remaining 10 days (the same rhythm, multiplied), gets
      (a) at least one surge alert in the hours [step, step + adopt_after_hours),
      (b) no surge alert at any hour >= step + adopt_after_hours + surge cooldown_hours,
      (c) a final-day expected count within a factor FACTOR_END (1.5) of the noiseless
          new-level rate at each hour (median ratio over the last 24 hours).

    Common practice, no source: a lasting change of level is a new normal, to be alerted
    once and then learned.
    """
    cfg = Config()
    step = 24 * warm_days
    total = step + 24 * 10
    x = _rhythm(total, level, seed)
    after = _rhythm(total, level * factor, seed + 1)
    x[step:] = after[step:]
    eng = Engine(cfg)
    surges, ratios = [], []
    t = np.arange(total)
    rate = level * factor * (1.0 + 0.5 * np.sin(2 * np.pi * (t % 24) / 24.0))
    for h in range(total):
        res = eng.step(START + timedelta(hours=h), {"/n": x[h]})
        surges += [h for a in res.alerts if a.kind == "surge"]
        if h >= total - 24:
            ratios.append(res.expected[0] / rate[h])
    quiet_from = step + cfg.baseline.adopt_after_hours + cfg.rules.surge.cooldown_hours
    assert any(step <= h < step + cfg.baseline.adopt_after_hours for h in surges), surges
    assert [h for h in surges if h >= quiet_from] == [], (step, surges)
    med = float(np.median(ratios))
    assert 1 / FACTOR_END <= med <= FACTOR_END, (med, ratios)
