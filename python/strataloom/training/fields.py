"""Stationary Gaussian random fields by circulant embedding (FFT), and property fields per facies.

A field on the grid is the product of white noise with the square root of the covariance's
spectrum on a periodic grid padded beyond the correlation range (circulant embedding: Dietrich &
Newsam 1997, SIAM J. Sci. Comput. 18(4); Wood & Chan 1994, J. Comput. Graph. Stat. 3(4)). Where the
padded spectrum has small negative values (smooth models, short padding) they are set to zero.

Covariance models use the practical range ``r`` (the distance where the correlation falls to
about 0.05, or to 0 for the spherical model):

* ``exponential``: ``C(h) = exp(-3 h / r)``
* ``gaussian``:    ``C(h) = exp(-3 (h / r)**2)``
* ``spherical``:   ``C(h) = 1 - 1.5 h / r + 0.5 (h / r)**3`` for ``h < r``, else 0

with ``h`` the anisotropic lag: ranges along z, along the azimuth and across it.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import _validate as v

__all__ = [
    "MODELS",
    "PropertyModel",
    "circulant_field",
    "correlation",
    "gaussian_field",
    "property_field",
]

MODELS = ("exponential", "gaussian", "spherical")


def correlation(h: np.ndarray, model: str) -> np.ndarray:
    """Correlation of the unit-range model at scaled lag ``h`` (practical range 1)."""
    h = np.asarray(h, dtype=float)
    if model == "exponential":
        return np.exp(-3.0 * h)
    if model == "gaussian":
        return np.exp(-3.0 * h * h)
    if model == "spherical":
        return np.where(h < 1.0, 1.0 - 1.5 * h + 0.5 * h ** 3, 0.0)
    raise v.fail("model", f"one of {', '.join(MODELS)}", model, "correlation")


def _ranges(value: Any, owner: str) -> tuple[float, float, float]:
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        r = (float(value),) * 3
    else:
        r = v.triple(value, "range", float, owner=owner)
    if not all(math.isfinite(x) and x > 0 for x in r):
        raise v.fail("range", "a positive number or 3 positive ranges (z, along azimuth, across)",
                     value, owner)
    return r  # type: ignore[return-value]


def gaussian_field(shape: Any, *, range: Any, model: str = "exponential", azimuth: float = 0.0,
                   spacing: Any = (1.0, 1.0, 1.0), seed: int | np.random.Generator = 0,
                   ) -> np.ndarray:
    """A stationary Gaussian field of mean 0 and variance 1.

    Parameters
    ----------
    shape : sequence of int
        ``(nz, ny, nx)`` or ``(ny, nx)``.
    range : float or sequence of 3 float
        Practical range, or ranges ``(along z, along the azimuth, across it)``; at azimuth 0 these
        are the z, y and x ranges. Physical units.
    model : {"exponential", "gaussian", "spherical"}, default "exponential"
        Covariance model (see the module notes).
    azimuth : float, default 0
        Direction of the second range, degrees clockwise from +y.
    spacing : sequence of 3 float, default (1, 1, 1)
        Cell sizes ``(dz, dy, dx)``.
    seed : int or numpy Generator, default 0
        Source of the white noise.

    Returns
    -------
    (nz, ny, nx) ndarray of float64
    """
    o = "gaussian_field"
    shp = v.shape3(shape, "shape", owner=o)
    r = _ranges(range, o)
    if model not in MODELS:
        raise v.fail("model", f"one of {', '.join(MODELS)}", model, o)
    az = v.real(azimuth, "azimuth", owner=o)
    spc = v.triple(spacing, "spacing", float, owner=o)
    if min(spc) <= 0:
        raise v.fail("spacing", "3 positive cell sizes (dz, dy, dx)", spacing, o)
    import scipy.fft  # imported on use: keeps `import strataloom` light

    if isinstance(seed, np.random.Generator):
        rng = seed
    else:
        rng = np.random.default_rng(v.seed(seed, owner=o))
    horiz = max(r[1], r[2])
    reach = (r[0], horiz, horiz)
    # padding: 2 ranges (the exponential correlation is 0.0025 there), never more than doubling
    m = tuple(scipy.fft.next_fast_len(n + min(n, math.ceil(2.0 * q / s)) if n > 1 else 1, real=True)
              for n, q, s in zip(shp, reach, spc, strict=True))
    lags = [np.fft.fftfreq(mi, 1.0 / mi) * s for mi, s in zip(m, spc, strict=True)]  # signed lags
    hz = lags[0][:, None, None] / r[0]
    th = math.radians(az)
    hy, hx = lags[1][None, :, None], lags[2][None, None, :]
    along = (hx * math.sin(th) + hy * math.cos(th)) / r[1]
    across = (hx * math.cos(th) - hy * math.sin(th)) / r[2]
    cov = correlation(np.sqrt(hz * hz + along * along + across * across), model)
    field = circulant_field(cov, rng)
    return np.ascontiguousarray(field[: shp[0], : shp[1], : shp[2]])


def circulant_field(covariance: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One stationary Gaussian field on the periodic grid of a covariance (circulant embedding).

    Parameters
    ----------
    covariance : ndarray of float64
        Covariance at every lag of the periodic (padded) grid, lag 0 at index 0 and negative lags
        wrapped to the end (``C[i] = C(min(i, m - i))`` for a symmetric model).
    rng : numpy Generator
        Source of the white noise: one ``standard_normal(covariance.shape)`` draw.

    Returns
    -------
    ndarray of float64, shape of ``covariance``
        The field on the whole periodic grid; crop it to the simulation grid. Negative
        eigenvalues of the embedding are set to zero (see the module notes).
    """
    import scipy.fft  # imported on use: keeps `import strataloom` light

    shape = covariance.shape
    spectrum = scipy.fft.rfftn(covariance).real
    np.maximum(spectrum, 0.0, out=spectrum)
    noise = rng.standard_normal(shape)
    return scipy.fft.irfftn(np.sqrt(spectrum) * scipy.fft.rfftn(noise), s=shape)


