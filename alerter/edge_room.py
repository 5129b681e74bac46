"""Per-edge arrays with spare room at their end, moved in place when links change.

When a few links appear or disappear in an hour, the learner's per-edge state (coefficients,
running variances, observed hours) must follow the new edge order. Gathering it into new
arrays costs a fresh allocation per array each such hour: at 22 million links about 260 MB
whose first touch (page faults) costs as much as the copy itself. Kept links keep their
relative order between two syncs unless the graph was compacted in between, so the new
order is the old one with a few stretches shifted left or right: moving those stretches
inside the same buffer (``memmove``, which handles overlap) does the job in one streaming
pass and no new memory, if the buffer has room for the new edge count. Arrays made here
carry that room: a view of the first ``n`` entries of a buffer about 1.6% longer.

Only C-contiguous views get room (the edge axis first, or only length-1 axes before it):
a strided view would turn a later ``reshape`` into a silent copy.
"""

from __future__ import annotations

import ctypes
import weakref
from dataclasses import dataclass

import numpy as np

from . import flow_kernels

__all__ = ["MAX_RUNS", "Moves", "allocate", "move", "plan", "room"]

MAX_RUNS = 50_000
"""More shifted stretches than this (a hundred-thousand-link reshuffle): gather instead, as
one Python call per stretch and array would then cost more than the gather."""


_MADE: weakref.WeakValueDictionary[int, np.ndarray] = weakref.WeakValueDictionary()
"""Buffers made by :func:`allocate`, by id: only these are ever written past a view's end."""


def _slack(n: int) -> int:
    return n + max(n >> 6, 1024)


def _roomy(shape: tuple[int, ...], axis: int) -> bool:
    return all(d == 1 for d in shape[:axis])


def allocate(shape: tuple[int, ...], dtype: np.dtype | type, axis: int, fill: float | None = None) -> np.ndarray:
    """An array of ``shape`` (``fill``-ed, else uninitialised) whose buffer is longer along ``axis``.

    >>> a = allocate((1, 5), np.float32, axis=1, fill=0.5)
    >>> a.shape, a.flags.c_contiguous, room(a, 1, 900) is not None, room(a, 1, 5000) is None
    ((1, 5), True, True, True)
    """
    if not _roomy(shape, axis):
        return np.empty(shape, dtype) if fill is None else np.full(shape, fill, dtype)
    big = list(shape)
    big[axis] = _slack(shape[axis])
    buf = np.empty(tuple(big), dtype)
    _MADE[id(buf)] = buf
    view = buf[(slice(None),) * axis + (slice(0, shape[axis]),)]
    if fill is not None:
        view[...] = fill
    return view


def room(a: np.ndarray, axis: int, n: int) -> np.ndarray | None:
    """The whole buffer behind ``a`` (made by :func:`allocate`) if it holds ``n`` entries along
    ``axis``; None for any other array (a pickled copy, a plain array, a strided view)."""
    buf = a.base
    if not isinstance(buf, np.ndarray) or _MADE.get(id(buf)) is not buf or buf.ndim != a.ndim:
        return None
    same_rest = buf.shape[:axis] == a.shape[:axis] and buf.shape[axis + 1:] == a.shape[axis + 1:]
    if not same_rest or not a.flags.c_contiguous or buf.ctypes.data != a.ctypes.data or buf.shape[axis] < n:
        return None
    return buf


@dataclass(frozen=True)
class Moves:
    """Where the kept edges go: ``runs[r] = (start, stop, d)`` says new positions
    ``start:stop`` take old positions ``start + d : stop + d``; ``fresh`` are the new links."""

    runs: np.ndarray  # (R, 3) int64
    fresh: np.ndarray  # (F,) int64 new positions of links that were not there before


def plan(keep: np.ndarray) -> Moves | None:
    """The stretches of ``keep`` (new position -> old position or -1) that shift as one, or
    None when kept links changed their relative order (after a compaction) or there are
    more than :data:`MAX_RUNS` of them; None too without numba (the scan is a compiled loop)."""
    if not flow_kernels.AVAILABLE:
        return None
    runs, n_runs, fresh, n_fresh, ordered = flow_kernels.shift_runs(keep, MAX_RUNS)
    if not ordered or n_runs > MAX_RUNS:
        return None
    return Moves(runs[:n_runs], fresh[:n_fresh])


def move(buf: np.ndarray, axis: int, moves: Moves) -> None:
    """Apply ``moves`` to ``buf`` along ``axis`` in place: stretches moving left first, in
    ascending order, then those moving right, in descending order, so no stretch overwrites
    entries another has yet to read (kept links keep their order). Python work is one
    ``memmove`` per stretch, proportional to the number of link changes."""
    rows = int(np.prod(buf.shape[:axis], dtype=np.int64))
    width = int(np.prod(buf.shape[axis + 1:], dtype=np.int64)) * buf.itemsize  # bytes per edge
    row_bytes, base = buf.shape[axis] * width, buf.ctypes.data
    runs = moves.runs.tolist()
    order = [r for r in runs if r[2] > 0] + [r for r in reversed(runs) if r[2] < 0]
    for start, stop, d in order:
        for row in range(rows):
            at = base + row * row_bytes
            ctypes.memmove(at + start * width, at + (start + d) * width, (stop - start) * width)
