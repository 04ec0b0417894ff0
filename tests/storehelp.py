"""Test helper: writes small realizations stores in the layout of docs/store-format.md with zarr.

Only for tests; the package's writer belongs to the ensemble workflow. Data written here are
invented for the tests unless a test says otherwise.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import zarr

CATS = [
    {"code": 0, "name": "floodplain mud", "colour": "#8c7a5b"},
    {"code": 1, "name": "channel sand", "colour": "#e0b84a"},
    {"code": 2, "name": "levee silt", "colour": "#6a9a58"},
]


def write_store(
    run_dir: Path,
    variables: dict[str, np.ndarray],
    *,
    categories: dict[str, list] | None = None,
    done: Any = None,
    spacing=(1.0, 1.0, 1.0),
    origin=(0.0, 0.0, 0.0),
    chunk_z: int | None = None,
    hard: dict[str, np.ndarray] | None = None,
    soft: np.ndarray | None = None,
    extra: dict | None = None,
) -> Path:
    """Write ``run_dir/realizations.zarr`` holding the given (n, nz, ny, nx) arrays."""
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    g = zarr.open_group(run_dir / "realizations.zarr", mode="w", zarr_format=3)
    first = next(iter(variables.values()))
    n, nz, ny, nx = first.shape
    cz = nz if chunk_z is None else chunk_z
    spec = {}
    for name, data in variables.items():
        cat = np.issubdtype(data.dtype, np.integer)
        a = g.create_array(
            name,
            shape=data.shape,
            chunks=(1, cz, ny, nx),
            dtype="int16" if cat else "float32",
            fill_value=-1 if cat else np.nan,
            dimension_names=("realization", "z", "y", "x"),
        )
        flags = np.ones(n, bool) if done is None else np.asarray(done, bool)
        for i in range(n):
            if flags[i]:
                a[i] = data[i]
        if cat:
            spec[name] = {"kind": "categorical", "categories": (categories or {}).get(name, CATS)}
        else:
            spec[name] = {"kind": "continuous", "units": "fraction"}
    d = g.create_array("done", shape=(n,), dtype="uint8", fill_value=0)
    d[...] = (np.ones(n) if done is None else np.asarray(done)).astype(np.uint8)
    meta = {
        "format": "realizations",
        "format_version": 1,
        "version": "0.1.0",
        "grid": {"shape": [nz, ny, nx], "spacing": list(spacing), "origin": list(origin)},
        "variables": spec,
        "seeds": list(range(100, 100 + n)),
        "engine": {"name": "pattern_tree", "parameters": {"levels": 2}},
        "inputs": {"ti.npy": "0" * 64},
        "study": {"name": "test study"},
    }
    if hard is not None:
        np.savez(run_dir / "hard_data.npz", **hard)
        meta["hard_data"] = {"variable": "facies", "file": "hard_data.npz"}
    if soft is not None:
        np.save(run_dir / "soft_data.npy", soft.astype(np.float32))
    if extra:
        meta.update(extra)
    g.attrs["strataloom"] = meta
    return run_dir
