"""Forecast accuracy measures."""

from __future__ import annotations

import numpy as np

__all__ = ["smape"]


def smape(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Symmetric mean absolute percentage error, in percent, bounded in [0, 200].

    Each term is ``2 |a - f| / (|a| + |f|)``; a pair with both values zero is a perfect
    forecast and counts 0. NaN pairs are left out.

    >>> round(smape(np.array([100.0, 0.0, 0.0]), np.array([110.0, 0.0, 5.0])), 4)
    69.8413
    """
    a = np.asarray(actual, dtype=float)
    f = np.asarray(forecast, dtype=float)
    keep = ~(np.isnan(a) | np.isnan(f))
    a, f = a[keep], f[keep]
    if a.size == 0:
        return float("nan")
    # halves first, so the largest doubles neither overflow nor lose the bound
    den = np.abs(a) / 2 + np.abs(f) / 2
    diff = np.abs(a / 2 - f / 2)
    terms = 2.0 * np.divide(diff, den, out=np.zeros_like(den), where=den > 0)
    return float(100.0 * terms.mean())
