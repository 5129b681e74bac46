"""The seasonal baseline checked against references outside the project.

* statsmodels' Holt-Winters (``ExponentialSmoothing``) with fixed parameters and known
  initial states gives the one-step forecasts of the single-season additive model;
* river's ``metrics.SMAPE`` gives the symmetric MAPE;
* the generic learner checks (no input mutation, pickling, late nodes, vectorised step
  equals per-node work) that the project keeps for every learner.
"""

from __future__ import annotations

import pickle
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from river import metrics as river_metrics
from statsmodels.tsa.holtwinters import ExponentialSmoothing

from alerter.baseline import SeasonalBaseline
from alerter.config import BaselineSettings
from alerter.metrics import smape

PAIRS = [(0.3, 0.2), (0.05, 0.1), (0.8, 0.15), (1.0, 0.0), (0.2, 0.7)]


def statsmodels_fitted(y: np.ndarray, m: int, alpha: float, gamma: float,
                       l0: float, s0: np.ndarray) -> np.ndarray:
    # Source: statsmodels ExponentialSmoothing (statsmodels.tsa.holtwinters), additive
    # season, no trend, initialization_method='known', fixed parameters (optimized=False);
    # fittedvalues are the one-step-ahead forecasts.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = ExponentialSmoothing(
            y, seasonal="add", seasonal_periods=m, trend=None, initialization_method="known",
            initial_level=l0, initial_seasonal=s0,
        )
        fit = model.fit(smoothing_level=alpha, smoothing_seasonal=gamma, optimized=False)
    return np.asarray(fit.fittedvalues, dtype=float)


def plain_hw(m: int, alpha: float, gamma: float) -> SeasonalBaseline:
    """The project's baseline reduced to textbook single-season additive Holt-Winters."""
    return SeasonalBaseline(BaselineSettings(
        transform="identity", dtype="float64", alpha=alpha, gamma=gamma, weekly=False,
        season_hours=m, clip_scales=float("inf"), adopt_after_hours=0, warmup_hours=0,
    ))


def project_forecasts(y: np.ndarray, m: int, alpha: float, gamma: float,
                      l0: np.ndarray, s0: np.ndarray) -> np.ndarray:
    """One-step forecasts for ``y`` of shape (T, n); ``l0`` (n,), ``s0`` (m, n)."""
    b = plain_hw(m, alpha, gamma)
    b.set_state(level=l0, season=s0, var=np.ones(l0.shape[0]))
    out = np.empty_like(y)
    for t in range(y.shape[0]):
        out[t] = b.forecast(t % m, 0)
        b.update(y[t].copy(), t % m, 0)
    return out


def initial_states(y: np.ndarray, m: int) -> tuple[float, np.ndarray]:
    # Common practice, no source: start the level at the first season's mean and the
    # seasonal indices at the first season's deviations from it.
    l0 = float(y[:m].mean())
    return l0, y[:m] - l0


# -- statsmodels ----------------------------------------------------------------------


@pytest.mark.parametrize("alpha,gamma", PAIRS)
def test_matches_statsmodels_on_airline(airline, alpha, gamma):
    """Box-Jenkins airline passengers (monthly, m=12): forecasts equal statsmodels' to 1e-9."""
    m = 12
    l0, s0 = initial_states(airline, m)
    ref = statsmodels_fitted(airline, m, alpha, gamma, l0, s0)
    got = project_forecasts(airline[:, None], m, alpha, gamma, np.array([l0]), s0[:, None])[:, 0]
    assert len(ref) == len(airline) == 144
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)


@pytest.mark.parametrize("alpha,gamma", PAIRS)
def test_matches_statsmodels_on_waterflow(waterflow, alpha, gamma):
    """river's WaterFlow (hourly, m=24; taken as a plain sequence): equal to 1e-9."""
    _, y = waterflow
    m = 24
    l0, s0 = initial_states(y, m)
    ref = statsmodels_fitted(y, m, alpha, gamma, l0, s0)
    got = project_forecasts(y[:, None], m, alpha, gamma, np.array([l0]), s0[:, None])[:, 0]
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)


def test_vectorised_columns_each_match_their_statsmodels_fit(airline, waterflow):
    """Many series at once (one column each): every column equals its own statsmodels fit."""
    _, flow = waterflow
    m, alpha, gamma = 24, 0.25, 0.3
    rng = np.random.default_rng(7)
    T = 400
    cols = [flow[:T], flow[300:300 + T], 3.0 * flow[:T] - 50.0, np.resize(airline, T),
            rng.gamma(2.0, 50.0, T), np.zeros(T)]
    y = np.column_stack(cols)
    inits = [initial_states(y[:, j], m) for j in range(y.shape[1])]
    l0 = np.array([i[0] for i in inits])
    s0 = np.column_stack([i[1] for i in inits])
    got = project_forecasts(y, m, alpha, gamma, l0, s0)
    for j in range(y.shape[1]):
        ref = statsmodels_fitted(y[:, j], m, alpha, gamma, l0[j], s0[:, j])
        np.testing.assert_allclose(got[:, j], ref, rtol=0, atol=1e-9, err_msg=f"column {j}")


