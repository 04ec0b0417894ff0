"""Quality checks of an ensemble against its data and its training image (TI).

Each check returns numbers and a verdict (``pass``, ``check`` or ``fail``) with the rule used. The
thresholds are this project's choices, stated beside each rule; they flag what a person should look
at, they do not replace looking.

Statistics against the TI are shown as the band of the realizations (P10 to P90 over the ensemble)
with the TI's own value: indicator variograms along the axes (computed with FFTs), histograms of
small multiple-point patterns compared by the Jensen–Shannon divergence (with the divergence between
the two halves of the TI as the achievable baseline), and connectivity functions. A two-point
baseline (truncated Gaussian fields with the same proportions and a fitted variogram) can be drawn
beside them: the same variogram does not mean the same connectivity. When a run asked for a
rotation, the local orientation of the realizations (structure tensor) is compared with it.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import _validate as v
from .connectivity import connectivity_function, label_bodies
from .training.fields import circulant_field, correlation
from .variogram import axis_semivariograms

__all__ = [
    "QCResult",
    "check_run",
    "copy_diagnostics",
    "fit_truncated_gaussian",
    "hard_data_honoured",
    "indicator_variograms",
    "js_divergence",
    "k_medoids",
    "local_azimuth",
    "orientation_gap",
    "pattern_divergence",
    "pattern_histogram",
    "representative_by_measure",
    "soft_agreement",
    "ti_half_baseline",
    "truncated_gaussian",
    "variogram_axes",
]

AXES = ("z", "y", "x")


# ----------------------------------------------------------------------------- variograms
def variogram_axes(values: Any, max_lag: int, mask: Any = None) -> np.ndarray:
    """Experimental semivariograms along the three axes, computed with FFTs.

    ``gamma[a, h-1] = sum((f(x) - f(x + h e_a))**2) / (2 N(h))`` over the pairs of valid cells ``h``
    cells apart along axis ``a`` (0 = z, 1 = y, 2 = x). The sums are cross-correlations of the
    masked field, its square and the mask, evaluated for all lags at once with zero-padded FFTs
    along the axis (Marcotte 1996, "Fast variogram computation with FFT", Computers & Geosciences
    22(10)), so the cost is O(n log n) instead of O(n · max_lag); the kernel is
    :func:`strataloom.variogram.axis_semivariograms`.

    Parameters
    ----------
    values : (nz, ny, nx) or (ny, nx) array
        The field (an indicator for an indicator variogram). NaN cells are left out.
    max_lag : int
        Largest lag in cells.
    mask : array of bool, optional
        Cells to use (default: all finite cells).

    Returns
    -------
    (3, max_lag) ndarray of float64
        NaN where an axis has no pair at a lag.
    """
    f = v.as_volume(values, "values").astype(np.float64)
    lags = v.integer(max_lag, "max_lag", low=1, owner="variogram_axes")
    m = np.isfinite(f)
    if mask is not None:
        mk = v.as_volume(mask, "mask")
        if mk.shape != f.shape:
            raise v.fail(
                "mask", f"an array of shape {f.shape}", f"shape {mk.shape}", "variogram_axes"
            )
        m &= mk.astype(bool)
    out = np.full((3, lags), np.nan)
    for ax in range(3):
        out[ax] = axis_semivariograms([f], m, ax, lags)[0]
    return out


def indicator_variograms(field_: Any, codes: Sequence[int], max_lag: int) -> np.ndarray:
    """Indicator semivariograms ``(K, 3, max_lag)`` of each category along the axes.

    Cells whose value is not one of ``codes`` are left out. Same sums as :func:`variogram_axes`;
    since an indicator equals its square, and the mask is shared, one FFT per category and axis
    suffices.
    """
    f = v.as_volume(field_, "field")
    lags = v.integer(max_lag, "max_lag", low=1, owner="indicator_variograms")
    valid = np.isin(f, np.asarray(codes))
    out = np.full((len(codes), 3, lags), np.nan)
    for ax in range(3):
        out[:, ax] = axis_semivariograms(
            ((f == c) for c in codes), valid, ax, lags, indicator=True
        )
    return out


# ----------------------------------------------------------------------------- patterns
def pattern_histogram(
    field_: Any, codes: Sequence[int], size: Sequence[int] = (1, 3, 3)
) -> tuple[np.ndarray, np.ndarray]:
    """Histogram of the multiple-point patterns of a categorical field.

    Every placement of a ``size = (sz, sy, sx)`` box inside the grid whose cells all hold one of
    ``codes`` is one pattern, encoded as a base-K integer of its cells in C order.

    Returns
    -------
    keys : (m,) ndarray of int64
        The distinct pattern codes, increasing.
    counts : (m,) ndarray of int64
        How often each occurs.
    """
    f = v.as_volume(field_, "field")
    sz, sy, sx = v.triple(size, "size", int, owner="pattern_histogram")
    cds = np.asarray(codes, dtype=np.int64)
    k = cds.size
    if min(sz, sy, sx) < 1 or sz > f.shape[0] or sy > f.shape[1] or sx > f.shape[2]:
        raise v.fail(
            "size",
            f"a pattern box of positive sides no larger than the grid {f.shape}",
            (sz, sy, sx),
            "pattern_histogram",
        )
    if sz * sy * sx * math.log2(max(k, 2)) > 62:
        raise v.fail(
            "size",
            f"a pattern box with at most {int(62 / math.log2(max(k, 2)))} cells for {k} categories",
            (sz, sy, sx),
            "pattern_histogram",
        )
    lut_index = np.full(f.shape, -1, dtype=np.int64)
    for i, c in enumerate(cds):
        lut_index[f == c] = i
    oz, oy, ox = f.shape[0] - sz + 1, f.shape[1] - sy + 1, f.shape[2] - sx + 1
    code = np.zeros((oz, oy, ox), dtype=np.int64)
    ok = np.ones((oz, oy, ox), dtype=bool)
    for dz in range(sz):
        for dy in range(sy):
            for dx in range(sx):
                sub = lut_index[dz : dz + oz, dy : dy + oy, dx : dx + ox]
                ok &= sub >= 0
                code = code * k + np.maximum(sub, 0)
    keys, counts = np.unique(code[ok], return_counts=True)
    return keys, counts.astype(np.int64)


def js_divergence(p: Any, q: Any) -> float:
    """Jensen–Shannon divergence of two distributions in bits (0 = equal, 1 = disjoint).

    ``JS(p, q) = KL(p || m) / 2 + KL(q || m) / 2`` with ``m = (p + q) / 2`` (Lin 1991, "Divergence
    measures based on the Shannon entropy", IEEE Trans. Inf. Theory 37(1)). Inputs are normalised.
    """
    a = np.asarray(p, dtype=np.float64)
    b = np.asarray(q, dtype=np.float64)
    if a.shape != b.shape or a.ndim != 1:
        raise v.fail(
            "q",
            f"a 1-D array of the same shape as p {a.shape}",
            f"shape {b.shape}",
            "js_divergence",
        )
    if (a < 0).any() or (b < 0).any() or a.sum() <= 0 or b.sum() <= 0:
        raise v.fail(
            "p",
            "non-negative weights with a positive sum",
            "negative or all-zero weights",
            "js_divergence",
        )
    a, b = a / a.sum(), b / b.sum()
    m = 0.5 * (a + b)

    def kl(x: np.ndarray) -> float:
        s = x > 0
        return float(np.sum(x[s] * np.log2(x[s] / m[s])))

    return max(0.0, 0.5 * kl(a) + 0.5 * kl(b))


def pattern_divergence(a: tuple[np.ndarray, np.ndarray], b: tuple[np.ndarray, np.ndarray]) -> float:
    """Jensen–Shannon divergence (bits) between two histograms from :func:`pattern_histogram`."""
    keys = np.union1d(a[0], b[0])
    pa = np.zeros(keys.size)
    pb = np.zeros(keys.size)
    pa[np.searchsorted(keys, a[0])] = a[1]
    pb[np.searchsorted(keys, b[0])] = b[1]
    return js_divergence(pa, pb)


def ti_half_baseline(ti: Any, codes: Sequence[int], size: Sequence[int] = (1, 3, 3)) -> float:
    """Pattern divergence between the two halves of the TI, cut across its longest horizontal axis.

    Two samples of the same texture differ by this much: it is the best a realization can be
    expected to do against the TI.
    """
    t = v.as_volume(ti, "ti")
    ax = 1 if t.shape[1] >= t.shape[2] else 2
    half = t.shape[ax] // 2
    first = np.take(t, np.arange(half), axis=ax)
    second = np.take(t, np.arange(half, 2 * half), axis=ax)
    return pattern_divergence(
        pattern_histogram(first, codes, size), pattern_histogram(second, codes, size)
    )


# ----------------------------------------------------------------------------- data checks
def hard_data_honoured(realization: np.ndarray, cells: np.ndarray, values: np.ndarray) -> int:
    """Number of hard-data cells whose value the realization reproduces exactly.

    Continuous values match within float32 rounding (relative 1e-6).
    """
    c = np.asarray(cells, dtype=np.int64).reshape(-1, 3)
    got = realization[c[:, 0], c[:, 1], c[:, 2]]
    want = np.asarray(values)
    if np.issubdtype(want.dtype, np.floating):
        known = np.isfinite(want)
        return int(np.count_nonzero(np.isclose(got[known], want[known], rtol=1e-6, atol=0)))
    known = want >= 0
    return int(np.count_nonzero(got[known] == want[known]))


def soft_agreement(probability: Any, soft: Any, bins: int = 10) -> dict[str, np.ndarray]:
    """Mean simulated indicator against soft probability, in bins of the soft probability.

    Parameters
    ----------
    probability : (K, nz, ny, nx) array
        Share of realizations holding each category per cell (the summary's probability).
    soft : (K, nz, ny, nx) array
        The soft probabilities given to the simulation (NaN = none).
    bins : int
        Number of equal bins of [0, 1].

    Returns
    -------
    dict with ``soft_mean``, ``simulated_mean``, ``cells`` each of shape (K, bins), and ``edges``.
    Bins without cells hold NaN. For well-calibrated soft data the two means agree.
    """
    p = np.asarray(probability, dtype=np.float64)
    s = np.asarray(soft, dtype=np.float64)
    if p.shape != s.shape:
        raise v.fail("soft", f"an array of shape {p.shape}", f"shape {s.shape}", "soft_agreement")
    nb = v.integer(bins, "bins", low=1, high=1000, owner="soft_agreement")
    edges = np.linspace(0, 1, nb + 1)
    k = p.shape[0]
    soft_mean = np.full((k, nb), np.nan)
    sim_mean = np.full((k, nb), np.nan)
    cells = np.zeros((k, nb), dtype=np.int64)
    for i in range(k):
        si, pi = s[i].ravel(), p[i].ravel()
        ok = np.isfinite(si) & np.isfinite(pi)
        b = np.clip(np.digitize(si[ok], edges[1:-1]), 0, nb - 1)
        cells[i] = np.bincount(b, minlength=nb)
        with np.errstate(divide="ignore", invalid="ignore"):
            soft_mean[i] = np.bincount(b, si[ok], minlength=nb) / cells[i]
            sim_mean[i] = np.bincount(b, pi[ok], minlength=nb) / cells[i]
    return {"edges": edges, "soft_mean": soft_mean, "simulated_mean": sim_mean, "cells": cells}


# ----------------------------------------------------------------------------- copy diagnostics
def copy_diagnostics(source: Any, ti_shape: Sequence[int], min_size: int = 27) -> dict[str, Any]:
    """Share of cells copied from the TI in verbatim patches larger than ``min_size`` cells.

    Parameters
    ----------
    source : (nz, ny, nx) array of int
        Flat (C-order) TI index each cell's value was copied from; negative = not copied (hard
        data, or a cell not simulated by copying).
    ti_shape : sequence of int
        Shape ``(nz, ny, nx)`` of the TI the indices refer to.
    min_size : int, default 27
        Patches of more cells than this count as verbatim copies (27 = a 3×3×3 block).

    Returns
    -------
    dict with ``share`` (cells in patches > min_size over copied cells), ``largest`` (cells of the
    largest patch), ``patches`` (number of patches > min_size), ``copied`` (copied cells) and
    ``sizes`` (patch sizes, decreasing).

    Notes
    -----
    Two neighbouring cells (sharing a face) belong to one verbatim patch when their values came
    from TI cells in the same relative position, that is when the shift from the grid cell to its
    source cell is the same for both. Patches are the connected groups of such links, found with
    :func:`scipy.sparse.csgraph.connected_components`.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    src = v.as_volume(source, "source")
    if not np.issubdtype(src.dtype, np.integer):
        raise v.fail_type("source", "an integer array of flat TI indices", src, "copy_diagnostics")
    tshape = v.shape3(ti_shape, "ti_shape", owner="copy_diagnostics")
    size = v.integer(min_size, "min_size", low=1, owner="copy_diagnostics")
    src = src.astype(np.int64)
    if (src >= int(np.prod(tshape))).any():
        raise v.fail(
            "source",
            f"indices below the TI size {int(np.prod(tshape))}",
            int(src.max()),
            "copy_diagnostics",
        )
    ok = src >= 0
    tz, ty, tx = np.unravel_index(np.where(ok, src, 0), tshape)
    gz, gy, gx = np.indices(src.shape)
    shift = np.stack([tz - gz, ty - gy, tx - gx])
    idx = np.arange(src.size).reshape(src.shape)
    rows, cols = [], []
    for ax in range(3):
        if src.shape[ax] < 2:
            continue
        a = [slice(None)] * 3
        b = [slice(None)] * 3
        a[ax], b[ax] = slice(0, -1), slice(1, None)
        same = (
            ok[tuple(a)]
            & ok[tuple(b)]
            & np.all(shift[(slice(None), *a)] == shift[(slice(None), *b)], axis=0)
        )
        rows.append(idx[tuple(a)][same])
        cols.append(idx[tuple(b)][same])
    r = np.concatenate(rows) if rows else np.zeros(0, np.int64)
    c = np.concatenate(cols) if cols else np.zeros(0, np.int64)
    graph = coo_matrix((np.ones(r.size, dtype=np.int8), (r, c)), shape=(src.size, src.size))
    _, comp = connected_components(graph, directed=False)
    comp_ok = comp[ok.ravel()]
    sizes = np.bincount(comp_ok)
    sizes = np.sort(sizes[sizes > 0])[::-1]
    copied = int(ok.sum())
    big = sizes[sizes > size]
    return {
        "share": float(big.sum() / copied) if copied else float("nan"),
        "largest": int(sizes[0]) if sizes.size else 0,
        "patches": int(big.size),
        "copied": copied,
        "min_size": size,
        "sizes": sizes,
    }


# ----------------------------------------------------------------------------- two-point baseline
def _upper_orthant(t: float, rho: np.ndarray) -> np.ndarray:
    """P(Y1 > t, Y2 > t) for standard bigaussian (Y1, Y2) with correlation rho.

    From d/drho Phi2(t, t; rho) = phi2(t, t; rho) and the substitution rho = sin(theta):
    ``(1 - Phi(t))**2 + (1 / 2 pi) * integral_0^asin(rho) exp(-t**2 / (1 + sin theta)) dtheta``.
    """
    from scipy.special import ndtr

    rho = np.atleast_1d(np.asarray(rho, dtype=np.float64))
    out = np.empty_like(rho)
    q = 1.0 - float(ndtr(t))
    for i, r in enumerate(rho):
        th = np.linspace(0.0, math.asin(min(max(r, -1.0), 1.0)), 257)
        y = np.exp(-t * t / (1.0 + np.sin(th)))
        out[i] = q * q + np.trapezoid(y, th) / (2 * math.pi)
    return out


_MODELS = ("exponential", "gaussian")  # fitted models, see training.fields.correlation


def _indicator_gamma_model(p: float, rho: np.ndarray) -> np.ndarray:
    """Indicator semivariogram of {Y > t} with P = p, for Gaussian correlations rho."""
    from scipy.special import ndtri

    t = float(ndtri(1.0 - p))
    return p - _upper_orthant(t, rho)


@dataclass
class TruncatedGaussian:
    """A fitted truncated-Gaussian model: category order, thresholds, correlation per axis."""

    codes: list[int]
    proportions: list[float]
    thresholds: list[float]
    model: str
    ranges: list[float]  # practical range in cells along z, y, x (inf where not fitted)
    facies: int

    def correlation(self, lag_cells: np.ndarray) -> np.ndarray:
        """Correlation of the Gaussian field for lags ``(..., 3)`` in cells (anisotropic)."""
        lag = np.asarray(lag_cells, dtype=np.float64)
        rng = np.where(np.isfinite(self.ranges), self.ranges, np.inf)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = np.sqrt(np.sum(np.where(np.isinf(rng), 0.0, lag / rng) ** 2, axis=-1))
        return correlation(d, self.model)


def fit_truncated_gaussian(
    gamma: np.ndarray, proportions: Sequence[float], codes: Sequence[int], facies: int
) -> TruncatedGaussian:
    """Fit a truncated-Gaussian model to the indicator variograms of one facies.

    The facies of interest takes the top interval ``Y > t`` of one standard Gaussian field, the
    other categories the intervals below in code order, so proportions are reproduced exactly. The
    Gaussian correlation model (exponential or Gaussian, whichever fits better) and its practical
    range along each axis are fitted by least squares to the facies' indicator variogram, through
    the bigaussian relation between the field's correlation and the indicator variogram.

    Parameters
    ----------
    gamma : (3, L) array
        Indicator semivariograms of the facies along z, y, x (NaN = no value).
    proportions : sequence of float
        Proportions of ``codes``.
    codes : sequence of int
        Category codes.
    facies : int
        Code of the facies whose variogram is fitted.
    """
    from scipy.optimize import minimize_scalar
    from scipy.special import ndtri

    cds = [int(c) for c in codes]
    if facies not in cds:
        raise v.fail("facies", f"one of the codes {cds}", facies, "fit_truncated_gaussian")
    prop = np.asarray(proportions, dtype=np.float64)
    prop = prop / prop.sum()
    order = [c for c in cds if c != facies] + [facies]
    op = np.array([prop[cds.index(c)] for c in order])
    cum = np.cumsum(op)[:-1]
    thresholds = [float(ndtri(min(max(x, 1e-12), 1 - 1e-12))) for x in cum]
    p = float(prop[cds.index(facies)])
    g = np.asarray(gamma, dtype=np.float64)
    best = None
    for name in _MODELS:
        ranges, cost = [], 0.0
        for ax in range(3):
            ok = np.isfinite(g[ax])
            if not ok.any() or p <= 0 or p >= 1:
                ranges.append(float("inf"))
                continue
            h = np.arange(1, g.shape[1] + 1)[ok]
            target = g[ax][ok]

            def misfit(
                log_a: float, h: np.ndarray = h, target: np.ndarray = target, name: str = name
            ) -> float:
                model = _indicator_gamma_model(p, correlation(h / math.exp(log_a), name))
                return float(np.sum((model - target) ** 2))

            res = minimize_scalar(
                misfit,
                bounds=(math.log(0.2), math.log(50.0 * g.shape[1])),
                method="bounded",
                options={"xatol": 1e-3},
            )
            ranges.append(float(math.exp(res.x)))
            cost += float(res.fun)
        if best is None or cost < best[0]:
            best = (cost, name, ranges)
    assert best is not None
    return TruncatedGaussian(
        codes=order,
        proportions=op.tolist(),
        thresholds=thresholds,
        model=best[1],
        ranges=best[2],
        facies=int(facies),
    )


def truncated_gaussian(model: TruncatedGaussian, shape: Sequence[int], seed: int = 0) -> np.ndarray:
    """One categorical realization of a truncated-Gaussian model on a grid ``(nz, ny, nx)``.

    The Gaussian field is drawn by circulant embedding on a grid padded by at least one range
    (and doubled) along each axis (Dietrich & Newsam 1997, "Fast and exact simulation of stationary
    Gaussian processes through circulant embedding of the covariance matrix", SIAM J. Sci.
    Comput. 18(4)) with :func:`strataloom.training.fields.circulant_field`; negative eigenvalues
    of the embedding, if any, are set to zero, which slightly smooths the covariance at the
    largest lags.
    """
    shp = v.shape3(shape, "shape", owner="truncated_gaussian")
    s = v.seed(seed, owner="truncated_gaussian")
    pad = []
    for n, a in zip(shp, model.ranges, strict=True):
        if n == 1:
            pad.append(1)
            continue
        extra = n + (math.ceil(a) if math.isfinite(a) else n)
        pad.append(1 << math.ceil(math.log2(max(2 * n, extra))))
    lags = np.meshgrid(*[np.minimum(np.arange(m), m - np.arange(m)) for m in pad], indexing="ij")
    cov = model.correlation(np.stack(lags, axis=-1).astype(np.float64))
    y = circulant_field(cov, np.random.default_rng(s))[: shp[0], : shp[1], : shp[2]]
    out = np.full(shp, model.codes[-1], dtype=np.int16)
    for c, t in reversed(list(zip(model.codes[:-1], model.thresholds, strict=True))):
        out[y <= t] = c
    return out


# ----------------------------------------------------------------------------- representatives
def representative_by_measure(
    values: Any, quantiles: Sequence[float] = (0.1, 0.5, 0.9)
) -> dict[str, int]:
    """Positions of the realizations whose measure is nearest each quantile of the ensemble.

    Ties go to the lower position. Keys are ``'P10'``, ``'P50'``, ``'P90'`` for the default
    quantiles.
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    if x.size == 0 or not np.isfinite(x).all():
        raise v.fail(
            "values", "a non-empty array of finite numbers", x.size, "representative_by_measure"
        )
    out = {}
    for q in quantiles:
        target = float(np.quantile(x, q))
        out[f"P{round(q * 100)}"] = int(np.argmin(np.abs(x - target)))
    return out


def k_medoids(distances: Any, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Partitioning around medoids (Kaufman & Rousseeuw 1990, "Finding Groups in Data", ch. 2).

    Greedy BUILD then SWAP until no exchange of a medoid with another item lowers the total
    distance of the items to their nearest medoid. Deterministic.

    Parameters
    ----------
    distances : (n, n) array
        Symmetric distances between the realizations.
    k : int
        Number of medoids, ``1 <= k <= n``.

    Returns
    -------
    medoids : (k,) ndarray of int
        Positions of the medoids, in increasing order.
    assignment : (n,) ndarray of int
        Index into ``medoids`` of each item's nearest medoid.
    """
    d = np.asarray(distances, dtype=np.float64)
    if d.ndim != 2 or d.shape[0] != d.shape[1]:
        raise v.fail("distances", "a square (n, n) array", f"shape {d.shape}", "k_medoids")
    n = d.shape[0]
    kk = v.integer(k, "k", low=1, high=n, owner="k_medoids")
    med = [int(np.argmin(d.sum(axis=1)))]
    near = d[med[0]].copy()
    while len(med) < kk:
        gain = np.maximum(near[None, :] - d, 0.0).sum(axis=1)
        gain[med] = -1.0
        j = int(np.argmax(gain))
        med.append(j)
        near = np.minimum(near, d[j])
    cost = near.sum()
    while True:
        best = (cost, -1, -1)
        for mi in range(kk):
            rest = [m for i, m in enumerate(med) if i != mi]
            base = d[rest].min(axis=0) if rest else np.full(n, np.inf)
            cand = np.minimum(base[None, :], d).sum(axis=1)
            cand[med] = np.inf
            j = int(np.argmin(cand))
            if cand[j] < best[0] - 1e-12:
                best = (float(cand[j]), mi, j)
        if best[1] < 0:
            break
        med[best[1]] = best[2]
        cost = best[0]
    medoids = np.array(sorted(med), dtype=np.int64)
    return medoids, np.argmin(d[medoids], axis=0)


# ----------------------------------------------------------------------------- local orientation
def local_azimuth(field_: Any, sigma: float = 1.0, window: float = 4.0) -> tuple[np.ndarray, np.ndarray]:
    """Horizontal orientation of the structures at every cell, from the structure tensor.

    The gradient tensor ``J = G_window * (grad f grad f^T)`` of each z-layer (Sobel gradients of
    the layer smoothed by ``sigma``, products smoothed by ``window``; scipy.ndimage) has its
    dominant eigenvector across the structures; the structures run along the other one (Bigün &
    Granlund 1987, "Optimal orientation detection of linear symmetry", ICCV).

    Parameters
    ----------
    field_ : (ny, nx) or (nz, ny, nx) array
        Values (for facies: an indicator or the codes).
    sigma : float, default 1.0
        Gaussian smoothing (cells) of the field before the gradients.
    window : float, default 4.0
        Gaussian window (cells) of the tensor: the scale of "local".

    Returns
    -------
    azimuth : ndarray of float, shaped like the input
        Degrees in [0, 180), clockwise from +y toward +x, along the structures.
    coherence : ndarray of float
        ``(l1 - l2) / (l1 + l2)`` in [0, 1]: 0 for no preferred direction, 1 for straight bands.
    """
    from scipy import ndimage

    a = np.asarray(field_)
    flat = a.ndim == 2
    a3 = v.as_volume(a, "field_", owner="local_azimuth")
    if not (np.issubdtype(a3.dtype, np.number) or a3.dtype == np.bool_):
        raise v.fail_type("field_", "a numeric array", a3, "local_azimuth")
    s = v.real(sigma, "sigma", low=0.0, owner="local_azimuth")
    w = v.real(window, "window", low=0.0, low_open=True, owner="local_azimuth")
    azimuth = np.empty(a3.shape)
    coherence = np.empty(a3.shape)
    for k in range(a3.shape[0]):  # layer by layer: the working arrays stay the size of one layer
        layer = a3[k].astype(np.float64)
        f = ndimage.gaussian_filter(layer, s) if s > 0 else layer
        gy = ndimage.sobel(f, axis=0)
        gx = ndimage.sobel(f, axis=1)
        jxx = ndimage.gaussian_filter(gx * gx, w)
        jyy = ndimage.gaussian_filter(gy * gy, w)
        jxy = ndimage.gaussian_filter(gx * gy, w)
        # Dominant gradient direction phi (from +x toward +y); the structures run at phi + 90
        # degrees, whose azimuth clockwise from +y is -phi.
        phi = 0.5 * np.arctan2(2 * jxy, jxx - jyy)
        azimuth[k] = np.degrees(-phi) % 180.0
        trace = jxx + jyy
        with np.errstate(invalid="ignore", divide="ignore"):
            coherence[k] = np.where(trace > 1e-12, np.sqrt((jxx - jyy) ** 2 + 4 * jxy**2) / trace, 0.0)
    if flat:
        return azimuth[0], coherence[0]
    return azimuth, coherence


def orientation_gap(measured: Any, requested: Any, weights: Any = None) -> float:
    """Mean angle (degrees, in [0, 90]) between measured and requested axial directions.

    Directions are axial (``a`` and ``a + 180`` are one direction), so each gap is
    ``min(|a - b| mod 180, 180 - |a - b| mod 180)``; ``weights`` (e.g. the coherence of
    `local_azimuth`) weigh the cells.
    """
    a = np.asarray(measured, dtype=np.float64)
    b = np.broadcast_to(np.asarray(requested, dtype=np.float64), a.shape)
    d = np.abs(a - b) % 180.0
    d = np.minimum(d, 180.0 - d)
    if weights is None:
        return float(d.mean())
    wt = np.broadcast_to(np.asarray(weights, dtype=np.float64), a.shape)
    total = wt.sum()
    return float((d * wt).sum() / total) if total > 0 else float("nan")


def _mean_axis(azimuth: np.ndarray, weights: np.ndarray) -> float:
    """Weighted mean of axial directions (doubled angles), degrees in [0, 180)."""
    t = np.radians(2 * azimuth)
    return float(np.degrees(np.arctan2((weights * np.sin(t)).sum(), (weights * np.cos(t)).sum())) / 2 % 180)


# ----------------------------------------------------------------------------- whole-run QC
@dataclass
class QCResult:
    """Everything the report shows: numbers per check and the verdicts."""

    variable: str | None = None
    codes: list[int] = field(default_factory=list)
    names: list[str] = field(default_factory=list)
    facies: int | None = None
    realizations: list[int] = field(default_factory=list)
    hard: dict[str, Any] | None = None
    proportions: np.ndarray | None = None  # (n, K)
    target: np.ndarray | None = None
    ti_proportions: np.ndarray | None = None
    soft: dict[str, Any] | None = None
    max_lag: int = 0
    variograms: np.ndarray | None = None  # (n, K, 3, L)
    ti_variograms: np.ndarray | None = None  # (K, 3, L)
    pattern_size: tuple[int, int, int] = (1, 3, 3)
    pattern_js: np.ndarray | None = None  # (n,)
    pattern_baseline: float | None = None
    connectivity: int = 6
    connectivity_fn: np.ndarray | None = None  # (n, 3, L)
    ti_connectivity_fn: np.ndarray | None = None  # (3, L)
    baseline_model: TruncatedGaussian | None = None
    baseline_connectivity_fn: np.ndarray | None = None  # (m, 3, L)
    baseline_variograms: np.ndarray | None = None  # (m, 3, L) for the facies
    copies: list[dict[str, Any]] | None = None
    measure_name: str = ""
    measure: np.ndarray | None = None
    by_measure: dict[str, int] | None = None
    medoids: list[int] | None = None
    medoid_members: list[int] | None = None
    orientation: dict[str, Any] | None = None
    verdicts: list[dict[str, Any]] = field(default_factory=list)

    def verdict(self, name: str, verdict: str, value: str, rule: str) -> None:
        self.verdicts.append({"check": name, "verdict": verdict, "value": value, "rule": rule})


def _nan_band(
    samples: np.ndarray, q: tuple[float, float] = (0.1, 0.9)
) -> tuple[np.ndarray, np.ndarray]:
    """P10 and P90 along axis 0 ignoring NaN (NaN where a column has no value)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        lo, hi = np.nanquantile(samples, q, axis=0)
    return lo, hi


def _band_share(samples: np.ndarray, reference: np.ndarray, tolerance: float) -> float:
    """Share of finite reference values inside the samples' P10–P90 band widened by tolerance."""
    lo, hi = _nan_band(samples)
    ok = np.isfinite(reference) & np.isfinite(lo) & np.isfinite(hi)
    if not ok.any():
        return float("nan")
    inside = (reference[ok] >= lo[ok] - tolerance) & (reference[ok] <= hi[ok] + tolerance)
    return float(inside.mean())


def _grade(x: float, good: float, fair: float, higher_is_better: bool = True) -> str:
    if not np.isfinite(x):
        return "check"
    if higher_is_better:
        return "pass" if x >= good else "check" if x >= fair else "fail"
    return "pass" if x <= good else "check" if x <= fair else "fail"


def check_run(
    run: Any,
    *,
    variable: str | None = None,
    ti: Any = None,
    facies: int | None = None,
    target_proportions: Sequence[float] | None = None,
    max_lag: int | None = None,
    pattern_size: Sequence[int] | None = None,
    connectivity: int = 6,
    baseline: bool = False,
    baseline_count: int = 10,
    wells: Mapping[str, Any] | None = None,
    source_maps: Mapping[int, np.ndarray] | None = None,
    ti_shape: Sequence[int] | None = None,
    min_patch: int = 27,
    representatives: int = 3,
    sample_cells: int = 20000,
    seed: int = 0,
    azimuth: Any = None,
    progress: Any = None,
) -> QCResult:
    """Run every QC check on a categorical variable of a run, streaming over the realizations.

    Parameters
    ----------
    run : Run or path
        The run folder.
    variable : str, optional
        The categorical variable (default: the first one).
    ti : (nz, ny, nx) or (ny, nx) array of int, optional
        The training image; without it the checks against the TI are skipped.
    facies : int, optional
        Code of the facies whose bodies matter (connectivity, representatives, baseline); default:
        the least abundant category of the first realization (often the reservoir or aquifer sand).
    target_proportions : sequence of float, optional
        Target share of each category (in code order); default the study's, if it gives them.
    max_lag : int, optional
        Largest lag (cells) of variograms and connectivity functions; default
        ``min(30, half the smallest horizontal size of the grid and the TI)``.
    pattern_size : sequence of 3 int, optional
        Pattern box ``(sz, sy, sx)``; default (2, 3, 3) for 3-D grids and TIs, else (1, 3, 3).
    connectivity : {6, 26}
        Neighbourhood of facies bodies.
    baseline : bool
        Draw ``baseline_count`` truncated-Gaussian fields with the same proportions and a fitted
        variogram and compute their connectivity functions.
    wells : mapping, optional
        Cells of wells; the measure for representatives is then the connected volume of the facies
        seen from the first well, otherwise the facies proportion.
    source_maps : mapping of int to array, optional
        For direct sampling: the TI index each cell was copied from, per realization index.
    ti_shape : sequence of int, optional
        Shape of the TI the source maps refer to (default ``ti.shape``).
    min_patch : int
        Size above which a copied patch counts as verbatim.
    representatives : int
        Number of k-medoids representatives.
    sample_cells : int
        Cells sampled (fixed seed) for the distances between realizations (share of differing
        cells).
    seed : int
        Seed of the cell sample and of the baseline fields.
    azimuth : float or array of the grid's shape, optional
        The rotation asked of the engine (degrees); default the run folder's ``azimuth.npy``
        when the study asked for one. The local orientation of the facies (`local_azimuth`) is
        then compared with the TI's own mean orientation turned by it (the TI's taken as 0 without
        ``ti``).
    progress : callable, optional
        ``progress(done, total)`` after each realization.
    """
    from .connectivity import body_sizes, structure, well_bodies, wells_from_hard_data
    from .runread import Run
    from .summary import CategoricalSummary

    r = run if isinstance(run, Run) else Run(run)
    structure(connectivity)
    var = variable if variable is not None else (r.categorical[0] if r.categorical else None)
    if var is None:
        raise v.fail("variable", "a categorical variable of the run", None, "check_run")
    if r.kind(var) != "categorical":
        raise v.fail(
            "variable", f"a categorical variable, one of {r.categorical}", var, "check_run"
        )
    if r.completed.size == 0:
        raise v.fail(
            "run", "a run with at least one finished realization", "none done", "check_run"
        )
    cats = r.categories(var)
    codes = [c["code"] for c in cats]
    res = QCResult(
        variable=var,
        codes=codes,
        names=[c["name"] for c in cats],
        connectivity=connectivity,
        realizations=[int(i) for i in r.completed],
    )
    shape = r.grid.shape
    tia = None
    if ti is not None:
        tia = v.as_volume(ti, "ti")
        if not np.issubdtype(tia.dtype, np.integer):
            raise v.fail_type("ti", "an integer array of category codes", tia, "check_run")
    horiz = [s for s in shape[1:] if s > 1] + (
        [s for s in tia.shape[1:] if s > 1] if tia is not None else []
    )
    lag = max_lag if max_lag is not None else max(1, min(30, min(horiz) // 2 if horiz else 1))
    lag = v.integer(lag, "max_lag", low=1, owner="check_run")
    res.max_lag = lag
    three_d = shape[0] >= 2 and (tia is None or tia.shape[0] >= 2)
    psize = (
        tuple(pattern_size) if pattern_size is not None else ((2, 3, 3) if three_d else (1, 3, 3))
    )
    res.pattern_size = v.triple(psize, "pattern_size", int, owner="check_run")
    hd = r.hard_data()
    key = f"values_{var}"
    hard_cells = hard_vals = None
    if hd is not None and key in hd:
        hard_cells, hard_vals = hd["cells"], hd[key]
    if wells is None:
        wells = wells_from_hard_data(hd["cells"], shape) if hd is not None else {}
    wells = {k: np.asarray(c, dtype=np.int64) for k, c in wells.items()}
    soft = r.soft_data()
    if target_proportions is None:
        study = r.meta.get("study") or {}
        tp = study.get("target_proportions") if isinstance(study, dict) else None
        if tp is None:
            tp = (r.meta.get("engine") or {}).get("parameters", {}).get("target_proportions")
        target_proportions = tp
    if target_proportions is not None:
        t = np.asarray(target_proportions, dtype=np.float64)
        if t.shape != (len(codes),) or (t < 0).any() or not np.isclose(t.sum(), 1.0, atol=1e-3):
            raise v.fail(
                "target_proportions",
                f"{len(codes)} non-negative shares summing to 1",
                list(np.asarray(target_proportions).tolist()),
                "check_run",
            )
        res.target = t

    if azimuth is None and (r.path / "azimuth.npy").is_file():
        azimuth = np.load(r.path / "azimuth.npy", allow_pickle=False)
    expected = None
    if azimuth is not None:
        req = np.asarray(azimuth, dtype=np.float64)
        if req.ndim == 2:
            req = req[np.newaxis]
        if (req.ndim != 0 and req.shape != shape) or not np.isfinite(req).all():
            raise v.fail("azimuth", f"finite degrees, a number or a map of the grid's shape {shape}",
                         f"shape {req.shape}", "check_run")
        expected = req
    n = int(r.completed.size)
    acc = CategoricalSummary(codes, shape) if soft is not None else None
    props = np.zeros((n, len(codes)))
    vgs = np.zeros((n, len(codes), 3, lag))
    js = np.full(n, np.nan)
    cfn = np.zeros((n, 3, lag))
    measure = np.zeros(n)
    matched = checked = 0
    rng = np.random.default_rng(seed)
    sample = np.sort(
        rng.choice(int(np.prod(shape)), size=min(sample_cells, int(np.prod(shape))), replace=False)
    )
    samples = np.zeros((n, sample.size), dtype=np.int16)
    ti_hist = pattern_histogram(tia, codes, res.pattern_size) if tia is not None else None
    fac = facies
    for j, (_, real) in enumerate(r.iter_realizations(var)):
        if fac is None:
            counts = np.array([np.count_nonzero(real == c) for c in codes])
            fac = int(codes[int(np.argmin(np.where(counts > 0, counts, np.iinfo(np.int64).max)))])
        if fac not in codes:
            raise v.fail("facies", f"one of the codes {codes}", fac, "check_run")
        valid = max(int(np.isin(real, codes).sum()), 1)
        props[j] = [np.count_nonzero(real == c) / valid for c in codes]
        if acc is not None:
            acc.add(real)
        if hard_cells is not None:
            known = hard_vals >= 0
            matched += hard_data_honoured(real, hard_cells, hard_vals)
            checked += int(known.sum())
        vgs[j] = indicator_variograms(real, codes, lag)
        if ti_hist is not None:
            js[j] = pattern_divergence(pattern_histogram(real, codes, res.pattern_size), ti_hist)
        labels, nb = label_bodies(real == fac, connectivity)
        for ax in range(3):
            cfn[j, ax] = connectivity_function(labels, lag, ax)
        if wells:
            vol, _ = well_bodies(
                labels, body_sizes(labels, nb), {k: wells[k] for k in list(wells)[:1]}
            )
            measure[j] = float(vol[0]) * float(np.prod(r.grid.spacing))
        else:
            measure[j] = props[j, codes.index(fac)]
        samples[j] = real.reshape(-1)[sample]
        if expected is not None:
            if j == 0:
                ti_axis = 0.0
                if tia is not None:
                    ti_az, ti_coh = local_azimuth(tia == fac)
                    ti_axis = _mean_axis(ti_az, ti_coh)
                expected = (expected + ti_axis) % 180.0
                gaps = np.zeros(n)
                mid = shape[0] // 2  # the layer the report shows
                doubled = np.zeros((2, *shape[1:]))
                res.orientation = {"ti_azimuth": ti_axis}
            az, coh = local_azimuth(real == fac)
            gaps[j] = orientation_gap(az, expected, coh)
            doubled[0] += coh[mid] * np.cos(np.radians(2 * az[mid]))
            doubled[1] += coh[mid] * np.sin(np.radians(2 * az[mid]))
        if progress is not None:
            progress(j + 1, n)
    res.facies = int(fac)  # type: ignore[arg-type]
    res.proportions = props
    res.variograms = vgs
    res.connectivity_fn = cfn
    res.pattern_js = js if ti_hist is not None else None
    res.measure = measure
    res.measure_name = (
        f"connected volume of {res.names[codes.index(res.facies)]} seen from well "
        f"{next(iter(wells))}"
        if wells
        else f"proportion of {res.names[codes.index(res.facies)]}"
    )

    # -- local orientation
    if res.orientation is not None:
        res.orientation.update(
            gap=gaps,
            requested=np.broadcast_to(expected, shape)[mid].copy(),
            measured=(np.degrees(np.arctan2(doubled[1], doubled[0])) / 2) % 180.0,
            strength=np.hypot(doubled[0], doubled[1]) / n,
            layer=mid,
        )
        med = float(np.median(gaps))
        res.verdict(
            "Local orientation against the requested rotation",
            _grade(med, 10.0, 20.0, False),
            f"median over realizations of the mean angle between the structures of "
            f"{res.names[codes.index(res.facies)]} and the requested direction {med:.1f} degrees",
            "structure tensor, cells weighted by coherence; pass ≤ 10, check ≤ 20 degrees "
            "(project's thresholds)",
        )
    # -- hard data
    if hard_cells is not None:
        share = matched / checked if checked else float("nan")
        res.hard = {"share": share, "matched": matched, "checked": checked}
        res.verdict(
            "Hard data honoured",
            "pass" if checked and matched == checked else "fail",
            f"{share:.4f} ({matched} of {checked} cell values over {n} realizations)",
            "every hard-data cell must hold its value in every realization (share 1.0)",
        )
    # -- proportions
    mean_props = props.mean(axis=0)
    if tia is not None:
        tv = tia[np.isin(tia, codes)]
        res.ti_proportions = np.array([np.count_nonzero(tv == c) for c in codes]) / max(tv.size, 1)
    for ref, ref_name in ((res.target, "target"), (res.ti_proportions, "TI")):
        if ref is None:
            continue
        dev = float(np.max(np.abs(mean_props - ref)))
        res.verdict(
            f"Proportions against the {ref_name}",
            _grade(dev, 0.02, 0.05, False),
            f"largest difference of the ensemble mean {dev:.3f}",
            "pass ≤ 0.02, check ≤ 0.05 (project's thresholds)",
        )
    # -- soft data
    if acc is not None and soft is not None and soft.shape[0] == len(codes):
        prob = np.stack([acc.probability(i) for i in range(len(codes))])
        res.soft = soft_agreement(prob, np.asarray(soft))
        cells = res.soft["cells"]
        busy = cells >= np.maximum(1, 0.01 * cells.sum(axis=1, keepdims=True))
        diff = np.abs(res.soft["simulated_mean"] - res.soft["soft_mean"])[busy]
        worst = float(np.nanmax(diff)) if diff.size else float("nan")
        res.verdict(
            "Soft data agreement",
            _grade(worst, 0.10, 0.20, False),
            f"largest gap between mean simulated indicator and soft probability {worst:.3f}",
            "over bins holding ≥ 1 % of the cells: pass ≤ 0.10, check ≤ 0.20 "
            "(project's thresholds)",
        )
    # -- against the TI
    if tia is not None:
        res.ti_variograms = indicator_variograms(tia, codes, lag)
        sills = np.array([p * (1 - p) for p in res.ti_proportions])  # type: ignore[union-attr]
        shares = []
        for k in range(len(codes)):
            shares.append(_band_share(vgs[:, k], res.ti_variograms[k], 0.1 * sills[k]))
        share = float(np.nanmean(shares)) if np.isfinite(shares).any() else float("nan")
        res.verdict(
            "Indicator variograms against the TI",
            _grade(share, 0.8, 0.5),
            f"{share:.2f} of TI values inside the realizations' P10–P90 band",
            "band widened by 10 % of each sill; pass ≥ 0.80, check ≥ 0.50 (project's thresholds)",
        )
        res.pattern_baseline = ti_half_baseline(tia, codes, res.pattern_size)
        med = float(np.median(js))
        ratio = med / res.pattern_baseline if res.pattern_baseline > 0 else float("inf")
        res.verdict(
            "Pattern histograms against the TI",
            _grade(ratio, 2.0, 4.0, False),
            f"median JS divergence {med:.4f} bits = {ratio:.2f} × the TI half-versus-half "
            f"{res.pattern_baseline:.4f}",
            "pass ≤ 2 × baseline, check ≤ 4 × baseline (project's thresholds)",
        )
        ti_labels, _ = label_bodies(tia == res.facies, connectivity)
        res.ti_connectivity_fn = np.stack(
            [connectivity_function(ti_labels, lag, ax) for ax in range(3)]
        )
        share = _band_share(cfn, res.ti_connectivity_fn, 0.1)
        res.verdict(
            "Connectivity functions against the TI",
            _grade(share, 0.8, 0.5),
            f"{share:.2f} of TI values inside the realizations' P10–P90 band",
            "band widened by 0.1; pass ≥ 0.80, check ≥ 0.50 (project's thresholds)",
        )
    # -- two-point baseline
    if baseline:
        k = codes.index(res.facies)
        ref_g = (
            res.ti_variograms[k] if res.ti_variograms is not None else np.nanmean(vgs[:, k], axis=0)
        )
        ref_p = res.ti_proportions if res.ti_proportions is not None else mean_props
        model = fit_truncated_gaussian(ref_g, ref_p, codes, res.facies)
        res.baseline_model = model
        bc = v.integer(baseline_count, "baseline_count", low=1, high=1000, owner="check_run")
        bcf = np.zeros((bc, 3, lag))
        bvg = np.zeros((bc, 3, lag))
        for b in range(bc):
            tg = truncated_gaussian(model, shape, seed=seed + 1 + b)
            labels, _ = label_bodies(tg == res.facies, connectivity)
            bcf[b] = np.stack([connectivity_function(labels, lag, ax) for ax in range(3)])
            bvg[b] = variogram_axes((tg == res.facies).astype(np.float64), lag)
        res.baseline_connectivity_fn = bcf
        res.baseline_variograms = bvg
    # -- copy diagnostics
    if source_maps:
        tshape = ti_shape if ti_shape is not None else (tia.shape if tia is not None else None)
        if tshape is None:
            raise v.fail("ti_shape", "the TI's shape (or give ti)", None, "check_run")
        res.copies = []
        for i, src in source_maps.items():
            d = copy_diagnostics(src, tshape, min_patch)
            d["realization"] = int(i)
            d.pop("sizes")
            res.copies.append(d)
        worst = max(d["share"] for d in res.copies)
        res.verdict(
            "Copy diagnostics",
            _grade(worst, 0.5, 0.8, False),
            f"up to {worst:.2f} of copied cells lie in verbatim patches of more than "
            f"{min_patch} cells",
            "pass ≤ 0.50, check ≤ 0.80 (project's thresholds)",
        )
    # -- representatives
    res.by_measure = {k: res.realizations[i] for k, i in representative_by_measure(measure).items()}
    kk = min(v.integer(representatives, "representatives", low=1, owner="check_run"), n)
    dist = np.zeros((n, n))
    for a in range(n):
        dist[a] = np.mean(samples[a][None, :] != samples, axis=1)
    med, assign = k_medoids(dist, kk)
    res.medoids = [res.realizations[i] for i in med]
    res.medoid_members = np.bincount(assign, minlength=kk).tolist()
    return res
