"""Counter-based random draws and simulation paths.

Every draw is a pure function of ``(seed, level, cell, stream)``, so the engines give the same
realization whatever the number of threads. Paths visit the nodes of one multiple-grid level in
a random order that depends only on ``(seed, level)``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _core
from . import _validate as v
from .grid import Grid

__all__ = ["conflict_free_batches", "random_path", "uniform_draws"]


def uniform_draws(seed: int, level: int, cells: Any, stream: int = 100) -> np.ndarray:
    """Uniform numbers in [0, 1), one per cell, from the counter-based generator.

    Parameters
    ----------
    seed : int
        Seed in ``[0, 2**63)``.
    level : int
        Multiple-grid level (part of the key).
    cells : array of int
        Flat cell indices (any non-negative int64).
    stream : int, default 100
        Purpose key, so different uses of one cell draw independent numbers. Streams below 100
        are used by the engines.

    Returns
    -------
    ndarray of float64, the shape of ``cells``.
    """
    s = v.seed(seed, owner="uniform_draws")
    lv = v.integer(level, "level", low=0, high=20, owner="uniform_draws")
    st = v.integer(stream, "stream", low=0, high=2**32 - 1, owner="uniform_draws")
    c = np.asarray(cells)
    if not np.issubdtype(c.dtype, np.integer):
        raise v.fail_type("cells", "an integer array of flat cell indices", c, "uniform_draws")
    if c.size and c.min() < 0:
        raise v.fail("cells", "non-negative cell indices", int(c.min()), "uniform_draws")
    return _core.uniform(s, lv, np.ascontiguousarray(c, dtype=np.int64).ravel(), st).reshape(c.shape)


def random_path(grid: Grid, level: int, seed: int, coarsest: int | None = None) -> np.ndarray:
    """The cells simulated at ``level`` (see `Grid.level_cells`) in a random order.

    The order sorts the cells by their draw on the path stream; it depends only on
    ``(seed, level)`` and the set of cells.
    """
    if not isinstance(grid, Grid):
        raise v.fail_type("grid", "a strataloom.Grid", grid, "random_path")
    lv = v.integer(level, "level", low=0, high=20, owner="random_path")
    top = lv if coarsest is None else v.integer(coarsest, "coarsest", low=lv, high=20, owner="random_path")
    return _core.random_path(grid._grid, lv, top, v.seed(seed, owner="random_path"))


def conflict_free_batches(grid: Grid, level: int, reach: Any, path: Any,
                          max_batch: int = 512) -> tuple[np.ndarray, np.ndarray]:
    """Split a path into batches whose nodes lie beyond ``reach`` of each other.

    A node goes to the batch after the last one holding an earlier path node within its reach,
    so running the batches in turn (the nodes of one batch in any order, e.g. on several threads)
    gives what visiting the path in order gives. Within a batch nodes keep their path order, and
    batches of more than ``max_batch`` nodes are cut into pieces. The result depends only on the
    inputs.

    Parameters
    ----------
    grid : Grid
    level : int
        Level of the path's nodes; ``reach`` is counted in level cells (``2**level`` cells).
    reach : sequence of 3 int
        Half-widths ``(rz, ry, rx)`` of the box a node reads.
    path : array of int
        Flat cell indices.
    max_batch : int, default 512
        Most nodes per batch.

    Returns
    -------
    order : ndarray of int64
        The path reordered batch after batch.
    starts : ndarray of int64
        Start of each batch in ``order``, followed by ``len(order)``.
    """
    if not isinstance(grid, Grid):
        raise v.fail_type("grid", "a strataloom.Grid", grid, "conflict_free_batches")
    lv = v.integer(level, "level", low=0, high=20, owner="conflict_free_batches")
    r = v.triple(reach, "reach", int, owner="conflict_free_batches")
    mb = v.integer(max_batch, "max_batch", low=1, owner="conflict_free_batches")
    p = np.asarray(path)
    if not np.issubdtype(p.dtype, np.integer):
        raise v.fail_type("path", "an integer array of flat cell indices", p, "conflict_free_batches")
    return _core.conflict_free_batches(grid._grid, lv, r, np.ascontiguousarray(p, dtype=np.int64).ravel(), mb)
