"""Well trajectories: positions along a hole from a directional survey by minimum curvature.

Between two survey stations the hole is taken to be a circular arc tangent to both stations'
directions (the minimum-curvature method, the industry's standard wellbore position calculation).
Positions are returned as (east, north, tvd) offsets from the collar: ``east`` along +x, ``north``
along +y, ``tvd`` the true vertical depth, positive downwards. Inclination is measured from the
vertical, azimuth clockwise from north, both in degrees.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .. import _validate as v

__all__ = ["Survey", "minimum_curvature"]


def _unit_vectors(inc: np.ndarray, azi: np.ndarray) -> np.ndarray:
    """Direction cosines (east, north, down) of stations given in radians."""
    return np.stack([np.sin(inc) * np.sin(azi), np.sin(inc) * np.cos(azi), np.cos(inc)], axis=-1)


def _ratio_factor(beta: np.ndarray) -> np.ndarray:
    """``2 / beta * tan(beta / 2)``, with its limit 1 for a straight segment."""
    out = np.ones_like(beta)
    big = beta > 1e-7
    out[big] = 2.0 / beta[big] * np.tan(beta[big] / 2.0)
    # second-order series below the threshold: 1 + beta**2 / 12
    out[~big] = 1.0 + beta[~big] ** 2 / 12.0
    return out


def _dogleg(t1: np.ndarray, t2: np.ndarray) -> np.ndarray:
    """Angle between unit vectors, stable for small angles (via the chord length)."""
    chord = np.linalg.norm(t2 - t1, axis=-1)
    return 2.0 * np.arcsin(np.clip(chord / 2.0, 0.0, 1.0))


def minimum_curvature(md: Any, inclination: Any, azimuth: Any) -> np.ndarray:
    """Positions of survey stations by the minimum-curvature method.

    Parameters
    ----------
    md : (n,) array of float
        Measured depths along the hole, strictly increasing; the first station is the collar
        reference (its position is the origin).
    inclination, azimuth : (n,) array of float
        Degrees; inclination in [0, 180], azimuth any value (taken modulo 360).

    Returns
    -------
    (n, 3) ndarray of float64
        ``(east, north, tvd)`` of every station relative to the first.
    """
    s = Survey(md, inclination, azimuth)
    return s.stations.copy()


class Survey:
    """A directional survey, able to place any measured depth along the hole.

    Parameters
    ----------
    md, inclination, azimuth : (n,) array of float
        Stations as in :func:`minimum_curvature`. A single station means a straight hole in that
        station's direction.
    """

    def __init__(self, md: Any, inclination: Any, azimuth: Any) -> None:
        md_a = _column(md, "md")
        inc = _column(inclination, "inclination")
        azi = _column(azimuth, "azimuth")
        if not (len(md_a) == len(inc) == len(azi)):
            raise v.fail(
                "survey",
                "md, inclination and azimuth columns of equal length",
                (len(md_a), len(inc), len(azi)),
                "Survey",
            )
        if len(md_a) > 1 and np.any(np.diff(md_a) <= 0):
            raise v.fail("md", "strictly increasing measured depths", md_a.tolist()[:6], "Survey")
        if np.any((inc < 0) | (inc > 180)):
            raise v.fail(
                "inclination",
                "degrees in [0, 180]",
                float(inc[(inc < 0) | (inc > 180)][0]),
                "Survey",
            )
        self.md = md_a
        self._t = _unit_vectors(np.radians(inc), np.radians(azi))
        n = len(md_a)
        pos = np.zeros((n, 3))
        if n > 1:
            t1, t2 = self._t[:-1], self._t[1:]
            beta = _dogleg(t1, t2)
            rf = _ratio_factor(beta)
            dmd = np.diff(md_a)
            step = (dmd * rf / 2.0)[:, None] * (t1 + t2)
            pos[1:] = np.cumsum(step, axis=0)
        self.stations = pos
        self.stations.flags.writeable = False

    def positions(self, md: Any) -> np.ndarray:
        """``(east, north, tvd)`` at measured depths ``md``, following each segment's arc.

        Depths above the first station or below the last continue straight along the end
        station's direction.
        """
        q = np.atleast_1d(np.asarray(md, dtype=np.float64))
        out = np.empty((*q.shape, 3))
        n = len(self.md)
        seg = np.clip(np.searchsorted(self.md, q, side="right") - 1, 0, max(n - 2, 0))
        if n == 1:
            out[:] = (q - self.md[0])[:, None] * self._t[0]
            return out
        m1, m2 = self.md[seg], self.md[seg + 1]
        t1, t2 = self._t[seg], self._t[seg + 1]
        p1 = self.stations[seg]
        beta = _dogleg(t1, t2)
        frac = (q - m1) / (m2 - m1)
        phi = beta * frac
        # direction at the partial angle phi along the arc (spherical interpolation of t1 -> t2)
        tq = np.empty_like(t1)
        curved = beta > 1e-9
        sb = np.sin(beta[curved])
        tq[curved] = (np.sin(beta[curved] - phi[curved]) / sb)[:, None] * t1[curved] + (
            np.sin(phi[curved]) / sb
        )[:, None] * t2[curved]
        tq[~curved] = t1[~curved]
        rf = _ratio_factor(phi)
        out[:] = p1 + ((q - m1) * rf / 2.0)[:, None] * (t1 + tq)
        # beyond the ends: straight continuation
        above = q < self.md[0]
        below = q > self.md[-1]
        out[above] = (q[above] - self.md[0])[:, None] * self._t[0]
        out[below] = self.stations[-1] + (q[below] - self.md[-1])[:, None] * self._t[-1]
        return out

    @property
    def directions(self) -> np.ndarray:
        """Unit tangent ``(east, north, down)`` at each station."""
        return self._t.copy()


def _column(values: Any, name: str) -> np.ndarray:
    a = np.asarray(values, dtype=np.float64)
    if a.ndim != 1 or a.size == 0:
        raise v.fail(
            name, "a non-empty 1-D column of numbers", f"an array of shape {a.shape}", "Survey"
        )
    if not np.all(np.isfinite(a)):
        raise v.fail(
            name, "finite numbers (no missing values)", "a column with NaN or inf", "Survey"
        )
    return np.ascontiguousarray(a)
