"""Fused numba kernels of the flow learner's default path (lag 0, no own lag, forgetting).

The numpy path of :mod:`alerter.flows` makes a dozen passes over the per-edge arrays each
hour; at 22 million links each pass costs tens of milliseconds of memory traffic. Over a
destination-sorted edge list the whole hour can instead be done destination by
destination, so the sources of one node's in-links are gathered once into a per-thread
scratch row and every later step of the hour (predict, attribute, the step and its
application) is a loop over contiguous rows that the compiler vectorises. Destinations
are split into blocks of about equal edge counts and the blocks run in parallel; nothing
is shared between destinations except the per-source totals of the conservation cap,
which each thread sums into its own row.

The sources of a node's in-links are scattered over the whole node range, so reading their
excess (the gather) and adding to their cap totals (the last loop) are random accesses to
arrays larger than a core's cache; both loops ask the memory system for the source of
the edge :data:`PREFETCH` places ahead (a software prefetch, no effect on the results).
The kind of prefetch matters on a machine with more than one core: a table that every
thread only reads (the excess) is prefetched for reading, and only a thread's own totals
row for writing. A prefetch for writing asks for the line exclusively, so two threads
gathering from one table took its lines from each other: at 22 million links the observe
kernel read 132-168 ms with write prefetches on both tables and 110-118 ms with the read
prefetch, and the forecast 48 ms against 19 ms (33 ms without any prefetch).

The cap totals are summed without a branch (a coefficient that is not positive adds 0):
about one coefficient in eight sits at 0, at places the branch predictor cannot guess,
and the branch cost 12-24 ms of that kernel's time at 22 million links.

Arithmetic is float64 inside; stored arrays keep their dtype. ``numba`` is a dependency,
but these are optional: :data:`alerter.flows.KERNEL` says whether they are in use, and
``ALERTER_FLOW_KERNEL=numpy`` forces the numpy path (CI runs both).
"""

from __future__ import annotations

import os

import numpy as np

__all__ = ["AVAILABLE", "balanced_blocks", "direction", "follow_slots", "forecast_runs", "gather_edges",
           "observe_runs", "scale", "shift_runs", "step", "threads", "value_range"]

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


def _jit_vec(fn):  # noqa: ANN001, ANN202 - a decorator: SIMD-friendly loops (see observe_runs)
    return numba.njit(cache=True, nogil=True, **_VEC)(fn) if numba is not None else fn


def _pjit_vec(fn):  # noqa: ANN001, ANN202 - a decorator: parallel over the blocks, SIMD-friendly loops
    return numba.njit(cache=True, nogil=True, parallel=True, **_VEC)(fn) if numba is not None else fn


_VEC = {"error_model": "numpy", "fastmath": {"reassoc", "contract"}}
"""No division-by-zero check per division and reassociable sums: what lets a loop over a
contiguous row vectorise. Results differ from the numpy path only in the last bits."""

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

    def _prefetch_intrinsic(write: int):  # noqa: ANN202 - builds a numba intrinsic
        """An intrinsic hinting the CPU to load row ``i`` of an array into cache (LLVM's
        ``llvm.prefetch``): for reading (``write=0``) or for writing (``write=1``)."""

        @intrinsic
        def prefetch(typingctx, arr, i):  # noqa: ANN001, ANN202, ARG001 - numba intrinsic signature
            sig = numba.types.void(arr, i)

            def codegen(context, builder, signature, args):  # noqa: ANN001, ANN202
                aryty = signature.args[0]
                ary = context.make_array(aryty)(context, builder, args[0])
                i64 = ir.IntType(64)
                row = args[1] if args[1].type.width == 64 else builder.sext(args[1], i64)
                index = [row] + [ir.Constant(i64, 0)] * (aryty.ndim - 1)
                shape = cgutils.unpack_tuple(builder, ary.shape)
                strides = cgutils.unpack_tuple(builder, ary.strides)
                ptr = cgutils.get_item_pointer2(context, builder, ary.data, shape, strides, aryty.layout, index,
                                                wraparound=False)
                byte_ptr = ir.IntType(8).as_pointer()
                i32 = ir.IntType(32)
                signature_ir = ir.FunctionType(ir.VoidType(), [byte_ptr, i32, i32, i32])
                fn = cgutils.get_or_insert_function(builder.module, signature_ir, _PREFETCH_NAME)
                # read (0) or write (1); locality 3 (keep in all cache levels); data cache
                builder.call(fn, [builder.bitcast(ptr, byte_ptr), ir.Constant(i32, write), ir.Constant(i32, 3),
                                  ir.Constant(i32, 1)])
                return context.get_dummy_value()
            return sig, codegen
        return prefetch

    _prefetch_read = _prefetch_intrinsic(0)
    _prefetch_write = _prefetch_intrinsic(1)
