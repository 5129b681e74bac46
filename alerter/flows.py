"""Per-edge flow coefficients: how much of a source's traffic shows up at its link targets.

For every directed edge ``e = (j -> i)`` and lag ``k = 0..L`` the learner keeps a coefficient
``beta[k, e]`` and predicts the destination's excess over its seasonal baseline from its
sources' inputs::

    u_e(t-k) = e_j(t-k) + (1 - a_e) * b_j(t-k)          e_j = x_j - b_j   (excess)
    ehat_i(t) = sum_{e into i, k} beta[k, e] * u_e(t-k)  (+ phi_i * e_i(t-1) with own_lag)

``x`` is the raw count, ``b`` the baseline's expected count (0 when the baseline is off) and
``a_e = 1 - exp(-age_hours / age_tau_hours)`` the link-age weight: a brand-new edge carries
its source's whole traffic, an old one (whose normal inflow the destination's baseline has
absorbed) only its source's excess; from :data:`OLD_AFTER_TAUS` time constants on (a
weight under 2e-9) a link counts as old. Everything is computed on the count scale.

Algorithm
---------
Preconditioned normalised LMS (projected stochastic gradient on the squared one-step
error), one step per closed hour, all edges at once (``np.bincount`` over ``dst``/``src``).
Per edge ``z_e = [u_e(t), ..., u_e(t-L), own_dst(t-1)]`` (own part only with ``own_lag``)::

    v_e    = (C_e + ridge) ^ -1 z_e          C_e: running mean of z_e z_e^T (per edge, d x d)
    quad_i = sum_{e into i} z_e . v_e        (+ a scalar block for phi of a node w/o in-edges)
    norm_i = eps + max(mean_t quad_i, mu_max_i * quad_i)
    beta_e += mu_e * err_dst / norm_dst * v_e[:L+1]
    phi_i  += mu_i * err_i / norm_i * sum_{e into i} v_e[L+1]

Why this and not textbook NLMS (``precondition=False`` keeps that: ``v = z``,
``norm = eps + sum z^2``):

* Block-diagonal RLS preconditioner. Each edge's lags (and the destination's own lag) are
  strongly correlated in hourly traffic; plain NLMS crawls along the slow directions (on a
  Muskingum routing test with input correlations ~0.97 it was still 0.25 off after 6,000
  hours, against 0.002 with the preconditioner). ``C_e`` is d x d with d = L+1(+1), so the
  cost is O(E d^3) per hour -- O(edges) for fixed L -- while full per-destination RLS
  would cost ``sum_i indeg_i^2``. With L = 0 and no own lag it is diagonal RLS
  (per-coordinate steps), so a source with 10 visits an hour learns as fast as one with
  10^6 into the same destination. The metric ``sum_e E_e^T P_e E_e`` is symmetric
  positive definite, so the fixed point is unchanged. Limitation: correlation *between*
  different in-edges is not seen; with strongly correlated sources convergence slows
  (a 3-in-edge design with condition number ~50 was still 0.04 off after 8,000 hours).
* Mean normaliser. Dividing by the hour's own ``quad`` (NLMS) solves a least-squares
  problem weighted by ``1 / quad`` and down-weights the most informative hours; its online
  average sat 2-4 standard errors from ordinary least squares in trials. Dividing by the
  running mean of ``quad`` keeps the fixed point at ordinary least squares; the
  ``mu_max * quad`` floor caps every step at one full normalised step so a high-leverage
  hour cannot overshoot, and binds ever more rarely as the steps decrease.

After the step the coefficients are projected onto ``[beta_min, beta_max]`` and then onto
the conservation cap: for each source, the sum of its positive coefficients over its
out-edges and lags is scaled down to ``cap`` when it exceeds it (a visit leaves a page at
most once). The own-lag coefficient is clipped to ``[own_min, own_max]``.

Step sizes. ``forgetting=True``: constant ``step`` (old hours are forgotten
exponentially, tracking drifting link usage). ``forgetting=False``: the step decreases per
coordinate as ``step0 / (1 + n / step_t0_hours) ** step_power`` (``n`` the coordinate's
observed hours, power in (1/2, 1)) and the iterates are averaged with polynomial-decay
averaging ``avg += (1 + eta) / (n + eta) * (beta - avg)`` (Polyak-Ruppert averaging that
down-weights the early transient); forecasts then use the averages, which converge to the
batch least-squares / NNLS solution of the same design. Decreasing steps rather than
constant-step averaging are used because with a bound active (a true coefficient 0) the
projected constant-step iterates are biased away from the bound and so is their average.
The defaults ``step0 = 0.5, step_power = 0.6`` trade that bound bias (smaller with a
larger power) against the slow-direction transient (shorter with a smaller power).

Shrinkage: a new edge starts at ``prior`` (lag 0; higher lags at 0) and each update adds a
pull ``step * prior_pull * exp(-n_e / prior_hours) * (prior - beta)`` that fades with the
edge's observed hours ``n_e``, so a sparsely observed edge stays near the shared prior.

Missing data: a destination with missing ``x`` (or non-finite ``b``) is not updated and its
in-edges do not learn; a source with missing ``x`` contributes ``u = 0`` that hour.

State and settings: :class:`FlowSettings` (frozen, stored as given) and :class:`FlowState`
(plain arrays; pickles into checkpoints) live in :mod:`alerter.flow_state`, with the pure
helpers and how the per-edge state follows a changed edge list; they are re-exported here.
The generic step above (any lags, own lag, either step schedule) is :mod:`alerter.flow_step`;
this module keeps the learner, its inputs and the faster forms of the default path. History
is kept per node -- the last ``max(L, own_lag)`` hours of cleaned excess and baseline, shape
``(H, n_nodes)`` -- and the lagged per-edge inputs are regathered through ``src``; it
therefore survives edge changes.

Public API
----------
``FlowLearner(settings)``
    ``.resize(n_nodes, src, dst, keep=None)`` set the node count (grow only) and the edge
    list; ``keep[new] = old position or -1`` (default: matched by ``(src, dst)`` pairs).
    ``.reindex(keep, n_new)`` remap the per-edge state only.
    ``.observe(x, b, age_hours) -> FlowStep`` learn one closed hour.
    ``.contributions(x, b, age_hours, direction="auto") -> Attribution`` attribution of a
    seen hour without learning (call before ``observe`` for that hour).
    ``.forecast(ehat_next, b_next, age_hours) -> ndarray`` neighbour part of the next hour's
    excess forecast.
    ``.coefficients`` ``(L+1, E)``; ``.own_coefficients`` ``(n,)`` -- averaged when
    forgetting is off.
``persistence_forecast(prev_excess, decay, horizon=1)``, ``cap_contributions(...)``,
``match_edges(...)``, ``age_weight(...)``.

>>> import numpy as np
>>> fl = FlowLearner(FlowSettings(forgetting=False, age_weighting=False))
>>> fl.resize(2, src=np.array([0]), dst=np.array([1]))
>>> rng = np.random.default_rng(0)
>>> for t in range(2000):
...     s = rng.exponential(10.0)
...     _ = fl.observe(np.array([s, 0.3 * s]), np.zeros(2), None)
>>> round(float(fl.coefficients[0, 0]), 3)
0.3
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from . import flow_kernels, flow_step
from .attribution import Attribution, cap_contributions
from .edge_runs import Segments, index_array, sum_by
from .flow_state import (
    OLD_AFTER_TAUS,
    FlowSettings,
    FlowState,
    FlowStep,
    LinkAges,
    age_weight,
    empty_state,
    follow_edges,
    match_edges,
    persistence_forecast,
)
from .flow_step import TINY

__all__ = [
    "OLD_AFTER_TAUS",
    "Attribution",
    "FlowLearner",
    "FlowSettings",
    "FlowState",
    "FlowStep",
    "LinkAges",
    "age_weight",
    "cap_contributions",
    "match_edges",
    "persistence_forecast",
]

KERNEL = "numba" if flow_kernels.AVAILABLE else "numpy"
"""Which implementation the default path's hour uses (see :mod:`alerter.flow_kernels`)."""


