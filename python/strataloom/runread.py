"""Reading a run folder: the realizations store written by an ensemble run (docs/store-format.md).

The reader never loads the whole ensemble: realizations are read one at a time, or a slab of cells
for every finished realization, and :func:`open_run` gives a lazy :class:`xarray.Dataset`.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from . import _validate as v
from .errors import StudyError
from .grid import Grid

__all__ = ["Run", "open_run"]

STORE_NAME = "realizations.zarr"
SUMMARY_NAME = "summary.zarr"
REPORT_NAME = "report.html"
FORMAT_VERSION = 1


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # exists, owned by someone else
        return True
    return True


def temporary_path(out: Path) -> Path:
    """The sibling ``OUT.tmp-<pid>`` to write before renaming it onto ``out`` (atomic replacement).

    Leftovers of writers killed before their rename (their process no longer runs) are deleted
    first, so an interrupted summary, report or store leaves nothing behind once rewritten.
    """
    out = Path(out)
    for left in out.parent.glob(f"{out.name}.tmp-*"):
        pid = left.name.rsplit("-", 1)[-1]
        if pid.isdigit() and int(pid) != os.getpid() and not _alive(int(pid)):
            if left.is_dir():
                shutil.rmtree(left, ignore_errors=True)
            else:
                left.unlink(missing_ok=True)
    return out.with_name(f"{out.name}.tmp-{os.getpid()}")


class Run:
    """A run folder opened for reading.

    Parameters
    ----------
    path : str or path-like
        The run folder holding ``realizations.zarr`` (or the store itself).

    Notes
    -----
    Only realizations whose ``done`` flag is 1 are read; a run that is still going, or was
    interrupted, is summarised over the realizations finished so far.
    """

    def __init__(self, path: Any) -> None:
        import zarr

        if not isinstance(path, str | Path):
            raise v.fail_type("path", "a path to a run folder", path, "Run")
        p = Path(path)
        if p.name == STORE_NAME:
            p = p.parent
        store = p / STORE_NAME
        if not store.is_dir():
            raise StudyError(
                f"The run folder '{p}' has no {STORE_NAME}; run an ensemble into it first "
                "(strataloom run STUDY --out DIR)."
            )
        self.path = p
        try:
            self._group = zarr.open_group(store, mode="r")
        except Exception as exc:  # zarr raises several kinds for a damaged store
            raise StudyError(
                f"The store '{store}' cannot be opened as a zarr v3 group: {exc}"
            ) from exc
        attrs = dict(self._group.attrs)
        meta = attrs.get("strataloom")
        if isinstance(meta, str):
            meta = json.loads(meta)
        if not isinstance(meta, dict) or meta.get("format") != "realizations":
            raise StudyError(
                f"The store '{store}' has no 'strataloom' attribute of format "
                "'realizations'; it was not written by an ensemble run."
            )
        if int(meta.get("format_version", 0)) > FORMAT_VERSION:
            raise StudyError(
                f"The store '{store}' has format_version {meta.get('format_version')}; "
                f"this version reads up to {FORMAT_VERSION}. Upgrade strataloom."
            )
        self.meta: dict[str, Any] = meta
        g = meta.get("grid", {})
        try:
            self.grid = Grid(g["shape"], g.get("spacing", (1, 1, 1)), g.get("origin", (0, 0, 0)))
        except (KeyError, TypeError, ValueError) as exc:
            raise StudyError(f"The store '{store}' has no valid 'grid' attribute: {exc}") from exc
        self.variables: dict[str, dict[str, Any]] = dict(meta.get("variables", {}))
        for name, spec in self.variables.items():
            if name not in self._group:
                raise StudyError(
                    f"The store '{store}' declares variable '{name}' but has no array for it."
                )
            shape = tuple(self._group[name].shape)
            if shape[1:] != self.grid.shape:
                raise StudyError(
                    f"The array '{name}' has shape {shape}; the grid is {self.grid.shape}."
                )
            if spec.get("kind") not in ("categorical", "continuous"):
                raise StudyError(
                    f"The variable '{name}' has kind {spec.get('kind')!r}; "
                    "expected 'categorical' or 'continuous'."
                )
        if not self.variables:
            raise StudyError(f"The store '{store}' declares no variables.")
        first = next(iter(self.variables))
        self.size = int(self._group[first].shape[0])
        if "done" in self._group:
            self.done = np.asarray(self._group["done"][:], dtype=np.uint8).astype(bool)
        else:
            self.done = np.zeros(self.size, dtype=bool)
        self.completed = np.flatnonzero(self.done)

    # ------------------------------------------------------------------ metadata
    def kind(self, variable: str) -> str:
        """``'categorical'`` or ``'continuous'``."""
        return str(self._spec(variable)["kind"])

    def categories(self, variable: str) -> list[dict[str, Any]]:
        """The declared categories of a categorical variable, in code order.

        Each item has ``code``, ``name`` and ``colour`` (defaults are filled in when missing).
        """
        spec = self._spec(variable)
        if spec["kind"] != "categorical":
            raise v.fail("variable", "a categorical variable", variable, "Run.categories")
        cats = spec.get("categories")
        if not cats:  # codes seen in the first finished realization
            seen = (
                np.unique(self.realization(int(self.completed[0]), variable))
                if self.completed.size
                else np.array([], dtype=np.int16)
            )
            cats = [{"code": int(c)} for c in seen if c >= 0]
        out = []
        for i, c in enumerate(sorted(cats, key=lambda c: int(c["code"]))):
            out.append(
                {
                    "code": int(c["code"]),
                    "name": str(c.get("name", f"facies {c['code']}")),
                    "colour": str(c.get("colour", _DEFAULT_COLOURS[i % len(_DEFAULT_COLOURS)])),
                }
            )
        return out

    def codes(self, variable: str) -> np.ndarray:
        """Category codes of a categorical variable as an int array."""
        return np.array([c["code"] for c in self.categories(variable)], dtype=np.int64)

    @property
    def categorical(self) -> list[str]:
        """Names of the categorical variables."""
        return [n for n, s in self.variables.items() if s["kind"] == "categorical"]

    @property
    def continuous(self) -> list[str]:
        """Names of the continuous variables."""
        return [n for n, s in self.variables.items() if s["kind"] == "continuous"]

    def _spec(self, variable: str) -> dict[str, Any]:
        if variable not in self.variables:
            raise v.fail("variable", f"one of {sorted(self.variables)}", variable, "Run")
        return self.variables[variable]

    def array(self, variable: str) -> Any:
        """The zarr array of a variable (for chunk-aware readers)."""
        self._spec(variable)
        return self._group[variable]

    # ------------------------------------------------------------------ data
    def _read(self, variable: str, index: int, key: Any) -> np.ndarray:
        """``array(variable)[key]``, with a damaged chunk reported as a StudyError."""
        try:
            return np.asarray(self.array(variable)[key])
        except (StudyError, v.ParameterError):
            raise
        except Exception as exc:  # the codec or zarr failed on the bytes of a chunk
            raise StudyError(
                f"Realization {index} of '{variable}' in '{self.path / STORE_NAME}' cannot be read "
                f"(a damaged chunk: {type(exc).__name__}); run the study into this folder again "
                "(strataloom run STUDY --out DIR): the resume recomputes damaged realizations."
            ) from exc

    def realization(self, index: int, variable: str) -> np.ndarray:
        """One realization ``(nz, ny, nx)`` of a variable, as stored (int16 or float32)."""
        i = v.integer(index, "index", low=0, high=self.size - 1, owner="Run.realization")
        return self._read(variable, i, i)

    def iter_realizations(
        self, variable: str, indices: Any = None
    ) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(index, array)`` for each finished realization, one at a time."""
        idx = self.completed if indices is None else np.asarray(indices, dtype=np.int64)
        for i in idx:
            yield int(i), self._read(variable, int(i), int(i))

    def slab(
        self, variable: str, z: slice, y: slice = slice(None), indices: Any = None
    ) -> np.ndarray:
        """Cells ``[z, y, :]`` of every finished realization: shape ``(n_done, dz, dy, nx)``."""
        idx = self.completed if indices is None else np.asarray(indices, dtype=np.int64)
        arr = self.array(variable)
        nz, ny, nx = self.grid.shape
        z0, z1, _ = z.indices(nz)
        y0, y1, _ = y.indices(ny)
        out = np.empty((idx.size, z1 - z0, y1 - y0, nx), dtype=arr.dtype)
        for k, i in enumerate(idx):
            out[k] = self._read(variable, int(i), (int(i), slice(z0, z1), slice(y0, y1), slice(None)))
        return out

    def chunk_depth(self, variable: str) -> int:
        """Number of z layers per stored chunk (the whole depth when chunked per realization)."""
        return int(self.array(variable).chunks[1])

    def hard_data(self) -> dict[str, np.ndarray] | None:
        """Upscaled conditioning data ``{'cells': (m, 3), 'values_<variable>': (m,)}``, or None."""
        info = self.meta.get("hard_data") or {}
        name = info.get("file", "hard_data.npz") if isinstance(info, dict) else "hard_data.npz"
        f = self.path / name
        if not f.is_file():
            return None
        with np.load(f, allow_pickle=False) as z:
            out = {k: np.asarray(z[k]) for k in z.files}
        if "cells" not in out or out["cells"].ndim != 2 or out["cells"].shape[1] != 3:
            raise StudyError(f"The file '{f}' must hold an array 'cells' of shape (m, 3).")
        return out

    def soft_data(self) -> np.ndarray | None:
        """Soft probabilities ``(K, nz, ny, nx)`` memory-mapped from ``soft_data.npy``, or None."""
        f = self.path / "soft_data.npy"
        if not f.is_file():
            return None
        soft = np.load(f, mmap_mode="r", allow_pickle=False)
        if soft.ndim != 4 or soft.shape[1:] != self.grid.shape:
            raise StudyError(
                f"The file '{f}' has shape {soft.shape}; expected (K, *{self.grid.shape})."
            )
        return soft

    def __repr__(self) -> str:
        return (
            f"Run('{self.path}', {self.completed.size}/{self.size} realizations done, "
            f"variables={list(self.variables)}, grid={self.grid.shape})"
        )


