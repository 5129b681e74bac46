"""The fused per-destination kernels of the flow learner against its numpy path and a plain loop.

The default path (lag 0, no own lag, forgetting) over a destination-sorted edge list runs
one parallel numba kernel per hour (``alerter.flow_kernels``); these checks hold it to the
numpy passes of the same step and to the deliberately plain loop of
``tests/test_flows_generic.py`` (the reference written from the module's formulas), and
check the cross-partition totals hook of the conservation cap.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest

from alerter import edge_room, flow_kernels
from alerter.flows import FlowLearner, FlowSettings, LinkAges

from .test_flows_generic import LoopFlows

pytestmark = pytest.mark.skipif(not flow_kernels.AVAILABLE, reason="numba kernels disabled by ALERTER_FLOW_KERNEL")

N = 40


def _graph(seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Destination-sorted distinct edges, a hub with many in-links, some nodes without any."""
    rng = np.random.default_rng(seed)
    pairs = {(int(s), int(d)) for s, d in zip(rng.integers(0, N, 300), rng.integers(0, N - 5, 300), strict=True)
             if s != d}
    pairs |= {(s, 0) for s in range(1, N)}  # node 0 is a hub
    keys = sorted(pairs, key=lambda p: (p[1], p[0]))
    return np.array([p[0] for p in keys]), np.array([p[1] for p in keys])


SRC, DST = _graph()


def _hours(hours: int, seed: int = 4, missing: float = 0.1):
    rng = np.random.default_rng(seed)
    level = rng.uniform(5.0, 300.0, N)
    for t in range(hours):
        b = level * (1.0 + 0.2 * np.sin(t / 4.0))
        x = rng.poisson(b * rng.uniform(0.5, 1.8, N)).astype(float)
        x[rng.random(N) < missing] = np.nan
        yield t, x, b


def _pair(**kw) -> tuple[FlowLearner, FlowLearner]:
    a, b = FlowLearner(FlowSettings(**kw)), FlowLearner(FlowSettings(**kw))
    a.resize(N, SRC, DST)
    b.resize(N, SRC, DST)
    return a, b


def _numpy_observe(fl: FlowLearner, *args, monkeypatch: pytest.MonkeyPatch, **kw):
    with monkeypatch.context() as m:
        m.setattr(flow_kernels, "AVAILABLE", False)
        return fl.observe(*args, **kw)


@pytest.mark.parametrize("kw", [dict(), dict(dtype="float64", cap=0.05, prior_pull=0.5),
                                dict(dtype="float64", age_weighting=False)])
def test_fused_hour_equals_numpy_passes(kw: dict, monkeypatch: pytest.MonkeyPatch) -> None:
    fused, plain = _pair(**kw)
    born = np.linspace(-400, 0, SRC.size).astype(np.int64)
    tol = 2e-4 if fused.dtype == np.float32 else 1e-9
    assert fused._fused()
    for t, x, b in _hours(120):
        got = fused.observe(x, b, LinkAges(born, t))
        want = _numpy_observe(plain, x, b, LinkAges(born, t), monkeypatch=monkeypatch)
        scale = 1.0 + np.abs(want.predicted).max()
        np.testing.assert_allclose(got.predicted, want.predicted, rtol=0, atol=tol * scale)
        np.testing.assert_allclose(got.attribution.capped, want.attribution.capped, rtol=0, atol=tol * scale)
        np.testing.assert_allclose(got.attribution.share, want.attribution.share, rtol=0, atol=tol)
        np.testing.assert_allclose(got.attribution.explained, want.attribution.explained, rtol=0, atol=tol * scale)
        np.testing.assert_allclose(fused.coefficients, plain.coefficients, rtol=0, atol=tol)
    np.testing.assert_array_equal(fused.state.edge_hours, plain.state.edge_hours)
    assert np.abs(fused.coefficients - fused.settings.prior).max() > 1e-3  # it learned something
    ehat = np.linspace(-50.0, 50.0, N)
    np.testing.assert_allclose(fused.forecast(ehat, None, None), plain.forecast(ehat, None, None),
                               rtol=0, atol=tol * 100)


def test_fused_hour_equals_plain_loop() -> None:
    """Against the plain loop reference (float64; explicit ages, as the loop takes them)."""
    s = FlowSettings(dtype="float64", age_tau_hours=20.0, cap=0.05, prior_pull=0.5)
    fl = FlowLearner(s)
    fl.resize(N, SRC, DST)
    ref = LoopFlows(s, N, SRC, DST)
    ages = np.linspace(0.0, 60.0, SRC.size)
    for t, x, b in _hours(40, missing=0.15):
        got = fl.observe(x, b, ages + t).predicted
        want = ref.observe(x, b, ages + t)
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-10 * (1 + np.abs(want).max()))
        np.testing.assert_allclose(fl.coefficients, ref.coefficients, rtol=0, atol=1e-10)