def _outside(a: np.ndarray, lo: int, hi: int) -> bool:
    """Whether some entry of the non-empty integer array ``a`` lies outside ``[lo, hi)``."""
    first, last = flow_kernels.value_range(a)
    return first < lo or last >= hi


# -- the learner -------------------------------------------------------------------------
class FlowLearner:
    """Vectorised online flow coefficients over a changing edge list (see module docstring)."""

    def __init__(self, settings: FlowSettings) -> None:
        self.settings = settings
        self.dtype = np.dtype(settings.dtype)
        self.state = empty_state(settings, 0, np.zeros(0, np.int32), np.zeros(0, np.int32))
        self._buf: dict[str, np.ndarray] = {}
        self._seg: Segments | None = None
        self._tables: dict[str, np.ndarray] = {}
        self.source_totals: Callable[[np.ndarray], np.ndarray] | None = None
        """Partitioned runs: maps this worker's per-source sums of positive coefficients
        (float64 over nodes) to the sums over all partitions, for the conservation cap. Not
        pickled; None = this learner holds every out-link of its sources."""

    def __getstate__(self) -> dict:
        """Learned state and settings only: the hook and the scratch buffers, run sums and
        lookup tables (all rebuilt on demand) stay out of checkpoints."""
        state = dict(self.__dict__)
        state.update(source_totals=None, _buf={}, _seg=None, _tables={})
        return state

    def __setstate__(self, state: dict) -> None:
        state.setdefault("source_totals", None)
        self.__dict__.update(state)

    def _cap_factor(self, totals: np.ndarray) -> np.ndarray | None:
        """Per source the scale-down that brings its positive coefficients to ``cap``, from this
        learner's per-source totals (summed over partitions by ``source_totals``); None when
        no source is over the cap."""
        if self.source_totals is not None:
            totals = np.asarray(self.source_totals(totals), np.float64)
        over = totals > self.settings.cap
        if not over.any():
            return None
        factor = np.ones(totals.shape[0], self.dtype)
        factor[over] = self.settings.cap / totals[over]
        return factor

    # -- shape ---------------------------------------------------------------------------
    def resize(self, n_nodes: int, src: np.ndarray, dst: np.ndarray, keep: np.ndarray | None = None,
               indptr: np.ndarray | None = None) -> None:
        """Set the node count (grow only) and the edge list.

        ``keep[new] = old edge position or -1`` (brand-new edge: prior, zero history); by
        default edges are matched on their ``(src, dst)`` pair. Node history is kept, so
        lagged inputs of kept and new edges alike survive. ``indptr``: the run boundaries of
        a destination-sorted edge list (the graph's CSR), so they need not be searched for.
        """
        src, dst = index_array(src, n_nodes), index_array(dst, n_nodes)
        old = self.state
        if n_nodes < old.n_nodes:
            raise ValueError(f"n_nodes may only grow: {n_nodes} < {old.n_nodes}")
        if src.shape != dst.shape or src.ndim != 1:
            raise ValueError("src and dst must be 1-d arrays of equal length")
        if src.size and (_outside(src, 0, n_nodes) or _outside(dst, 0, n_nodes)):  # equal shapes: checked above
            raise ValueError(f"edge endpoints must lie in [0, {n_nodes})")
        if keep is None:
            keep = match_edges(old.src, old.dst, src, dst, max(n_nodes, 1))
        self._grow_nodes(n_nodes)
        self.reindex(keep, src.shape[0], src, dst)
        if indptr is not None:
            self._seg = Segments(self.state.dst, n_nodes, indptr)

    def _grow_nodes(self, n: int) -> None:
        old = self.state
        if n == old.n_nodes:
            return
        new = empty_state(self.settings, n, old.src[:0], old.dst[:0])  # node arrays only: edge arrays carry over
        new.src, new.dst = old.src, old.dst
        m = old.n_nodes
        for name in ("phi", "phi_avg", "phi_scale", "node_hours", "quad_mean"):
            getattr(new, name)[:m] = getattr(old, name)
        new.hist_e[:, :m] = old.hist_e
        new.hist_b[:, :m] = old.hist_b
        new.beta, new.beta_avg, new.cov, new.edge_hours = old.beta, old.beta_avg, old.cov, old.edge_hours
        new.head, new.hours = old.head, old.hours
        self.state = new

    def reindex(self, keep: np.ndarray, n_new: int, src: np.ndarray | None = None,
                dst: np.ndarray | None = None) -> None:
        """Remap per-edge state: position ``p`` takes old position ``keep[p]`` or starts fresh.

        A fresh position (``keep == -1``) starts at the prior with zero observed hours. The
        new edges' endpoints come from ``src``/``dst``; without them every position must be
        kept (the endpoints are then gathered from the old edges).
        """
        keep = np.asarray(keep)
        if keep.dtype not in (np.int32, np.int64):  # int32 from the graph's slot positions: no copy
            keep = keep.astype(np.int64)
        if keep.shape != (n_new,):
            raise ValueError(f"keep must have shape ({n_new},), got {keep.shape}")
        st = self.state
        lowest, highest = flow_kernels.value_range(keep) if keep.size else (-1, -1)
        if highest >= st.n_edges or lowest < -1:
            raise ValueError(f"keep entries must be -1 or in [0, {st.n_edges})")
        if src is None or dst is None:
            if lowest < 0:
                raise ValueError("src and dst are needed when keep introduces new edges")
            src, dst = st.src[keep], st.dst[keep]
        n_nodes = max(st.n_nodes, 1)
        src, dst = index_array(src, n_nodes), index_array(dst, n_nodes)
        n_old = st.n_edges
        st.src, st.dst = src, dst  # the old endpoints are not needed below: let them go before the gather
        self._buf, self._seg = {}, None
        s = self.settings
        fresh = empty_state(s, 0, src, dst) if n_old == 0 else follow_edges(st, s, keep, src, dst)
        st.beta, st.beta_avg, st.cov, st.edge_hours = fresh.beta, fresh.beta_avg, fresh.cov, fresh.edge_hours

    # -- reading -------------------------------------------------------------------------
    def sum_into_dst(self, values: np.ndarray) -> np.ndarray:
        """Per node the float64 sum of per-edge ``values`` over its in-edges (run sums when sorted)."""
        return self._segments().sum(values)

    @property
    def coefficients(self) -> np.ndarray:
        """``(L+1, E)`` edge coefficients used for forecasts (averaged when forgetting is off)."""
        return self.state.beta if self.settings.forgetting else self.state.beta_avg

    @property
    def own_coefficients(self) -> np.ndarray:
        """``(n,)`` own-lag coefficients phi used for forecasts (zeros unless own_lag)."""
        return self.state.phi if self.settings.forgetting else self.state.phi_avg

    def _get(self, name: str, shape: tuple[int, ...], dtype: np.dtype | type | None = None) -> np.ndarray:
        buf = self._buf.get(name)
        dtype = self.dtype if dtype is None else np.dtype(dtype)
        if buf is None or buf.shape != shape or buf.dtype != dtype:
            buf = np.empty(shape, dtype)
            self._buf[name] = buf
        return buf

    def _slot(self, lag: int) -> int:
        """History slot of the hour ``lag`` hours before the current one (lag >= 1)."""
        return (self.state.head - lag + 1) % self.settings.history_hours

    def _inputs(self, e0: np.ndarray, b0: np.ndarray, age_hours: np.ndarray | None) -> np.ndarray:
        """``U[k, e] = u_e(t-k)``: lag 0 from the given cleaned node arrays, others from history."""
        st, s = self.state, self.settings
        n_e = st.n_edges
        u = self._get("u", (s.lags + 1, n_e))
        w = self._get("w", (n_e,))
        for k in range(s.lags + 1):  # loop over lags (settings constant), not over edges
            ek, bk = (e0, b0) if k == 0 else (st.hist_e[self._slot(k)], st.hist_b[self._slot(k)])
            np.take(ek, st.src, out=u[k])
            np.take(bk, st.src, out=w)
            w *= age_weight(age_hours, n_e, s, lag=k, out=self._get("a", (n_e,)))
            u[k] += w
        return u

    def _lag0_inputs(self, e0: np.ndarray, b0: np.ndarray | None, age_hours: np.ndarray | None) -> np.ndarray:
        """``u_e(t)`` alone; with ``b0`` None the baseline term (and its age weight) is skipped."""
        if b0 is not None:
            return self._inputs(e0, b0, age_hours)[0]
        u = self._get("u", (1, self.state.n_edges))[0]
        return np.take(e0, self.state.src, out=u, mode="clip")

    def _own_input(self) -> np.ndarray:
        st = self.state
        if not self.settings.own_lag:
            return np.zeros(st.n_nodes, self.dtype)
        return st.hist_e[self._slot(1)]

    def _clean(self, x: np.ndarray, b: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Validated copies: (cleaned excess, cleaned baseline, observed mask)."""
        n = self.state.n_nodes
        x = np.asarray(x, dtype=float)
        b = np.zeros(n) if b is None else np.asarray(b, dtype=float)
        if x.shape != (n,) or b.shape != (n,):
            raise ValueError(f"x and b must have shape ({n},), got {x.shape} and {b.shape}")
        ok = np.isfinite(x) & np.isfinite(b)
        e = np.where(ok, x - b, 0.0).astype(self.dtype)
        return e, np.where(ok, b, 0.0).astype(self.dtype), ok

    def _check_age(self, age_hours: np.ndarray | LinkAges | None) -> np.ndarray | None:
        if age_hours is None:
            return None
        if isinstance(age_hours, LinkAges):
            age_hours = age_hours.hours(self.dtype)
        age = np.asarray(age_hours, dtype=self.dtype)
        if age.shape != (self.state.n_edges,):
            raise ValueError(f"age_hours must have shape ({self.state.n_edges},), got {age.shape}")
        return age

    def _predict(self, beta: np.ndarray, phi: np.ndarray, u: np.ndarray,
                 own: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per-edge signed contributions and per-node predicted excess."""
        st = self.state
        c = np.einsum("ke,ke->e", beta, u, dtype=float)
        pred = sum_by(st.dst, c, st.n_nodes)
        pred += phi * own
        return c, pred

    def contributions(self, x: np.ndarray, b: np.ndarray | None, age_hours: np.ndarray | LinkAges | None,
                      direction: str = "auto") -> Attribution:
        """Attribution of the hour ``x`` (not yet observed) with the public coefficients."""
        e, b0, ok = self._clean(x, b)
        u = self._inputs(e, b0, self._check_age(age_hours))
        c, _ = self._predict(self.coefficients, self.own_coefficients, u, self._own_input())
        return cap_contributions(c, self.state.dst, np.where(ok, e, np.nan), self.state.n_nodes, direction)

    def forecast(self, ehat_next: np.ndarray, b_next: np.ndarray | None,
                 age_hours: np.ndarray | LinkAges | None) -> np.ndarray:
        """Neighbour part ``F_i - b_i`` of the next hour's forecast (plus phi_i * e_i(t) with own_lag).

        ``ehat_next`` is each source's own excess forecast (e.g. :func:`persistence_forecast`),
        ``b_next`` its baseline for the next hour; NaN counts as 0. Lagged inputs use the
        hours already observed.
        """
        n = self.state.n_nodes
        eh = np.asarray(ehat_next, dtype=float)
        bn = np.zeros(n) if b_next is None else np.asarray(b_next, dtype=float)
        if eh.shape != (n,) or bn.shape != (n,):
            raise ValueError(f"ehat_next and b_next must have shape ({n},)")
        if self._fused() and b_next is None:  # the joint model's forecast: excess through beta
            seg, out = self._segments(), np.zeros(n)
            flow_kernels.forecast_runs(seg.blocks(), seg.indptr, self.state.src, self.coefficients[0],
                                       np.nan_to_num(eh, nan=0.0).astype(self.dtype), out)
            return out
        e0 = np.nan_to_num(eh, nan=0.0).astype(self.dtype)
        if self.settings.lags == 0 and not self.settings.own_lag:
            b0 = None if b_next is None else np.nan_to_num(bn, nan=0.0).astype(self.dtype)
            u = self._lag0_inputs(e0, b0, self._check_age(age_hours))
            u *= self.coefficients[0]
            return self._segments().sum(u)
        b0 = np.nan_to_num(bn, nan=0.0).astype(self.dtype)
        u = self._inputs(e0, b0, self._check_age(age_hours))
        _, pred = self._predict(self.coefficients, self.own_coefficients, u, self._own_input())
        return pred

    # -- learning ------------------------------------------------------------------------
    def observe(self, x: np.ndarray, b: np.ndarray | None, age_hours: np.ndarray | LinkAges | None,
                direction: str = "auto") -> FlowStep:
        """Learn one closed hour; ``x`` raw counts (NaN = missing), ``b`` baseline (None = 0)."""
        st = self.state
        e, b0, ok = self._clean(x, b)
        if self._default_path() and self._fused():
            return self._observe_fused(e, b0, ok, age_hours, direction)
        if self._default_path():
            return self._observe_lag0(e, b0, ok, self._check_age(age_hours), direction)
        u = self._inputs(e, b0, self._check_age(age_hours))
        own = self._own_input()
        c_pub, predicted = self._predict(self.coefficients, self.own_coefficients, u, own)
        attribution = cap_contributions(c_pub, st.dst, np.where(ok, e, np.nan), st.n_nodes, direction)
        if self.settings.forgetting:
            pred_iter = predicted
        else:
            _, pred_iter = self._predict(st.beta, st.phi, u, own)
        err = np.where(ok, e - pred_iter, 0.0)
        self._learn(u, own, err, ok)
        self._push(e, b0)
        return FlowStep(predicted=predicted, attribution=attribution, updated=ok)

    def _learn(self, u: np.ndarray, own: np.ndarray, err: np.ndarray, ok: np.ndarray) -> None:
        """One step of the generic path (:func:`alerter.flow_step.learn`)."""
        flow_step.learn(self.state, self.settings, u, own, err, ok, self._get, self._apply_cap)

    def _apply_cap(self, beta: np.ndarray) -> None:
        """Scale each source's positive coefficients so their sum is at most ``cap``."""
        s, st = self.settings, self.state
        if s.cap is None or (st.n_edges == 0 and self.source_totals is None):
            return
        pos = np.maximum(beta, 0.0)
        factor = self._cap_factor(sum_by(st.src, pos.sum(axis=0, dtype=float), st.n_nodes))
        if factor is not None:
            np.multiply(beta, factor[st.src], out=beta, where=beta > 0)

    def _push(self, e: np.ndarray, b: np.ndarray) -> None:
        st, h = self.state, self.settings.history_hours
        if h == 0:
            return
        st.head = (st.head + 1) % h
        st.hist_e[st.head] = e
        st.hist_b[st.head] = b

    # -- the default path: lag 0, no own lag, forgetting, preconditioning ----------------
    # With one lag and no own lag the preconditioner is a per-edge scalar (diagonal RLS), so
    # the hour is a short sequence of in-place elementwise passes over float arrays plus
    # run sums over the destination-sorted edge list; the step and scale rates, functions
    # of an edge's observed hours, come from small lookup tables.
    def _default_path(self) -> bool:
        s = self.settings
        return s.lags == 0 and not s.own_lag and s.forgetting and s.precondition

    def _segments(self) -> Segments:
        """Run sums over the current edge list (rebuilt when the edges or node count change)."""
        st, seg = self.state, self._seg
        if seg is None or seg.dst is not st.dst or seg.n != st.n_nodes:
            seg = self._seg = Segments(st.dst, st.n_nodes)
        return seg

    def _hour_table(self, name: str) -> np.ndarray | None:
        """Per observed-hours value of the scale rate or the prior-pull weight, exact to its end.

        ``rate(h) = max(1 / (h + 1), scale_rate)`` and ``pull(h) = step * prior_pull *
        exp(-h / prior_hours)`` (the same float64 expressions as the generic path); each table
        ends where the value has reached its constant (``scale_rate``; 0 after exp
        underflows), so a clipped lookup is exact for any ``h``. None if it would be huge.
        """
        table = self._tables.get(name)
        if table is None:
            s = self.settings
            if name == "rate":
                h = np.arange(int(np.ceil(1.0 / s.scale_rate)) + 2, dtype=np.float64)
                table = np.maximum(1.0 / (h + 1.0), s.scale_rate)
            else:
                length = int(746.0 * s.prior_hours) + 2
                if length > 1 << 22:
                    return None
                ages = np.arange(length, dtype=np.int64)
                table = s.step * s.prior_pull * np.exp(-ages / s.prior_hours)
            table = self._tables[name] = table.astype(self.dtype)
        return table

    def _per_edge(self, name: str, buf: str) -> np.ndarray:
        """``table[edge_hours]`` (clipped lookup) into a reused buffer."""
        out = self._get(buf, (self.state.n_edges,))
        table = self._hour_table(name)
        if table is None:  # a very slow prior decay: evaluate the expression directly
            s = self.settings
            out[:] = s.step * s.prior_pull * np.exp(-self.state.edge_hours / s.prior_hours)
            return out
        return np.take(table, self.state.edge_hours, out=out, mode="clip")

    def _observe_lag0(self, e: np.ndarray, b0: np.ndarray, ok: np.ndarray, age: np.ndarray | None,
                      direction: str) -> FlowStep:
        """``observe`` on the default path; same results as the generic path up to rounding."""
        st = self.state
        seg = self._segments()
        u = self._lag0_inputs(e, b0, age)
        raw = np.multiply(st.beta[0], u)  # a new array: it becomes the attribution's raw
        predicted = seg.sum(raw)
        attribution = self._attribute(raw, e, direction, seg)
        self._learn_lag0(u, np.where(ok, e - predicted, 0.0), ok, seg)
        return FlowStep(predicted=predicted, attribution=attribution, updated=ok)

    def _attribute(self, raw: np.ndarray, e: np.ndarray, direction: str, seg: Segments) -> Attribution:
        """:func:`cap_contributions` over run sums, per-edge arrays in the learner's dtype."""
        sign = self._sign(e, direction)
        part = seg.expand(sign, self.dtype)
        part *= raw
        np.maximum(part, 0.0, out=part)
        return Attribution.from_parts(raw, self.state.dst, e.astype(np.float64), sign, seg.sum(part),
                                      seg.sum(raw))

    def _sign(self, e: np.ndarray, direction: str) -> np.ndarray:
        """Per node the direction attribution looks at: the excess's sign, or a fixed one."""
        if direction not in ("auto", "surge", "drop"):
            raise ValueError(f"direction must be 'auto', 'surge' or 'drop', got {direction!r}")
        if direction == "auto":
            return np.sign(e.astype(np.float64))
        return np.full(self.state.n_nodes, 1.0 if direction == "surge" else -1.0)

    def _novelty_table(self) -> np.ndarray:
        """``exp(-h / tau)`` per whole hour of link age ``h`` below :data:`OLD_AFTER_TAUS` tau,
        then one 0 that stands for every older age (small enough to stay in L1 cache)."""
        table = self._tables.get("novelty")
        if table is None:
            tau = self.settings.age_tau_hours
            h = np.arange(int(np.ceil(OLD_AFTER_TAUS * tau)), dtype=np.float64)
            weight = np.where(h / tau < OLD_AFTER_TAUS, np.exp(-h / tau), 0.0)
            table = self._tables["novelty"] = np.concatenate([weight, [0.0]])
        return table

    def _fused(self) -> bool:
        """The fused per-destination kernels apply: numba there, edges sorted by destination."""
        return (flow_kernels.AVAILABLE and self.settings.lags == 0 and not self.settings.own_lag
                and self._segments().sorted and self._hour_table("pull") is not None)

    def _observe_fused(self, e: np.ndarray, b0: np.ndarray, ok: np.ndarray,
                       age_hours: np.ndarray | LinkAges | None, direction: str) -> FlowStep:
        """``observe`` on the default path in one parallel kernel call (see flow_kernels)."""
        st, s = self.state, self.settings
        seg, n = self._segments(), st.n_nodes
        sign = self._sign(e, direction)
        weighted = s.age_weighting and age_hours is not None
        if isinstance(age_hours, LinkAges):  # whole hours: the weight comes from a table
            ages, a0, a1, table = age_hours.born, float(age_hours.tick), -1.0, self._novelty_table()
        else:
            checked = self._check_age(age_hours)
            ages, a0, a1 = (np.zeros(1, self.dtype) if checked is None else checked), 0.0, 1.0
            table = np.zeros(0)
        raw = np.empty(st.n_edges, self.dtype)
        inflow, part_sum = np.zeros(n), np.zeros(n)
        totals = np.zeros((flow_kernels.threads(), n))
        scratch = self._get("scratch", (flow_kernels.threads(), 3, max(int(seg.counts.max(initial=0)), 1)),
                            np.float64)
        pull = self._hour_table("pull") if s.prior_pull > 0 else np.zeros(1, self.dtype)
        flow_kernels.observe_runs(
            seg.blocks(), seg.indptr, st.src, np.stack([e, b0], axis=1), ok, sign, st.beta[0], st.cov.reshape(-1),
            st.edge_hours,
            ages, a0, a1, 1.0 / s.age_tau_hours if weighted else 0.0, table, self._hour_table("rate"), pull,
            s.ridge, TINY, s.prior, s.beta_min, s.beta_max, s.step, s.eps, s.scale_rate,
            st.quad_mean, st.node_hours, raw, inflow, part_sum, totals, scratch)
        factor = None if s.cap is None else self._cap_factor(totals.sum(axis=0))
        if factor is not None:
            flow_kernels.scale(st.beta[0], st.src, factor)
        st.hours += 1
        attribution = Attribution.from_parts(raw, st.dst, e.astype(np.float64), sign, part_sum, inflow)
        return FlowStep(predicted=inflow, attribution=attribution, updated=ok)

    def _learn_lag0(self, u: np.ndarray, err: np.ndarray, ok: np.ndarray, seg: Segments) -> None:
        """The generic ``_learn`` for d = 1: fused kernels if numba is there, else numpy passes."""
        if flow_kernels.AVAILABLE and self._hour_table("pull") is not None:
            self._learn_lag0_fused(u, err, ok)
        else:
            self._learn_lag0_numpy(u, err, ok, seg)

    def _learn_lag0_fused(self, u: np.ndarray, err: np.ndarray, ok: np.ndarray) -> None:
        """Two passes over the edges (direction, then step + pull + clip + cap totals), one
        more only when some source exceeds the cap; float64 inside, stored in the dtype."""
        st, s = self.state, self.settings
        quad = np.zeros(st.n_nodes)
        flow_kernels.direction(u, ok, st.dst, st.cov.reshape(-1), st.edge_hours, self._hour_table("rate"),
                          s.ridge, TINY, quad)
        gain = self._gain_lag0(quad, err, ok) * s.step
        totals = np.zeros(st.n_nodes)
        pull = self._hour_table("pull") if s.prior_pull > 0 else np.zeros(1, self.dtype)
        flow_kernels.step(u, gain, ok, st.src, st.dst, st.beta[0], st.edge_hours, pull, s.prior,
                     s.beta_min, s.beta_max, totals)
        factor = None if s.cap is None else self._cap_factor(totals)
        if factor is not None:
            flow_kernels.scale(st.beta[0], st.src, factor)
        st.node_hours += ok
        st.hours += 1

    def _learn_lag0_numpy(self, u: np.ndarray, err: np.ndarray, ok: np.ndarray, seg: Segments) -> None:
        """The generic ``_learn`` for d = 1, written as in-place passes (``u`` is consumed)."""
        st, s = self.state, self.settings
        mask = None if ok.all() else seg.expand(ok, bool)  # in-edges of observed destinations
        beta, cov = st.beta[0], st.cov.reshape(-1)
        if mask is not None:
            u *= mask  # z: zero input on unobserved destinations
        rate = self._per_edge("rate", "rate")
        if mask is not None:
            rate *= mask
        tmp = self._get("tmp", (st.n_edges,))
        np.multiply(u, u, out=tmp)  # cov += rate * (z^2 - cov)
        tmp -= cov
        tmp *= rate
        cov += tmp
        v = np.multiply(cov, 1.0 + s.ridge, out=tmp)  # v = z / (cov (1 + ridge) + tiny)
        v += TINY
        np.divide(u, v, out=v)
        gain = self._gain_lag0(seg.sum(np.multiply(u, v, out=rate)), err, ok)
        v *= seg.expand(s.step * gain, self.dtype)
        beta += v
        if s.prior_pull > 0:
            pull = self._per_edge("pull", "rate")
            if mask is not None:
                pull *= mask
            np.subtract(s.prior, beta, out=tmp)
            tmp *= pull
            beta += tmp
        np.clip(beta, s.beta_min, s.beta_max, out=beta)
        self._apply_cap(st.beta)
        st.edge_hours += 1 if mask is None else mask
        st.node_hours += ok
        st.hours += 1

    def _gain_lag0(self, quad: np.ndarray, err: np.ndarray, ok: np.ndarray) -> np.ndarray:
        """Per destination ``err / norm``; with a constant step ``mu_max`` is the node's own step."""
        st, s = self.state, self.settings
        step_n, rate_n = flow_step.rates(s, st.node_hours)
        step_n *= ok
        rate_n *= ok
        st.quad_mean += rate_n * (quad - st.quad_mean)
        norm = np.maximum(st.quad_mean, step_n * quad)
        norm += s.eps
        return err / norm
