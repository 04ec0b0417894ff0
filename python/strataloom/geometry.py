"""Local geometry of non-stationary simulation: the one reading of rotation and affinity arguments.

Both engines take ``rotation`` (azimuth, and dip in 3-D) and ``affinity`` (stretch factors per axis)
as constants or per-cell maps. This module checks and normalises them once and builds the matrix that
takes training-image (TI) coordinates to grid coordinates; the pattern tree turns the TI with it
(`strataloom.turned_image`), the direct sampler compares each grid lag ``h`` with the TI lag
``M^-1 h``.

Conventions (axes z, y, x): the azimuth is in degrees clockwise from +y toward +x (a TI direction
along +y then points along the azimuth); the dip tips that direction toward -z; affinity factors
stretch the TI's structures along z, y and x before the rotation (2 along x: bodies twice as long
along x).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from . import _validate as v

__all__ = ["LocalGeometry", "affinity_factors", "local_geometry", "turn_matrix"]

#: Largest affinity factor (and smallest: its inverse is not enforced; factors must be in (0, 16]).
MAX_AFFINITY = 16.0
#: Largest zone code (zone maps and per-zone engines, API and study files).
MAX_ZONE = 254


@dataclass(frozen=True)
class LocalGeometry:
    """Checked rotation and affinity: constants (0-d / shape (3,)) or per-cell values (flattened)."""

    azimuth: np.ndarray  # degrees, 0-d or (cells,)
    dip: np.ndarray  # degrees, 0-d or (cells,)
    affinity: np.ndarray  # (3,) or (cells, 3), factors (z, y, x)

    @property
    def constant(self) -> bool:
        """True when rotation and affinity are the same at every cell."""
        return self.azimuth.ndim == 0 and self.dip.ndim == 0 and self.affinity.ndim == 1

    @property
    def has_dip(self) -> bool:
        """True when some cell asks for a non-zero dip."""
        return bool(np.any(self.dip != 0))

    def rows(self, cells: int) -> np.ndarray:
        """(cells, 5) array of (azimuth, dip, fz, fy, fx) per cell."""
        out = np.empty((cells, 5))
        out[:, 0] = np.broadcast_to(self.azimuth, cells)
        out[:, 1] = np.broadcast_to(self.dip, cells)
        out[:, 2:] = np.broadcast_to(self.affinity, (cells, 3))
        return out


def local_geometry(rotation: Any, affinity: Any, shape: tuple[int, int, int], owner: str) -> LocalGeometry | None:
    """Check ``rotation`` and ``affinity`` for a grid of ``shape`` (None when both are None).

    Parameters
    ----------
    rotation : float, (azimuth, dip), array or pair of arrays, or None
        Degrees; arrays of the grid's shape (``(ny, nx)`` accepted when ``nz = 1``), finite.
    affinity : float, (fz, fy, fx) or (3, nz, ny, nx) array, or None
        Factors in (0, 16].
    shape : (nz, ny, nx)
    owner : str
        Named in error messages.

    Returns
    -------
    LocalGeometry or None
    """
    if rotation is None and affinity is None:
        return None
    azimuth, dip = _rotation(rotation, shape, owner)
    geo = LocalGeometry(azimuth, dip, affinity_factors(affinity, shape, owner))
    if shape[0] == 1 and geo.has_dip:
        raise v.fail("rotation", "an azimuth alone for a 2-D grid (dip needs a 3-D grid)", rotation, owner)
    return geo


def refuse_flat_dip(flat_ti: bool, geo: LocalGeometry | None, rotation: Any, owner: str) -> None:
    """Refuse a dip when a training image is 2-D (a flat image cannot be tipped)."""
    if flat_ti and geo is not None and geo.has_dip:
        raise v.fail("rotation", "no dip with a 2-D training image (a flat image cannot be tipped); "
                     "give a 3-D training image or an azimuth alone", rotation, owner)


def _rotations(azimuth: Any, dip: Any) -> np.ndarray:
    """(n, 3, 3) rotations (axes z, y, x): turn by ``azimuth`` about z, then tip by ``dip``.

    x' = x cos + y sin, y' = -x sin + y cos (clockwise from +y), then the dip in the (z, y) plane.
    """
    az, dp = np.radians(np.atleast_1d(azimuth)), np.radians(np.atleast_1d(dip))
    n = max(len(az), len(dp))
    rot_az = np.zeros((n, 3, 3))
    rot_az[:, 0, 0] = 1
    rot_az[:, 1, 1] = np.cos(az)
    rot_az[:, 1, 2] = -np.sin(az)
    rot_az[:, 2, 1] = np.sin(az)
    rot_az[:, 2, 2] = np.cos(az)
    rot_dip = np.zeros((n, 3, 3))
    rot_dip[:, 0, 0] = np.cos(dp)
    rot_dip[:, 0, 1] = -np.sin(dp)
    rot_dip[:, 1, 0] = np.sin(dp)
    rot_dip[:, 1, 1] = np.cos(dp)
    rot_dip[:, 2, 2] = 1
    return rot_dip @ rot_az


def turn_matrix(azimuth: float, dip: float = 0.0, affinity: Any = (1.0, 1.0, 1.0)) -> np.ndarray:
    """The 3x3 matrix (axes z, y, x) taking TI coordinates to grid coordinates.

    Stretch by ``affinity``, then turn by ``azimuth`` about z, then tip by ``dip``.
    """
    return _rotations(azimuth, dip)[0] @ np.diag(np.asarray(affinity, dtype=np.float64))


def _angle_map(value: Any, shape: tuple[int, int, int], owner: str) -> np.ndarray:
    """Degrees: a 0-d array for a constant, else the flattened (nz, ny, nx) map."""
    if np.isscalar(value):
        return np.asarray(v.real(value, "rotation", owner=owner))
    try:
        a = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise v.fail_type("rotation", "a number of degrees or a map of the grid's shape", value, owner) from None
    if a.ndim == 0:
        return np.asarray(v.real(float(a), "rotation", owner=owner))
    if a.ndim == 2:
        a = a[np.newaxis]
    if a.shape != shape:
        raise v.fail("rotation", f"a number of degrees or a map of the grid's shape {shape}",
                     f"shape {np.asarray(value).shape}", owner)
    if not np.isfinite(a).all():
        bad = int((~np.isfinite(a)).sum())
        raise v.fail("rotation", "a map of finite angles in degrees", f"{bad} non-finite cells", owner)
    return a.ravel()


def _rotation(rotation: Any, shape: tuple[int, int, int], owner: str) -> tuple[np.ndarray, np.ndarray]:
    if rotation is None:
        return np.asarray(0.0), np.asarray(0.0)
    if isinstance(rotation, (tuple, list)) and len(rotation) == 2:
        return _angle_map(rotation[0], shape, owner), _angle_map(rotation[1], shape, owner)
    return _angle_map(rotation, shape, owner), np.asarray(0.0)


def affinity_factors(affinity: Any, shape: tuple[int, int, int], owner: str) -> np.ndarray:
    """Checked affinity factors (z, y, x): shape (3,) for constants, else (cells, 3)."""
    if affinity is None:
        return np.ones(3)
    try:
        a = np.asarray(affinity, dtype=np.float64)
    except (TypeError, ValueError):
        raise v.fail_type("affinity", "a factor, three factors (z, y, x) or maps", affinity, owner) from None
    if a.ndim == 0:
        a = np.repeat(a, 3)
    if a.shape == (3,):
        flat = a
    elif a.shape == (3, *shape) or (shape[0] == 1 and a.shape == (3, *shape[1:])):
        flat = np.moveaxis(a.reshape(3, -1), 0, -1)
    else:
        raise v.fail("affinity", f"a factor, three factors (z, y, x) or an array of shape (3, {shape})",
                     f"shape {a.shape}", owner)
    if not np.isfinite(flat).all() or (flat <= 0).any() or (flat > MAX_AFFINITY).any():
        raise v.fail("affinity", f"factors in (0, {MAX_AFFINITY:g}]",
                     f"values in [{np.nanmin(flat):g}, {np.nanmax(flat):g}]", owner)
    return flat


def grid_to_ti(rows: np.ndarray) -> np.ndarray:
    """Per row (azimuth, dip, fz, fy, fx): the (3, 3) matrix taking a grid lag to the TI lag.

    The inverse of `turn_matrix`, computed for all rows at once: ``diag(1/f) R^T``.
    """
    rows = np.atleast_2d(np.asarray(rows, dtype=np.float64))
    rot = _rotations(rows[:, 0], rows[:, 1])
    return np.transpose(rot, (0, 2, 1)) / rows[:, 2:, np.newaxis]
