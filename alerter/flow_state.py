"""What the flow learner stores, and how its per-edge state follows a changing edge list.

:class:`FlowSettings` (frozen, stored as given), :class:`FlowState` (plain arrays that pickle
into checkpoints), :class:`LinkAges` and :class:`FlowStep` (one hour's inputs and output),
the pure helpers of the model (:func:`age_weight`, :func:`persistence_forecast`,
:func:`match_edges`), and the state's layout over an edge list: :func:`empty_state` for
fresh edges and :func:`follow_edges` after links changed. The learning itself is in
:mod:`alerter.flows`, which re-exports every public name here.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import edge_room, flow_kernels
from .attribution import Attribution

__all__ = ["OLD_AFTER_TAUS", "FlowSettings", "FlowState", "FlowStep", "LinkAges", "age_weight", "empty_state",
           "follow_edges", "match_edges", "persistence_forecast"]

OLD_AFTER_TAUS = 20.0
"""Link age, in ``age_tau_hours``, from which a link's novelty weight is 0 (exp(-20) = 2e-9
of the source's baseline: nothing a count could show)."""


@dataclass(frozen=True)
class FlowSettings:
    """Settings of the flow learner; stored exactly as given, never modified."""

    lags: int = 0
    """Highest source lag L in hours; inputs at lags 0..L are used (0 = same hour only)."""

    own_lag: bool = False
    """Also regress on the destination's own excess of the previous hour (coefficient phi)."""

    forgetting: bool = True
    """True: constant step, old hours forgotten exponentially. False: decreasing step plus
    iterate averaging, converging to the batch least-squares solution."""

    step: float = 0.05
    """With forgetting: the constant normalised step size mu, 0 < mu <= 1 (memory of
    roughly block_size * in_degree / mu hours)."""

    step0: float = 0.5
    """Without forgetting: the initial normalised step size, 0 < step0 <= 1."""

    step_t0_hours: float = 50.0
    """Without forgetting: hours after which the step has fallen by 2 ** step_power."""

    step_power: float = 0.6
    """Without forgetting: step ~ (1 + n / t0) ** -power; use a power in (1/2, 1]."""

    average_eta: float = 3.0
    """Without forgetting: polynomial-decay averaging weight (1 + eta) / (n + eta); 0 = plain mean."""

    precondition: bool = True
    """Precondition each edge's step by the inverse of its running input covariance over its
    lags and the own lag (block-diagonal RLS); False = textbook NLMS."""

    scale_rate: float = 0.01
    """Floor of the rate of the running input covariance (1/n before that, then EW)."""

    ridge: float = 1e-3
    """Ridge of the preconditioner, relative to the mean input variance of the edge's block."""

    eps: float = 1e-6
    """Added to the per-destination normaliser so all-zero inputs give a zero step."""

    beta_min: float = 0.0
    """Lower bound of every edge coefficient (0 = non-negative; -inf = unbounded)."""

    beta_max: float = 1.0
    """Upper bound of every edge coefficient (inf = unbounded)."""

    own_min: float = -1.0
    """Lower bound of the own-lag coefficient phi."""

    own_max: float = 1.0
    """Upper bound of the own-lag coefficient phi."""

    cap: float | None = 1.0
    """Conservation cap: per source, sum of positive coefficients over out-edges and lags;
    None switches the cap off."""

    prior: float = 0.01
    """Shared prior of a new edge's lag-0 coefficient (higher lags start at 0)."""

    prior_pull: float = 0.1
    """Strength of the pull toward the prior on a fresh edge, relative to the step."""

    prior_hours: float = 48.0
    """E-folding of the prior pull in the edge's observed hours."""

    age_weighting: bool = True
    """Weight the source's baseline by the edge's novelty (1 - a_e); False = every edge old."""

    age_tau_hours: float = 168.0
    """Time constant of the link-age weight a_e = 1 - exp(-age_hours / tau)."""

    dtype: str = "float32"
    """Floating type of the learned arrays: 'float32' or 'float64' (reference checks)."""

    def __post_init__(self) -> None:
        problems = []
        if not isinstance(self.lags, int) or self.lags < 0:
            problems.append(f"lags must be an int >= 0, got {self.lags!r}")
        if not (0 < self.step <= 1 and 0 < self.step0 <= 1):
            problems.append(f"step and step0 must be in (0, 1], got {self.step!r} and {self.step0!r}")
        if self.step_t0_hours <= 0 or self.step_power < 0:
            problems.append("step_t0_hours must be > 0 and step_power >= 0")
        if not 0 < self.scale_rate <= 1:
            problems.append(f"scale_rate must be in (0, 1], got {self.scale_rate!r}")
        if self.beta_min > self.beta_max or self.own_min > self.own_max:
            problems.append("bounds must satisfy min <= max")
        if self.cap is not None and self.cap < 0:
            problems.append(f"cap must be >= 0 or None, got {self.cap!r}")
        if min(self.age_tau_hours, self.prior_hours, self.eps) <= 0 or min(self.average_eta, self.ridge) < 0:
            problems.append("age_tau_hours, prior_hours and eps must be > 0; average_eta and ridge >= 0")
        if self.dtype not in ("float32", "float64"):
            problems.append(f"dtype must be 'float32' or 'float64', got {self.dtype!r}")
        if problems:
            raise ValueError("invalid FlowSettings: " + "; ".join(problems))

    @property
    def block_size(self) -> int:
        """Inputs per edge seen by the preconditioner: L+1 lags plus the own lag."""
        return self.lags + 1 + (1 if self.own_lag else 0)

    @property
    def history_hours(self) -> int:
        """Hours of per-node history needed: max(L, 1 if own_lag)."""
        return max(self.lags, 1 if self.own_lag else 0)


