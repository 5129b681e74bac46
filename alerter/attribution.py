"""Attribution of a seen hour: how much of each node's excess its in-links explain.

Made with the flow coefficients before the hour is learned: each link's contribution
toward its destination's excess, capped so a node's explained total never exceeds the
excess, with shares that sum to at most 1 per node. An estimate from learned link shares,
not proof of cause.
"""

from __future__ import annotations

import numpy as np

from .edge_runs import sum_by

__all__ = ["Attribution", "cap_contributions"]


class Attribution:
    """Per-edge explanation of a seen hour, made with the coefficients before learning it.

    Kept compact because it is made every hour over every edge: the signed per-edge
    contributions ``raw`` (``c_e = sum_k beta[k, e] u_e(t-k)``) and, per node, the direction
    looked at (``sign``: +1 surge, -1 drop, 0 none), the scale-down ``factor`` that keeps the
    explained total within the node's excess, ``1 / |excess|`` and the totals. The capped
    contributions (>= 0, per node total <= |excess|) and shares (per node sum <= 1) are
    derived for the edges asked for; the full arrays on first access.
    """

    def __init__(self, raw: np.ndarray, dst: np.ndarray, sign: np.ndarray, factor: np.ndarray,
                 inverse: np.ndarray, explained: np.ndarray, inflow: np.ndarray) -> None:
        self.raw, self.dst = raw, dst
        self.sign, self.factor, self.inverse = sign, factor, inverse
        self.explained = explained  # (n,) per node sum of capped
        self.inflow = inflow  # (n,) per node signed sum of raw
        self._capped: np.ndarray | None = None

    @classmethod
    def from_parts(cls, raw: np.ndarray, dst: np.ndarray, excess: np.ndarray, sign: np.ndarray,
                   part_sum: np.ndarray, inflow: np.ndarray) -> Attribution:
        """From the per-node sums of the contributions pointing the way of ``sign``."""
        n = excess.shape[0]
        target = np.maximum(excess * sign, 0.0)
        factor = np.divide(target, part_sum, out=np.ones(n), where=part_sum > target)
        inverse = np.divide(1.0, target, out=np.zeros(n), where=target > 0)
        return cls(raw, dst, sign, factor, inverse, part_sum * factor, inflow)

    def capped_run(self, i: int, lo: int, hi: int) -> np.ndarray:
        """``capped[lo:hi]`` for node ``i``'s own in-edges ``lo:hi`` without the full array (one
        destination: its sign and factor are scalars)."""
        dt = self.raw.dtype.type
        return _capped(self.raw[lo:hi], dt(self.sign[i]), dt(self.factor[i]))

    @property
    def capped(self) -> np.ndarray:
        """(E,) >= 0: contributions toward each node's excess, per node total <= |excess|."""
        if self._capped is None:
            dt = self.raw.dtype
            self._capped = _capped(self.raw, self.sign[self.dst].astype(dt), self.factor[self.dst].astype(dt))
        return self._capped

    @property
    def share(self) -> np.ndarray:
        """(E,) capped / |excess of the destination|; per destination sum <= 1."""
        return self.capped * self.inverse[self.dst].astype(self.raw.dtype)



def _capped(raw: np.ndarray, sign: np.ndarray | np.floating, factor: np.ndarray | np.floating) -> np.ndarray:
    """The part of ``raw`` pointing the way of ``sign``, scaled by the cap ``factor`` (all in
    ``raw``'s dtype, so one node's run and the full array give the same bits)."""
    return np.maximum(raw * sign, 0.0) * factor

def cap_contributions(raw: np.ndarray, dst: np.ndarray, excess: np.ndarray, n_nodes: int,
                      direction: str = "auto") -> Attribution:
    """Cap per-edge contributions so a node's explained total never exceeds its excess.

    ``surge``: only positive contributions count, toward a positive excess; a node whose
    excess is <= 0 gets 0. ``drop``: the mirror image with negative contributions and a
    negative excess (capped values are reported as magnitudes). ``auto``: by the sign of
    each node's excess. Where the sum exceeds ``|excess|`` the node's contributions are
    scaled down proportionally; ``share = capped / |excess|`` sums to at most 1.
    """
    if direction not in ("auto", "surge", "drop"):
        raise ValueError(f"direction must be 'auto', 'surge' or 'drop', got {direction!r}")
    ex = np.nan_to_num(np.asarray(excess, dtype=float), nan=0.0)
    sign = np.sign(ex) if direction == "auto" else np.full(n_nodes, 1.0 if direction == "surge" else -1.0)
    raw = np.array(raw, dtype=float)
    part = np.maximum(raw * sign[dst], 0.0)  # contributions pointing that way
    return Attribution.from_parts(raw, dst, ex, sign, sum_by(dst, part, n_nodes), sum_by(dst, raw, n_nodes))
