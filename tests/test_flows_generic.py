"""The project's generic learner checks, applied to the flow learner."""

from __future__ import annotations

import ast
import copy
import dataclasses
import inspect
import math
import pickle
import textwrap

import numpy as np
import pytest

from alerter.flows import FlowLearner, FlowSettings, FlowState, match_edges, persistence_forecast

N = 6
SRC = np.array([0, 1, 2, 0, 3, 4, 5, 1])
DST = np.array([3, 3, 3, 4, 4, 5, 0, 5])


def _stream(hours: int, seed: int = 0, n: int = N, missing: float = 0.1):
    """Counts, baselines and link ages; some counts missing."""
    rng = np.random.default_rng(seed)
    b = rng.uniform(20.0, 200.0, n)
    for t in range(hours):
        x = rng.poisson(b * (1.0 + 0.3 * rng.standard_normal(n)).clip(0.1)).astype(float)
        x[rng.random(n) < missing] = np.nan
        yield x, b * (1.0 + 0.05 * math.sin(t / 3.0)), None


def _ages(t: int, e: int = SRC.size) -> np.ndarray:
    return np.linspace(0.0, 300.0, e) + t


def _learner(**kw) -> FlowLearner:
    fl = FlowLearner(FlowSettings(**kw))
    fl.resize(N, SRC, DST)
    return fl


def _feed(fl: FlowLearner, hours: int, seed: int = 0, start: int = 0, missing: float = 0.1) -> list:
    outs = []
    for t, (x, b, _) in enumerate(_stream(hours, seed, missing=missing)):
        outs.append(fl.observe(x, b, _ages(start + t, fl.state.n_edges)))
    return outs


SETTINGS = [
    dict(),
    dict(forgetting=False, lags=2, own_lag=True),
    dict(lags=1, own_lag=True, precondition=False, dtype="float64"),
]


@pytest.mark.parametrize("kw", SETTINGS)
def test_inputs_are_not_mutated(kw):
    fl = FlowLearner(FlowSettings(**kw))
    src, dst = SRC.copy(), DST.copy()
    fl.resize(N, src, dst)
    for t, (x, b, _) in enumerate(_stream(30)):
        age = _ages(t)
        saved = (x.copy(), b.copy(), age.copy())
        fl.observe(x, b, age)
        fl.contributions(x, b, age)
        ehat = persistence_forecast(x - b, 0.5)
        ehat_saved = ehat.copy()
        fl.forecast(ehat, b, age)
        for before, after in zip(saved + (ehat_saved,), (x, b, age, ehat), strict=True):
            np.testing.assert_array_equal(before, after)
    np.testing.assert_array_equal(src, SRC)
    np.testing.assert_array_equal(dst, DST)


def test_settings_are_stored_as_given_and_frozen():
    s = FlowSettings(lags=2, prior=0.03, cap=None)
    fl = FlowLearner(s)
    assert fl.settings is s
    with pytest.raises(AttributeError):
        s.lags = 3  # type: ignore[misc]
    with pytest.raises(ValueError, match="lags"):
        FlowSettings(lags=-1)


def test_every_settings_field_has_a_docstring():
    tree = ast.parse(textwrap.dedent(inspect.getsource(FlowSettings)))
    body = tree.body[0].body
    fields = {f.name for f in dataclasses.fields(FlowSettings)}
    documented = set()
    for stmt, nxt in zip(body, body[1:], strict=False):
        if isinstance(stmt, ast.AnnAssign) and isinstance(nxt, ast.Expr) and isinstance(nxt.value, ast.Constant):
            if isinstance(nxt.value.value, str) and nxt.value.value.strip():
                documented.add(stmt.target.id)
    assert fields and documented == fields