@dataclass
class FlowState:
    """Learned arrays; settings live apart. Per-edge arrays are indexed by edge position."""

    src: np.ndarray  # (E,) int32 (int64 past 2**31 nodes) source node of each edge
    dst: np.ndarray  # (E,) int32 (int64 past 2**31 nodes) destination node
    beta: np.ndarray  # (L+1, E) current iterate
    beta_avg: np.ndarray  # (L+1, E) averaged iterate (used when forgetting is off)
    cov: np.ndarray  # (E, d, d) running mean of z z^T, z = [u(t-0..L), own] (preconditioner)
    edge_hours: np.ndarray  # (E,) int32 hours the edge was updated
    phi: np.ndarray  # (n,) own-lag coefficient
    phi_avg: np.ndarray  # (n,)
    phi_scale: np.ndarray  # (n,)
    node_hours: np.ndarray  # (n,) int64 hours the node was updated as a destination
    quad_mean: np.ndarray  # (n,) running mean of the per-destination normaliser z^T M z
    hist_e: np.ndarray  # (H, n) cleaned excess of past hours (0 where missing)
    hist_b: np.ndarray  # (H, n) cleaned baseline of past hours (0 where missing)
    head: int = 0  # slot of hist_* holding the most recent hour
    hours: int = 0  # hours observed

    @property
    def n_nodes(self) -> int:
        return int(self.phi.shape[0])

    @property
    def n_edges(self) -> int:
        return int(self.src.shape[0])


@dataclass(frozen=True)
class LinkAges:
    """Link ages as birth hours plus the current hour, so no per-edge age array is made."""

    born: np.ndarray  # (E,) integer hour each link appeared
    tick: int  # the current hour

    def hours(self, dtype: np.dtype | type) -> np.ndarray:
        return (self.tick - self.born).astype(dtype)


@dataclass
class FlowStep:
    """What one observed hour produced."""

    predicted: np.ndarray  # (n,) predicted excess with the public coefficients, before the update
    attribution: Attribution  # from the public coefficients before the update
    updated: np.ndarray  # (n,) bool: destinations that learned this hour


