"""Per-node seasonal baseline: robust double-seasonal additive exponential smoothing.

All nodes are updated at once as flat numpy arrays. On the working scale ``y`` (``log1p``
of the count by default, which stabilises the variance of counts spanning 1 to 10^6) a
node's forecast for an hour is ``level + season[hour_of_day] + week[day_of_week]``
(Holt-Winters additive form with two seasonal cycles). Seasonal state is stored
season-major (``season[slot]`` is one contiguous row over nodes) so one hour touches
contiguous memory only.

Robustness: the residual entering the update is clipped at ``clip_scales`` times the
running scale (robust Holt-Winters in the manner of Gelper, Fried and Croux, 2010), so a
surge does not drag the baseline along. A residual that stays beyond the clip in one
direction for ``adopt_after_hours`` observed hours is taken as a new regime: the level
jumps by the mean residual of that run and alerting on it stops.

Cold start: a node seen for the first time borrows the population-average seasonal
profile of the warm nodes (sharing shape across series beats learning each alone) and
raises no alerts until it has been observed ``warmup_hours`` times.

Missing counts (NaN) leave a node's state untouched.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .config import BaselineSettings

__all__ = ["BaselineState", "SeasonalBaseline", "to_working", "from_working"]


def to_working(counts: np.ndarray, transform: str) -> np.ndarray:
    """Counts to the working scale (NaN stays NaN)."""
    return np.log1p(counts) if transform == "log1p" else np.asarray(counts, dtype=float).copy()


def from_working(values: np.ndarray, transform: str) -> np.ndarray:
    """Working scale back to counts; never negative for ``log1p``."""
    if transform == "log1p":
        return np.expm1(values)
    return np.asarray(values, dtype=float).copy()


@dataclass
class BaselineState:
    """The learned arrays, one column per node; settings live apart."""

    level: np.ndarray
    season: np.ndarray  # (season_hours, n)
    week: np.ndarray  # (7, n); a single zero row when weekly is off
    var: np.ndarray
    seen: np.ndarray  # int32 observed hours; 0 means never initialised
    run: np.ndarray  # int32 signed run length of clipped residuals
    run_sum: np.ndarray  # sum of residuals over the current run

    @property
    def n(self) -> int:
        return int(self.level.shape[0])


@dataclass
class _Scratch:
    """Preallocated buffers so a tick allocates nothing proportional to the nodes."""

    n: int
    dtype: np.dtype
    buffers: dict[str, np.ndarray] = field(default_factory=dict)

    def get(self, name: str, dtype: np.dtype | type | None = None) -> np.ndarray:
        buf = self.buffers.get(name)
        if buf is None or buf.shape[0] != self.n:
            buf = np.empty(self.n, dtype=dtype or self.dtype)
            self.buffers[name] = buf
        return buf


class SeasonalBaseline:
    """Vectorised robust Holt-Winters over many nodes.

    >>> import numpy as np
    >>> from alerter.config import BaselineSettings
    >>> b = SeasonalBaseline(BaselineSettings(weekly=False, season_hours=4, warmup_hours=0))
    >>> b.resize(2)
    >>> for t in range(40):
    ...     y = np.array([10.0 + (t % 4), 100.0])
    ...     _ = b.update(b.to_working(y), slot=t % 4, day=0)
    >>> np.round(b.from_working(b.forecast(slot=1, day=0)), 0).tolist()
    [11.0, 100.0]
    """

    def __init__(self, settings: BaselineSettings) -> None:
        self.settings = settings
        self.dtype = np.dtype(settings.dtype)
        self.state = self._empty(0)
        self._scratch = _Scratch(0, self.dtype)

    # -- shape -------------------------------------------------------------------------
    def _empty(self, n: int) -> BaselineState:
        s, dt = self.settings, self.dtype
        return BaselineState(
            level=np.zeros(n, dt),
            season=np.zeros((s.season_hours, n), dt),
            week=np.zeros((7 if s.weekly else 1, n), dt),
            var=np.full(n, s.initial_scale**2, dt),
            seen=np.zeros(n, np.int32),
            run=np.zeros(n, np.int32),
            run_sum=np.zeros(n, dt),
        )

    def resize(self, n: int) -> None:
        """Grow to ``n`` nodes; new columns start uninitialised (seen == 0)."""
        old = self.state
        if n <= old.n:
            return
        new = self._empty(n)
        for name in ("level", "var", "seen", "run", "run_sum"):
            getattr(new, name)[: old.n] = getattr(old, name)
        new.season[:, : old.n] = old.season
        new.week[:, : old.n] = old.week
        self.state = new
        self._scratch = _Scratch(n, self.dtype)

    def to_working(self, counts: np.ndarray) -> np.ndarray:
        return to_working(counts, self.settings.transform).astype(self.dtype, copy=False)

    def from_working(self, values: np.ndarray) -> np.ndarray:
        return from_working(values, self.settings.transform)

    def _day(self, day: int) -> int:
        return day if self.settings.weekly else 0

    # -- reading -----------------------------------------------------------------------
    def forecast(self, slot: int, day: int, out: np.ndarray | None = None) -> np.ndarray:
        """One-step forecast on the working scale for the hour with these slots."""
        st = self.state
        out = np.add(st.level, st.season[slot], out=out)
        out += st.week[self._day(day)]
        return out

    def scale(self, out: np.ndarray | None = None) -> np.ndarray:
        """Residual scale (standard deviation on the working scale), floored."""
        out = np.sqrt(self.state.var, out=out)
        return np.maximum(out, self.settings.min_scale, out=out)

    def warm(self) -> np.ndarray:
        """Nodes observed long enough to be alerted on."""
        return self.state.seen >= max(self.settings.warmup_hours, 1)

    # -- learning ----------------------------------------------------------------------
    def initialise(self, idx: np.ndarray, y: np.ndarray, slot: int, day: int) -> None:
        """Start nodes ``idx`` from their first value and the population's profile."""
        st, d = self.state, self._day(day)
        donors = self.warm()
        if donors.any():
            season = st.season[:, donors] - st.season[:, donors].mean(axis=0)
            prof_s = season.mean(axis=1)
            prof_w = st.week[:, donors].mean(axis=1)
            var0 = np.median(st.var[donors])
        else:
            prof_s = np.zeros(st.season.shape[0], self.dtype)
            prof_w = np.zeros(st.week.shape[0], self.dtype)
            var0 = self.settings.initial_scale**2
        st.season[:, idx] = prof_s[:, None]
        st.week[:, idx] = prof_w[:, None]
        st.level[idx] = y - prof_s[slot] - prof_w[d]
        st.var[idx] = var0
        st.run[idx] = 0
        st.run_sum[idx] = 0

    def set_state(self, level: np.ndarray, season: np.ndarray, var: np.ndarray,
                  week: np.ndarray | None = None, seen: int = 1) -> None:
        """Set known initial states (as statsmodels' ``initialization_method='known'``)."""
        n = level.shape[0]
        self.state = self._empty(n)
        self._scratch = _Scratch(n, self.dtype)
        st = self.state
        st.level[:] = level
        st.season[:] = season
        if week is not None:
            st.week[:] = week
        st.var[:] = var
        st.seen[:] = seen

    def update(self, y: np.ndarray, slot: int, day: int) -> np.ndarray:
        """Learn one hour; ``y`` on the working scale, NaN where missing.

        Returns the boolean mask of nodes adopted as a new regime this hour.
        """
        st, s, sc = self.state, self.settings, self._scratch
        d = self._day(day)
        observed = ~np.isnan(y)
        fresh = observed & (st.seen == 0)
        if fresh.any():
            self.initialise(np.flatnonzero(fresh), y[fresh], slot, day)

        yhat = self.forecast(slot, d, out=sc.get("yhat"))
        resid = np.subtract(y, yhat, out=sc.get("resid"))
        np.copyto(resid, 0, where=~observed)
        bound = self.scale(out=sc.get("bound"))
        bound *= s.clip_scales
        clipped = np.clip(resid, -bound, bound, out=sc.get("clipped"))
        mask = observed.astype(self.dtype)
        self._smooth(clipped, mask, slot, d)
        self._track_variance(clipped, mask)
        adopted = self._adopt(resid, bound, observed)
        st.seen += observed
        return adopted

    def _smooth(self, clipped: np.ndarray, mask: np.ndarray, slot: int, d: int) -> None:
        """Holt-Winters updates written as ``x += rate * mask * error``.

        With ``e = y* - yhat`` (``y*`` the clipped observation) the textbook updates
        ``l' = a (y* - s - w) + (1 - a) l`` and ``s' = g (y* - l - w) + (1 - g) s``
        (old level, as in statsmodels) reduce to ``l += a e`` and ``s += g e``.
        """
        st, s, sc = self.state, self.settings, self._scratch
        step = np.multiply(clipped, mask, out=sc.get("step"))
        tmp = sc.get("tmp")
        st.level += np.multiply(step, s.alpha, out=tmp)
        st.season[slot] += np.multiply(step, s.gamma, out=tmp)
        if s.weekly:
            st.week[d] += np.multiply(step, s.delta, out=tmp)

    def _track_variance(self, clipped: np.ndarray, mask: np.ndarray) -> None:
        """EW variance of the clipped residual: ``v += rate * mask * (e^2 - v)``."""
        st, sc = self.state, self._scratch
        tmp = np.multiply(clipped, clipped, out=sc.get("tmp"))
        tmp -= st.var
        tmp *= mask
        tmp *= self.settings.variance_rate
        st.var += tmp

    def _adopt(self, resid: np.ndarray, bound: np.ndarray, observed: np.ndarray) -> np.ndarray:
        """Count runs of residuals beyond the clip; adopt a run that lasts."""
        st, s = self.state, self.settings
        up = observed & (resid > bound)
        down = observed & (resid < -bound)
        inside = observed & ~up & ~down
        flip = (up & (st.run < 0)) | (down & (st.run > 0))
        st.run[flip | inside] = 0
        st.run_sum[flip | inside] = 0
        st.run += up
        st.run -= down
        np.add(st.run_sum, resid, out=st.run_sum, where=up | down)
        if s.adopt_after_hours <= 0:
            return np.zeros_like(observed)
        adopted = np.abs(st.run) >= s.adopt_after_hours
        if adopted.any():
            idx = np.flatnonzero(adopted)
            st.level[idx] += st.run_sum[idx] / np.abs(st.run[idx])
            st.run[idx] = 0
            st.run_sum[idx] = 0
        return adopted