# -- SMAPE ----------------------------------------------------------------------------


def river_smape(actual, forecast) -> float:
    # Source: river.metrics.SMAPE (update per pair, get() in percent; a 0/0 pair counts 0).
    metric = river_metrics.SMAPE()
    for a, f in zip(actual, forecast, strict=True):
        metric.update(float(a), float(f))
    return metric.get()


def test_smape_matches_river_on_statsmodels_forecasts(airline):
    m = 12
    l0, s0 = initial_states(airline, m)
    fc = statsmodels_fitted(airline, m, 0.3, 0.2, l0, s0)
    ours = smape(airline, fc)
    assert ours > 0
    assert ours == pytest.approx(river_smape(airline, fc), abs=1e-9)


def test_smape_matches_river_on_random_inputs_with_zeros():
    rng = np.random.default_rng(3)
    for _ in range(20):
        n = int(rng.integers(1, 200))
        a = rng.poisson(2.0, n).astype(float) * rng.integers(0, 2, n)
        f = rng.exponential(3.0, n) * rng.integers(0, 2, n)
        a[: n // 5] = 0.0
        f[: n // 10] = 0.0  # both zero on the first tenth
        assert smape(a, f) == pytest.approx(river_smape(a, f), abs=1e-9)


_nonneg = st.one_of(st.just(0.0), st.floats(min_value=0.0, max_value=1e9),
                    st.floats(min_value=0.0, max_value=1e300))


def _smape_bound_holds(a: np.ndarray, f: np.ndarray) -> None:
    """Common practice, no source (from memory): SMAPE's terms 2|a-f|/(|a|+|f|) lie in
    [0, 2], so the percentage lies in [0, 200]; the M-competitions report it on that scale."""
    value = smape(a, f)
    assert 0.0 <= value <= 200.0


@settings(max_examples=200, deadline=None)
@given(pairs=st.lists(st.tuples(_nonneg, _nonneg), min_size=1, max_size=50))
def test_smape_is_bounded(pairs):
    """For any non-negative floats in [0, 1e300] (zeros and huge values): 0 <= SMAPE <= 200."""
    _smape_bound_holds(np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs]))


@pytest.mark.parametrize("a,f", [(0.0, np.finfo(float).max), (np.finfo(float).max, 0.0),
                                 (np.finfo(float).max, np.finfo(float).max / 3), (0.0, 9e307)])
def test_smape_is_bounded_at_the_largest_doubles(a, f):
    """The same bound for the largest finite doubles (where 2|a-f| overflows in a naive form)."""
    _smape_bound_holds(np.array([a, 1.0]), np.array([f, 1.0]))


# -- generic learner checks -------------------------------------------------------------


