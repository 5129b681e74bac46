"""Fused numba kernels of the seasonal baseline (see ``alerter/baseline.py``).

One pass per hour over the nodes doing the float operations of the numpy path in the same
order and precision; used when numba imports, else the names below are plain Python
functions that the baseline never calls (it takes its numpy path).
"""

from __future__ import annotations

import math
import os

import numpy as np

try:  # optional: one fused pass per hour over the nodes; numpy passes otherwise
    if os.environ.get("ALERTER_BASELINE_KERNEL", "") == "numpy":  # force the fallback
        raise ImportError("numba disabled by ALERTER_BASELINE_KERNEL=numpy")
    import numba as _numba
except ImportError:  # pragma: no cover - depends on the environment
    _numba = None  # type: ignore[assignment]

KERNEL = "numba" if _numba is not None else "numpy"
"""Which implementation ``SeasonalBaseline`` uses for forecast, scale and update."""


def _jit(fn):  # noqa: ANN001, ANN202 - a decorator
    # error_model="numpy": a division by zero gives inf/nan instead of a check per division,
    # which keeps the loops free of exception paths (and vectorisable).
    return _numba.njit(cache=True, nogil=True, error_model="numpy")(fn) if _numba is not None else fn


def _jit_inline(fn):  # noqa: ANN001, ANN202 - a decorator
    # Helpers of the update kernel, inlined at numba's level: a call per node that passes
    # arrays would cost reference counting per node.
    if _numba is None:
        return fn
    return _numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")(fn)


# The kernels below do, node by node, exactly the float operations of the numpy path, in
# the same order and the same precision (constants arrive as scalars of the state's dtype
# in the tuple ``p``, so float32 state stays float32 arithmetic; where numpy rounds a float64
# intermediate to the dtype, ``cast`` does the same). Only ``exp`` is left to numpy, so that
# it is the same SIMD exp in both modes. No fastmath (it would allow FMA contraction).
_P_ALPHA, _P_GAMMA, _P_DELTA, _P_CLIP, _P_RATE, _P_FLOOR, _P_ZERO, _P_ONE = range(8)
_I_WARM, _I_YOUNG, _I_ADOPT, _I_RELEARN, _I_WEEKLY, _I_NOISE, _I_COMPUTE_SD = range(7)


@_jit
def _kernel_forecast(level, season, week, out, neg, zero):  # noqa: ANN001, ANN201
    """``out = level + season + week``; ``neg = -max(out, 0)`` (the count noise's exponent)."""
    for i in range(level.shape[0]):
        f = level[i] + season[i]
        f += week[i]
        out[i] = f
        neg[i] = -(f if (f > zero or f != f) else zero)


@_jit
def _kernel_neg(yhat, neg, zero):  # noqa: ANN001, ANN201
    """``neg = -max(yhat, 0)``, NaN kept (as ``np.maximum``)."""
    for i in range(yhat.shape[0]):
        f = yhat[i]
        neg[i] = -(f if (f > zero or f != f) else zero)


@_jit
def _kernel_scale(var, t, noise_on, p, out):  # noqa: ANN001, ANN201
    """``out = max(sqrt(var + t (1 - t)), floor)`` (``sqrt(var)`` without count noise)."""
    one, floor = p[_P_ONE], p[_P_FLOOR]
    for i in range(var.shape[0]):
        v = var[i]
        if noise_on:
            ti = t[i]
            v = v + ti * (one - ti)
        sd = math.sqrt(v)
        out[i] = sd if not sd < floor else floor


@_jit_inline
def _k_sd(var_i, t_i, p, noise_on):  # noqa: ANN001, ANN201
    """Scale and count noise of one node (as ``scale`` and ``_count_noise``)."""
    one, floor = p[_P_ONE], p[_P_FLOOR]
    noise = t_i * (one - t_i) if noise_on else p[_P_ZERO]
    v = var_i + noise if noise_on else var_i
    sd = math.sqrt(v)
    return (sd if not sd < floor else floor), noise


@_jit_inline
def _k_clip(resid, bound):  # noqa: ANN001, ANN201
    """``maximum(minimum(resid, bound), -bound)``, NaN kept as numpy does."""
    clipped = bound if resid > bound else resid
    return -bound if clipped < -bound else clipped


@_jit_inline
def _k_var_delta(clipped, noise, var_i, p, noise_on):  # noqa: ANN001, ANN201
    """``rate * (e^2 - noise - v)`` in the dtype (``_track_variance``)."""
    tmp = clipped * clipped
    if noise_on:
        tmp -= noise
    tmp -= var_i
    return tmp * p[_P_RATE]


