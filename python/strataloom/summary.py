"""Ensemble summaries computed streaming over the realizations, written to ``summary.zarr``.

Per cell
    categorical variables: probability of each category (share of realizations), most likely
    category (ties go to the lower code), entropy of the probabilities divided by ``log(K)`` so it
    lies in [0, 1] (0: all realizations agree; 1: all K categories equally likely).
    continuous variables: mean and variance (population variance over the realizations, ``ddof=0``)
    by Welford's update, and P10/P50/P90.
Per realization, with their P10/P50/P90 over the ensemble
    share of each category (for a binary sand/mud model the sand share is the net-to-gross);
    for each well and category, the volume of the bodies of that category the well touches;
    for each pair of wells, whether one body of the category joins them; averaged over the
    ensemble, the probability that the two wells are connected (the well-to-well matrix).

Quantiles are exact: the ``linear`` rule of :func:`numpy.quantile` (Hyndman & Fan's type 7),
``P10`` being the 10th percentile of the realizations at a cell (the value that 10 % of the
realizations fall below). To stay within ``memory_budget`` the grid is cut into slabs of z
layers (and, for very wide grids, rows of y) small enough that the values of every finished
realization for one slab fit the budget; each slab is read from every realization, sorted, and
interpolated. Memory is therefore independent of the number of realizations, at the price of
reading each stored chunk once per slab it overlaps: with the store chunked per realization,
a continuous variable is decompressed ``n_slabs`` times; a store chunked along z in step with the
slabs is read once. Categorical summaries and the per-realization quantities need no quantile
stack and read each realization once.
"""

from __future__ import annotations

import json
import math
import os
import shutil
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from . import _validate as v
from .connectivity import body_sizes, label_bodies, well_bodies, wells_from_hard_data
from .errors import MemoryLimitError
from .runread import SUMMARY_NAME, Run, cell_centres

__all__ = [
    "CategoricalSummary",
    "ContinuousSummary",
    "exact_quantiles",
    "normalised_entropy",
    "open_summary",
    "summarize",
]

QUANTILES = (0.1, 0.5, 0.9)
DEFAULT_BUDGET = 256 * 2**20
_BLOCK = 1 << 16


def normalised_entropy(probabilities: np.ndarray, axis: int = 0) -> np.ndarray:
    """Shannon entropy of probabilities along ``axis`` divided by ``log(K)`` (K = axis length).

    Zero probabilities contribute nothing (``0 log 0 = 0``). Returns zeros when ``K == 1``.
    """
    p = np.asarray(probabilities, dtype=np.float64)
    k = p.shape[axis]
    if k < 2:
        return np.zeros(np.delete(p.shape, axis))
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(p > 0, -p * np.log(np.where(p > 0, p, 1.0)), 0.0)
    return terms.sum(axis=axis) / math.log(k)


