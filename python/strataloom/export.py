"""Exports of a run: VTK ImageData (.vti) for ParaView, NumPy ``.npy`` files and CSV tables.

The ``.vti`` files are written and read by :mod:`strataloom.vti` (VTK XML ImageData, cell data in
one appended raw block, 64-bit size headers); :func:`write_vti` and :func:`read_vti` here take and
give a :class:`~strataloom.grid.Grid`.
"""

from __future__ import annotations

import csv
import json
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from . import _validate as v
from . import vti
from .grid import Grid
from .runread import SUMMARY_NAME, Run

__all__ = ["FORMATS", "export_run", "read_vti", "write_vti"]

FORMATS = ("vti", "npy", "csv")

def write_vti(path: Any, arrays: Mapping[str, np.ndarray], grid: Grid) -> Path:
    """Write cell arrays on a regular grid as a VTK XML ImageData file.

    Parameters
    ----------
    path : path
        The ``.vti`` file (written under a temporary name, then renamed).
    arrays : mapping of str to (nz, ny, nx) arrays
        Cell data; bool arrays are written as UInt8.
    grid : Grid
        Shape, spacing and origin. VTK's point extent is ``0..n`` along each axis.

    Returns
    -------
    pathlib.Path
        The file written.

    See Also
    --------
    strataloom.vti.write_vti : the writer, with ``spacing`` and ``origin`` keywords.
    """
    for name, a in arrays.items():
        shape = np.shape(a)
        if shape != grid.shape:
            raise v.fail(
                f"arrays[{name!r}]",
                f"an array of the grid's shape {grid.shape}",
                f"shape {shape}",
                "write_vti",
            )
    return vti.write_vti(path, arrays, spacing=grid.spacing, origin=grid.origin)


def read_vti(path: Any) -> tuple[dict[str, np.ndarray], Grid]:
    """Read a ``.vti`` file written by :func:`write_vti` (appended raw cell data).

    Parameters
    ----------
    path : path
        The ``.vti`` file.

    Returns
    -------
    arrays : dict of str to (nz, ny, nx) ndarray
        The cell arrays.
    grid : Grid
        Shape, spacing and origin of the file.
    """
    arrays, shape, spacing, origin = vti.read_image(path)
    return arrays, Grid(shape, spacing, origin)


def _pick(r: Run, realizations: Any) -> list[int]:
    if realizations is None:
        return [int(r.completed[0])] if r.completed.size else []
    if isinstance(realizations, str):
        if realizations == "all":
            return [int(i) for i in r.completed]
        try:
            realizations = [int(x) for x in realizations.split(",") if x.strip()]
        except ValueError as exc:
            raise v.fail(
                "realizations",
                "'all' or a comma-separated list of indices such as 0,3,5",
                realizations,
                "export_run",
            ) from exc
    picks = [
        v.integer(i, "realizations", low=0, high=r.size - 1, owner="export_run")
        for i in realizations
    ]
    missing = [i for i in picks if not r.done[i]]
    if missing:
        raise v.fail("realizations", "indices of finished realizations", missing, "export_run")
    return picks


def _summary_arrays(r: Run) -> dict[str, np.ndarray]:
    from .summary import open_summary

    if not (r.path / SUMMARY_NAME).is_dir():
        return {}
    ds = open_summary(r.path)
    meta = json.loads(ds.attrs["strataloom"])
    out: dict[str, np.ndarray] = {}
    for name, da in ds.data_vars.items():
        dims = da.dims
        if dims[-3:] != ("z", "y", "x"):
            continue
        if len(dims) == 3:
            out[str(name)] = da.values
        else:
            var = str(name).rsplit("_probability", 1)[0]
            cats = meta["variables"].get(var, {}).get("categories", [])
            for k in range(da.shape[0]):
                label = cats[k]["name"] if k < len(cats) else str(k)
                out[f"{var}_p_{_safe(label)}"] = da.values[k]
    return out


