"""Fused numba kernels of the flow learner's default path (lag 0, no own lag, forgetting).

The numpy path of :mod:`alerter.flows` makes a dozen passes over the per-edge arrays each
hour; at 22 million links each pass costs tens of milliseconds of memory traffic. Over a
destination-sorted edge list the whole hour can instead be done destination by
destination, so the in-edges of one node are read once to predict, attribute and compute
the step, and once more (still in cache for all but the hubs) to apply it. Destinations
are split into blocks of about equal edge counts and the blocks run in parallel; nothing
is shared between destinations except the per-source totals of the conservation cap,
which each thread sums into its own row.

The sources of a node's in-links are scattered over the whole node range, so reading their
excess (first pass) and adding to their cap totals (second pass) are random accesses to
arrays larger than a core's cache; both passes ask the memory system for the source of
the edge :data:`PREFETCH` places ahead (a software prefetch, no effect on the results),
which roughly halved the kernel's time at 22 million links on this project's machine.

Arithmetic is float64 inside; stored arrays keep their dtype. ``numba`` is a dependency,
but these are optional: :data:`alerter.flows.KERNEL` says whether they are in use, and
``ALERTER_FLOW_KERNEL=numpy`` forces the numpy path (CI runs both).
"""

from __future__ import annotations

import os

import numpy as np

__all__ = ["AVAILABLE", "balanced_blocks", "direction", "follow_slots", "forecast_runs", "gather_edges",
           "observe_runs", "scale", "step", "threads"]

try:
    if os.environ.get("ALERTER_FLOW_KERNEL", "") == "numpy":  # force the fallback (benchmarks, CI)
        raise ImportError("numba disabled by ALERTER_FLOW_KERNEL=numpy")
    import numba
except ImportError:  # pragma: no cover - depends on the environment
    numba = None  # type: ignore[assignment]

AVAILABLE = numba is not None
"""True when the kernels are compiled with numba (else the numpy path is used)."""


def _jit(fn):  # noqa: ANN001, ANN202 - a decorator
    return numba.njit(cache=True, nogil=True)(fn) if numba is not None else fn


def _pjit(fn):  # noqa: ANN001, ANN202 - a decorator: parallel over the blocks
    return numba.njit(cache=True, nogil=True, parallel=True)(fn) if numba is not None else fn


_prange = numba.prange if numba is not None else range

PREFETCH = 32
"""How many edges ahead the kernels prefetch a source's row (tried 16, 32, 64: all alike)."""


def _no_prefetch(arr, i):  # noqa: ANN001, ANN202 - plain Python: nothing to prefetch
    return None


if numba is not None:
    from llvmlite import binding, ir
    from numba.core import cgutils
    from numba.extending import intrinsic

    # the intrinsic's mangled name: opaque pointers from LLVM 15 (llvmlite >= 0.44), typed before
    _PREFETCH_NAME = "llvm.prefetch.p0" if binding.llvm_version_info >= (15,) else "llvm.prefetch.p0i8"

    @intrinsic
    def _prefetch(typingctx, arr, i):  # noqa: ANN001, ANN202, ARG001 - numba intrinsic signature
        """Hint the CPU to load row ``i`` of ``arr`` into cache (LLVM's ``llvm.prefetch``)."""
        sig = numba.types.void(arr, i)

        def codegen(context, builder, signature, args):  # noqa: ANN001, ANN202
            aryty = signature.args[0]
            ary = context.make_array(aryty)(context, builder, args[0])
            i64 = ir.IntType(64)
            row = args[1] if args[1].type.width == 64 else builder.sext(args[1], i64)
            index = [row] + [ir.Constant(i64, 0)] * (aryty.ndim - 1)
            ptr = cgutils.get_item_pointer2(context, builder, ary.data, cgutils.unpack_tuple(builder, ary.shape),
                                            cgutils.unpack_tuple(builder, ary.strides), aryty.layout, index,
                                            wraparound=False)
            byte_ptr = ir.IntType(8).as_pointer()
            i32 = ir.IntType(32)
            signature_ir = ir.FunctionType(ir.VoidType(), [byte_ptr, i32, i32, i32])
            fn = cgutils.get_or_insert_function(builder.module, signature_ir, _PREFETCH_NAME)
            # read/write 1 (the totals are written), locality 3 (keep in all cache levels), data cache
            builder.call(fn, [builder.bitcast(ptr, byte_ptr), ir.Constant(i32, 1), ir.Constant(i32, 3),
                              ir.Constant(i32, 1)])
            return context.get_dummy_value()
        return sig, codegen
else:  # pragma: no cover - depends on the environment
    _prefetch = _no_prefetch


def _thread_id() -> int:  # replaced by numba's inside compiled code
    return 0


_tid = numba.get_thread_id if numba is not None else _thread_id


def threads() -> int:
    """Worker threads of the parallel kernels (numba's setting; 1 without numba)."""
    return int(numba.get_num_threads()) if numba is not None else 1