class CategoricalSummary:
    """Streaming counts of categories per cell.

    Parameters
    ----------
    codes : sequence of int
        The category codes, in the order of the output's category axis.
    shape : tuple of int
        Shape of one realization (or of a slab of it).
    """

    def __init__(self, codes: Sequence[int], shape: tuple[int, ...]) -> None:
        self.codes = np.asarray(codes, dtype=np.int64)
        if self.codes.size == 0:
            raise v.fail("codes", "a non-empty sequence of category codes", list(codes))
        self.shape = tuple(shape)
        self.n = 0
        self.counts = np.zeros((self.codes.size, *self.shape), dtype=np.uint32)
        self.valid = np.zeros(self.shape, dtype=np.uint32)

    def add(self, realization: np.ndarray) -> None:
        """Count one realization (values that are not a declared code are left out)."""
        r = np.asarray(realization)
        if r.shape != self.shape:
            raise v.fail("realization", f"an array of shape {self.shape}", f"shape {r.shape}")
        for k, c in enumerate(self.codes):
            hit = r == c
            self.counts[k] += hit
            self.valid += hit
        self.n += 1

    def probability(self, k: int) -> np.ndarray:
        """Probability of category ``k`` per cell (float32; NaN where no realization has a code)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return (self.counts[k] / self.valid).astype(np.float32)

    def most_likely(self) -> np.ndarray:
        """Code of the most frequent category per cell (int16; -1 where none; ties: lower code)."""
        best = self.counts[0].copy()
        arg = np.zeros(self.shape, dtype=np.int16)
        for k in range(1, self.codes.size):
            better = self.counts[k] > best
            arg[better] = k
            np.maximum(best, self.counts[k], out=best)
        out = self.codes[arg].astype(np.int16)
        out[self.valid == 0] = -1
        return out

    def entropy(self) -> np.ndarray:
        """Normalised entropy per cell (float32, NaN where no realization has a code)."""
        k = self.codes.size
        if k < 2:
            return np.where(self.valid > 0, 0.0, np.nan).astype(np.float32)
        h = np.zeros(self.shape, dtype=np.float64)
        for i in range(k):
            with np.errstate(divide="ignore", invalid="ignore"):
                p = self.counts[i] / self.valid
                h -= np.where(p > 0, p * np.log(np.where(p > 0, p, 1.0)), 0.0)
        h /= math.log(k)
        h[self.valid == 0] = np.nan
        return h.astype(np.float32)


class ContinuousSummary:
    """Streaming mean and variance per cell by Welford's update (NaN values are skipped).

    Welford (1962), "Note on a method for calculating corrected sums of squares and products",
    Technometrics 4(3): the running mean and sum of squared deviations are updated with each new
    value, which avoids the cancellation of the textbook ``E[x²] - E[x]²``. Updates run over blocks
    of cells so temporaries stay small.
    """

    def __init__(self, shape: tuple[int, ...]) -> None:
        self.shape = tuple(shape)
        size = int(np.prod(self.shape))
        self.count = np.zeros(size, dtype=np.uint32)
        self.mean = np.zeros(size, dtype=np.float64)
        self.m2 = np.zeros(size, dtype=np.float64)
        self.n = 0

    def add(self, realization: np.ndarray) -> None:
        """Fold one realization into the running mean and sum of squared deviations."""
        r = np.asarray(realization)
        if r.shape != self.shape:
            raise v.fail("realization", f"an array of shape {self.shape}", f"shape {r.shape}")
        flat = r.reshape(-1)
        for s in range(0, flat.size, _BLOCK):
            e = min(s + _BLOCK, flat.size)
            x = flat[s:e].astype(np.float64)
            ok = ~np.isnan(x)
            cnt = self.count[s:e]
            cnt += ok
            mean = self.mean[s:e]
            delta = np.where(ok, x - mean, 0.0)
            mean += delta / np.maximum(cnt, 1)
            self.m2[s:e] += np.where(ok, delta * (x - mean), 0.0)
        self.n += 1

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """Mean and population variance per cell (float64; NaN where no value)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = np.where(self.count > 0, self.mean, np.nan)
            var = np.where(self.count > 0, self.m2 / self.count, np.nan)
        return mean.reshape(self.shape), var.reshape(self.shape)


def exact_quantiles(stack: np.ndarray, quantiles: Sequence[float] = QUANTILES) -> np.ndarray:
    """Quantiles along axis 0 by sorting in place; NaN values are ignored.

    Equal to ``numpy.nanquantile(stack, quantiles, axis=0)`` with the default ``linear`` method;
    ``stack`` is sorted in place to avoid a copy.

    Returns
    -------
    (len(quantiles), *stack.shape[1:]) ndarray of float64
    """
    stack.sort(axis=0)  # NaNs sort last
    n_valid = (
        (~np.isnan(stack)).sum(axis=0)
        if np.issubdtype(stack.dtype, np.floating)
        else np.full(stack.shape[1:], stack.shape[0])
    )
    out = np.empty((len(quantiles), *stack.shape[1:]), dtype=np.float64)
    has = n_valid > 0
    last = np.maximum(n_valid - 1, 0)
    for i, q in enumerate(quantiles):
        pos = q * last
        lo = np.floor(pos).astype(np.int64)
        hi = np.minimum(lo + 1, last)
        frac = pos - lo
        a = np.take_along_axis(stack, lo[None], axis=0)[0].astype(np.float64)
        b = np.take_along_axis(stack, hi[None], axis=0)[0].astype(np.float64)
        out[i] = np.where(has, a + (b - a) * frac, np.nan)
    return out