@pytest.mark.parametrize("kw", SETTINGS)
def test_state_survives_pickle_round_trip(kw):
    fl = FlowLearner(FlowSettings(**kw))
    fl.resize(N, SRC, DST)
    _feed(fl, 40)
    blob = pickle.dumps(fl.state)
    twin = FlowLearner(FlowSettings(**kw))
    twin.state = pickle.loads(blob)
    assert isinstance(twin.state, FlowState)
    a = _feed(fl, 25, seed=9, start=40)
    b = _feed(twin, 25, seed=9, start=40)
    for sa, sb in zip(a, b, strict=True):
        np.testing.assert_array_equal(sa.predicted, sb.predicted)
        np.testing.assert_array_equal(sa.attribution.capped, sb.attribution.capped)
    np.testing.assert_array_equal(fl.coefficients, twin.coefficients)
    np.testing.assert_array_equal(fl.own_coefficients, twin.own_coefficients)
    ehat = np.ones(N)
    np.testing.assert_array_equal(fl.forecast(ehat, None, _ages(99)), twin.forecast(ehat, None, _ages(99)))


@pytest.mark.parametrize("kw", SETTINGS)
def test_same_inputs_same_results(kw):
    a, b = _learner(**kw), _learner(**kw)
    for sa, sb in zip(_feed(a, 60, seed=3), _feed(b, 60, seed=3), strict=True):
        np.testing.assert_array_equal(sa.predicted, sb.predicted)
        np.testing.assert_array_equal(sa.attribution.share, sb.attribution.share)
    np.testing.assert_array_equal(a.coefficients, b.coefficients)


def test_nodes_and_edges_appear_and_vanish():
    kw = dict(forgetting=False, lags=1, own_lag=True, dtype="float64")
    fl = _learner(**kw)
    _feed(fl, 50)
    old = copy.deepcopy(fl.state)
    x, b, _ = next(_stream(1, seed=11))
    age_old = _ages(50)
    before = fl.contributions(x, b, age_old).raw

    # drop edges 1 and 5, reverse the rest, add (6 -> 3) to a new node 6 and (2 -> 6)
    keep_old = np.array([7, 6, 4, 3, 2, 0])
    new_src = np.concatenate([SRC[keep_old], [6, 2]])
    new_dst = np.concatenate([DST[keep_old], [3, 6]])
    fl.resize(N + 1, new_src, new_dst)  # keep found by (src, dst) matching
    keep = match_edges(SRC, DST, new_src, new_dst, N + 1)
    np.testing.assert_array_equal(keep, np.concatenate([keep_old, [-1, -1]]))

    st = fl.state
    np.testing.assert_array_equal(st.beta[:, :6], old.beta[:, keep_old])
    np.testing.assert_array_equal(fl.coefficients[:, :6], old.beta_avg[:, keep_old])
    np.testing.assert_array_equal(st.cov[:6], old.cov[keep_old])
    np.testing.assert_array_equal(st.edge_hours[:6], old.edge_hours[keep_old])
    assert np.all(st.beta[0, 6:] == fl.settings.prior) and np.all(st.beta[1:, 6:] == 0)
    assert np.all(st.edge_hours[6:] == 0) and np.all(st.cov[6:] == 0)
    np.testing.assert_array_equal(st.phi[:N], old.phi)
    assert st.phi[N] == 0 and st.node_hours[N] == 0

    # lagged history survived: kept edges explain the same hour the same way
    x7, b7 = np.append(x, np.nan), np.append(b, 10.0)
    age_new = np.concatenate([age_old[keep_old], [0.0, 0.0]])
    after = fl.contributions(x7, b7, age_new).raw
    np.testing.assert_allclose(after[:6], before[keep_old], rtol=0, atol=1e-12)
    # and learning continues with the new shape, node 6 counting as missing at first
    step = fl.observe(x7, b7, age_new)
    assert step.predicted.shape == (N + 1,)
    assert not step.updated[N]

    # explicit reindex: vanish everything but edge 0, then grow again
    fl.reindex(np.array([0]), 1)
    assert fl.state.n_edges == 1 and fl.state.src[0] == new_src[0]
    with pytest.raises(ValueError):
        fl.reindex(np.array([-1]), 1)  # new edge without endpoints
    with pytest.raises(ValueError):
        fl.resize(N, new_src, new_dst)  # nodes never shrink


