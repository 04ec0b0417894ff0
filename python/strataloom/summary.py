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
realization for one slab fit the budget. Each realization is read once and cut into its slabs,
which are appended to a scratch file beside the summary, laid out slab after slab; then each
slab's stack (all realizations) is read back in one contiguous piece, folded into Welford's
mean and variance, sorted and interpolated. Memory is therefore independent of the number of
realizations; the scratch file takes ``n × cells`` values of disk for the duration of the
summary. When the whole ensemble fits the budget, there is one slab and no scratch file.
Categorical summaries and the per-realization quantities need no stack: counts are kept per
cell (16-bit up to 65,535 realizations) and each realization is read once.
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
from .runread import SUMMARY_NAME, Run, cell_centres, temporary_path

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
    max_count : int, default 65535
        Largest number of realizations to be added; counters are 16-bit up to 65535, else 32-bit.

    Notes
    -----
    The results are computed for a block of the first axis (``block``, default all), so a
    caller can write them slab by slab without full-size floating-point temporaries.
    """

    def __init__(
        self, codes: Sequence[int], shape: tuple[int, ...], max_count: int = 65535
    ) -> None:
        self.codes = np.asarray(codes, dtype=np.int64)
        if self.codes.size == 0:
            raise v.fail("codes", "a non-empty sequence of category codes", list(codes))
        self.shape = tuple(shape)
        self.n = 0
        self.max_count = int(max_count)
        dtype = np.uint16 if self.max_count <= np.iinfo(np.uint16).max else np.uint32
        self.counts = np.zeros((self.codes.size, *self.shape), dtype=dtype)

    @property
    def valid(self) -> np.ndarray:
        """Number of realizations holding one of the codes, per cell (the sum of the counts)."""
        return self._valid(slice(None))

    def _valid(self, block: slice) -> np.ndarray:
        return self.counts[(slice(None), block)].sum(axis=0, dtype=np.int64)

    def add(self, realization: np.ndarray) -> np.ndarray:
        """Count one realization; returns the number of its cells holding each code.

        Values that are not a declared code are left out.
        """
        r = np.asarray(realization)
        if r.shape != self.shape:
            raise v.fail("realization", f"an array of shape {self.shape}", f"shape {r.shape}")
        if self.n >= self.max_count:
            raise v.fail(
                "max_count",
                f"at least {self.n + 1} for this many realizations",
                self.max_count,
                "CategoricalSummary",
            )
        seen = np.zeros(self.codes.size, dtype=np.int64)
        for k, c in enumerate(self.codes):
            hit = r == c
            self.counts[k] += hit
            seen[k] = np.count_nonzero(hit)
        self.n += 1
        return seen

    def probability(self, k: int, block: slice = slice(None)) -> np.ndarray:
        """Probability of category ``k`` per cell (float32; NaN where no realization has a code)."""
        valid = self._valid(block)
        out = np.full(valid.shape, np.nan, dtype=np.float32)
        np.divide(self.counts[k][block], valid, out=out, where=valid > 0, dtype=np.float32)
        return out

    def most_likely(self, block: slice = slice(None)) -> np.ndarray:
        """Code of the most frequent category per cell (int16; -1 where none; ties: lower code)."""
        best = self.counts[0][block].copy()
        arg = np.zeros(best.shape, dtype=np.int16)
        for k in range(1, self.codes.size):
            ck = self.counts[k][block]
            arg[ck > best] = k
            np.maximum(best, ck, out=best)
        out = self.codes[arg].astype(np.int16)
        out[self._valid(block) == 0] = -1
        return out

    def entropy(self, block: slice = slice(None)) -> np.ndarray:
        """Normalised entropy per cell (float32, NaN where no realization has a code)."""
        k = self.codes.size
        valid = self._valid(block)
        if k < 2:
            return np.where(valid > 0, 0.0, np.nan).astype(np.float32)
        h = np.zeros(valid.shape, dtype=np.float64)
        for i in range(k):
            p = np.zeros(valid.shape, dtype=np.float64)
            np.divide(self.counts[i][block], valid, out=p, where=valid > 0)
            lp = np.zeros_like(p)
            np.log(p, out=lp, where=p > 0)
            h -= p * lp
        h /= math.log(k)
        h[valid == 0] = np.nan
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
    tmp = temporary_path(out)
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
                _continuous(r, name, group, budget, quantiles, progress, tmp)
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
    _put(group, name, values, (name,))


def _put(group: Any, name: str, values: Any, dims: tuple[str, ...]) -> None:
    """Store a whole (small) array under ``name`` with its dimension names."""
    values = np.asarray(values)
    a = group.create_array(name, shape=values.shape, dtype=values.dtype, dimension_names=dims)
    a[...] = values


def _grid_array(
    group: Any,
    name: str,
    dtype: Any,
    fill: Any,
    shape: tuple[int, int, int],
    lead: tuple[tuple[str, int], ...] = (),
    depth: int | None = None,
) -> Any:
    dims = (*(d for d, _ in lead), "z", "y", "x")
    full = tuple(s for _, s in lead) + shape
    cz = shape[0] if depth is None else max(1, min(depth, shape[0]))
    chunks = (*(1 for _ in lead), cz, shape[1], shape[2])
    return group.create_array(
        name, shape=full, chunks=chunks, dtype=dtype, fill_value=fill, dimension_names=dims
    )


def _block_depth(shape: tuple[int, int, int], cells: int = 1 << 18) -> int:
    """Number of z layers holding at most ``cells`` cells (at least one)."""
    return max(1, min(shape[0], cells // (shape[1] * shape[2])))


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
    acc = CategoricalSummary(codes, shape, max_count=n)
    proportions = np.zeros((n, k))
    w = len(wells)
    volume = np.zeros((n, w, k))
    connected = np.zeros((w, w, k))
    for j, (_, real) in enumerate(r.iter_realizations(name)):
        seen = acc.add(real)
        proportions[j] = seen / max(int(seen.sum()), 1)
        if w:
            for c_i, c in enumerate(codes):
                labels, nb = label_bodies(real == c, connectivity)
                vol, con = well_bodies(labels, body_sizes(labels, nb), wells)
                volume[j, :, c_i] = vol * cell_volume
                connected[:, :, c_i] += con
                del labels
        del real
        if progress is not None:
            progress(j + 1, n)
    depth = _block_depth(shape)
    prob = _grid_array(
        group,
        f"{name}_probability",
        "float32",
        np.nan,
        shape,
        ((f"{name}_category", k),),
        depth=depth,
    )
    most = _grid_array(group, f"{name}_most_likely", "int16", -1, shape, depth=depth)
    ent = _grid_array(group, f"{name}_entropy", "float32", np.nan, shape, depth=depth)
    for z in range(0, shape[0], depth):
        b = slice(z, min(z + depth, shape[0]))
        for i in range(k):
            prob[i, b] = acc.probability(i, b)
        most[b] = acc.most_likely(b)
        ent[b] = acc.entropy(b)
    del acc
    cat = f"{name}_category"
    _put(group, f"{name}_proportion", proportions, ("realization", cat))
    table: dict[str, Any] = {"codes": codes, "proportion": _pct(proportions)}
    if w:
        _put(group, f"{name}_well_volume", volume, ("realization", "well", cat))
        p = connected / n
        _put(group, f"{name}_well_connection", p, ("well", "well_to", cat))
        table["wells"] = list(wells)
        table["well_volume"] = _pct(volume)
        table["well_connection"] = p.tolist()
    return table


def _continuous(
    r: Run, name: str, group: Any, budget: int, quantiles: bool, progress: Any, scratch: Path
) -> None:
    """Mean, variance and quantiles of a continuous variable, slab by slab.

    With more than one slab, each realization is read once and its slabs are appended to a
    scratch file laid out slab after slab (``n`` realizations per slab, contiguous), so every slab's
    stack is then one contiguous read; the scratch file holds ``n * cells`` values on disk.
    """
    shape = r.grid.shape
    n = int(r.completed.size)
    dtype = np.dtype(r.array(name).dtype)
    plan = _slab_plan(shape, n, dtype.itemsize, budget, r.chunk_depth(name))
    layers = plan[0][0].stop - plan[0][0].start
    depth = layers if plan[0][1] == slice(0, shape[1]) else 1
    mean_a = _grid_array(group, f"{name}_mean", "float32", np.nan, shape, depth=depth)
    var_a = _grid_array(group, f"{name}_variance", "float32", np.nan, shape, depth=depth)
    q_a = (
        [
            _grid_array(
                group, f"{name}_p{round(q * 100):02d}", "float32", np.nan, shape, depth=depth
            )
            for q in QUANTILES
        ]
        if quantiles
        else []
    )
    sizes = [(zs.stop - zs.start) * (ys.stop - ys.start) * shape[2] for zs, ys in plan]
    offsets = np.concatenate([[0], np.cumsum(sizes)]) * n * dtype.itemsize
    spill = None
    try:
        if len(plan) > 1:
            spill = scratch.with_name(scratch.name + f".{name}.stack")
            with open(spill, "wb") as fh:
                fh.truncate(int(offsets[-1]))
                for j, (_, real) in enumerate(r.iter_realizations(name)):
                    for s, (zs, ys) in enumerate(plan):
                        fh.seek(int(offsets[s] + j * sizes[s] * dtype.itemsize))
                        fh.write(np.ascontiguousarray(real[zs, ys, :]).tobytes())
                    del real
                    if progress is not None:
                        progress(j + 1, n + len(plan))
        for s, (zs, ys) in enumerate(plan):
            dz, dy = zs.stop - zs.start, ys.stop - ys.start
            if spill is None:
                stack = r.slab(name, zs, ys)
            else:
                stack = np.fromfile(
                    spill, dtype=dtype, count=n * sizes[s], offset=int(offsets[s])
                ).reshape(n, dz, dy, shape[2])
            acc = ContinuousSummary(stack.shape[1:])
            for j in range(n):
                acc.add(stack[j])
            mean, var = acc.result()
            mean_a[zs, ys, :] = mean.astype(np.float32)
            var_a[zs, ys, :] = var.astype(np.float32)
            del mean, var, acc
            if quantiles:
                qs = exact_quantiles(stack)
                for i, arr in enumerate(q_a):
                    arr[zs, ys, :] = qs[i].astype(np.float32)
                del qs
            del stack
            if progress is not None:
                progress(
                    n + s + 1 if spill is not None else s + 1,
                    n + len(plan) if spill is not None else len(plan),
                )
    finally:
        if spill is not None:
            spill.unlink(missing_ok=True)


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
