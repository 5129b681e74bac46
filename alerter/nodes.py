"""Node ids interned to dense indices, so that per-node state is a flat array column."""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

from .errors import UnknownNodeError

__all__ = ["NodeIndex"]


class NodeIndex:
    """Append-only mapping between node ids and indices 0..n-1.

    >>> idx = NodeIndex()
    >>> idx.intern(["/b", "/a", "/b"]).tolist()
    [0, 1, 0]
    >>> idx.ids
    ['/b', '/a']
    """

    def __init__(self) -> None:
        self.ids: list[str] = []
        self._index: dict[str, int] = {}

    def __len__(self) -> int:
        return len(self.ids)

    def __contains__(self, node: object) -> bool:
        return node in self._index

    def intern(self, nodes: Iterable[str]) -> np.ndarray:
        """Indices of ``nodes``, adding the ones not seen before."""
        index, ids = self._index, self.ids
        out = []
        for node in nodes:
            i = index.get(node)
            if i is None:
                i = index[node] = len(ids)
                ids.append(node)
            out.append(i)
        return np.asarray(out, dtype=np.int64)

    def get(self, node: str) -> int:
        """Index of a known node; raise UnknownNodeError with close matches otherwise."""
        try:
            return self._index[node]
        except KeyError:
            import difflib

            close = difflib.get_close_matches(node, self.ids, n=3)
            hint = f"; did you mean {', '.join(close)}?" if close else ""
            raise UnknownNodeError(f"unknown node {node!r}: the stream never mentioned it{hint}") from None