def test_missing_destination_does_not_learn_and_missing_source_contributes_nothing():
    fl = _learner(forgetting=True, age_weighting=False, dtype="float64")
    _feed(fl, 20, missing=0.0)
    beta = fl.state.beta.copy()
    x = np.full(N, 50.0)
    b = np.full(N, 40.0)
    x[3] = np.nan  # destination 3 missing
    x[2] = np.nan  # source 2 (edge 2 -> 3) missing
    att = fl.contributions(x, b, None)
    assert att.raw[2] == 0.0
    step = fl.observe(x, b, None)
    into3 = DST == 3
    np.testing.assert_array_equal(fl.state.beta[:, into3], beta[:, into3])
    assert not step.updated[3]
    assert not np.array_equal(fl.state.beta[:, ~into3], beta[:, ~into3])


def test_age_weight_new_edge_carries_whole_baseline_old_edge_only_excess():
    s = FlowSettings(age_tau_hours=100.0, dtype="float64", lags=1)
    fl = FlowLearner(s)
    src, dst = np.array([0, 0, 0, 1]), np.array([2, 3, 4, 2])
    fl.resize(5, src, dst)
    fl.state.beta[:] = 0.0
    fl.state.beta[0] = 1.0  # c_e = u_e(t)
    x = np.array([130.0, 70.0, 0.0, 0.0, 0.0])
    b = np.array([100.0, 80.0, 0.0, 0.0, 0.0])
    age = np.array([0.0, 100.0, 1e7, 0.0])
    raw = fl.contributions(x, b, age).raw
    np.testing.assert_allclose(raw[0], 130.0)  # brand new: excess + whole baseline = x
    np.testing.assert_allclose(raw[1], 30.0 + math.exp(-1.0) * 100.0)
    np.testing.assert_allclose(raw[2], 30.0)  # old: only the excess
    np.testing.assert_allclose(raw[3], 70.0)
    off = FlowLearner(FlowSettings(age_weighting=False, dtype="float64"))
    off.resize(5, src, dst)
    off.state.beta[0] = 1.0
    np.testing.assert_allclose(off.contributions(x, b, age).raw, [30.0, 30.0, 30.0, -10.0])


def test_forecast_formula():
    """F - b = sum_e beta0 (ehat_src + (1-a) b_src) + beta1 u(t-1) + phi e_dst(t-1)."""
    fl = FlowLearner(FlowSettings(lags=1, own_lag=True, dtype="float64", age_tau_hours=50.0))
    src, dst = np.array([0, 1]), np.array([2, 2])
    fl.resize(3, src, dst)
    x1, b1 = np.array([12.0, 30.0, 9.0]), np.array([10.0, 20.0, 5.0])
    fl.observe(x1, b1, np.array([0.0, 0.0]))
    st = fl.state
    st.beta[:] = [[0.2, 0.1], [0.05, 0.3]]
    st.phi[:] = [0.0, 0.0, 0.4]
    ehat = persistence_forecast(x1 - b1, decay=0.5)
    np.testing.assert_allclose(ehat, [1.0, 5.0, 2.0])
    b2 = np.array([11.0, 21.0, 6.0])
    age = np.array([1.0, 500.0])
    w = np.exp(-age / 50.0)
    w_prev = np.exp(-(age - 1.0).clip(0) / 50.0)
    u_prev = (x1 - b1)[src] + w_prev * b1[src]
    expect = (0.2 * (ehat[0] + w[0] * b2[0]) + 0.1 * (ehat[1] + w[1] * b2[1])
              + 0.05 * u_prev[0] + 0.3 * u_prev[1] + 0.4 * (x1[2] - b1[2]))
    got = fl.forecast(ehat, b2, age)
    assert got[2] == pytest.approx(expect, abs=1e-12)
    assert got[0] == 0.0 and got[1] == 0.0  # nodes without in-edges