@dataclass(frozen=True)
class PropertyModel:
    """A property inside one facies: ``mean + sd * Gaussian field``.

    Parameters
    ----------
    mean, sd : float
        Mean and standard deviation (``sd >= 0``; 0 gives a constant).
    range : float or sequence of 3 float
        Practical range(s), see `gaussian_field`.
    model : {"exponential", "gaussian", "spherical"}, default "exponential"
    azimuth : float, default 0
    """

    mean: float
    sd: float
    range: Any
    model: str = "exponential"
    azimuth: float = 0.0

    def __post_init__(self) -> None:
        o = "PropertyModel"
        object.__setattr__(self, "mean", v.real(self.mean, "mean", owner=o))
        object.__setattr__(self, "sd", v.real(self.sd, "sd", low=0, owner=o))
        object.__setattr__(self, "range", _ranges(self.range, o))
        if self.model not in MODELS:
            raise v.fail("model", f"one of {', '.join(MODELS)}", self.model, o)
        object.__setattr__(self, "azimuth", v.real(self.azimuth, "azimuth", owner=o))


def property_field(facies: Any, models: Mapping[int, PropertyModel], *,
                   spacing: Any = (1.0, 1.0, 1.0), seed: int = 0, stream: int = 0,
                   low: float | None = None, high: float | None = None) -> np.ndarray:
    """A continuous property co-located with a facies image, one independent field per facies.

    Parameters
    ----------
    facies : (nz, ny, nx) or (ny, nx) array of int
        Facies codes; cells whose code has no model (and negative codes) get NaN.
    models : mapping of int to PropertyModel
        The property's model in each facies.
    spacing : sequence of 3 float
        Cell sizes ``(dz, dy, dx)``.
    seed : int
        Seed; facies ``k`` of property ``stream`` uses the generator of ``(seed, stream, k)``,
        so adding a facies model leaves the other facies' values unchanged.
    stream : int, default 0
        Distinguishes properties built from one seed.
    low, high : float, optional
        Values are clipped to ``[low, high]`` (porosity in [0, 1], for example).

    Returns
    -------
    ndarray of float32, the shape of ``facies`` (3-D).
    """
    o = "property_field"
    fac = v.as_volume(facies, "facies", owner=o)
    if not np.issubdtype(fac.dtype, np.integer):
        raise v.fail_type("facies", "an integer array of facies codes", fac, o)
    s = v.seed(seed, owner=o)
    st = v.integer(stream, "stream", low=0, high=2**31 - 1, owner=o)
    if not isinstance(models, Mapping):
        raise v.fail_type("models", "a mapping of facies code to PropertyModel", models, o)
    lo = None if low is None else v.real(low, "low", owner=o)
    hi = None if high is None else v.real(high, "high", owner=o)
    if lo is not None and hi is not None and lo >= hi:
        raise v.fail("high", f"greater than low ({lo:g})", hi, o)
    out = np.full(fac.shape, np.nan, dtype=np.float32)
    for code, pm in sorted(models.items()):
        k = v.integer(code, "models key", low=0, high=126, owner=o)
        if not isinstance(pm, PropertyModel):
            raise v.fail_type(f"models[{k}]", "a PropertyModel", pm, o)
        where = fac == k
        if not where.any():
            continue
        rng = np.random.default_rng(np.random.SeedSequence([s, st, k]))
        z = gaussian_field(fac.shape, range=pm.range, model=pm.model, azimuth=pm.azimuth,
                           spacing=spacing, seed=rng)
        out[where] = (pm.mean + pm.sd * z[where]).astype(np.float32)
    if lo is not None or hi is not None:
        np.clip(out, lo, hi, out=out)
    return out