# -- pure helpers ------------------------------------------------------------------------
def age_weight(age_hours: np.ndarray | None, n_edges: int, settings: FlowSettings,
               lag: int = 0, out: np.ndarray | None = None) -> np.ndarray:
    """``1 - a_e`` at ``lag`` hours back: the fraction of the source's baseline an edge carries.

    ``exp(-max(age - lag, 0) / tau)``, 0 from :data:`OLD_AFTER_TAUS` time constants on; all
    zeros when age weighting is off or ages are None.
    """
    dt = np.dtype(settings.dtype)
    if out is None:
        out = np.empty(n_edges, dt)
    if not settings.age_weighting or age_hours is None:
        out.fill(0.0)
        return out
    np.subtract(age_hours, lag, out=out)
    np.maximum(out, 0.0, out=out)
    out *= -1.0 / settings.age_tau_hours
    np.copyto(out, -np.inf, where=out <= -OLD_AFTER_TAUS)
    return np.exp(out, out=out)


def persistence_forecast(prev_excess: np.ndarray, decay: float = 0.5, horizon: int = 1) -> np.ndarray:
    """Each source's own excess forecast: ``decay ** horizon * prev_excess`` (NaN -> 0)."""
    return np.nan_to_num(np.asarray(prev_excess, dtype=float), nan=0.0) * float(decay) ** horizon


def match_edges(old_src: np.ndarray, old_dst: np.ndarray, new_src: np.ndarray, new_dst: np.ndarray,
                n_nodes: int) -> np.ndarray:
    """``keep[new] = position of the same (src, dst) among the old edges, or -1``."""
    old_key = np.asarray(old_src, np.int64) * n_nodes + np.asarray(old_dst, np.int64)
    new_key = np.asarray(new_src, np.int64) * n_nodes + np.asarray(new_dst, np.int64)
    keep = np.full(new_key.shape[0], -1, np.int64)
    if old_key.size == 0 or new_key.size == 0:
        return keep
    order = np.argsort(old_key, kind="stable")
    pos = np.searchsorted(old_key[order], new_key)
    pos = np.minimum(pos, old_key.size - 1)
    hit = old_key[order][pos] == new_key
    keep[hit] = order[pos[hit]]
    return keep


# -- layout over an edge list ---------------------------------------------------------------
def empty_state(settings: FlowSettings, n: int, src: np.ndarray, dst: np.ndarray) -> FlowState:
    """Fresh state: every edge at the prior, nothing observed. Per-edge arrays get spare
    room (see :mod:`alerter.edge_room`) so later link changes can move them in place."""
    s, dt = settings, np.dtype(settings.dtype)
    k, e, h = s.lags + 1, int(src.shape[0]), s.history_hours
    beta, beta_avg = edge_room.allocate((k, e), dt, axis=1, fill=0.0), None
    beta[0] = s.prior
    if not s.forgetting:
        beta_avg = edge_room.allocate((k, e), dt, axis=1)
        beta_avg[...] = beta
    return FlowState(
        src=src, dst=dst, beta=beta, beta_avg=beta if beta_avg is None else beta_avg,
        cov=edge_room.allocate((e, s.block_size, s.block_size), dt, axis=0, fill=0.0),
        edge_hours=edge_room.allocate((e,), np.int32, axis=0, fill=0), phi=np.zeros(n, dt),
        phi_avg=np.zeros(n, dt), phi_scale=np.zeros(n, dt), node_hours=np.zeros(n, np.int64),
        quad_mean=np.zeros(n, dt), hist_e=np.zeros((h, n), dt), hist_b=np.zeros((h, n), dt))


