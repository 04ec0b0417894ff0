"""Brute-force experimental semivariogram along one axis with NumPy (the textbook definition).

gamma(h) = 1 / (2 N(h)) * sum over pairs (x, x + h e_axis) of valid cells of (f(x) - f(x + h))**2,
as in Chilès & Delfiner (2012), "Geostatistics: Modeling Spatial Uncertainty", 2nd ed., section 2.2
for the experimental variogram (the method-of-moments estimator of Matheron).
"""

from __future__ import annotations

import numpy as np


def variogram_axis(
    f: np.ndarray, axis: int, max_lag: int, mask: np.ndarray | None = None
) -> np.ndarray:
    f = np.asarray(f, dtype=np.float64)
    m = np.isfinite(f) if mask is None else (np.asarray(mask, bool) & np.isfinite(f))
    n = f.shape[axis]
    out = np.full(max_lag, np.nan)
    for h in range(1, max_lag + 1):
        if h >= n:
            break
        a = np.take(f, np.arange(0, n - h), axis=axis)
        b = np.take(f, np.arange(h, n), axis=axis)
        ok = np.take(m, np.arange(0, n - h), axis=axis) & np.take(m, np.arange(h, n), axis=axis)
        if ok.any():
            out[h - 1] = 0.5 * np.mean((a[ok] - b[ok]) ** 2)
    return out