def _slab_plan(
    shape: tuple[int, int, int], n: int, itemsize: int, budget: int, chunk_depth: int
) -> list[tuple[slice, slice]]:
    """Cut the grid into (z, y) slabs whose values for n realizations fit the budget."""
    nz, ny, nx = shape
    layer = n * ny * nx * itemsize
    if layer <= budget:
        depth = max(1, budget // layer)
        if chunk_depth < nz and depth >= chunk_depth:  # keep slabs in step with stored chunks
            depth = depth // chunk_depth * chunk_depth
        depth = min(depth, nz)
        return [(slice(z, min(z + depth, nz)), slice(0, ny)) for z in range(0, nz, depth)]
    row = n * nx * itemsize
    if row > budget:
        raise MemoryLimitError(
            f"The parameter 'memory_budget' must be at least {row} bytes to hold one row of x for "
            f"{n} realizations; got {budget}. Raise memory_budget or drop the quantiles."
        )
    rows = max(1, budget // row)
    return [
        (slice(z, z + 1), slice(y, min(y + rows, ny)))
        for z in range(nz)
        for y in range(0, ny, rows)
    ]


def _validate_wells(wells: Any, shape: tuple[int, int, int]) -> dict[str, np.ndarray]:
    if wells is None:
        return {}
    if not isinstance(wells, Mapping):
        raise v.fail_type(
            "wells", "a mapping of well name to an (m, 3) array of cells", wells, "summarize"
        )
    out = {}
    for name, cells in wells.items():
        c = np.asarray(cells)
        if (
            c.ndim != 2
            or c.shape[1] != 3
            or c.shape[0] == 0
            or not np.issubdtype(c.dtype, np.integer)
        ):
            raise v.fail(
                f"wells['{name}']",
                "a non-empty (m, 3) integer array of (iz, iy, ix) cells",
                f"an array of shape {c.shape} and dtype {c.dtype}",
                "summarize",
            )
        if (c < 0).any() or (c >= np.array(shape)).any():
            raise v.fail(
                f"wells['{name}']",
                f"cells inside the grid {shape}",
                "cells outside it",
                "summarize",
            )
        out[str(name)] = c.astype(np.int64)
    return out


def _pct(values: np.ndarray, axis: int = 0) -> dict[str, Any]:
    q = np.quantile(np.asarray(values, dtype=np.float64), QUANTILES, axis=axis)
    return {
        "P10": q[0].tolist(),
        "P50": q[1].tolist(),
        "P90": q[2].tolist(),
        "mean": np.mean(values, axis=axis).tolist(),
    }


def summarize(
    run: Run | str | os.PathLike,
    *,
    output: Any = None,
    variables: Sequence[str] | None = None,
    wells: Mapping[str, Any] | None = None,
    connectivity: int = 6,
    memory_budget: int = DEFAULT_BUDGET,
    quantiles: bool = True,
    progress: Any = None,
) -> Path:
    """Summarise a run's realizations into ``summary.zarr``.

    Parameters
    ----------
    run : Run or path
        The run folder (or an opened :class:`~strataloom.runread.Run`).
    output : path, optional
        Where to write the summary store (default ``RUN_DIR/summary.zarr``). It is written under a
        temporary name in the same folder and renamed when complete, so a reader never sees a
        half-written summary.
    variables : sequence of str, optional
        Variables to summarise (default all).
    wells : mapping of str to (m, 3) int arrays, optional
        Cells of each well for the connected volumes and the well-to-well matrix. Default: the
        hard-data cells grouped into 26-connected chains (see
        :func:`~strataloom.connectivity.wells_from_hard_data`); no wells if the run has no hard
        data.
    connectivity : {6, 26}
        Neighbourhood of the facies bodies (6: shared faces).
    memory_budget : int, default 256 MiB
        Bytes allowed for the values of all finished realizations over one slab of cells (the
        quantile stack). Peak memory is about this budget plus one realization plus the outputs
        of one slab.
    quantiles : bool, default True
        Compute P10/P50/P90 of continuous variables.
    progress : callable, optional
        Called as ``progress(done, total)`` after each realization or slab.

    Returns
    -------
    pathlib.Path
        The summary store.
    """
    import zarr

    r = run if isinstance(run, Run) else Run(run)
    budget = v.integer(memory_budget, "memory_budget", low=1, owner="summarize")
    v.callback(progress, "progress", owner="summarize")
    names = list(r.variables) if variables is None else list(variables)
    for name in names:
        r.kind(name)
    if r.completed.size == 0:
        raise v.fail(
            "run",
            "a run with at least one finished realization (done == 1)",
            f"{r.size} realizations, none done",
            "summarize",
        )
    shape = r.grid.shape
    if wells is None:
        hd = r.hard_data()
        well_cells = wells_from_hard_data(hd["cells"], shape) if hd is not None else {}
    else:
        well_cells = _validate_wells(wells, shape)
    from .connectivity import structure

    structure(connectivity)  # validates

    out = Path(output) if output is not None else r.path / SUMMARY_NAME
    tmp = out.with_name(out.name + f".tmp-{os.getpid()}")
    if tmp.exists():
        shutil.rmtree(tmp)
    group = zarr.open_group(tmp, mode="w", zarr_format=3)
    zc, yc, xc = cell_centres(r.grid)
    _coord(group, "z", zc)
    _coord(group, "y", yc)
    _coord(group, "x", xc)
    _coord(group, "realization", r.completed.astype(np.int64))
    if well_cells:
        _coord(group, "well", np.arange(len(well_cells), dtype=np.int64))
    cell_volume = float(np.prod(r.grid.spacing))
    tables: dict[str, Any] = {}
    var_meta: dict[str, Any] = {}
    n = int(r.completed.size)
    try:
        for name in names:
            if r.kind(name) == "categorical":
                cats = r.categories(name)
                codes = [c["code"] for c in cats]
                _coord(group, f"{name}_category", np.asarray(codes, dtype=np.int64))
                tables[name] = _categorical(
                    r, name, codes, group, well_cells, connectivity, cell_volume, progress
                )
                var_meta[name] = {"kind": "categorical", "categories": cats}
            else:
                _continuous(r, name, group, budget, quantiles, progress)
                var_meta[name] = {
                    "kind": "continuous",
                    **{k: val for k, val in r.variables[name].items() if k != "kind"},
                }
        group.attrs["strataloom"] = {
            "format": "summary",
            "format_version": 1,
            "realizations": n,
            "realizations_total": r.size,
            "grid": r.meta.get("grid"),
            "variables": var_meta,
            "connectivity": connectivity,
            "quantiles": list(QUANTILES),
            "quantile_method": "exact, numpy 'linear' (Hyndman & Fan type 7), per slab",
            "variance": "population (ddof=0) by Welford's update",
            "wells": {k: c.tolist() for k, c in well_cells.items()},
            "cell_volume": cell_volume,
            "tables": tables,
            "source_version": r.meta.get("version"),
            "seeds": r.meta.get("seeds"),
        }
        _replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


def _coord(group: Any, name: str, values: np.ndarray) -> None:
    a = group.create_array(name, shape=values.shape, dtype=values.dtype, dimension_names=(name,))
    a[...] = values


def _grid_array(
    group: Any,
    name: str,
    dtype: Any,
    fill: Any,
    shape: tuple[int, int, int],
    lead: tuple[tuple[str, int], ...] = (),
) -> Any:
    dims = (*(d for d, _ in lead), "z", "y", "x")
    full = tuple(s for _, s in lead) + shape
    chunks = tuple(1 for _ in lead) + shape
    return group.create_array(
        name, shape=full, chunks=chunks, dtype=dtype, fill_value=fill, dimension_names=dims
    )


def _categorical(
    r: Run,
    name: str,
    codes: list[int],
    group: Any,
    wells: dict[str, np.ndarray],
    connectivity: int,
    cell_volume: float,
    progress: Any,
) -> dict[str, Any]:
    shape = r.grid.shape
    n = int(r.completed.size)
    k = len(codes)
    acc = CategoricalSummary(codes, shape)
    proportions = np.zeros((n, k))
    w = len(wells)
    volume = np.zeros((n, w, k))
    connected = np.zeros((w, w, k))
    for j, (_, real) in enumerate(r.iter_realizations(name)):
        acc.add(real)
        valid = max(int(np.isin(real, codes).sum()), 1)
        for c_i, c in enumerate(codes):
            mask = real == c
            proportions[j, c_i] = np.count_nonzero(mask) / valid
            if w:
                labels, nb = label_bodies(mask, connectivity)
                vol, con = well_bodies(labels, body_sizes(labels, nb), wells)
                volume[j, :, c_i] = vol * cell_volume
                connected[:, :, c_i] += con
        if progress is not None:
            progress(j + 1, n)
    prob = _grid_array(
        group, f"{name}_probability", "float32", np.nan, shape, ((f"{name}_category", k),)
    )
    for i in range(k):
        prob[i] = acc.probability(i)
    _grid_array(group, f"{name}_most_likely", "int16", -1, shape)[...] = acc.most_likely()
    _grid_array(group, f"{name}_entropy", "float32", np.nan, shape)[...] = acc.entropy()
    a = group.create_array(
        f"{name}_proportion",
        shape=(n, k),
        dtype="float64",
        dimension_names=("realization", f"{name}_category"),
    )
    a[...] = proportions
    table: dict[str, Any] = {"codes": codes, "proportion": _pct(proportions)}
    if w:
        a = group.create_array(
            f"{name}_well_volume",
            shape=(n, w, k),
            dtype="float64",
            dimension_names=("realization", "well", f"{name}_category"),
        )
        a[...] = volume
        p = connected / n
        a = group.create_array(
            f"{name}_well_connection",
            shape=(w, w, k),
            dtype="float64",
            dimension_names=("well", "well_to", f"{name}_category"),
        )
        a[...] = p
        table["wells"] = list(wells)
        table["well_volume"] = _pct(volume)
        table["well_connection"] = p.tolist()
    return table


def _continuous(r: Run, name: str, group: Any, budget: int, quantiles: bool, progress: Any) -> None:
    shape = r.grid.shape
    n = int(r.completed.size)
    itemsize = np.dtype(r.array(name).dtype).itemsize
    mean_a = _grid_array(group, f"{name}_mean", "float32", np.nan, shape)
    var_a = _grid_array(group, f"{name}_variance", "float32", np.nan, shape)
    if not quantiles:
        acc = ContinuousSummary(shape)
        for j, (_, real) in enumerate(r.iter_realizations(name)):
            acc.add(real)
            if progress is not None:
                progress(j + 1, n)
        mean, var = acc.result()
        mean_a[...] = mean.astype(np.float32)
        var_a[...] = var.astype(np.float32)
        return
    q_a = [
        _grid_array(group, f"{name}_p{round(q * 100):02d}", "float32", np.nan, shape)
        for q in QUANTILES
    ]
    plan = _slab_plan(shape, n, itemsize, budget, r.chunk_depth(name))
    for s, (zs, ys) in enumerate(plan):
        stack = r.slab(name, zs, ys)
        acc = ContinuousSummary(stack.shape[1:])
        for j in range(n):
            acc.add(stack[j])
        mean, var = acc.result()
        mean_a[zs, ys, :] = mean.astype(np.float32)
        var_a[zs, ys, :] = var.astype(np.float32)
        del mean, var, acc
        qs = exact_quantiles(stack.astype(np.float32, copy=False))
        for i, arr in enumerate(q_a):
            arr[zs, ys, :] = qs[i].astype(np.float32)
        del stack, qs
        if progress is not None:
            progress(s + 1, len(plan))


def _replace(tmp: Path, out: Path) -> None:
    """Put a finished store in place: rename, keeping the old one until the new one is there."""
    old = out.with_name(out.name + f".old-{os.getpid()}")
    if out.exists():
        os.replace(out, old)
    os.replace(tmp, out)
    if old.exists():
        shutil.rmtree(old, ignore_errors=True)


def open_summary(path: Any) -> Any:
    """Open a summary store (or a run folder holding ``summary.zarr``) as an xarray Dataset.

    The per-realization tables and the P10/P50/P90 values are in ``attrs['strataloom']`` (JSON).
    """
    import xarray as xr

    p = Path(path)
    if p.is_dir() and not (p / "zarr.json").exists() and (p / SUMMARY_NAME).is_dir():
        p = p / SUMMARY_NAME
    if not (p / "zarr.json").exists():
        raise v.fail(
            "path",
            "a summary.zarr store or a run folder holding one; run "
            "'strataloom summarize DIR' first",
            str(path),
            "open_summary",
        )
    ds = xr.open_dataset(p, engine="zarr", consolidated=False, chunks=None)
    meta = ds.attrs.get("strataloom")
    if isinstance(meta, dict):
        ds.attrs["strataloom"] = json.dumps(meta)
    return ds