else:  # pragma: no cover - depends on the environment
    _prefetch_read = _prefetch_write = _no_prefetch


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
@_pjit_vec
def forecast_runs(blocks, indptr, src, beta, ehat, out):  # noqa: ANN001, ANN201
    """``out[i] = sum over i's in-edges of beta[e] * ehat[src[e]]``, prefetching ``ehat`` for
    reading (see the module docstring)."""
    n_edges = src.shape[0]
    for k in _prange(blocks.shape[0] - 1):
        for i in range(blocks[k], blocks[k + 1]):
            s = 0.0
            for e in range(indptr[i], indptr[i + 1]):
                if e + PREFETCH < n_edges:
                    _prefetch_read(ehat, src[e + PREFETCH])
                s += np.float64(beta[e]) * np.float64(ehat[src[e]])
            out[i] = s


@_pjit_vec
def observe_runs(blocks, indptr, src, eb, ok, sign, beta, cov, hours, ages, a0, a1, inv_tau, age_table,  # noqa: ANN001, ANN201, PLR0913, C901
                 rate_table, pull_table, ridge, tiny, prior, lo, hi, step, eps, scale_rate,
                 quad_mean, node_hours, raw, inflow, part_sum, totals, scratch):
    """One closed hour of the default path, destination by destination.

    ``eb[j] = (excess, baseline)`` of node ``j`` side by side, so one cache line serves both
    when gathered through ``src``. Per edge into node ``i``: input ``u = e[j] + exp(-age /
    tau) * b[j]`` (``age = a0 + a1 * ages[e]``, so link birth hours and explicit ages both
    fit; ``inv_tau = 0``: no age weight; a non-empty ``age_table`` holds the weight per whole
    hour of age, its last entry that of all older ages), contribution ``raw = beta u`` before
    learning, and its part pointing the way of ``sign[i]`` summed into ``part_sum[i]`` for the
    attribution cap. Then, when ``ok[i]``, the diagonal-RLS normalised step: running input
    variance ``cov``, direction ``v = u / (cov (1 + ridge))``, gain ``step * err / max(mean
    quad, step * quad)``, the pull toward the prior, the edge's observed hours; for every edge
    the clip to ``[lo, hi]`` and the positive coefficients summed per source into
    ``totals[thread]`` for the conservation cap.

    ``scratch[thread]`` holds three float64 rows as long as the largest in-degree: the run's
    gathered inputs are copied there first, so every later step is a loop over contiguous
    rows that the compiler turns into SIMD code (the source gather, with the link-age weight
    looked up in it, and the per-source scatter stay scalar loops of their own; the other
    table look-ups are loops of their own, written so that they vectorise: clamp as a float,
    then convert).
    """
    last_r = rate_table.shape[0] - 1
    last_p = pull_table.shape[0] - 1
    n_edges = src.shape[0]
    c1 = 1.0 + ridge
    for k in _prange(blocks.shape[0] - 1):
        t = _tid()
        z_run, v_run, w_run = scratch[t, 0], scratch[t, 1], scratch[t, 2]
        tot = totals[t]
        for i in range(blocks[k], blocks[k + 1]):
            first, stop = indptr[i], indptr[i + 1]
            m = stop - first
            _gather_inputs(first, m, src, eb, ages, a0, a1, inv_tau, age_table, z_run, w_run)
            bt, hr = beta[first:stop], hours[first:stop]
            pred, part = _contributions(bt, z_run, np.float64(sign[i]), raw[first:stop])
            inflow[i] = pred
            part_sum[i] = part
            if ok[i]:
                for q in range(m):
                    v_run[q] = rate_table[min(hr[q], last_r)]
                quad = _directions(cov[first:stop], z_run, v_run, c1, tiny)
                rate_n = max(1.0 / (np.float64(node_hours[i]) + 1.0), scale_rate)
                qm = np.float64(quad_mean[i])
                quad_mean[i] = qm + rate_n * (quad - qm)
                norm = max(np.float64(quad_mean[i]), step * quad) + eps
                gain = step * (np.float64(eb[i, 0]) - pred) / norm
                node_hours[i] += 1
                for q in range(m):
                    w_run[q] = pull_table[min(hr[q], last_p)]
                for q in range(m):
                    bb = np.float64(bt[q]) + gain * v_run[q]
                    bb += w_run[q] * (prior - bb)
                    hr[q] += 1
                    bt[q] = min(max(bb, lo), hi)
            else:
                for q in range(m):
                    bt[q] = min(max(np.float64(bt[q]), lo), hi)
            for ed in range(first, stop):  # the cap's per-source totals
                if ed + PREFETCH < n_edges:
                    _prefetch_write(tot, src[ed + PREFETCH])
                b = np.float64(beta[ed])
                tot[src[ed]] += b if b > 0.0 else 0.0  # no branch (module docstring)


