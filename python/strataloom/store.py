"""The realizations store: ``RUN_DIR/realizations.zarr``, a zarr v3 group.

Layout (the shared contract, also in docs/store-format.md):

- one array per variable, shape ``(n, nz, ny, nx)``, chunks ``(1, nz, ny, nx)`` (z split for
  realizations above 64 MiB), dimension names ``("realization", "z", "y", "x")``; categorical
  variables int16 with fill -1, continuous float32 with fill NaN;
- ``done``: ``(n,)`` uint8, fill 0; ``done[i]`` is set only after every variable of realization
  ``i`` has been written, so an interrupted run resumes with the realizations whose flag is 0;
- group attribute ``strataloom``: format, format_version, version, grid, variables, seeds, engine,
  inputs (SHA-256 per input file), study (the validated study as JSON), hard_data.

Nothing in the store depends on when or where it was written, so a resumed run's store equals an
uninterrupted run's byte for byte.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .errors import StudyError
from .runread import temporary_path

__all__ = ["FORMAT_VERSION", "RealizationStore"]

FORMAT_VERSION = 1
_CHUNK_LIMIT = 64 * 2**20


def _chunks(shape: tuple[int, int, int], itemsize: int) -> tuple[int, int, int, int]:
    nz, ny, nx = shape
    per_layer = ny * nx * itemsize
    layers = max(1, min(nz, _CHUNK_LIMIT // max(per_layer, 1)))
    return (1, layers, ny, nx)


class RealizationStore:
    """A realizations store on disk. Open with :meth:`create` or :meth:`open`."""

    def __init__(self, group: Any, path: Path) -> None:
        self._group = group
        self.path = path

    # -- creation ------------------------------------------------------------------------------
    @classmethod
    def create(
        cls, path: str | Path, *, attrs: Mapping[str, Any], overwrite: bool = False
    ) -> RealizationStore:
        """Create a store, or reopen a compatible one (same attributes) to resume it.

        Parameters
        ----------
        path : path-like
            The ``realizations.zarr`` folder.
        attrs : mapping
            The ``strataloom`` attribute (see the module notes); ``grid.shape``, ``variables`` and
            ``seeds`` fix the arrays.
        overwrite : bool, default False
            Replace an existing store that holds a different run instead of refusing.
        """
        import zarr

        p = Path(path)
        attrs = json.loads(json.dumps(dict(attrs)))  # plain JSON, a stable copy
        if p.exists():
            try:
                old = cls.open(p, mode="r+")
                same = old.attrs == attrs
            except StudyError:
                same = False
            if same:
                old.clean_partial_writes()
                old.recheck_done()
                return old
            if not overwrite:
                raise StudyError(
                    f"The run folder already holds a store '{p}' from a different "
                    "study, inputs or version; choose a new --out folder or pass "
                    "--overwrite."
                )
            shutil.rmtree(p)
        shape = tuple(int(s) for s in attrs["grid"]["shape"])
        n = len(attrs["seeds"])
        # built under a temporary name and renamed when complete, so a store that exists is whole
        tmp = temporary_path(p)  # also deletes what a creation killed before its rename left
        shutil.rmtree(tmp, ignore_errors=True)
        group = zarr.open_group(str(tmp), mode="w", zarr_format=3)
        for name, spec in attrs["variables"].items():
            if spec["kind"] == "categorical":
                dtype, fill = np.int16, -1
            else:
                dtype, fill = np.float32, float("nan")
            group.create_array(
                name,
                shape=(n, *shape),
                chunks=_chunks(shape, np.dtype(dtype).itemsize),
                dtype=dtype,
                fill_value=fill,
                dimension_names=("realization", "z", "y", "x"),
            )
        group.create_array(
            "done",
            shape=(n,),
            chunks=(n,),
            dtype=np.uint8,
            fill_value=0,
            dimension_names=("realization",),
        )
        group.attrs["strataloom"] = attrs
        # consolidated metadata lets xarray.open_zarr read the store without a fallback warning;
        # zarr-python warns that v3 has no spec for it yet, which is known and harmless here
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", category=UserWarning)
            zarr.consolidate_metadata(str(tmp))
        os.replace(tmp, p)
        return cls(zarr.open_group(str(p), mode="r+", zarr_format=3), p)

    @classmethod
    def open(cls, path: str | Path, mode: str = "r") -> RealizationStore:
        """Open an existing store, read-only unless ``mode="r+"``."""
        import zarr

        p = Path(path)
        try:
            group = zarr.open_group(str(p), mode=mode, zarr_format=3)
            meta = group.attrs["strataloom"]
        except Exception as e:
            raise StudyError(f"'{p}' is not a Strata Loom realizations store: {e}") from e
        if not isinstance(meta, dict) or meta.get("format") != "realizations":
            raise StudyError(f"'{p}' is not a Strata Loom realizations store.")
        return cls(group, p)

    def clean_partial_writes(self) -> int:
        """Delete temporary files a killed writer left behind (zarr writes ``*.<hex>.partial``
        then renames); returns how many. Their data are rewritten because ``done`` is still 0."""
        n = 0
        for f in self.path.rglob("*.partial"):
            if re.fullmatch(r".*\.[0-9a-f]{32}\.partial", f.name):
                f.unlink(missing_ok=True)
                n += 1
        return n

    def recheck_done(self) -> list[int]:
        """Clear the ``done`` flag of finished realizations whose chunks no longer read back whole
        (a damaged or deleted chunk file), so that a resume computes them again; returns them."""
        try:
            flags = self.done()
        except Exception:  # the flags themselves are damaged: every realization is redone
            self._group["done"][:] = np.zeros(self.size, dtype=np.uint8)
            return list(range(self.size))
        bad = []
        specs = self.attrs["variables"]
        for i in np.flatnonzero(flags):
            for name, spec in specs.items():
                try:
                    a = np.asarray(self._group[name][int(i)])
                except Exception:
                    bad.append(int(i))
                    break
                # every cell of a finished realization is simulated, so fill values mean a lost chunk
                lost = (a == -1) if spec["kind"] == "categorical" else np.isnan(a)
                if lost.all(axis=(1, 2)).any():
                    bad.append(int(i))
                    break
        for i in bad:
            self._group["done"][i] = 0
        return bad

    # -- contents ------------------------------------------------------------------------------
    @property
    def attrs(self) -> dict[str, Any]:
        """The ``strataloom`` group attribute."""
        return dict(self._group.attrs["strataloom"])

    @property
    def variables(self) -> list[str]:
        return list(self.attrs["variables"])

    @property
    def size(self) -> int:
        """Number of realizations the store holds room for."""
        return int(self._group["done"].shape[0])

    def done(self) -> np.ndarray:
        """Boolean flags of the completed realizations."""
        return np.asarray(self._group["done"][:]) == 1

    def missing(self) -> list[int]:
        """Indices of realizations not yet completed."""
        return [int(i) for i in np.flatnonzero(~self.done())]

    def write(self, index: int, arrays: Mapping[str, np.ndarray]) -> None:
        """Write realization ``index`` of every variable, then mark it done.

        Raises StudyError when a variable is missing or has the wrong shape, before writing.
        """
        shape = tuple(self.attrs["grid"]["shape"])
        specs = self.attrs["variables"]
        checked = {}
        for name, spec in specs.items():
            if name not in arrays:
                raise StudyError(f"The engine returned no '{name}' for realization {index}.")
            a = np.asarray(arrays[name])
            if a.shape != shape:
                raise StudyError(
                    f"The engine returned '{name}' of shape {a.shape} for realization "
                    f"{index}; the grid is {shape}."
                )
            if spec["kind"] == "categorical":
                if a.size and (a.min() < -1 or a.max() > np.iinfo(np.int16).max):
                    raise StudyError(f"Realization {index} of '{name}' holds codes out of range.")
                checked[name] = a.astype(np.int16, copy=False)
            else:
                checked[name] = a.astype(np.float32, copy=False)
        for name, a in checked.items():
            self._group[name][index] = a
        self._group["done"][index] = 1

    def read(self, variable: str, index: int) -> np.ndarray:
        """Realization ``index`` of ``variable``."""
        return np.asarray(self._group[variable][index])

    def array(self, variable: str) -> Any:
        """The zarr array of a variable."""
        return self._group[variable]


def realization_attrs(
    *,
    version: str,
    grid: Any,
    variables: Mapping[str, Any],
    seeds: Sequence[int],
    engine: Mapping[str, Any],
    inputs: Mapping[str, str],
    study: Mapping[str, Any],
    hard_data: Mapping[str, Any] | None,
) -> dict[str, Any]:
    """The ``strataloom`` group attribute of store.md."""
    out: dict[str, Any] = {
        "format": "realizations",
        "format_version": FORMAT_VERSION,
        "version": version,
        "grid": {
            "shape": list(grid.shape),
            "spacing": list(grid.spacing),
            "origin": list(grid.origin),
        },
        "variables": dict(variables),
        "seeds": [int(s) for s in seeds],
        "engine": dict(engine),
        "inputs": dict(inputs),
        "study": dict(study),
    }
    if hard_data is not None:
        out["hard_data"] = dict(hard_data)
    return json.loads(json.dumps(out))