def export_run(
    run: Any, fmt: str, *, out: Any = None, realizations: Any = None, summary: bool = True
) -> list[Path]:
    """Export realizations, summaries or tables of a run.

    Parameters
    ----------
    run : Run or path
        The run folder.
    fmt : {'vti', 'npy', 'csv'}
        ``vti``: one ImageData file per realization (all variables) and ``summary.vti``;
        ``npy``: one array per variable and realization, and one per summary field;
        ``csv``: ``realizations.csv`` (one row per realization: seed, category shares, connected
        volumes per well), ``percentiles.csv`` (P10/P50/P90 of those) and one
        ``well_connection_<variable>_<category>.csv`` matrix per category.
    out : path, optional
        Folder for the files (default ``RUN_DIR/export``).
    realizations : 'all', str or sequence of int, optional
        Realizations for vti/npy (default: the first finished one).
    summary : bool
        Also export the summary fields (vti/npy), when ``summary.zarr`` exists.

    Returns
    -------
    list of pathlib.Path
        The files written.
    """
    r = run if isinstance(run, Run) else Run(run)
    if fmt not in FORMATS:
        raise v.fail("format", f"one of {', '.join(FORMATS)}", fmt, "export_run")
    folder = Path(out) if out is not None else r.path / "export"
    folder.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    if fmt in ("vti", "npy"):
        for i in _pick(r, realizations):
            arrays = {name: r.realization(i, name) for name in r.variables}
            if fmt == "vti":
                written.append(write_vti(folder / f"realization_{i:04d}.vti", arrays, r.grid))
            else:
                for name, a in arrays.items():
                    f = folder / f"{_safe(name)}_{i:04d}.npy"
                    np.save(f, a)
                    written.append(f)
        if summary:
            fields = _summary_arrays(r)
            if fields and fmt == "vti":
                written.append(write_vti(folder / "summary.vti", fields, r.grid))
            elif fields:
                for name, a in fields.items():
                    f = folder / f"summary_{_safe(name)}.npy"
                    np.save(f, a)
                    written.append(f)
        return written
    written += _export_csv(r, folder)
    return written


def _export_csv(r: Run, folder: Path) -> list[Path]:
    from .summary import open_summary

    if not (r.path / SUMMARY_NAME).is_dir():
        raise v.fail(
            "run",
            "a run folder with summary.zarr for CSV tables; run 'strataloom summarize DIR' first",
            str(r.path),
            "export_run",
        )
    ds = open_summary(r.path)
    meta = json.loads(ds.attrs["strataloom"])
    seeds = r.meta.get("seeds") or []
    idx = ds["realization"].values
    header: list[str] = ["realization", "seed"]
    cols: list[np.ndarray] = [
        idx,
        np.array([seeds[i] if i < len(seeds) else "" for i in idx], dtype=object),
    ]
    pct_rows: list[Sequence[Any]] = []
    written = []
    for var, spec in meta["variables"].items():
        if spec["kind"] != "categorical":
            continue
        names = [c["name"] for c in spec["categories"]]
        prop = ds[f"{var}_proportion"].values
        for k, nm in enumerate(names):
            header.append(f"{var} share {nm}")
            cols.append(prop[:, k])
            pct_rows.append(_pct_row(f"{var} share {nm}", prop[:, k]))
        table = meta["tables"][var]
        if "wells" in table:
            vol = ds[f"{var}_well_volume"].values
            for j, w in enumerate(table["wells"]):
                for k, nm in enumerate(names):
                    label = f"{var} volume of {nm} bodies at {w}"
                    header.append(label)
                    cols.append(vol[:, j, k])
                    pct_rows.append(_pct_row(label, vol[:, j, k]))
            con = ds[f"{var}_well_connection"].values
            for k, nm in enumerate(names):
                f = folder / f"well_connection_{_safe(var)}_{_safe(nm)}.csv"
                with open(f, "w", newline="", encoding="utf-8") as fh:
                    wr = csv.writer(fh)
                    wr.writerow(["well", *table["wells"]])
                    for j, w in enumerate(table["wells"]):
                        wr.writerow([w, *[f"{x:.6g}" for x in con[j, :, k]]])
                written.append(f)
    f = folder / "realizations.csv"
    with open(f, "w", newline="", encoding="utf-8") as fh:
        wr = csv.writer(fh)
        wr.writerow(header)
        for row in zip(*cols, strict=True):
            wr.writerow([_cell(x) for x in row])
    written.insert(0, f)
    f = folder / "percentiles.csv"
    with open(f, "w", newline="", encoding="utf-8") as fh:
        wr = csv.writer(fh)
        wr.writerow(["quantity", "P10", "P50", "P90", "mean"])
        wr.writerows(pct_rows)
    written.insert(1, f)
    return written


def _safe(name: str) -> str:
    """A file-name-safe form of a variable or category name."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("_") or "unnamed"


def _pct_row(label: str, x: np.ndarray) -> list[Any]:
    """A percentiles.csv row: the summary's P10, P50, P90 and mean of one column."""
    from .summary import _pct

    d = _pct(x)
    return [label, *[f"{float(d[k]):.6g}" for k in ("P10", "P50", "P90", "mean")]]


def _cell(x: Any) -> Any:
    if isinstance(x, float | np.floating):
        return f"{float(x):.6g}"
    return x