@_jit_vec
def _gather_inputs(first, m, src, eb, ages, a0, a1, inv_tau, table, z, w):  # noqa: ANN001, ANN202
    """``z[q] = u`` of the ``m`` edges from ``first``: the source's excess plus, when ``inv_tau``
    is not 0, the novelty weight ``exp(-max(age, 0) / tau)`` times its baseline (``age = a0 +
    a1 * ages[e]``). A non-empty ``table`` holds the weight per whole hour of age (its last
    entry serves all older ages) and is looked up in the gather loop itself: the loop is
    scalar anyway and the table small (separate passes cost about 11 ms at 22 million
    links). A computed weight (explicit ages) takes a loop of its own over the baselines
    gathered into ``w`` (a scratch row)."""
    n_edges = src.shape[0]
    if inv_tau != 0.0 and table.shape[0] > 0:
        last = np.float64(table.shape[0] - 1)
        for q in range(m):
            e = first + q
            if e + PREFETCH < n_edges:
                _prefetch_read(eb, src[e + PREFETCH])
            j = src[e]
            weight = table[np.int64(min(max(a0 + a1 * np.float64(ages[e]), 0.0), last))]
            z[q] = np.float64(eb[j, 0]) + weight * np.float64(eb[j, 1])
        return
    for q in range(m):
        e = first + q
        if e + PREFETCH < n_edges:
            _prefetch_read(eb, src[e + PREFETCH])
        j = src[e]
        z[q] = eb[j, 0]
        w[q] = eb[j, 1]
    if inv_tau != 0.0:
        for q in range(m):
            z[q] += np.exp(-max(a0 + a1 * np.float64(ages[first + q]), 0.0) * inv_tau) * w[q]


@_jit_vec
def _contributions(beta, z, sign, raw):  # noqa: ANN001, ANN202
    """``raw = beta z`` (stored, then read back at its dtype); returns their sum and the sum
    of their parts pointing the way of ``sign``."""
    pred = 0.0
    part = 0.0
    for q in range(beta.shape[0]):
        raw[q] = np.float64(beta[q]) * z[q]
        r = np.float64(raw[q])
        pred += r
        part += max(r * sign, 0.0)
    return pred, part