@_jit_inline
def _k_young(seen_i, rate64):  # noqa: ANN001, ANN201
    """The warm-up factor ``max(1 / (seen + 1), rate) / rate`` in float64."""
    return max(1.0 / (seen_i + 1.0), rate64) / rate64


@_jit_inline
def _k_var_apply(var_i, tmp, use, p, noise_on):  # noqa: ANN001, ANN201
    if use:
        var_i = var_i + tmp
    if noise_on:
        var_i = var_i if not var_i < p[_P_ZERO] else p[_P_ZERO]
    return var_i


@_jit_inline
def _k_run(run_i, sum_i, resid, up, down, obs, zero):  # noqa: ANN001, ANN201
    """Advance one signed run (``_runs``): a flip or a residual inside the clip resets."""
    if (up and run_i < 0) or (down and run_i > 0) or (obs and not up and not down):
        run_i = 0
        sum_i = zero
    if up or down:
        run_i += 1 if up else -1
        sum_i += resid
    return run_i, sum_i


@_jit_inline
def _k_relearn(relearn_i, obs, hit, relearn_hours):  # noqa: ANN001, ANN201
    if hit:
        return relearn_hours
    return relearn_i - 1 if (obs and relearn_i > 0) else relearn_i


@_jit
def _kernel_update(y, yhat, sd, t, st, p, ip, rate64, adopted):  # noqa: ANN001, ANN201
    """One hour over all nodes, no node young (``seen >= ceil(1 / variance_rate)``)."""
    _update_loop(y, yhat, sd, t, st, p, ip, rate64, adopted, False)


@_jit
def _kernel_update_young(y, yhat, sd, t, st, p, ip, rate64, adopted):  # noqa: ANN001, ANN201
    """One hour over all nodes, some young (the float64 warm-up rate is computed)."""
    _update_loop(y, yhat, sd, t, st, p, ip, rate64, adopted, True)


@_jit
def _kernel_adopt(idx, level, run, run_sum):  # noqa: ANN001, ANN201
    """Adopt the runs that lasted: the level jumps by the run's mean residual (in float64,
    rounded to the dtype, as numpy), and the run starts over."""
    zero = run_sum.dtype.type(0)
    for i in idx:
        level[i] = level[i] + np.float64(run_sum[i]) / np.float64(abs(run[i]))
        run[i] = 0
        run_sum[i] = zero


@_jit_inline
def _update_loop(y, yhat, sd, t, st, p, ip, rate64, adopted, young):  # noqa: ANN001, ANN201
    """The fused hour. ``sd`` is read, or (``ip[_I_COMPUTE_SD]``) computed from ``var`` and
    ``t = exp(-max(yhat, 0))`` and written. ``adopted`` is written; the adopted nodes'
    level jump and run reset are left to ``_kernel_adopt`` (a division per node would
    otherwise be paid by every node of the vectorised loop)."""
    level, season, week, var, seen, run, run_sum, relearn = st
    noise_on, zero, adopt_after = ip[_I_NOISE], p[_P_ZERO], ip[_I_ADOPT]
    cast = var.dtype.type  # rounds a float64 to the dtype, as numpy's stores do
    for i in range(y.shape[0]):
        yi, var_i, seen_i = y[i], var[i], seen[i]
        obs = yi == yi
        sd_i, noise = _k_sd(var_i, t[i], p, noise_on)
        if ip[_I_COMPUTE_SD]:
            sd[i] = sd_i
        else:
            sd_i = sd[i]
        resid = cast(yi - yhat[i]) if obs else zero
        bound = sd_i * p[_P_CLIP]
        clipped = _k_clip(resid, bound)
        level[i] += clipped * p[_P_ALPHA]
        season[i] += clipped * p[_P_GAMMA]
        if ip[_I_WEEKLY]:
            week[i] += clipped * p[_P_DELTA]
        tmp = _k_var_delta(clipped, noise, var_i, p, noise_on)
        if young and seen_i < ip[_I_YOUNG]:
            tmp = cast(tmp * _k_young(seen_i, rate64))
        use = obs and (clipped == resid or seen_i < ip[_I_WARM])
        var[i] = _k_var_apply(var_i, tmp, use, p, noise_on)
        run_i, sum_i = _k_run(run[i], run_sum[i], resid, obs and resid > bound,
                              obs and resid < -bound, obs, zero)
        hit = adopt_after > 0 and abs(run_i) >= adopt_after
        run[i], run_sum[i] = run_i, sum_i
        relearn[i] = _k_relearn(relearn[i], obs, hit, ip[_I_RELEARN])
        seen[i] = seen_i + obs
        adopted[i] = hit
