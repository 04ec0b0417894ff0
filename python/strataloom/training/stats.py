"""Statistics of training images: proportions, indicator variograms, connectivity, body sizes.

Variograms are computed with FFTs over zero-padded arrays (axis variograms by the kernel of
:mod:`strataloom.variogram`), which handles masked cells and the grid's edges exactly (Marcotte
1996, "Fast variogram computation with FFT", Computers & Geosciences 22(10)): with ``M`` the
valid-cell mask and ``I`` the indicator,

    2 N(h) gamma(h) = sum M(x) M(x+h) (I(x) - I(x+h))**2,   N(h) = sum M(x) M(x+h),

and each sum is a cross-correlation. Connected bodies are the components of
`scipy.ndimage.label` with 6-connectivity (faces) or 26-connectivity (faces, edges, corners); in a
plan view (nz = 1) these are 4- and 8-connectivity. Labels, body sizes and connectivity functions
come from :mod:`strataloom.connectivity`; the functions here take a TI and a code.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import _validate as v
from .. import connectivity as _conn
from ..variogram import axis_semivariograms

__all__ = [
    "BodySizes",
    "Statistics",
    "anisotropy",
    "body_sizes",
    "connected_share",
    "connectivity_function",
    "describe",
    "indicator_variogram",
    "label_bodies",
    "proportions",
    "variogram_map",
]



class _Lazy:
    """scipy modules imported on first use, so `import strataloom` stays light."""

    def __getattr__(self, name: str) -> Any:
        import scipy.fft
        import scipy.ndimage

        mods = {"fft": scipy.fft, "ndi": scipy.ndimage}
        return mods[name]


_scipy = _Lazy()
_AXES = {"z": 0, "y": 1, "x": 2, 0: 0, 1: 1, 2: 2}


def _codes(ti: Any, owner: str) -> np.ndarray:
    a = v.as_volume(ti, "ti", owner=owner)
    if not np.issubdtype(a.dtype, np.integer):
        raise v.fail_type("ti", "an integer array of facies codes (negative = masked)", a, owner)
    return a


def _code(code: Any, owner: str) -> int:
    return v.integer(code, "code", low=0, high=2**31 - 1, owner=owner)


def _axis(axis: Any, owner: str) -> int:
    if axis not in _AXES or isinstance(axis, bool):
        raise v.fail("axis", "one of 'z', 'y', 'x' or 0, 1, 2", axis, owner)
    return _AXES[axis]


def _axis_lags(a: np.ndarray, axis: Any, max_lag: Any, owner: str) -> tuple[int, int]:
    """The axis index and the largest lag (default half the axis, at most its length - 1)."""
    ax = _axis(axis, owner)
    n = a.shape[ax]
    if max_lag is None:
        return ax, max(n // 2, 1)
    return ax, v.integer(max_lag, "max_lag", low=1, high=max(n - 1, 1), owner=owner)


def proportions(ti: Any, ncodes: int | None = None) -> np.ndarray:
    """Share of each code 0..K-1 among the unmasked cells.

    Parameters
    ----------
    ti : (nz, ny, nx) or (ny, nx) array of int
        Codes; negative values are masked.
    ncodes : int, optional
        K; default ``max code + 1``.

    Returns
    -------
    (K,) ndarray of float64
    """
    a = _codes(ti, "proportions")
    valid = a[a >= 0].astype(np.int64)
    k = int(valid.max()) + 1 if valid.size else 0
    if ncodes is not None:
        k = max(k, v.integer(ncodes, "ncodes", low=1, high=2**20, owner="proportions"))
    counts = np.bincount(valid, minlength=k).astype(float)
    return counts / max(valid.size, 1)


def _axis_variograms(a: np.ndarray, codes: list[int], ax: int, lmax: int) -> np.ndarray:
    """Semivariograms along axis ``ax`` at lags 1..lmax of each code's indicator, shape (K, L).

    Unmasked cells (code >= 0) take part; the FFT kernel is
    :func:`strataloom.variogram.axis_semivariograms`.
    """
    return axis_semivariograms(((a == k) for k in codes), a >= 0, ax, lmax, indicator=True)


def indicator_variogram(ti: Any, code: int, axis: Any = "x", max_lag: int | None = None,
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Indicator variogram of one code along one grid axis.

    Parameters
    ----------
    ti : (nz, ny, nx) or (ny, nx) array of int
        Codes; negative values are masked.
    code : int
        The facies whose indicator is used.
    axis : {"z", "y", "x"} or {0, 1, 2}, default "x"
    max_lag : int, optional
        Largest lag in cells (default: half the axis length).

    Returns
    -------
    lags : (L,) ndarray of int
        1 .. max_lag.
    gamma : (L,) ndarray of float64
        Semivariogram per lag (NaN where no pair of valid cells exists).
    """
    o = "indicator_variogram"
    a = _codes(ti, o)
    k = _code(code, o)
    ax, lmax = _axis_lags(a, axis, max_lag, o)
    return np.arange(1, lmax + 1), _axis_variograms(a, [k], ax, lmax)[0]