def test_cap_totals_hook_makes_two_halves_learn_like_the_whole() -> None:
    """Edges split by destination over two learners (two partitions, run in two threads); the
    totals hook sums the halves' per-source totals, so the cap binds as over the whole graph."""
    kw = dict(dtype="float64", cap=0.3, step=0.2)
    whole = FlowLearner(FlowSettings(**kw))
    whole.resize(N, SRC, DST)
    halves = []
    for part in (DST % 2 == 0, DST % 2 == 1):
        fl = FlowLearner(FlowSettings(**kw))
        fl.resize(N, SRC[part], DST[part])
        halves.append((fl, part))
    sync = threading.Barrier(2)
    partial: dict[int, np.ndarray] = {}

    def hook(k: int):
        def exchange(totals: np.ndarray) -> np.ndarray:
            partial[k] = totals.copy()
            sync.wait()
            out = partial[0] + partial[1]
            sync.wait()
            return out
        return exchange

    for k, (fl, _) in enumerate(halves):
        fl.source_totals = hook(k)
    bound = 0
    for _, x, b in _hours(150, missing=0.05):
        whole.observe(x, b, None)
        threads = [threading.Thread(target=fl.observe, args=(x, b, None)) for fl, _ in halves]
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        merged = np.zeros(SRC.size)
        for fl, part in halves:
            merged[part] = fl.coefficients[0]
        np.testing.assert_allclose(merged, whole.coefficients[0], rtol=0, atol=1e-12)
        per_source = np.bincount(SRC, weights=whole.coefficients[0], minlength=N)
        bound += int((per_source > 0.3 - 1e-9).any())
    assert bound > 0  # the cap did bind, across the halves
    each = np.bincount(SRC[halves[0][1]], weights=halves[0][0].coefficients[0], minlength=N)
    assert (np.bincount(SRC, weights=whole.coefficients[0], minlength=N) <= 0.3 + 1e-9).all()
    assert each.max() < 0.3 + 1e-9


@pytest.mark.parametrize("kw", [dict(), dict(dtype="float64", forgetting=False, lags=1, own_lag=True)])
def test_regather_after_link_changes_equals_numpy(kw: dict, monkeypatch: pytest.MonkeyPatch) -> None:
    """The one-pass kernel that moves per-edge state to new positions after links changed gives
    exactly what the numpy gathers give: kept links keep every value, new ones start fresh."""
    fused, plain = _pair(**kw)
    for _, x, b in _hours(30):
        fused.observe(x, b, None)
        plain.observe(x, b, None)
    rng = np.random.default_rng(5)
    keep = rng.permutation(SRC.size)[: SRC.size - 20]
    keep[rng.choice(keep.size, 15, replace=False)] = -1  # 15 brand-new links
    src, dst = rng.integers(0, N, keep.size), rng.integers(0, N, keep.size)
    fused.reindex(keep, keep.size, src, dst)
    with monkeypatch.context() as m:
        m.setattr(flow_kernels, "AVAILABLE", False)
        plain.reindex(keep, keep.size, src, dst)
    a, b_ = fused.state, plain.state
    for name in ("beta", "beta_avg", "cov", "edge_hours", "src", "dst"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b_, name), err_msg=name)
    assert (a.beta_avg is a.beta) == fused.settings.forgetting
    new = keep < 0
    assert np.all(a.beta[0, new] == a.beta.dtype.type(fused.settings.prior)) and np.all(a.beta[1:, new] == 0)
    assert np.all(a.edge_hours[new] == 0) and np.all(a.edge_hours[~new] > 0)


def _ordered_keep(n_old: int, drop: int, add: int, rng: np.random.Generator) -> np.ndarray:
    """New position -> old position for a link change that keeps the survivors' order:
    ``drop`` old links gone, ``add`` new ones (-1) inserted at random places."""
    kept = np.sort(rng.choice(n_old, n_old - drop, replace=False))
    keep = np.insert(kept, np.sort(rng.integers(0, kept.size + 1, add)), -1)
    return keep.astype(np.int32)


