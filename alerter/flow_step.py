"""The flow learner's generic step: preconditioned normalised LMS for any lags and own lag.

One closed hour's update of :class:`~alerter.flow_state.FlowState` in place, as whole-array
numpy passes over the edges (see :mod:`alerter.flows` for the model and why this step).
The default path (lag 0, no own lag, forgetting) has faster forms of the same step in
:mod:`alerter.flows` and :mod:`alerter.flow_kernels`; this one serves every setting.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .edge_runs import sum_by
from .flow_state import FlowSettings, FlowState

__all__ = ["TINY", "learn", "rates", "solve"]

TINY = 1e-30
"""Added to every divisor of the step, so an input that never moved gives a zero direction."""

Scratch = Callable[[str, tuple[int, ...]], np.ndarray]  # a reused buffer by name and shape


def rates(s: FlowSettings, hours: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(step size, scale rate) for coordinates with ``hours`` updates before this one."""
    if s.forgetting:
        step = np.full(hours.shape, s.step, dtype=float)
    else:
        step = s.step0 * (1.0 + hours / s.step_t0_hours) ** (-s.step_power)
    rate = np.maximum(1.0 / (hours + 1.0), s.scale_rate)
    return step, rate


def learn(st: FlowState, s: FlowSettings, u: np.ndarray, own: np.ndarray, err: np.ndarray, ok: np.ndarray,
          scratch: Scratch, apply_cap: Callable[[np.ndarray], None]) -> None:
    """One normalised, preconditioned, projected gradient step on the observed destinations.

    ``u`` the per-edge inputs (lags x edges), ``own`` the destinations' own previous excess,
    ``err`` the one-step error per node, ``ok`` the observed nodes; ``apply_cap`` projects
    the coefficients onto the conservation cap (it may need other partitions' sums).
    """
    m_e = ok[st.dst]
    step_e, rate_e = rates(s, st.edge_hours)
    step_e *= m_e
    rate_e *= m_e
    step_n, rate_n = rates(s, st.node_hours)
    step_n *= ok
    if s.own_lag:
        st.phi_scale += (rate_n * ok) * (own * own - st.phi_scale)
    if s.precondition:
        v_beta, v_own, quad = _block_direction(st, s, u, own, m_e, rate_e, scratch)
    else:
        v_beta, v_own, quad = _plain_direction(st, s, u, own)
    gain = err / _normaliser(st, s, quad, step_e, step_n, rate_n * ok)  # per node
    v_beta *= step_e * gain[st.dst]
    st.beta += v_beta
    _pull_to_prior(st, s, step_e)
    np.clip(st.beta, s.beta_min, s.beta_max, out=st.beta)
    apply_cap(st.beta)
    st.edge_hours += m_e
    if s.own_lag:
        st.phi += step_n * gain * v_own
        np.clip(st.phi, s.own_min, s.own_max, out=st.phi)
    st.node_hours += ok
    if not s.forgetting:
        _average(st.beta_avg, st.beta, st.edge_hours, m_e, s.average_eta)
        if s.own_lag:
            _average(st.phi_avg, st.phi, st.node_hours, ok, s.average_eta)
    st.hours += 1


def _normaliser(st: FlowState, s: FlowSettings, quad: np.ndarray, step_e: np.ndarray, step_n: np.ndarray,
                rate_n: np.ndarray) -> np.ndarray:
    """``eps + max(mean quad, mu_max * quad)`` per destination.

    Dividing by the running mean of ``quad`` (not the hour's own value) keeps the fixed
    point at ordinary least squares; dividing by the hour's ``quad`` (NLMS) would solve a
    least-squares problem weighted by ``1 / quad``, which down-weights the most
    informative hours. The ``mu_max * quad`` floor (``mu_max`` the largest step into the
    destination this hour) keeps every step at most a full normalised step, so a
    high-leverage hour cannot overshoot; as the steps decrease it binds ever more rarely.
    """
    st.quad_mean += rate_n * (quad - st.quad_mean)
    mu_max = np.array(step_n, dtype=float)
    np.maximum.at(mu_max, st.dst, step_e)
    norm = np.maximum(st.quad_mean, mu_max * quad)
    norm += s.eps
    return norm