# -- the plain per-edge loop reference --------------------------------------------------
class LoopFlows:
    """Plain Python, one edge at a time; written independently from the module's formulas."""

    def __init__(self, s: FlowSettings, n: int, src, dst):
        self.s, self.n, self.src, self.dst = s, n, [int(v) for v in src], [int(v) for v in dst]
        e, k = len(self.src), s.lags + 1
        self.d = k + (1 if s.own_lag else 0)
        self.beta = [[s.prior if lag == 0 else 0.0 for lag in range(k)] for _ in range(e)]
        self.avg = [row[:] for row in self.beta]
        self.cov = [np.zeros((self.d, self.d)) for _ in range(e)]
        self.ne = [0] * e
        self.phi, self.phi_avg, self.phi_s = [0.0] * n, [0.0] * n, [0.0] * n
        self.ni, self.qmean = [0] * n, [0.0] * n
        self.hist: list[tuple[list, list]] = []  # most recent last

    def step(self, h):
        s = self.s
        return s.step if s.forgetting else s.step0 * (1 + h / s.step_t0_hours) ** (-s.step_power)

    def rate(self, h):
        return max(1.0 / (h + 1), self.s.scale_rate)

    def u(self, e_idx, lag, e_now, b_now, age):
        if lag == 0:
            ex, bb = e_now, b_now
        elif len(self.hist) >= lag:
            ex, bb = self.hist[-lag]
        else:
            return 0.0
        j = self.src[e_idx]
        w = 0.0 if (not self.s.age_weighting or age is None) else math.exp(-max(age[e_idx] - lag, 0) / self.s.age_tau_hours)
        return ex[j] + w * bb[j]

    def observe(self, x, b, age):  # noqa: C901 - deliberately one plain loop
        s, n, E, k = self.s, self.n, len(self.src), self.s.lags + 1
        ok = [math.isfinite(x[i]) and math.isfinite(b[i]) for i in range(n)]
        ex = [x[i] - b[i] if ok[i] else 0.0 for i in range(n)]
        bb = [b[i] if ok[i] else 0.0 for i in range(n)]
        own = [self.hist[-1][0][i] if (s.own_lag and self.hist) else 0.0 for i in range(n)]
        u = [[self.u(e, lag, ex, bb, age) for lag in range(k)] for e in range(E)]
        pub_beta = self.beta if s.forgetting else self.avg
        pub_phi = self.phi if s.forgetting else self.phi_avg
        predicted, pred_iter = [0.0] * n, [0.0] * n
        for i in range(n):
            predicted[i] = pub_phi[i] * own[i]
            pred_iter[i] = self.phi[i] * own[i]
        for e in range(E):
            predicted[self.dst[e]] += sum(pub_beta[e][lag] * u[e][lag] for lag in range(k))
            pred_iter[self.dst[e]] += sum(self.beta[e][lag] * u[e][lag] for lag in range(k))
        err = [ex[i] - pred_iter[i] if ok[i] else 0.0 for i in range(n)]
        # step sizes and the preconditioned directions
        step_e = [self.step(self.ne[e]) if ok[self.dst[e]] else 0.0 for e in range(E)]
        step_n = [self.step(self.ni[i]) if ok[i] else 0.0 for i in range(n)]
        for i in range(n):
            if s.own_lag and ok[i]:
                self.phi_s[i] += self.rate(self.ni[i]) * (own[i] ** 2 - self.phi_s[i])
        v = [np.zeros(self.d) for _ in range(E)]
        quad, v_own = [0.0] * n, [0.0] * n
        indeg = [self.dst.count(i) for i in range(n)]
        for e in range(E):
            if not ok[self.dst[e]]:
                continue
            z = np.array(u[e] + ([own[self.dst[e]]] if s.own_lag else []))
            if s.precondition:
                r = self.rate(self.ne[e])
                self.cov[e] = self.cov[e] + r * (np.outer(z, z) - self.cov[e])
                c = self.cov[e]
                if self.d == 1:
                    v[e] = z / (c[0, 0] * (1 + s.ridge) + 1e-30)
                else:
                    ridge = np.trace(c) * s.ridge / self.d + 1e-30
                    v[e] = np.linalg.solve(c + ridge * np.eye(self.d), z)
                quad[self.dst[e]] += float(z @ v[e])
                if s.own_lag:
                    v_own[self.dst[e]] += v[e][k]
            else:
                v[e] = z
                quad[self.dst[e]] += sum(val * val for val in u[e])
        for i in range(n):
            if s.own_lag and not s.precondition:
                quad[i] += own[i] ** 2
                v_own[i] = own[i]
            elif s.own_lag and indeg[i] == 0:
                lonely = own[i] / (self.phi_s[i] + 1e-30)
                v_own[i] += lonely
                quad[i] += lonely * own[i]
        gain = [0.0] * n
        for i in range(n):
            if ok[i]:
                self.qmean[i] += self.rate(self.ni[i]) * (quad[i] - self.qmean[i])
            mu_max = max([step_n[i]] + [step_e[e] for e in range(E) if self.dst[e] == i])
            gain[i] = err[i] / (max(self.qmean[i], mu_max * quad[i]) + s.eps)
        for e in range(E):
            g = step_e[e] * gain[self.dst[e]]
            for lag in range(k):
                self.beta[e][lag] += g * v[e][lag]
            pull = step_e[e] * s.prior_pull * math.exp(-self.ne[e] / s.prior_hours)
            self.beta[e][0] += pull * (s.prior - self.beta[e][0])
            for lag in range(1, k):
                self.beta[e][lag] -= pull * self.beta[e][lag]
            for lag in range(k):
                self.beta[e][lag] = min(max(self.beta[e][lag], s.beta_min), s.beta_max)
        if s.cap is not None:
            for j in range(n):
                out_edges = [e for e in range(E) if self.src[e] == j]
                total = sum(max(self.beta[e][lag], 0.0) for e in out_edges for lag in range(k))
                if total > s.cap:
                    for e in out_edges:
                        for lag in range(k):
                            if self.beta[e][lag] > 0:
                                self.beta[e][lag] *= s.cap / total
        for e in range(E):
            if ok[self.dst[e]]:
                self.ne[e] += 1
                w = (1 + s.average_eta) / (self.ne[e] + s.average_eta)
                for lag in range(k):
                    self.avg[e][lag] += w * (self.beta[e][lag] - self.avg[e][lag])
        for i in range(n):
            if s.own_lag:
                self.phi[i] = min(max(self.phi[i] + step_n[i] * gain[i] * v_own[i], s.own_min), s.own_max)
            if ok[i]:
                self.ni[i] += 1
                w = (1 + s.average_eta) / (self.ni[i] + s.average_eta)
                if s.own_lag:
                    self.phi_avg[i] += w * (self.phi[i] - self.phi_avg[i])
        self.hist.append((ex, bb))
        return predicted

    @property
    def coefficients(self):
        rows = self.beta if self.s.forgetting else self.avg
        return np.array(rows).T