@_jit_vec
def _directions(cov, z, rate, c1, tiny):  # noqa: ANN001, ANN202
    """Update the running input variance ``cov`` at ``rate``; overwrite ``rate`` with the
    direction ``v = z / (cov c1 + tiny)``; returns ``sum z v``."""
    quad = 0.0
    for q in range(cov.shape[0]):
        zq = z[q]
        c = np.float64(cov[q])
        cov[q] = c + rate[q] * (zq * zq - c)
        v = zq / (np.float64(cov[q]) * c1 + tiny)
        rate[q] = v
        quad += zq * v
    return quad


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
def follow_slots(order, position, born, keep, born_out, src, dst, src_out, dst_out):  # noqa: ANN001, ANN201, PLR0913
    """Re-sync with the link graph in one parallel pass over the new CSR order (``order[p]``
    is the graph slot at position ``p``, each slot once): ``keep[p]`` takes the slot's learner
    position of the last sync (-1 for a new slot), the slot records ``p`` for the next one,
    ``born_out[p]`` the link's birth hour and, when ``src_out`` is not empty, ``src_out[p]``
    and ``dst_out[p]`` its endpoints (from the per-slot ``src`` and ``dst``)."""
    ends = src_out.shape[0] > 0
    for p in _prange(order.shape[0]):
        s = order[p]
        keep[p] = position[s]
        position[s] = p
        born_out[p] = born[s]
        if ends:
            src_out[p] = src[s]
            dst_out[p] = dst[s]


def value_range(a: np.ndarray) -> tuple[int, int]:
    """``(a.min(), a.max())`` of a non-empty integer array in one pass (two numpy passes
    cost about 20 ms each over 22 million links; the re-sync checks three such arrays)."""
    if numba is None:  # pragma: no cover - depends on the environment
        return int(a.min()), int(a.max())
    lo, hi = _value_range(a)
    return int(lo), int(hi)


@_pjit
def _value_range(a):  # noqa: ANN001, ANN202
    lo, hi = a[0], a[0]
    for i in _prange(a.shape[0]):
        lo = min(lo, a[i])
        hi = max(hi, a[i])
    return lo, hi


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


# -- moving per-edge state in place after link changes (see alerter.edge_room) -------------
@_jit
def shift_runs(keep, max_runs):  # noqa: ANN001, ANN201
    """Stretches of kept positions that shift by one displacement: ``runs[r] = (start, stop,
    d)`` for new positions ``start:stop`` reading old ``start + d:stop + d``, the positions of
    new links (``keep == -1``), and whether kept positions rise (False: order changed). A count
    above ``max_runs`` means there were more stretches than that (the scan stopped)."""
    runs = np.empty((max_runs, 3), np.int64)
    fresh = np.empty(1024, np.int64)
    n, n_runs, n_fresh, last, p = keep.shape[0], 0, 0, np.int64(-1), 0
    while p < n:
        q = np.int64(keep[p])
        if q < 0:
            if n_fresh == fresh.shape[0]:
                grown = np.empty(2 * n_fresh, np.int64)
                grown[:n_fresh] = fresh
                fresh = grown
            fresh[n_fresh] = p
            n_fresh += 1
            p += 1
            continue
        if q <= last:
            return runs, n_runs, fresh, n_fresh, False
        if n_runs == max_runs:
            return runs, n_runs + 1, fresh, n_fresh, True
        start, d = p, q - p
        p += 1
        while p < n and np.int64(keep[p]) == p + d:  # the stretch goes on (the hot loop)
            p += 1
        runs[n_runs, 0], runs[n_runs, 1], runs[n_runs, 2] = start, p, d
        n_runs += 1
        last = p - 1 + d
    return runs, n_runs, fresh, n_fresh, True