def follow_edges(state: FlowState, settings: FlowSettings, keep: np.ndarray, src: np.ndarray,
                 dst: np.ndarray) -> FlowState:
    """The per-edge state at new positions: position ``p`` takes old position ``keep[p]``, or
    starts as in :func:`empty_state` where ``keep[p]`` is -1; endpoints from ``src``/``dst``.
    Moved in place when it can be (:func:`_moved`), else gathered: one numba pass per
    iterate, or one numpy ``take`` per array (new positions read position 0, then reset)."""
    st, s = state, settings
    if flow_kernels.AVAILABLE:
        moved = _moved(st, s, keep, src, dst)
        return moved if moved is not None else _gathered_fused(st, s, keep, src, dst)
    at, new = np.maximum(keep, 0), np.flatnonzero(keep < 0)

    def take(values: np.ndarray, axis: int) -> np.ndarray:
        out = np.take(values, at, axis=axis)
        if axis == 1:
            out[:, new] = 0
        else:
            out[new] = 0
        return out
    beta = take(st.beta, 1)
    beta[0, new] = s.prior
    if s.forgetting:
        beta_avg = beta
    else:
        beta_avg = take(st.beta_avg, 1)
        beta_avg[0, new] = s.prior
    return replace(st, src=src, dst=dst, beta=beta, beta_avg=beta_avg, cov=take(st.cov, 0),
                   edge_hours=take(st.edge_hours, 0))


def _moved(st: FlowState, s: FlowSettings, keep: np.ndarray, src: np.ndarray, dst: np.ndarray) -> FlowState | None:
    """:func:`follow_edges` in place, when kept links kept their order and every per-edge
    buffer has room for the new count (see :mod:`alerter.edge_room`); else None."""
    e = keep.shape[0]
    arrays = [(st.beta, 1), (st.cov, 0), (st.edge_hours, 0)] + ([] if s.forgetting else [(st.beta_avg, 1)])
    rooms = [r for r in (edge_room.room(a, axis, e) for a, axis in arrays) if r is not None]
    if len(rooms) < len(arrays):
        return None
    moves = edge_room.plan(keep)
    if moves is None:
        return None
    for buf, (_, axis) in zip(rooms, arrays, strict=True):
        edge_room.move(buf, axis, moves)
    beta, cov, hours = rooms[0][:, :e], rooms[1][:e], rooms[2][:e]
    beta_avg = beta if s.forgetting else rooms[3][:, :e]
    for b in (beta,) if beta_avg is beta else (beta, beta_avg):
        b[0, moves.fresh] = s.prior
        b[1:, moves.fresh] = 0
    cov[moves.fresh] = 0
    hours[moves.fresh] = 0
    return replace(st, src=src, dst=dst, beta=beta, beta_avg=beta_avg, cov=cov, edge_hours=hours)


def _gathered_fused(st: FlowState, s: FlowSettings, keep: np.ndarray, src: np.ndarray,
                    dst: np.ndarray) -> FlowState:
    """:func:`follow_edges` as one parallel kernel pass per iterate (see flow_kernels), into
    arrays with spare room."""
    e, m = keep.shape[0], st.cov.shape[1] * st.cov.shape[2]
    beta = edge_room.allocate((st.beta.shape[0], e), st.beta.dtype, axis=1)
    cov = edge_room.allocate((e, *st.cov.shape[1:]), st.cov.dtype, axis=0)
    hours = edge_room.allocate((e,), st.edge_hours.dtype, axis=0)
    old_cov = st.cov.reshape(st.cov.shape[0], m)  # st.src already holds the new edges
    flow_kernels.gather_edges(keep, st.beta, old_cov, st.edge_hours, beta, cov.reshape(e, m), hours, s.prior)
    beta_avg = beta
    if not s.forgetting:
        beta_avg = edge_room.allocate(beta.shape, beta.dtype, axis=1)
        flow_kernels.gather_edges(keep, st.beta_avg, old_cov[:, :0], st.edge_hours, beta_avg,
                                  np.empty((e, 0), st.cov.dtype), hours, s.prior)  # same hours again
    return replace(st, src=src, dst=dst, beta=beta, beta_avg=beta_avg, cov=cov, edge_hours=hours)
