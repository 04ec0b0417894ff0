"""Connected bodies of a facies: labels, volumes, wells touching bodies, connectivity functions.

Bodies are the connected components of the cells of one facies, found by
:func:`scipy.ndimage.label`. Two cells are neighbours when they share a face (``connectivity=6``,
the default) or a face, an edge or a corner (``connectivity=26``).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from . import _validate as v

__all__ = [
    "body_sizes",
    "connectivity_function",
    "label_bodies",
    "structure",
    "well_bodies",
    "wells_from_hard_data",
]


def structure(connectivity: int = 6, *, owner: str | None = None) -> np.ndarray:
    """The 3×3×3 neighbourhood of 6- or 26-connectivity for :func:`scipy.ndimage.label`.

    Parameters
    ----------
    connectivity : {6, 26}
        Neighbourhood, see the module notes.
    owner : str, optional
        Function named in the error message for a bad ``connectivity``.

    Returns
    -------
    (3, 3, 3) ndarray of bool
    """
    from scipy import ndimage

    if isinstance(connectivity, bool) or connectivity not in (6, 26):
        raise v.fail(
            "connectivity", "6 (faces) or 26 (faces, edges and corners)", connectivity, owner
        )
    return ndimage.generate_binary_structure(3, 1 if connectivity == 6 else 3)


def label_bodies(
    mask: Any, connectivity: int = 6, *, owner: str | None = None
) -> tuple[np.ndarray, int]:
    """Label the connected bodies of a boolean mask.

    Parameters
    ----------
    mask : (nz, ny, nx) or (ny, nx) array of bool
        Cells of the facies.
    connectivity : {6, 26}
        Neighbourhood, see the module notes.
    owner : str, optional
        Function named in error messages (default: none).

    Returns
    -------
    labels : (nz, ny, nx) ndarray of int32
        0 outside the mask, bodies numbered 1..n.
    n : int
        Number of bodies.
    """
    from scipy import ndimage

    m = v.as_volume(mask, "mask", owner=owner)
    labels, n = ndimage.label(
        m.astype(bool, copy=False), structure=structure(connectivity, owner=owner)
    )
    return labels.astype(np.int32, copy=False), int(n)


def body_sizes(labels: np.ndarray, n: int) -> np.ndarray:
    """Number of cells of each body.

    Parameters
    ----------
    labels : ndarray of int
        Body labels from :func:`label_bodies` (0 = not the facies).
    n : int
        Number of bodies.

    Returns
    -------
    (n + 1,) ndarray of int64
        Entry ``i`` counts the cells of body ``i``; entry 0 the background.
    """
    return np.bincount(labels.ravel(), minlength=n + 1).astype(np.int64)


def well_bodies(
    labels: np.ndarray, sizes: np.ndarray, wells: Mapping[str, np.ndarray]
) -> tuple[np.ndarray, np.ndarray]:
    """Volumes of the bodies touched by each well, and which wells share a body.

    Parameters
    ----------
    labels : (nz, ny, nx) ndarray of int
        Body labels from :func:`label_bodies`.
    sizes : (n + 1,) ndarray
        Body sizes from :func:`body_sizes`.
    wells : mapping of str to (m, 3) int arrays
        Cells ``(iz, iy, ix)`` along each well.

    Returns
    -------
    cells : (n_wells,) ndarray of int64
        Number of cells in the union of the bodies that each well touches (0 if none).
    connected : (n_wells, n_wells) ndarray of bool
        ``connected[a, b]`` is True when wells a and b touch one common body; the diagonal says
        whether a well touches the facies at all.
    """
    touched = []
    for cells in wells.values():
        c = np.asarray(cells, dtype=np.int64).reshape(-1, 3)
        labs = np.unique(labels[c[:, 0], c[:, 1], c[:, 2]])
        touched.append(labs[labs > 0])
    w = len(touched)
    volume = np.array([int(sizes[t].sum()) for t in touched], dtype=np.int64)
    connected = np.zeros((w, w), dtype=bool)
    for a in range(w):
        for b in range(a, w):
            both = np.intersect1d(touched[a], touched[b], assume_unique=True).size > 0
            connected[a, b] = connected[b, a] = both
    return volume, connected


def connectivity_function(labels: np.ndarray, max_lag: int, axis: int) -> np.ndarray:
    """Probability that two facies cells a lag apart along an axis lie in one body.

    ``tau(h) = P(x and x + h in one body | x and x + h both in the facies)`` for
    ``h = 1 .. max_lag`` cells along ``axis`` (0 = z, 1 = y, 2 = x); NaN where no pair exists.

    Parameters
    ----------
    labels : (nz, ny, nx) ndarray of int
        Body labels from :func:`label_bodies` (0 = not the facies).
    max_lag : int
        Largest lag in cells.
    axis : int
        Axis of the lag.

    Returns
    -------
    (max_lag,) ndarray of float64
        ``tau(h)`` at ``h = 1 .. max_lag``.
    """
    o = "connectivity_function"
    lab = v.as_volume(labels, "labels", owner=o)
    ax = v.integer(axis, "axis", low=0, high=2, owner=o)
    lags = v.integer(max_lag, "max_lag", low=1, owner=o)
    lab = np.moveaxis(lab, ax, 0)
    n = lab.shape[0]
    out = np.full(lags, np.nan)
    for h in range(1, min(lags, n - 1) + 1):
        a, b = lab[:-h], lab[h:]
        both = (a > 0) & (b > 0)
        pairs = int(np.count_nonzero(both))
        if pairs:
            out[h - 1] = np.count_nonzero(both & (a == b)) / pairs
    return out


def wells_from_hard_data(cells: Any, shape: tuple[int, int, int]) -> dict[str, np.ndarray]:
    """Group hard-data cells into wells: chains of cells connected by faces, edges or corners.

    An upscaled vertical or deviated well is a 26-connected chain of cells, so each 26-connected
    group of hard-data cells is taken as one well, named ``W1, W2, ...`` in the order of their
    first cell (C order). Wells that touch each other merge into one group.
    """
    c = np.asarray(cells, dtype=np.int64).reshape(-1, 3)
    if c.size == 0:
        return {}
    mask = np.zeros(shape, dtype=bool)
    mask[c[:, 0], c[:, 1], c[:, 2]] = True
    labels, n = label_bodies(mask, 26, owner="wells_from_hard_data")
    lab_of = labels[c[:, 0], c[:, 1], c[:, 2]]
    flat = np.ravel_multi_index(c.T, shape)
    order = []
    for k in range(1, n + 1):
        order.append((int(flat[lab_of == k].min()), k))
    wells = {}
    for i, (_, k) in enumerate(sorted(order)):
        sel = np.unique(flat[lab_of == k])
        wells[f"W{i + 1}"] = np.stack(np.unravel_index(sel, shape), axis=1).astype(np.int64)
    return wells