LOOP_CASES = [
    dict(lags=1, own_lag=True, forgetting=False),
    dict(lags=0, forgetting=True, cap=0.05, prior_pull=0.5),
    dict(lags=2, own_lag=True, precondition=False, beta_min=-np.inf, beta_max=np.inf),
    dict(lags=1, forgetting=False, age_weighting=False, own_lag=True, own_min=-0.1, own_max=0.1),
]


@pytest.mark.parametrize("kw", LOOP_CASES)
def test_vectorised_step_equals_plain_loop(kw):
    s = FlowSettings(dtype="float64", age_tau_hours=20.0, **kw)
    n = N + 1  # node 6 has no in-edges and no out-edges
    fl = FlowLearner(s)
    fl.resize(n, SRC, DST)
    ref = LoopFlows(s, n, SRC, DST)
    for t, (x, b, _) in enumerate(_stream(40, seed=5, n=n, missing=0.15)):
        age = _ages(t) / 10.0
        got = fl.observe(x, b, age).predicted
        want = ref.observe(x, b, age)
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-10 * (1 + np.abs(want).max()))
        np.testing.assert_allclose(fl.coefficients, ref.coefficients, rtol=0, atol=1e-10)
        np.testing.assert_allclose(fl.own_coefficients,
                                   ref.phi if s.forgetting else ref.phi_avg, rtol=0, atol=1e-10)
    assert np.abs(fl.coefficients - s.prior * (np.arange(s.lags + 1) == 0)[:, None]).max() > 1e-3