def balanced_blocks(indptr: np.ndarray, per_thread: int = 4) -> np.ndarray:
    """Node boundaries ``[b0=0, b1, ..., n]`` of runs holding about equal numbers of edges.

    >>> b = balanced_blocks(np.array([0, 5, 6, 7, 8, 10]))
    >>> int(b[0]), int(b[-1]), bool(np.all(np.diff(b) > 0))
    (0, 5, True)
    """
    n = indptr.shape[0] - 1
    k = max(1, threads() * per_thread)
    cuts = np.searchsorted(indptr, np.linspace(0, indptr[-1], k + 1)[1:-1], side="left")
    return np.unique(np.concatenate([[0], np.clip(cuts, 0, n), [n]])).astype(np.int64)


# -- the fused hour, per destination run ----------------------------------------------------
@_pjit
def forecast_runs(blocks, indptr, src, beta, ehat, out):  # noqa: ANN001, ANN201
    """``out[i] = sum over i's in-edges of beta[e] * ehat[src[e]]``."""
    n_edges = src.shape[0]
    for k in _prange(blocks.shape[0] - 1):
        for i in range(blocks[k], blocks[k + 1]):
            s = 0.0
            for e in range(indptr[i], indptr[i + 1]):
                if e + PREFETCH < n_edges:
                    _prefetch(ehat, src[e + PREFETCH])
                s += np.float64(beta[e]) * np.float64(ehat[src[e]])
            out[i] = s


@_jit
def _novelty(ages, ed, a0, a1, inv_tau, table):  # noqa: ANN001, ANN202
    """``exp(-max(age, 0) / tau)`` of edge ``ed``: from ``table`` for whole-hour ages (0 past
    its end), else computed; 0 when ``inv_tau`` is 0 (no age weighting)."""
    if inv_tau == 0.0:
        return 0.0
    age = max(a0 + a1 * np.float64(ages[ed]), 0.0)
    if table.shape[0] > 0:
        k = np.int64(age)
        return table[k] if k < table.shape[0] else 0.0
    return np.exp(-age * inv_tau)


@_pjit
def observe_runs(blocks, indptr, src, eb, ok, sign, beta, cov, hours, ages, a0, a1, inv_tau, age_table,  # noqa: ANN001, ANN201, PLR0913, C901
                 rate_table, pull_table, ridge, tiny, prior, lo, hi, step, eps, scale_rate,
                 quad_mean, node_hours, raw, inflow, part_sum, totals, scratch):
    """One closed hour of the default path, destination by destination.

    ``eb[j] = (excess, baseline)`` of node ``j`` side by side, so one cache line serves both
    when gathered through ``src``. Per edge into node ``i``: input ``u = e[j] + exp(-age /
    tau) * b[j]`` (``age = a0 + a1 * ages[e]``, so link birth hours and explicit ages both
    fit; ``inv_tau = 0``: no age weight; a non-empty ``age_table`` holds the weight per whole
    hour of age), contribution ``raw = beta u`` before learning, and its part pointing the
    way of ``sign[i]`` summed into ``part_sum[i]`` for the attribution cap. Then, when
    ``ok[i]``, the diagonal-RLS normalised step: running input variance ``cov``, direction
    ``v = u / (cov (1 + ridge))``, gain ``step * err / max(mean quad, step * quad)``, the
    pull toward the prior, the edge's observed hours; for every edge the clip to ``[lo,
    hi]`` and the positive coefficients summed per source into ``totals[thread]`` for the
    conservation cap. ``scratch[thread]`` (as long as the largest in-degree) keeps the run's
    directions between the two passes, so the second pass gathers nothing.
    """
    last_r = rate_table.shape[0] - 1
    last_p = pull_table.shape[0] - 1
    n_edges = src.shape[0]
    for k in _prange(blocks.shape[0] - 1):
        t = _tid()
        v_run = scratch[t]
        tot = totals[t]
        for i in range(blocks[k], blocks[k + 1]):
            first, stop = indptr[i], indptr[i + 1]
            sg = np.float64(sign[i])
            good = ok[i]
            pred = 0.0
            part = 0.0
            quad = 0.0
            for ed in range(first, stop):
                if ed + PREFETCH < n_edges:
                    _prefetch(eb, src[ed + PREFETCH])
                j = src[ed]
                z = np.float64(eb[j, 0]) + _novelty(ages, ed, a0, a1, inv_tau, age_table) * np.float64(eb[j, 1])
                raw[ed] = np.float64(beta[ed]) * z
                r = np.float64(raw[ed])
                pred += r
                if r * sg > 0.0:
                    part += r * sg
                if good:
                    c = np.float64(cov[ed])
                    cov[ed] = c + np.float64(rate_table[min(hours[ed], last_r)]) * (z * z - c)
                    v = z / (np.float64(cov[ed]) * (1.0 + ridge) + tiny)
                    v_run[ed - first] = v
                    quad += z * v
            inflow[i] = pred
            part_sum[i] = part
            if good:
                rate_n = max(1.0 / (np.float64(node_hours[i]) + 1.0), scale_rate)
                qm = np.float64(quad_mean[i])
                quad_mean[i] = qm + rate_n * (quad - qm)
                norm = max(np.float64(quad_mean[i]), step * quad) + eps
                gain = step * (np.float64(eb[i, 0]) - pred) / norm
                node_hours[i] += 1
                for ed in range(first, stop):
                    bb = np.float64(beta[ed]) + gain * v_run[ed - first]
                    bb += np.float64(pull_table[min(hours[ed], last_p)]) * (prior - bb)
                    hours[ed] += 1
                    if ed + PREFETCH < n_edges:
                        _prefetch(tot, src[ed + PREFETCH])
                    beta[ed] = min(max(bb, lo), hi)
                    if beta[ed] > 0:
                        tot[src[ed]] += np.float64(beta[ed])
            else:
                for ed in range(first, stop):
                    if ed + PREFETCH < n_edges:
                        _prefetch(tot, src[ed + PREFETCH])
                    beta[ed] = min(max(np.float64(beta[ed]), lo), hi)
                    if beta[ed] > 0:
                        tot[src[ed]] += np.float64(beta[ed])


