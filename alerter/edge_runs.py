"""Per-destination runs of an edge list: sums over a node's in-edges and per-node values
spread to its edges, fast when the edges are sorted by destination (the graph's CSR).

Shared by the flow learner and the attribution of its contributions.
"""

from __future__ import annotations

import numpy as np

from . import flow_kernels

__all__ = ["Segments", "index_array", "sum_by"]


def sum_by(index: np.ndarray, weights: np.ndarray, n: int) -> np.ndarray:
    """``np.bincount`` with weights, always float64 (bincount returns int64 when empty)."""
    return np.bincount(index, weights=weights, minlength=n).astype(np.float64, copy=False)


def index_array(a: np.ndarray, n_nodes: int) -> np.ndarray:
    """Node indices as int32 (int64 past 2**31 nodes); a read-only array of that type is shared.

    Read-only (e.g. the graph's CSR views) means the caller cannot change it under the
    learner, so no copy is needed; int32 halves the bytes every per-hour gather reads.
    """
    dt = np.int32 if n_nodes < 2**31 else np.int64
    a = np.asarray(a)
    if a.dtype == dt and a.ndim == 1 and not a.flags.writeable:
        return a
    return np.array(a, dtype=dt)


class Segments:
    """Per-destination sums and expansions over an edge list, fast when ``dst`` is sorted.

    With a destination-sorted edge list (what the joint model passes: the graph's CSR) a
    sum is one ``np.add.reduceat`` at the starts of the non-empty runs (reduceat yields
    ``values[start]`` for an empty run, so those are masked) and a per-node value is spread
    to the edges with ``np.repeat``; otherwise ``np.bincount`` and ``np.take`` are used.
    """

    def __init__(self, dst: np.ndarray, n: int, indptr: np.ndarray | None = None) -> None:
        """``indptr``: the run boundaries when the caller has them (the graph's CSR, whose
        ``dst`` is sorted by construction); finding them costs a binary search per node
        over all edges, which at 22 million links takes longer than an hour's learning pass."""
        self.dst, self.n = dst, n
        self._blocks: np.ndarray | None = None
        if indptr is not None:
            indptr = np.asarray(indptr, np.int64)
            if indptr.shape != (n + 1,) or indptr[0] != 0 or indptr[-1] != dst.size or np.any(np.diff(indptr) < 0):
                raise ValueError(f"indptr must be a non-decreasing ({n + 1},) array from 0 to {dst.size} "
                                 "(the CSR of the same edges)")
        self.sorted = bool(indptr is not None or dst.size == 0 or np.all(dst[1:] >= dst[:-1]))
        if self.sorted:
            self.indptr = np.searchsorted(dst, np.arange(n + 1)).astype(np.int64) if indptr is None else indptr
            self.counts = np.diff(self.indptr)
            self.nonempty = self.counts > 0
            self.starts = self.indptr[:-1][self.nonempty]

    def blocks(self) -> np.ndarray:
        """Node boundaries of runs with about equal edge counts, for the parallel kernels."""
        if self._blocks is None:
            self._blocks = flow_kernels.balanced_blocks(self.indptr)
        return self._blocks

    def sum(self, values: np.ndarray) -> np.ndarray:
        """Per node the sum of ``values`` over its in-edges, float64 (pairwise within a run)."""
        if not self.sorted or values.size == 0:
            return sum_by(self.dst, values, self.n)
        out = np.zeros(self.n)
        out[self.nonempty] = np.add.reduceat(values, self.starts)
        return out

    def expand(self, per_node: np.ndarray, dtype: np.dtype | type) -> np.ndarray:
        """``per_node[dst]`` as a new array of ``dtype`` (one sequential ``np.repeat`` when sorted)."""
        values = per_node.astype(dtype, copy=False)
        if self.sorted:
            return np.repeat(values, self.counts)
        return np.take(values, self.dst, mode="clip")