def variogram_map(ti: Any, code: int, max_lag: Any = None) -> np.ndarray:
    """Indicator semivariogram on every lag vector of a box, as an array centred on lag 0.

    Parameters
    ----------
    ti : (nz, ny, nx) or (ny, nx) array of int
    code : int
    max_lag : int or sequence of 3 int, optional
        Largest lag per axis ``(z, y, x)`` in cells (default: a quarter of each axis).

    Returns
    -------
    ndarray of float64, shape ``(2 Lz + 1, 2 Ly + 1, 2 Lx + 1)``
        ``out[Lz + hz, Ly + hy, Lx + hx]`` is gamma at lag ``(hz, hy, hx)``; NaN without pairs.
    """
    o = "variogram_map"
    a = _codes(ti, o)
    k = _code(code, o)
    if max_lag is None:
        lm = tuple(n // 4 for n in a.shape)
    elif isinstance(max_lag, int) and not isinstance(max_lag, bool):
        lm = tuple(min(max_lag, n - 1) for n in a.shape)
    else:
        lm = tuple(min(x, n - 1) for x, n in zip(v.triple(max_lag, "max_lag", int, owner=o),
                                                 a.shape, strict=True))
    if min(lm) < 0:
        raise v.fail("max_lag", "non-negative lags", max_lag, o)
    s = [_scipy.fft.next_fast_len(2 * n, real=True) for n in a.shape]
    fm = _scipy.fft.rfftn((a >= 0).astype(np.float64), s=s)
    fi = _scipy.fft.rfftn((a == k).astype(np.float64), s=s)
    mm = _scipy.fft.irfftn(np.abs(fm) ** 2, s=s)
    num = _scipy.fft.irfftn(np.conj(fm) * fi + np.conj(fi) * fm - 2.0 * np.abs(fi) ** 2, s=s)
    idx = np.ix_(*[np.arange(-L, L + 1) % s for L, s in zip(lm, mm.shape, strict=True)])
    pairs = np.rint(mm[idx])
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.where(pairs > 0, num[idx] / (2.0 * np.maximum(pairs, 1)), np.nan)
    return np.maximum(g, 0.0)


def anisotropy(ti: Any, code: int, max_lag: int | None = None, spacing: Any = (1.0, 1.0, 1.0),
               ) -> tuple[float, float]:
    """Horizontal direction of greatest continuity of one facies, from its variogram map.

    The lags of the horizontal variogram map where ``gamma(h)`` is below half the sill
    ``p (1 - p)``, connected to lag 0, form the half-sill region (its outline is the contour
    read off a variogram map by eye); the major eigenvector of the region's second-moment tensor
    ``sum h h^T`` is the azimuth of greatest continuity.

    Parameters
    ----------
    ti : array of int
    code : int
    max_lag : int, optional
        Half-size of the lag plane in cells (default: half the smaller horizontal axis, less 1).
    spacing : sequence of 3 float
        Cell sizes, so lags are physical.

    Returns
    -------
    azimuth : float
        Degrees clockwise from +y, in [0, 180).
    ratio : float
        Square root of the eigenvalue ratio (major over minor), >= 1.
    """
    o = "anisotropy"
    a = _codes(ti, o)
    spc = v.triple(spacing, "spacing", float, owner=o)
    top = max(min(a.shape[1], a.shape[2]) - 1, 1)
    L = max(min(a.shape[1], a.shape[2]) // 2 - 1, 1) if max_lag is None else v.integer(
        max_lag, "max_lag", low=1, high=top, owner=o)
    g = variogram_map(a, code, (0, L, L))[0]
    valid = a[a >= 0]
    p = float(np.mean(valid == _code(code, o))) if valid.size else 0.0
    if not 0.0 < p < 1.0:
        raise v.fail("code", "a code present in part (not all) of the image", code, o)
    below = np.nan_to_num(g, nan=p * (1.0 - p)) < 0.5 * p * (1.0 - p)
    labels, _ = _scipy.ndi.label(below)
    region = labels == labels[L, L] if labels[L, L] else np.zeros_like(below)
    region[L, L] = True
    hy = np.broadcast_to(np.arange(-L, L + 1)[:, None] * spc[1], region.shape)[region]
    hx = np.broadcast_to(np.arange(-L, L + 1)[None, :] * spc[2], region.shape)[region]
    t = np.array([[np.sum(hx * hx), np.sum(hx * hy)], [np.sum(hx * hy), np.sum(hy * hy)]])
    vals, vecs = np.linalg.eigh(t)
    ex, ey = vecs[:, 1]
    az = math.degrees(math.atan2(ex, ey)) % 180.0
    ratio = math.sqrt(vals[1] / vals[0]) if vals[0] > 0 else math.inf
    return az, ratio


def label_bodies(ti: Any, code: int, connectivity: int = 6) -> tuple[np.ndarray, int]:
    """Connected bodies of one facies (:func:`strataloom.connectivity.label_bodies`).

    Parameters
    ----------
    ti : (nz, ny, nx) or (ny, nx) array of int
        Codes; negative values are masked.
    code : int
        The facies.
    connectivity : {6, 26}, default 6
        Neighbourhood: faces, or faces, edges and corners.

    Returns
    -------
    labels : (nz, ny, nx) ndarray of int32
        0 outside the facies, 1..n per body.
    n : int
        Number of bodies.
    """
    o = "label_bodies"
    a = _codes(ti, o)
    return _conn.label_bodies(a == _code(code, o), connectivity, owner=o)


def connected_share(ti: Any, code: int, connectivity: int = 6) -> float:
    """Share of the facies' cells in its largest connected body (0 when the facies is absent).

    Parameters
    ----------
    ti, code, connectivity
        As in `label_bodies`.

    Returns
    -------
    float
    """
    labels, n = label_bodies(ti, code, connectivity)
    if n == 0:
        return 0.0
    sizes = _conn.body_sizes(labels, n)[1:]
    return float(sizes.max() / sizes.sum())


def connectivity_function(ti: Any, code: int, axis: Any = "x", max_lag: int | None = None,
                          connectivity: int = 6) -> tuple[np.ndarray, np.ndarray]:
    """Probability that two cells of a facies a lag apart along an axis are in one body.

    ``tau(h) = P(x and x + h connected | both in the facies)``, the connectivity function of
    Allard (1994) and Renard & Allard (2013), Advances in Water Resources 51; computed by
    :func:`strataloom.connectivity.connectivity_function` on the bodies of `label_bodies`.

    Parameters
    ----------
    ti, code, connectivity
        As in `label_bodies`.
    axis, max_lag
        As in `indicator_variogram`.

    Returns
    -------
    lags : (L,) ndarray of int
    tau : (L,) ndarray of float64 (NaN where no pair lies in the facies)
    """
    o = "connectivity_function"
    a = _codes(ti, o)
    ax, lmax = _axis_lags(a, axis, max_lag, o)
    labels, _ = label_bodies(a, code, connectivity)
    return np.arange(1, lmax + 1), _conn.connectivity_function(labels, lmax, ax)


@dataclass(frozen=True)
class BodySizes:
    """Sizes of the connected bodies of one facies.

    Attributes
    ----------
    count : int
        Number of bodies.
    cells : (n,) ndarray of int64
        Cells per body, largest first.
    extent : (n, 3) ndarray of float64
        Bounding-box size ``(z, y, x)`` per body in physical units, same order.
    """

    count: int
    cells: np.ndarray
    extent: np.ndarray

    def typical(self) -> dict[str, float]:
        """Volume-weighted median cells and extents (bodies weighted by their size)."""
        if self.count == 0:
            return {"cells": 0.0, "z": 0.0, "y": 0.0, "x": 0.0}
        w = self.cells / self.cells.sum()

        def wmedian(x: np.ndarray) -> float:
            order = np.argsort(x)
            c = np.cumsum(w[order])
            return float(x[order][np.searchsorted(c, 0.5)])

        return {"cells": wmedian(self.cells.astype(float)), "z": wmedian(self.extent[:, 0]),
                "y": wmedian(self.extent[:, 1]), "x": wmedian(self.extent[:, 2])}


def body_sizes(ti: Any, code: int, connectivity: int = 6, spacing: Any = (1.0, 1.0, 1.0),
               ) -> BodySizes:
    """Cell counts and bounding boxes of the connected bodies of one facies.

    Parameters
    ----------
    ti, code, connectivity
        As in `label_bodies`.
    spacing : sequence of 3 float, default (1, 1, 1)
        Cell sizes ``(dz, dy, dx)``, for the extents.

    Returns
    -------
    BodySizes
    """
    o = "body_sizes"
    spc = np.array(v.triple(spacing, "spacing", float, owner=o))
    labels, n = label_bodies(ti, code, connectivity)
    return _sizes(labels, n, spc)


def _sizes(labels: np.ndarray, n: int, spc: np.ndarray) -> BodySizes:
    if n == 0:
        return BodySizes(0, np.zeros(0, dtype=np.int64), np.zeros((0, 3)))
    cells = _conn.body_sizes(labels, n)[1:]
    boxes = _scipy.ndi.find_objects(labels)
    extent = np.array([[s.stop - s.start for s in b] for b in boxes], dtype=float) * spc
    order = np.argsort(-cells, kind="stable")
    return BodySizes(n, cells[order].astype(np.int64), extent[order])


@dataclass(frozen=True)
class Statistics:
    """Summary statistics of a categorical training image (see `describe`)."""

    proportions: np.ndarray
    connected_share: np.ndarray
    bodies: list[BodySizes]
    variograms: dict[str, np.ndarray]
    connectivity: int
    spacing: tuple[float, float, float]
    connectivity_functions: dict[str, np.ndarray] = field(default_factory=dict)

    def table(self) -> str:
        """A plain-text table, one row per code."""
        rows = [f"{'code':>4} {'share':>7} {'largest body':>12} {'bodies':>7} "
                f"{'typical z':>9} {'typical y':>9} {'typical x':>9}"]
        for k, p in enumerate(self.proportions):
            t = self.bodies[k].typical()
            rows.append(f"{k:>4} {p:>7.4f} {self.connected_share[k]:>12.3f} "
                        f"{self.bodies[k].count:>7d} "
                        f"{t['z']:>9.4g} {t['y']:>9.4g} {t['x']:>9.4g}")
        rows.append(f"(bodies: {self.connectivity}-connectivity; largest body = share of the "
                    "code's cells in its largest body; typical = size-weighted median extent)")
        return "\n".join(rows)

    def as_dict(self) -> dict[str, Any]:
        """Plain types, for JSON."""
        return {
            "proportions": self.proportions.tolist(),
            "connected_share": self.connected_share.tolist(),
            "bodies": [{"count": b.count, "typical": b.typical()} for b in self.bodies],
            "variograms": {k: np.where(np.isnan(g), None, g).tolist()
                           for k, g in self.variograms.items()},
            "connectivity_functions": {k: np.where(np.isnan(g), None, g).tolist()
                                       for k, g in self.connectivity_functions.items()},
            "connectivity": self.connectivity,
            "spacing": list(self.spacing),
        }


def describe(ti: Any, *, spacing: Any = (1.0, 1.0, 1.0), connectivity: int = 6,
             max_lag: int | None = None, tau_lag: int | None = 32) -> Statistics:
    """Proportions, largest-body shares, body sizes, axis variograms and connectivity functions.

    Parameters
    ----------
    ti : (nz, ny, nx) or (ny, nx) array of int
        Codes 0..K-1 (negative = masked).
    spacing : sequence of 3 float
        Cell sizes, for body extents in physical units.
    connectivity : {6, 26}, default 6
    max_lag : int, optional
        Largest variogram lag in cells (default half of each axis).
    tau_lag : int or None, default 32
        Largest lag of the connectivity functions (capped at half of each axis); None skips them.

    Returns
    -------
    Statistics
        ``variograms`` and ``connectivity_functions`` hold arrays ``(K, L)`` under keys
        ``"z"``, ``"y"``, ``"x"`` (axes of length 1 are left out).
    """
    o = "describe"
    a = _codes(ti, o)
    spc = v.triple(spacing, "spacing", float, owner=o)
    _conn.structure(connectivity, owner=o)
    if max_lag is not None:
        v.integer(max_lag, "max_lag", low=1, high=2**31 - 1, owner=o)
    if tau_lag is not None:
        v.integer(tau_lag, "tau_lag", low=1, high=2**31 - 1, owner=o)
    p = proportions(a)
    axes = [(name, ax) for name, ax in (("z", 0), ("y", 1), ("x", 2)) if a.shape[ax] >= 2]
    share = np.zeros(len(p))
    bodies = []
    taus: dict[str, list[np.ndarray]] = {name: [] for name, _ in axes}
    for k in range(len(p)):
        labels, n = _conn.label_bodies(a == k, connectivity, owner=o)
        sizes = _sizes(labels, n, np.array(spc))
        bodies.append(sizes)
        share[k] = sizes.cells[0] / sizes.cells.sum() if n else 0.0
        if tau_lag is not None:
            for name, ax in axes:
                lag = max(min(tau_lag, a.shape[ax] // 2), 1)
                taus[name].append(_conn.connectivity_function(labels, lag, ax))
    grams = {}
    for name, ax in axes:
        lag = a.shape[ax] // 2 if max_lag is None else min(max_lag, a.shape[ax] - 1)
        grams[name] = _axis_variograms(a, list(range(len(p))), ax, max(lag, 1))
    tau = {name: np.array(t) for name, t in taus.items() if t}
    return Statistics(p, share, bodies, grams, connectivity, spc, tau)  # type: ignore[arg-type]