@pytest.mark.parametrize("kw", [dict(), dict(dtype="float64", forgetting=False, lags=1, own_lag=True)])
def test_in_place_move_after_link_changes_equals_numpy(kw: dict, monkeypatch: pytest.MonkeyPatch) -> None:
    """Link changes that keep the survivors' order move per-edge state inside its buffers
    (no new arrays where they have room); the state equals what the numpy gathers give, over
    shrinking, growing within the room, growing past it and a reshuffle (which gathers)."""
    fused, plain = _pair(**kw)
    rng = np.random.default_rng(8)
    n_old = SRC.size
    buffers = []
    for step, (drop, add) in enumerate([(30, 10), (5, 40), (0, 3), (12, 12), (0, 3000), (20, 0), (None, 5)]):
        for _, x, b in _hours(6, seed=step):
            fused.observe(x, b, None)
            plain.observe(x, b, None)
        if drop is None:  # a reshuffle, as after the graph's compaction: not movable in place
            keep = rng.permutation(n_old).astype(np.int32)
            keep[rng.choice(n_old, add, replace=False)] = -1
        else:
            keep = _ordered_keep(n_old, drop, add, rng)
        n_old = keep.size
        src, dst = rng.integers(0, N, n_old), rng.integers(0, N, n_old)
        fused.reindex(keep, n_old, src, dst)
        with monkeypatch.context() as m:
            m.setattr(flow_kernels, "AVAILABLE", False)
            plain.reindex(keep, n_old, src, dst)
        a, b_ = fused.state, plain.state
        for name in ("beta", "beta_avg", "cov", "edge_hours", "src", "dst"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b_, name), err_msg=f"{name} after change {step}")
        buffers.append(edge_room.room(a.cov, 0, n_old))
    assert all(b is not None for b in buffers)
    same = [buffers[i] is buffers[i - 1] for i in range(1, len(buffers))]
    if fused.settings.lags == 0:
        # the 3000 added links outgrow the room, and the reshuffle gathers: new buffers there only
        assert same == [True, True, True, False, True, False]
        assert edge_room.room(fused.state.beta, 1, n_old) is not None  # beta moved in place as well
    else:  # (lags + 1, E) coefficients get no room (a strided view): every change gathers
        assert not any(same)


def test_edge_room_moves_equal_a_gather() -> None:
    """``edge_room.move`` of a random order-keeping plan equals numpy's ``take``, for a
    per-edge axis first and last; foreign arrays and strided views get no room."""
    rng = np.random.default_rng(9)
    for trial in range(20):
        n_old = int(rng.integers(50, 400))
        keep = _ordered_keep(n_old, int(rng.integers(0, 30)), int(rng.integers(0, 5)), rng)
        for shape, axis in (((n_old, 2, 2), 0), ((1, n_old), 1), ((n_old,), 0)):
            a = edge_room.allocate(shape, np.float32, axis)
            a[...] = rng.random(shape)
            want = np.take(a, np.maximum(keep, 0), axis=axis)
            buf = edge_room.room(a, axis, keep.size)
            if buf is None:  # only when the insertions outgrew the room
                assert keep.size > buf_len(shape, axis)
                continue
            moves = edge_room.plan(keep)
            assert moves is not None
            np.testing.assert_array_equal(moves.fresh, np.flatnonzero(keep < 0))
            edge_room.move(buf, axis, moves)
            got = buf[(slice(None),) * axis + (slice(0, keep.size),)]
            kept = keep >= 0
            np.testing.assert_array_equal(np.compress(kept, got, axis=axis), np.compress(kept, want, axis=axis),
                                          err_msg=f"trial {trial}, shape {shape}")
    assert edge_room.room(np.zeros(10)[:5], 0, 5) is None  # not made by allocate
    assert edge_room.room(edge_room.allocate((5,), np.float64, 0)[::2], 0, 2) is None  # strided
    assert edge_room.plan(np.array([0, 2, 1], np.int32)) is None  # order changed


def buf_len(shape: tuple[int, ...], axis: int) -> int:
    """The length along ``axis`` of a buffer :func:`edge_room.allocate` makes for ``shape``."""
    return edge_room.room(edge_room.allocate(shape, np.float32, axis), axis, 0).shape[axis]


@pytest.mark.parametrize("dtype", [np.int32, np.int64])
def test_value_range_is_numpys_min_and_max(dtype: type) -> None:
    """The one-pass parallel range check equals ``ndarray.min`` / ``ndarray.max`` (numpy as
    the reference), for negative values, a single entry and a long array split over threads."""
    rng = np.random.default_rng(8)
    for a in (rng.integers(-50, 50, 1), rng.integers(-(2**30), 2**30, 100_003), np.full(7, -1)):
        a = a.astype(dtype)
        assert flow_kernels.value_range(a) == (int(a.min()), int(a.max()))


def test_out_of_range_endpoints_and_positions_are_refused() -> None:
    """The re-sync's range checks (now one pass each) still refuse what they refused."""
    fl = FlowLearner(FlowSettings())
    fl.resize(N, SRC, DST)
    bad = DST.copy()
    bad[3] = N
    with pytest.raises(ValueError, match=r"edge endpoints must lie in \[0, 40\)"):
        fl.resize(N, SRC, bad)
    with pytest.raises(ValueError, match="keep entries must be -1 or in"):
        fl.reindex(np.full(SRC.size, SRC.size), SRC.size, SRC, DST)
    fl.reindex(np.full(SRC.size, -1), SRC.size, SRC, DST)  # every link new: allowed
    assert np.all(fl.state.edge_hours == 0)
