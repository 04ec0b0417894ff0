"""The project's one FFT kernel for experimental semivariograms along a grid axis.

With ``M`` the mask of valid cells and ``f`` the field (zero outside the mask), the semivariogram
at lag ``h`` along an axis is

    2 N(h) gamma(h) = sum M(x) M(x+h) (f(x) - f(x+h))**2
                    = sum f2(x) M(x+h) + sum M(x) f2(x+h) - 2 sum f(x) f(x+h),
    N(h) = sum M(x) M(x+h),

with ``f2 = f**2`` (``f`` itself for an indicator). Each sum is a cross-correlation, evaluated for
all lags at once with zero-padded FFTs along the axis and summed over the other axes in the
frequency domain, so the grid's edges and masked cells are handled exactly (Marcotte 1996, "Fast
variogram computation with FFT", Computers & Geosciences 22(10)); the cost is O(n log n) instead
of O(n · max_lag).

:func:`strataloom.qc.variogram_axes`, :func:`strataloom.qc.indicator_variograms` and the
training-image statistics (:mod:`strataloom.training.stats`) call :func:`axis_semivariograms`.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

__all__ = ["axis_semivariograms"]


def axis_semivariograms(
    fields: Iterable[np.ndarray],
    valid: np.ndarray,
    axis: int,
    max_lag: int,
    *,
    indicator: bool = False,
) -> np.ndarray:
    """Semivariograms along one axis at lags ``1 .. max_lag`` of fields sharing one mask.

    Parameters
    ----------
    fields : iterable of (nz, ny, nx) ndarray
        The fields (consumed one at a time, so a generator keeps memory to one field); values
        outside ``valid`` are ignored and may be NaN.
    valid : (nz, ny, nx) ndarray of bool
        Cells that take part in pairs.
    axis : int
        Axis of the lag (0 = z, 1 = y, 2 = x). Inputs are trusted: callers validate them.
    max_lag : int
        Largest lag in cells, ``>= 1``.
    indicator : bool, default False
        The fields hold only 0 and 1 on valid cells, so ``f**2 = f`` and one FFT per field
        suffices.

    Returns
    -------
    (n_fields, max_lag) ndarray of float64
        ``gamma`` per field and lag, NaN where no pair of valid cells exists (in particular at
        lags of the axis length or more). Tiny negative values left by rounding are set to 0.
    """
    import scipy.fft  # imported on use: keeps `import strataloom` light

    m = np.asarray(valid, dtype=bool)
    n = m.shape[axis]
    top = min(max_lag, n - 1)
    rows = []
    if top >= 1:
        size = scipy.fft.next_fast_len(2 * n, real=True)
        others = tuple(d for d in range(m.ndim) if d != axis)
        h = np.arange(1, top + 1)

        def xcorr(a: np.ndarray, b: np.ndarray) -> np.ndarray:
            """``sum_t a(t) b(t + h)`` summed over the other axes, from the spectra."""
            return scipy.fft.irfft(np.sum(np.conj(a) * b, axis=others), n=size)

        fm = scipy.fft.rfft(m.astype(np.float64), n=size, axis=axis)
        npairs = np.rint(xcorr(fm, fm)[h])
    for f in fields:
        g = np.full(max_lag, np.nan)
        if top >= 1:
            x = np.where(m, f, 0.0).astype(np.float64, copy=False)
            fx = scipy.fft.rfft(x, n=size, axis=axis)
            f2 = fx if indicator else scipy.fft.rfft(x * x, n=size, axis=axis)
            num = xcorr(f2, fm) + xcorr(fm, f2) - 2.0 * xcorr(fx, fx)
            with np.errstate(divide="ignore", invalid="ignore"):
                g[:top] = np.where(npairs > 0, num[h] / (2.0 * np.maximum(npairs, 1)), np.nan)
        rows.append(g)
    out = np.array(rows, dtype=np.float64).reshape(len(rows), max_lag)
    return np.maximum(out, 0.0)
