"""Regular 3-D grids: cell, flat index and coordinate conversions, multiple-grid levels."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _core
from . import _validate as v

__all__ = ["Grid"]


class Grid:
    """A regular grid of ``nz * ny * nx`` cells, axes (z, y, x), x varying fastest (C order).

    Parameters
    ----------
    shape : sequence of int
        ``(nz, ny, nx)``; a pair ``(ny, nx)`` means a single layer (``nz = 1``).
    spacing : sequence of float, default (1, 1, 1)
        Cell sizes ``(dz, dy, dx)``, positive.
    origin : sequence of float, default (0, 0, 0)
        Coordinates ``(z0, y0, x0)`` of the lower corner of cell (0, 0, 0). Cell centres lie at
        ``origin + (i + 0.5) * spacing``, as for cell data on VTK ImageData.

    Notes
    -----
    Multiple-grid level ``g`` holds the cells whose three indices are multiples of ``2**g``.
    """

    def __init__(self, shape: Any, spacing: Any = (1.0, 1.0, 1.0), origin: Any = (0.0, 0.0, 0.0)) -> None:
        shp = v.shape3(shape, "shape", owner="Grid")
        spc = v.triple(spacing, "spacing", float, owner="Grid")
        org = v.triple(origin, "origin", float, owner="Grid")
        self._grid = _core.Grid(shp, spc, org)

    @property
    def shape(self) -> tuple[int, int, int]:
        """``(nz, ny, nx)``."""
        return tuple(self._grid.shape)  # type: ignore[return-value]

    @property
    def spacing(self) -> tuple[float, float, float]:
        """Cell sizes ``(dz, dy, dx)``."""
        return tuple(self._grid.spacing)  # type: ignore[return-value]

    @property
    def origin(self) -> tuple[float, float, float]:
        """Lower corner ``(z0, y0, x0)`` of the first cell."""
        return tuple(self._grid.origin)  # type: ignore[return-value]

    @property
    def size(self) -> int:
        """Number of cells."""
        return int(self._grid.size)

    def __repr__(self) -> str:
        return f"Grid(shape={self.shape}, spacing={self.spacing}, origin={self.origin})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Grid) and (self.shape, self.spacing, self.origin) == (
            other.shape, other.spacing, other.origin)

    def __hash__(self) -> int:
        return hash((self.shape, self.spacing, self.origin))

    def index(self, cells: Any) -> np.ndarray:
        """Flat C-order indices of cells.

        Parameters
        ----------
        cells : (n, 3) or (3,) array of int
            ``(iz, iy, ix)`` per row; every cell must lie inside the grid.

        Returns
        -------
        (n,) ndarray of int64 (a scalar array for a single cell)
        """
        c = _int_rows(cells, "cells")
        out = self._grid.index(c.reshape(-1, 3))
        return out.reshape(c.shape[:-1])

    def cell(self, index: Any) -> np.ndarray:
        """Cells ``(iz, iy, ix)`` of flat indices, shape ``index.shape + (3,)``."""
        idx = np.asarray(index)
        if not np.issubdtype(idx.dtype, np.integer):
            raise v.fail_type("index", "an integer array", idx, "Grid.cell")
        out = self._grid.cell(np.ascontiguousarray(idx, dtype=np.int64).ravel())
        return out.reshape((*idx.shape, 3))

    def centre(self, cells: Any) -> np.ndarray:
        """Coordinates ``(z, y, x)`` of cell centres, shape ``cells.shape``."""
        c = _int_rows(cells, "cells")
        return self._grid.centre(c.reshape(-1, 3)).reshape(c.shape)

    def locate(self, points: Any) -> np.ndarray:
        """Cells containing points ``(z, y, x)``; rows of -1 for points outside the grid.

        A point on an inner cell face belongs to the upper cell; the grid's upper outer faces are
        outside.
        """
        p = np.asarray(points, dtype=np.float64)
        if p.shape[-1:] != (3,):
            raise v.fail("points", "an (n, 3) array of (z, y, x) coordinates",
                         f"an array of shape {p.shape}", "Grid.locate")
        return self._grid.locate(np.ascontiguousarray(p.reshape(-1, 3))).reshape(p.shape)

    def level_shape(self, level: int) -> tuple[int, int, int]:
        """Number of level-``level`` nodes along each axis (every ``2**level``-th cell)."""
        lv = v.integer(level, "level", low=0, high=20, owner="Grid.level_shape")
        return tuple(self._grid.level_extent(lv))  # type: ignore[return-value]

    def level_cells(self, level: int, coarsest: int | None = None) -> np.ndarray:
        """Flat indices of the cells simulated at ``level``, in increasing order.

        Parameters
        ----------
        level : int
            The multiple-grid level.
        coarsest : int, optional
            The coarsest level of the run (default ``level``). Below it, a level holds only its
            nodes that are not nodes of the next coarser level, so every cell is simulated once.
        """
        lv = v.integer(level, "level", low=0, high=20, owner="Grid.level_cells")
        top = lv if coarsest is None else v.integer(coarsest, "coarsest", low=lv, high=20,
                                                    owner="Grid.level_cells")
        return _core.level_cells(self._grid, lv, top)


def _int_rows(cells: Any, name: str) -> np.ndarray:
    c = np.asarray(cells)
    if c.shape[-1:] != (3,):
        raise v.fail(name, "an (n, 3) array of (iz, iy, ix) cells", f"an array of shape {c.shape}", "Grid")
    if not np.issubdtype(c.dtype, np.integer):
        raise v.fail_type(name, "an integer array of cells", c, "Grid")
    return np.ascontiguousarray(c, dtype=np.int64)