@_pjit
def gather_edges(keep, beta, cov, hours, new_beta, new_cov, new_hours, prior):  # noqa: ANN001, ANN201
    """Per-edge state at new positions after links changed, in one parallel pass: position
    ``p`` takes old position ``keep[p]``, or starts fresh (``prior`` in lag 0, zero elsewhere,
    zero variance and hours) where ``keep[p]`` is -1. ``beta`` is (lags, E), ``cov`` (E, m)."""
    for p in _prange(keep.shape[0]):
        q = keep[p]
        if q >= 0:
            for r in range(beta.shape[0]):
                new_beta[r, p] = beta[r, q]
            for c in range(cov.shape[1]):
                new_cov[p, c] = cov[q, c]
            new_hours[p] = hours[q]
        else:
            new_beta[0, p] = prior
            for r in range(1, beta.shape[0]):
                new_beta[r, p] = 0
            for c in range(cov.shape[1]):
                new_cov[p, c] = 0
            new_hours[p] = 0


@_pjit
def follow_slots(order, position, born, keep, born_out):  # noqa: ANN001, ANN201
    """Re-sync with the link graph in one parallel pass over the new CSR order (``order[p]``
    is the graph slot at position ``p``, each slot once): ``keep[p]`` takes the slot's learner
    position of the last sync (-1 for a new slot), the slot records ``p`` for the next one,
    and ``born_out[p]`` the link's birth hour."""
    for p in _prange(order.shape[0]):
        s = order[p]
        keep[p] = position[s]
        position[s] = p
        born_out[p] = born[s]


@_pjit
def scale(beta, src, factor):  # noqa: ANN001, ANN201
    """``beta *= factor[src]`` where beta > 0 (the conservation cap)."""
    for e in _prange(beta.shape[0]):
        if beta[e] > 0:
            beta[e] = beta[e] * factor[src[e]]


# -- the two-pass learning step for an unsorted edge list -----------------------------------
@_jit
def direction(u, ok, dst, cov, hours, rate_table, ridge, tiny, quad):  # noqa: ANN001, ANN201
    """Per edge of an observed destination: update cov, overwrite ``u`` with ``v = z / cov'``,
    add ``z v`` into ``quad[dst]``; other edges get ``v = 0`` and keep their cov."""
    last = rate_table.shape[0] - 1
    for e in range(u.shape[0]):
        i = dst[e]
        if not ok[i]:
            u[e] = 0.0
            continue
        z = np.float64(u[e])
        r = np.float64(rate_table[min(hours[e], last)])
        c = np.float64(cov[e]) + r * (z * z - np.float64(cov[e]))
        cov[e] = c
        v = z / (np.float64(cov[e]) * (1.0 + ridge) + tiny)
        u[e] = v
        quad[i] += z * np.float64(u[e])


@_jit
def step(v, gain, ok, src, dst, beta, hours, pull_table, prior, lo, hi, totals):  # noqa: ANN001, ANN201
    """Per edge: ``beta += gain[dst] v``, the prior pull, the clip, ``hours += ok[dst]`` and the
    positive coefficients summed into ``totals[src]`` for the cap."""
    last = pull_table.shape[0] - 1
    for e in range(v.shape[0]):
        i = dst[e]
        b = np.float64(beta[e]) + gain[i] * np.float64(v[e])
        beta[e] = b
        if ok[i]:
            w = np.float64(pull_table[min(hours[e], last)])
            beta[e] = np.float64(beta[e]) + w * (prior - np.float64(beta[e]))
            hours[e] += 1
        b = min(max(np.float64(beta[e]), lo), hi)
        beta[e] = b
        if beta[e] > 0:
            totals[src[e]] += np.float64(beta[e])