def _plain_direction(st: FlowState, s: FlowSettings, u: np.ndarray,
                     own: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Textbook NLMS: direction = inputs, normaliser = sum of squared inputs per destination."""
    quad = sum_by(st.dst, np.einsum("ke,ke->e", u, u, dtype=float), st.n_nodes)
    if s.own_lag:
        quad += own.astype(float) ** 2
    return np.array(u, dtype=np.dtype(s.dtype)), own.astype(float), quad


def _block_direction(st: FlowState, s: FlowSettings, u: np.ndarray, own: np.ndarray, m_e: np.ndarray,
                     rate_e: np.ndarray, scratch: Scratch) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-edge block preconditioner: direction ``P_e z_e``, ``P_e`` the inverse of the edge's
    running (ridged) input covariance over ``z_e = [u_e(t-0..L), own_dst]``.

    The metric ``M = sum_e E_e^T P_e E_e`` (plus a scalar block for the own coefficient of a
    node without in-edges) is symmetric positive definite, so the fixed point is the
    least-squares one; ``quad = z^T M z`` per destination is the NLMS normaliser.
    """
    k = s.lags + 1
    z = scratch("z", (st.n_edges, s.block_size))
    z[:, :k] = u.T
    if s.own_lag:
        np.take(own, st.dst, out=z[:, k])
    z *= m_e[:, None]  # unobserved destinations: zero input, zero step
    st.cov += rate_e[:, None, None] * (z[:, :, None] * z[:, None, :] - st.cov)
    v = solve(st.cov, z, s.ridge)
    quad = sum_by(st.dst, np.einsum("ed,ed->e", z, v, dtype=float), st.n_nodes)
    v_own = np.zeros(st.n_nodes)
    if s.own_lag:
        v_own += sum_by(st.dst, v[:, k], st.n_nodes)
        lonely = np.bincount(st.dst, minlength=st.n_nodes) == 0
        own_v = np.where(lonely, own / (st.phi_scale + TINY), 0.0)
        v_own += own_v
        quad += own_v * own
    return np.ascontiguousarray(v[:, :k].T), v_own, quad


def solve(cov: np.ndarray, z: np.ndarray, ridge: float) -> np.ndarray:
    """``(cov_e + ridge * tr(cov_e) / d * I)^-1 z_e`` for every edge at once.

    >>> cov = np.array([[[2.0, 0.0], [0.0, 4.0]]])
    >>> solve(cov, np.array([[2.0, 4.0]]), 0.0).round(6).tolist()
    [[1.0, 1.0]]
    """
    d = cov.shape[1]
    shift = np.trace(cov, axis1=1, axis2=2) * (ridge / d) + TINY
    if d == 1:
        return z / (cov[:, 0, :] * (1.0 + ridge) + TINY)
    a = cov + shift[:, None, None] * np.eye(d, dtype=cov.dtype)
    return np.linalg.solve(a, z[:, :, None])[:, :, 0]


def _pull_to_prior(st: FlowState, s: FlowSettings, step_e: np.ndarray) -> None:
    """The shrinkage toward the shared prior, fading with each edge's observed hours."""
    if s.prior_pull <= 0:
        return
    w = step_e * s.prior_pull * np.exp(-st.edge_hours / s.prior_hours)
    st.beta[0] += w * (s.prior - st.beta[0])
    if s.lags:
        st.beta[1:] -= w * st.beta[1:]


def _average(avg: np.ndarray, cur: np.ndarray, hours: np.ndarray, mask: np.ndarray, eta: float) -> None:
    """Polynomial-decay averaging of the iterates (``forgetting=False``)."""
    w = (1.0 + eta) / (hours + eta) * mask
    avg += w * (cur - avg)
