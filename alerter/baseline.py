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

Speed: with numba importable (and ``ALERTER_BASELINE_KERNEL`` not ``"numpy"``) one hour is
one fused, vectorised pass over the nodes (``SeasonalBaseline.step``: forecast, count-noise
scale, clipping, level/season/week, variance, runs and adoption bookkeeping; numpy's exp
before it), float32 and float64 alike; otherwise a sequence of numpy passes. Both do the
same float operations in the same order (``tests/test_baseline_kernels.py``). ``KERNEL``
says which is in use; ``SeasonalBaseline.kernel = "numpy"`` forces the fallback per object.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .config import BaselineSettings

__all__ = ["KERNEL", "BaselineState", "SeasonalBaseline", "to_working", "from_working"]

from .baseline_kernels import (  # noqa: F401 - re-exported names used below
    _I_ADOPT,
    _I_COMPUTE_SD,
    _I_NOISE,
    _I_RELEARN,
    _I_WARM,
    _I_WEEKLY,
    _I_YOUNG,
    _P_ALPHA,
    _P_CLIP,
    _P_DELTA,
    _P_FLOOR,
    _P_GAMMA,
    _P_ONE,
    _P_RATE,
    _P_ZERO,
    KERNEL,
    _kernel_adopt,
    _kernel_forecast,
    _kernel_neg,
    _kernel_scale,
    _kernel_update,
    _kernel_update_young,
    _numba,
)


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
    relearn: np.ndarray  # int32 observed hours left of re-learning after a regime adoption

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

    def filled(self, name: str, value: float) -> np.ndarray:
        """A buffer holding ``value`` everywhere, filled once when (re)allocated."""
        buf = self.buffers.get(name)
        if buf is None or buf.shape[0] != self.n:
            buf = np.full(self.n, value, dtype=self.dtype)
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
        self.kernel = KERNEL
        """``"numba"`` (fused kernels) or ``"numpy"``; set to ``"numpy"`` to force the fallback."""
        s, dt = settings, self.dtype.type
        self._p = tuple(dt(v) for v in (s.alpha, s.gamma, s.delta, s.clip_scales, s.variance_rate,
                                        s.min_scale, 0.0, 1.0))
        self._rate_hours = int(np.ceil(1.0 / s.variance_rate))

    def _ip(self, noise: bool, compute_sd: bool) -> tuple[int, ...]:
        """Integer settings of the update kernel (see ``_I_*``)."""
        s = self.settings
        return (max(s.warmup_hours, 1), self._rate_hours, s.adopt_after_hours, s.relearn_hours,
                int(s.weekly), int(noise), int(compute_sd))

    def _fused(self) -> bool:
        return self.kernel == "numba" and _numba is not None

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
            relearn=np.zeros(n, np.int32),
        )

    def resize(self, n: int) -> None:
        """Grow to ``n`` nodes; new columns start uninitialised (seen == 0)."""
        old = self.state
        if n <= old.n:
            return
        new = self._empty(n)
        for name in ("level", "var", "seen", "run", "run_sum", "relearn"):
            getattr(new, name)[: old.n] = getattr(old, name)
        new.season[:, : old.n] = old.season
        new.week[:, : old.n] = old.week
        self.state = new
        self._scratch = _Scratch(n, self.dtype)

    def to_working(self, counts: np.ndarray) -> np.ndarray:
        """Counts to the working scale in the state's float type (one pass, no float64 copy)."""
        if self.settings.transform == "log1p":
            return np.log1p(np.asarray(counts), dtype=self.dtype)
        return np.asarray(counts, dtype=self.dtype).copy()

    def from_working(self, values: np.ndarray) -> np.ndarray:
        return from_working(values, self.settings.transform)

    def _day(self, day: int) -> int:
        return day if self.settings.weekly else 0

    # -- reading -----------------------------------------------------------------------
    def forecast(self, slot: int, day: int, out: np.ndarray | None = None) -> np.ndarray:
        """One-step forecast on the working scale for the hour with these slots."""
        st = self.state
        if self._fused() and (out is None or out.dtype == self.dtype):
            out = np.empty(st.n, self.dtype) if out is None else out
            _kernel_forecast(st.level, st.season[slot], st.week[self._day(day)], out,
                             self._scratch.get("neg"), self._p[_P_ZERO])
            return out
        out = np.add(st.level, st.season[slot], out=out)
        out += st.week[self._day(day)]
        return out

    def _count_noise(self, yhat: np.ndarray, out: np.ndarray) -> np.ndarray | None:
        """Poisson variance of ``log1p`` of a count with mean ``mu``: about ``mu / (1 + mu)^2``.

        On the log scale, a count of 5 is far noisier than a count of 5,000; a page's quiet
        night hours need a wider band than its busy afternoon. Returns None when off.
        """
        if not self._count_noise_on():
            return None
        # with mu = e^y - 1: mu / (1 + mu)^2 = e^-y - e^-2y = t (1 - t), t = e^-y
        t = np.exp(np.negative(np.maximum(yhat, 0.0, out=out), out=out), out=out)
        one_minus = np.subtract(1.0, t, out=self._scratch.get("cn_tmp"))
        return np.multiply(t, one_minus, out=out)

    def scale(self, out: np.ndarray | None = None, yhat: np.ndarray | None = None) -> np.ndarray:
        """Residual scale (standard deviation on the working scale), floored.

        With ``yhat`` (and ``count_noise`` on) the count noise of that forecast is added to
        the learned extra variance.
        """
        if self._fused() and (out is None or out.dtype == self.dtype):
            return self._scale_fused(out, yhat)
        noise = None if yhat is None else self._count_noise(yhat, self._scratch.get("cn"))
        if noise is None:
            out = np.sqrt(self.state.var, out=out)
        else:
            out = np.sqrt(np.add(self.state.var, noise, out=out), out=out)
        # An array floor: numpy's maximum against a stride-0 scalar is about twice as slow.
        floor = self._scratch.filled("floor", self.settings.min_scale)
        if floor.shape != out.shape or floor.dtype != out.dtype:
            return np.maximum(out, self.settings.min_scale, out=out)
        return np.maximum(out, floor, out=out)

    def _scale_fused(self, out: np.ndarray | None, yhat: np.ndarray | None) -> np.ndarray:
        """``scale`` in one pass after numpy's exp; ``t = exp(-max(yhat, 0))`` is kept in the
        scratch buffer ``cn_t`` for ``update`` (as the numpy path keeps the noise in ``cn``)."""
        st, sc = self.state, self._scratch
        out = np.empty(st.n, self.dtype) if out is None else out
        noise = yhat is not None and self._count_noise_on()
        t = st.var
        if noise:
            neg = sc.get("neg")
            _kernel_neg(yhat, neg, self._p[_P_ZERO])
            t = np.exp(neg, out=sc.get("cn_t"))
        _kernel_scale(st.var, t, noise, self._p, out)
        return out

    def warm(self) -> np.ndarray:
        """Nodes observed long enough to be alerted on, and not re-learning a new regime."""
        st = self.state
        return (st.seen >= max(self.settings.warmup_hours, 1)) & (st.relearn == 0)

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

    def update(self, y: np.ndarray, slot: int, day: int, forecast: np.ndarray | None = None,
               scale: np.ndarray | None = None) -> np.ndarray:
        """Learn one hour; ``y`` on the working scale, NaN where missing.

        ``forecast`` and ``scale`` may be passed when the caller has just computed them for
        this hour (``self.forecast(slot, day)`` and ``self.scale(yhat=that forecast)``), to
        save the passes. Returns the boolean mask of nodes adopted as a new regime this hour.
        """
        sc, d = self._scratch, self._day(day)
        started, youngest = self._start(y, slot, day)
        if started or forecast is None or scale is None:
            forecast = self.forecast(slot, d, out=sc.get("yhat"))
            scale = self.scale(out=sc.get("sd"), yhat=forecast)
        if self._fused():
            return self._update_fused(y, slot, d, forecast, scale)
        return self._update_numpy(y, slot, d, forecast, scale, youngest)

    def step(self, y: np.ndarray, slot: int, day: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Forecast, scale and learn one hour: ``(forecast, scale, adopted)``.

        The same as ``f = self.forecast(slot, day); s = self.scale(yhat=f)`` (both from the
        state before this hour) followed by ``self.update(y, slot, day, forecast=f, scale=s)``,
        with the same results; with the numba kernel the three are one pass over the nodes
        (plus numpy's exp) instead of three. ``forecast`` and ``scale`` are new arrays. Read
        anything else of the state that is wanted as of before the hour (``warm()``,
        ``state.seen``) before calling.
        """
        st, sc = self.state, self._scratch
        if not self._fused() or self._any_fresh(y):
            f = self.forecast(slot, day)
            sd = self.scale(yhat=f)
            return f, sd, self.update(y, slot, day, forecast=f, scale=sd)
        f, sd, d = np.empty(st.n, self.dtype), np.empty(st.n, self.dtype), self._day(day)
        neg = sc.get("neg")
        _kernel_forecast(st.level, st.season[slot], st.week[d], f, neg, self._p[_P_ZERO])
        t = np.exp(neg, out=sc.get("cn_t")) if self._count_noise_on() else None
        return f, sd, self._run_kernel(y, f, sd, t, slot, d, compute_sd=True)

    def _any_fresh(self, y: np.ndarray) -> bool:
        """Any node never initialised (``seen == 0``) observed in ``y``?"""
        st, sc = self.state, self._scratch
        if not st.n or int(st.seen.min()) != 0:
            return False
        fresh = np.equal(st.seen, 0, out=sc.get("fresh", bool))
        fresh &= np.logical_not(np.isnan(y, out=sc.get("missing", bool)), out=sc.get("observed", bool))
        return bool(fresh.any())

    def _start(self, y: np.ndarray, slot: int, day: int) -> tuple[bool, int]:
        """Initialise the nodes observed for the first time; ``(any started, min(seen))``."""
        st = self.state
        youngest = int(st.seen.min()) if st.n else 0  # one cheap reduction gates the rare paths
        if youngest != 0 or not self._any_fresh(y):
            return False, youngest
        fresh = self._scratch.get("fresh", bool)
        self.initialise(np.flatnonzero(fresh), y[fresh], slot, day)
        return True, youngest

    def _as_input(self, y: np.ndarray) -> np.ndarray:
        y = np.ascontiguousarray(y)
        return y if y.dtype.kind == "f" else y.astype(np.float64)

    def _arrays(self, slot: int, d: int) -> tuple[np.ndarray, ...]:
        st = self.state
        return (st.level, st.season[slot], st.week[d], st.var, st.seen, st.run, st.run_sum, st.relearn)

    def _run_kernel(self, y: np.ndarray, yhat: np.ndarray, sd: np.ndarray, t: np.ndarray | None,
                    slot: int, d: int, compute_sd: bool) -> np.ndarray:
        """The fused update pass (and the adoptions it found); returns ``adopted``."""
        st = self.state
        young = bool(st.n) and int(st.seen.min()) < self._rate_hours
        kernel = _kernel_update_young if young else _kernel_update
        adopted = np.empty(st.n, dtype=bool)
        kernel(self._as_input(y), yhat, sd, yhat if t is None else t, self._arrays(slot, d), self._p,
               self._ip(t is not None, compute_sd), self.settings.variance_rate, adopted)
        if adopted.any():
            _kernel_adopt(np.flatnonzero(adopted), st.level, st.run, st.run_sum)
        return adopted

    def _update_fused(self, y: np.ndarray, slot: int, d: int, forecast: np.ndarray,
                      scale: np.ndarray) -> np.ndarray:
        """``update`` in one pass; the count noise is that of the last ``scale(yhat=...)``
        (kept in ``cn_t``), as the numpy path takes it from ``cn``."""
        t = self._scratch.buffers.get("cn_t") if self._count_noise_on() else None
        forecast = np.ascontiguousarray(forecast, dtype=self.dtype)
        scale = np.ascontiguousarray(scale, dtype=self.dtype)
        return self._run_kernel(y, forecast, scale, t, slot, d, compute_sd=False)

    def _update_numpy(self, y: np.ndarray, slot: int, d: int, yhat: np.ndarray,
                      scale: np.ndarray, youngest: int) -> np.ndarray:
        st, s, sc = self.state, self.settings, self._scratch
        missing = np.isnan(y, out=sc.get("missing", bool))
        observed = np.logical_not(missing, out=sc.get("observed", bool))
        resid = np.subtract(y, yhat, out=sc.get("resid"))
        if youngest == 0 or missing.any():
            np.copyto(resid, 0, where=missing)
        bound = np.multiply(scale, s.clip_scales, out=sc.get("bound"))
        noise = self._scratch.buffers.get("cn") if self._count_noise_on() else None
        neg_bound = np.negative(bound, out=sc.get("neg_bound"))
        # clip(resid, -bound, bound) as two passes: np.clip is ~3x slower than min + max.
        clipped = np.minimum(resid, bound, out=sc.get("clipped"))
        np.maximum(clipped, neg_bound, out=clipped)
        self._smooth(clipped, slot, d)
        use = self._variance_mask(resid, clipped, observed, youngest)
        self._track_variance(clipped, use, noise, youngest)
        adopted = self._adopt(resid, bound, neg_bound, observed)
        self._count_relearn(adopted, observed)
        st.seen += observed
        return adopted

    def _count_relearn(self, adopted: np.ndarray, observed: np.ndarray) -> None:
        """After an adoption the profile fits the new level only roughly: for
        ``relearn_hours`` observed hours the node raises no alerts (it was alerted on while
        the change was news) while level and profile settle."""
        st = self.state
        busy = np.flatnonzero(st.relearn > 0)
        if busy.size:
            st.relearn[busy] -= observed[busy]
        if adopted.any():
            st.relearn[adopted] = self.settings.relearn_hours

    def _smooth(self, clipped: np.ndarray, slot: int, d: int) -> None:
        """Holt-Winters updates written as ``x += rate * error``.

        With ``e = y* - yhat`` (``y*`` the clipped observation) the textbook updates
        ``l' = a (y* - s - w) + (1 - a) l`` and ``s' = g (y* - l - w) + (1 - g) s``
        (old level, as in statsmodels) reduce to ``l += a e`` and ``s += g e``. A missing
        node has ``e = 0`` (its residual is zeroed), so its state is left as it was.
        """
        st, s, sc = self.state, self.settings, self._scratch
        tmp = sc.get("tmp")
        st.level += np.multiply(clipped, s.alpha, out=tmp)
        st.season[slot] += np.multiply(clipped, s.gamma, out=tmp)
        if s.weekly:
            st.week[d] += np.multiply(clipped, s.delta, out=tmp)

    def _variance_mask(self, resid: np.ndarray, clipped: np.ndarray, observed: np.ndarray,
                       youngest: int) -> np.ndarray:
        """Nodes whose residual may move the band: observed, and inside the clip once warm.

        A warm node's residual beyond the clip is an event or a new regime, not noise; let
        into the variance it widens the band for days after a surge or an outage (and hides
        the next, smaller event). The truncation at ``clip_scales`` >= 3 scales barely biases
        the estimate, and a real rise in noise still widens the band through the residuals
        inside it. A cold node learns from every residual, so a poor starting scale recovers.
        """
        st, sc = self.state, self._scratch
        # inside the clip <=> the clip left it alone (one pass for -bound <= resid <= bound
        # when bound >= 0; NaN is outside either way)
        keep = np.equal(clipped, resid, out=sc.get("keep", bool))
        if youngest < max(self.settings.warmup_hours, 1):
            keep |= np.less(st.seen, max(self.settings.warmup_hours, 1), out=sc.get("cold", bool))
        keep &= observed
        return keep

    def _count_noise_on(self) -> bool:
        return self.settings.count_noise and self.settings.transform == "log1p"

    def _track_variance(self, clipped: np.ndarray, use: np.ndarray, noise: np.ndarray | None,
                        youngest: int) -> None:
        """EW variance of the clipped residual: ``v += rate * mask * (e^2 - noise - v)``.

        With count noise on, ``v`` is the variance beyond the count noise (over-dispersion
        and model error), kept >= 0.

        A cold node uses ``rate = max(1 / (seen + 1), variance_rate)`` (a running mean at
        first), so its band reflects its own noise within hours, not the starting guess.
        """
        st, sc = self.state, self._scratch
        rate = self.settings.variance_rate
        tmp = np.multiply(clipped, clipped, out=sc.get("tmp"))
        if noise is not None:
            tmp -= noise
        tmp -= st.var
        tmp *= rate
        if youngest < int(np.ceil(1.0 / rate)):
            young = np.flatnonzero(st.seen < int(np.ceil(1.0 / rate)))
            tmp[young] *= np.maximum(1.0 / (st.seen[young] + 1.0), rate) / rate
        np.add(st.var, tmp, out=st.var, where=use)
        if noise is not None:
            np.maximum(st.var, 0.0, out=st.var)

    def _adopt(self, resid: np.ndarray, bound: np.ndarray, neg_bound: np.ndarray,
               observed: np.ndarray) -> np.ndarray:
        """Count runs of residuals beyond the clip; adopt a run that lasts.

        Only nodes beyond the clip now or inside a run can change (a node with ``run == 0``
        also has ``run_sum == 0``), so when those are few the work is done on them alone.
        """
        st, s, sc = self.state, self.settings, self._scratch
        up = np.greater(resid, bound, out=sc.get("up", bool))
        up &= observed
        down = np.less(resid, neg_bound, out=sc.get("down", bool))
        down &= observed
        active = np.not_equal(st.run, 0, out=sc.get("active", bool))
        active |= up
        active |= down
        idx = np.flatnonzero(active)
        if 4 * idx.size > st.n:
            return self._adopt_all(resid, up, down, observed)
        run, run_sum = st.run[idx], st.run_sum[idx]
        self._runs(run, run_sum, resid[idx], up[idx], down[idx], observed[idx])
        adopted = np.zeros(st.n, dtype=bool)
        if s.adopt_after_hours > 0:
            hit = np.abs(run) >= s.adopt_after_hours
            if hit.any():
                st.level[idx[hit]] += run_sum[hit] / np.abs(run[hit])
                run[hit] = 0
                run_sum[hit] = 0
                adopted[idx[hit]] = True
        st.run[idx] = run
        st.run_sum[idx] = run_sum
        return adopted

    @staticmethod
    def _runs(run: np.ndarray, run_sum: np.ndarray, resid: np.ndarray, up: np.ndarray,
              down: np.ndarray, observed: np.ndarray) -> None:
        """Advance the signed runs in place: a flip or a residual inside the clip resets."""
        inside = observed & ~up & ~down
        flip = (up & (run < 0)) | (down & (run > 0))
        reset = flip | inside
        run[reset] = 0
        run_sum[reset] = 0
        run += up
        run -= down
        np.add(run_sum, resid, out=run_sum, where=up | down)

    def _adopt_all(self, resid: np.ndarray, up: np.ndarray, down: np.ndarray,
                   observed: np.ndarray) -> np.ndarray:
        """``_adopt`` over every node (when many are in a run, e.g. a global outage)."""
        st, s = self.state, self.settings
        self._runs(st.run, st.run_sum, resid, up, down, observed)
        if s.adopt_after_hours <= 0:
            return np.zeros_like(observed)
        adopted = np.abs(st.run) >= s.adopt_after_hours
        if adopted.any():
            idx = np.flatnonzero(adopted)
            st.level[idx] += st.run_sum[idx] / np.abs(st.run[idx])
            st.run[idx] = 0
            st.run_sum[idx] = 0
        return adopted