_DEFAULT_COLOURS = [
    "#8c7a5b",
    "#e0b84a",
    "#4f7ca8",
    "#6a9a58",
    "#b0533c",
    "#8a6bb0",
    "#5aa9a6",
    "#c98bb9",
]


def cell_centres(grid: Grid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Coordinates of cell centres along z, y and x."""
    return tuple(
        o + (np.arange(n) + 0.5) * d  # type: ignore[return-value]
        for n, d, o in zip(grid.shape, grid.spacing, grid.origin, strict=True)
    )


def _lazy(array: Any) -> Any:
    """An xarray backend array over a zarr array (basic and outer indexing, read on demand)."""
    from xarray.backends import BackendArray

    class _LazyZarr(BackendArray):
        def __init__(self, array: Any) -> None:
            self.array = array
            self.shape = tuple(array.shape)
            self.dtype = np.dtype(array.dtype)

        def __getitem__(self, key: Any) -> np.ndarray:
            from xarray.core import indexing

            return indexing.explicit_indexing_adapter(
                key, self.shape, indexing.IndexingSupport.OUTER, self._raw
            )

        def _raw(self, key: tuple) -> np.ndarray:
            if any(isinstance(k, np.ndarray) for k in key):
                return np.asarray(self.array.get_orthogonal_selection(key))
            return np.asarray(self.array[key])

    return _LazyZarr(array)


def open_run(path: Any, *, completed_only: bool = True) -> Any:
    """Open a run folder's realizations as a lazy :class:`xarray.Dataset`.

    Parameters
    ----------
    path : str or path-like
        The run folder (holding ``realizations.zarr``).
    completed_only : bool, default True
        Keep only the realizations whose ``done`` flag is set.

    Returns
    -------
    xarray.Dataset
        One variable per simulated property with dims ``(realization, z, y, x)``, coordinates at
        cell centres, the ``done`` flags, and the store's provenance in ``attrs['strataloom']``.
        Data are read from disk only when indexed or loaded.
    """
    import xarray as xr
    from xarray.core import indexing

    run = Run(path)
    zc, yc, xc = cell_centres(run.grid)
    data_vars = {}
    for name, spec in run.variables.items():
        arr = run.array(name)
        var = xr.Variable(
            ("realization", "z", "y", "x"),
            indexing.LazilyIndexedArray(_lazy(arr)),
            attrs={
                k: json.dumps(val) if isinstance(val, list | dict) else val
                for k, val in spec.items()
            },
        )
        data_vars[name] = var
    ds = xr.Dataset(
        data_vars, coords={"realization": np.arange(run.size), "z": zc, "y": yc, "x": xc}
    )
    ds["done"] = ("realization", run.done)
    ds.attrs["strataloom"] = json.dumps(run.meta)
    if completed_only:
        ds = ds.isel(realization=run.completed)
    return ds