def _rhythm(T: int, n: int, seed: int, nan_rate: float = 0.05) -> np.ndarray:
    """Counts with a daily rhythm, one surge run, one lasting step and NaN gaps."""
    rng = np.random.default_rng(seed)
    t = np.arange(T)[:, None]
    level = rng.uniform(20, 5000, n)[None, :]
    rate = level * (1.0 + 0.5 * np.sin(2 * np.pi * (t % 24) / 24.0 + rng.uniform(0, 6, n)))
    x = rng.poisson(rate).astype(float)
    x[T // 3: T // 3 + 3] *= 20.0  # a short surge: clipped, not adopted
    x[2 * T // 3:, : max(1, n // 2)] *= 8.0  # a lasting step on half the nodes: adopted
    x[rng.random(x.shape) < nan_rate] = np.nan
    x[0] = np.nan_to_num(x[0], nan=10.0)  # every node starts at hour 0
    return x


def _slots(t: int) -> tuple[int, int]:
    return t % 24, (t // 24) % 7


LEARNER = BaselineSettings(dtype="float64", adopt_after_hours=6, warmup_hours=24)


def test_update_does_not_mutate_input():
    # Common practice, no source: a learner must not write into the caller's arrays.
    x = _rhythm(200, 5, seed=1)
    b = SeasonalBaseline(LEARNER)
    b.resize(5)
    for t in range(x.shape[0]):
        y = b.to_working(x[t])
        before = y.copy()
        b.update(y, *_slots(t))
        np.testing.assert_array_equal(y, before)


def test_pickle_round_trip_continues_identically():
    # Common practice, no source: a learner's state survives pickle and resumes exactly.
    x = _rhythm(300, 6, seed=2)
    b = SeasonalBaseline(LEARNER)
    b.resize(6)
    for t in range(150):
        b.update(b.to_working(x[t]), *_slots(t))
    copy = pickle.loads(pickle.dumps(b))
    assert copy is not b and copy.state.level is not b.state.level
    for t in range(150, 300):
        s, d = _slots(t)
        np.testing.assert_array_equal(copy.forecast(s, d), b.forecast(s, d))
        np.testing.assert_array_equal(copy.scale(), b.scale())
        a1 = b.update(b.to_working(x[t]), s, d)
        a2 = copy.update(copy.to_working(x[t]), s, d)
        np.testing.assert_array_equal(a1, a2)


@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_nodes_appearing_later_leave_old_columns_unchanged(dtype):
    # Common practice, no source: growing the node set mid-stream must not disturb the
    # nodes already there.
    x = _rhythm(300, 4, seed=3)
    extra = _rhythm(300, 3, seed=4)
    cfg = LEARNER.model_copy(update={"dtype": dtype})
    plain, grown = SeasonalBaseline(cfg), SeasonalBaseline(cfg)
    plain.resize(4)
    grown.resize(4)
    for t in range(300):
        s, d = _slots(t)
        if t == 100:
            grown.resize(6)
        if t == 180:
            grown.resize(7)
        xg = np.concatenate([x[t], extra[t, : grown.state.n - 4]])
        f_plain = plain.forecast(s, d).copy()
        f_grown = grown.forecast(s, d)[:4].copy()
        np.testing.assert_array_equal(f_grown, f_plain)
        plain.update(plain.to_working(x[t]), s, d)
        grown.update(grown.to_working(xg), s, d)
    for name in ("level", "var", "seen", "run", "run_sum"):
        np.testing.assert_array_equal(getattr(grown.state, name)[:4], getattr(plain.state, name))
    np.testing.assert_array_equal(grown.state.season[:, :4], plain.state.season)
    np.testing.assert_array_equal(grown.state.week[:, :4], plain.state.week)
    assert grown.state.seen[4:].min() > 0  # the late nodes did learn


def test_vectorised_step_equals_per_node_loop():
    """One N-node baseline equals N single-node baselines, clipping and adoption on (1e-12)."""
    # Common practice, no source: a vectorised learner equals the same learner run per series.
    n, T = 12, 400
    x = _rhythm(T, n, seed=5)
    together = SeasonalBaseline(LEARNER)
    together.resize(n)
    alone = [SeasonalBaseline(LEARNER) for _ in range(n)]
    for b in alone:
        b.resize(1)
    clipped = adopted_any = 0
    for t in range(T):
        s, d = _slots(t)
        f_all = together.forecast(s, d).copy()
        bound = together.scale() * LEARNER.clip_scales
        y = together.to_working(x[t])
        clipped += int(np.sum(np.abs(y - f_all) > bound))
        adopted_all = together.update(y, s, d)
        adopted_any += int(adopted_all.sum())
        for j, b in enumerate(alone):
            f_one = b.forecast(s, d)[0]
            assert f_one == pytest.approx(f_all[j], abs=1e-12, rel=0)
            a_one = b.update(b.to_working(x[t, j: j + 1]), s, d)
            assert bool(a_one[0]) == bool(adopted_all[j])
    assert clipped > 0 and adopted_any > 0, "the data must exercise clipping and adoption"
    for j, b in enumerate(alone):
        for name in ("level", "var", "run_sum"):
            np.testing.assert_allclose(getattr(b.state, name), getattr(together.state, name)[j: j + 1],
                                       rtol=0, atol=1e-12)
        np.testing.assert_array_equal(b.state.run, together.state.run[j: j + 1])
        np.testing.assert_allclose(b.state.season[:, 0], together.state.season[:, j], rtol=0, atol=1e-12)
        np.testing.assert_allclose(b.state.week[:, 0], together.state.week[:, j], rtol=0, atol=1e-12)


@settings(max_examples=100, deadline=None)
@given(x=hnp.arrays(np.float64, st.tuples(st.integers(1, 60), st.integers(1, 5)),
                    elements=st.one_of(st.just(np.nan), st.floats(0, 1e6))))
def test_update_never_mutates_input_any_data(x):
    """For any counts (NaN gaps, zeros, up to 1e6): ``update`` leaves its argument as given."""
    # Common practice, no source: a learner must not write into the caller's arrays.
    b = SeasonalBaseline(BaselineSettings(warmup_hours=2, adopt_after_hours=3))
    b.resize(x.shape[1])
    for t in range(x.shape[0]):
        y = b.to_working(x[t])
        before = y.copy()
        b.update(y, *_slots(t))
        np.testing.assert_array_equal(y, before)
