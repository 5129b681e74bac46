"""The fused numba kernels of ``alerter.baseline`` against its numpy path, side by side.

Random hours with NaN gaps, nodes appearing over time, surges and drops (so residuals are
clipped, runs counted and regimes adopted) and a node population big enough to use both
``_adopt`` branches. float64 must agree to 1e-12; float32 to rtol 1e-5 (the two paths do
the same float32 operations in the same order; exp is numpy's in both, so in practice the
results are identical, but the compiler is not held to the last bit).
"""

from __future__ import annotations

import numpy as np
import pytest

from alerter.baseline import KERNEL, SeasonalBaseline
from alerter.config import BaselineSettings

pytest.importorskip("numba")
# with ALERTER_BASELINE_KERNEL=numpy both sides would be the numpy path
pytestmark = pytest.mark.skipif(KERNEL != "numba", reason="numba kernel disabled by ALERTER_BASELINE_KERNEL")

FIELDS = ("level", "season", "week", "var", "seen", "run", "run_sum", "relearn")


def pair(**kw: object) -> tuple[SeasonalBaseline, SeasonalBaseline]:
    settings = BaselineSettings(**kw)
    fused, plain = SeasonalBaseline(settings), SeasonalBaseline(settings)
    fused.kernel, plain.kernel = "numba", "numpy"
    return fused, plain


def hours(n: int, count: int, seed: int) -> list[np.ndarray]:
    """Poisson counts with a daily rhythm, NaN gaps, long surges and outages."""
    rng = np.random.default_rng(seed)
    level = rng.lognormal(2.0, 1.5, n)
    out = []
    for h in range(count):
        x = rng.poisson(level * (1.0 + 0.5 * np.sin(2 * np.pi * (h % 24) / 24))).astype(float)
        x[rng.random(n) < 0.05] = np.nan
        if 30 <= h < 50:
            x[: n // 10] *= 20.0  # a long surge: clipped, then adopted
        if 60 <= h < 75:
            x[n // 10: n // 5] = 0.0  # an outage
        if h % 7 == 3:
            x[rng.random(n) < 0.02] *= 10.0  # scattered spikes
        out.append(x)
    return out


def assert_same(fused: SeasonalBaseline, plain: SeasonalBaseline, rtol: float, atol: float) -> None:
    for name in FIELDS:
        a, b = getattr(fused.state, name), getattr(plain.state, name)
        if a.dtype.kind == "f":
            np.testing.assert_allclose(a, b, rtol=rtol, atol=atol, err_msg=name)
        else:
            np.testing.assert_array_equal(a, b, err_msg=name)


def run(fused: SeasonalBaseline, plain: SeasonalBaseline, n: int, count: int, seed: int,
        rtol: float, atol: float, use_step: bool) -> int:
    """Feed both the same hours, nodes joining over time; returns the adoptions seen."""
    adoptions = 0
    for h, x in enumerate(hours(n, count, seed)):
        size = min(n, n // 4 + h * n // 40)  # new nodes appear
        fused.resize(size)
        plain.resize(size)
        y = fused.to_working(x[:size])
        slot, day = h % fused.settings.season_hours, (h // 24) % 7
        if use_step:
            f1, s1, a1 = fused.step(y, slot, day)
            f2, s2, a2 = plain.step(y, slot, day)
            np.testing.assert_allclose(f1, f2, rtol=rtol, atol=atol)
            np.testing.assert_allclose(s1, s2, rtol=rtol, atol=atol)
        else:
            f1, f2 = fused.forecast(slot, day), plain.forecast(slot, day)
            np.testing.assert_allclose(f1, f2, rtol=rtol, atol=atol)
            a1 = fused.update(y, slot, day, forecast=f1, scale=fused.scale(yhat=f1))
            a2 = plain.update(y, slot, day, forecast=f2, scale=plain.scale(yhat=f2))
        np.testing.assert_array_equal(a1, a2)
        adoptions += int(a1.sum())
        assert_same(fused, plain, rtol, atol)
    return adoptions


@pytest.mark.parametrize("use_step", [True, False])
@pytest.mark.parametrize(("dtype", "rtol", "atol"), [("float64", 1e-12, 1e-12), ("float32", 1e-5, 1e-6)])
def test_fused_matches_numpy(dtype: str, rtol: float, atol: float, use_step: bool) -> None:
    fused, plain = pair(dtype=dtype, warmup_hours=10, adopt_after_hours=6, relearn_hours=5)
    adoptions = run(fused, plain, 4000, 100, 1, rtol, atol, use_step)
    assert adoptions > 100  # the surge and the outage were adopted
    assert (fused.state.relearn > 0).any() or adoptions


@pytest.mark.parametrize("kw", [
    {"weekly": False, "count_noise": False, "transform": "identity"},
    {"adopt_after_hours": 0, "min_scale": 0.0, "warmup_hours": 0},
    {"variance_rate": 0.5, "clip_scales": 1.0, "season_hours": 5},
])
def test_fused_matches_numpy_other_settings(kw: dict) -> None:
    fused, plain = pair(dtype="float64", **kw)
    run(fused, plain, 600, 60, 2, 1e-12, 1e-12, use_step=True)


def test_update_without_forecast_and_scale() -> None:
    fused, plain = pair(dtype="float64")
    for h, x in enumerate(hours(500, 40, 3)):
        fused.resize(500)
        plain.resize(500)
        y = fused.to_working(x)
        np.testing.assert_array_equal(fused.update(y, h % 24, 0), plain.update(y, h % 24, 0))
    assert_same(fused, plain, 1e-12, 1e-12)


def test_step_is_forecast_scale_update() -> None:
    """``step`` returns the forecast and scale of the state before the hour."""
    b, = pair(dtype="float64")[:1]
    b.resize(300)
    data = hours(300, 30, 4)
    for h, x in enumerate(data):
        y = b.to_working(x)
        f, s = b.forecast(h % 24, 1), b.scale(yhat=b.forecast(h % 24, 1))
        f2, s2, _ = b.step(y, h % 24, 1)
        np.testing.assert_array_equal(f, f2)
        np.testing.assert_array_equal(s, s2)
