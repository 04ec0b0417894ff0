"""Benchmarks of the streaming ensemble summary (asv).

Run the modest default size with asv from the project root::

    asv run --python=same --bench bench_summary

The full size of the issue (100 realizations × 1,000,000 cells, grid 100 × 100 × 100) takes a few
minutes to build the store and needs about 0.5 GB of disk::

    STRATALOOM_BENCH_FULL=1 asv run --python=same --bench bench_summary
    python benchmarks/bench_summary.py --full     # the same, printed without asv

``track_peak_ratio`` runs the summary in a fresh process and reports the rise of peak resident
memory during the summary divided by the size of one realization as float64 (target ≤ 3). The
baseline is taken after the imports (NumPy, SciPy, zarr) and one read, so fixed import costs are
not counted; ``peakmem_summarize`` is asv's whole-process peak, imports included.
The data are invented random fields: only their size matters here.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

FULL = os.environ.get("STRATALOOM_BENCH_FULL", "") not in ("", "0")
N = 100 if FULL else 20
SHAPE = (100, 100, 100) if FULL else (20, 100, 100)
BUDGET = 8 * 2**20  # bytes for the quantile stack of one slab
CACHE = Path(tempfile.gettempdir()) / f"strataloom-bench-summary-{N}-{'x'.join(map(str, SHAPE))}"


def build_store(path: Path = CACHE, n: int = N, shape: tuple[int, int, int] = SHAPE) -> Path:
    """Write an invented realizations store (facies int16 and porosity float32) once."""
    import zarr

    if (path / "realizations.zarr" / "zarr.json").exists() and (path / "ready").exists():
        return path
    shutil.rmtree(path, ignore_errors=True)
    path.mkdir(parents=True)
    g = zarr.open_group(path / "realizations.zarr", mode="w", zarr_format=3)
    dims = ("realization", "z", "y", "x")
    fac = g.create_array(
        "facies",
        shape=(n, *shape),
        chunks=(1, *shape),
        dtype="int16",
        fill_value=-1,
        dimension_names=dims,
    )
    por = g.create_array(
        "porosity",
        shape=(n, *shape),
        chunks=(1, *shape),
        dtype="float32",
        fill_value=np.nan,
        dimension_names=dims,
    )
    rng = np.random.default_rng(0)
    for i in range(n):
        u = rng.random(shape, dtype=np.float32)
        fac[i] = np.digitize(u, [0.6, 0.85]).astype(np.int16)
        por[i] = 0.1 + 0.2 * u
    done = g.create_array("done", shape=(n,), dtype="uint8", fill_value=0)
    done[...] = 1
    g.attrs["strataloom"] = {
        "format": "realizations",
        "format_version": 1,
        "version": "bench",
        "grid": {"shape": list(shape), "spacing": [1, 1, 1], "origin": [0, 0, 0]},
        "variables": {
            "facies": {
                "kind": "categorical",
                "categories": [
                    {"code": 0, "name": "mud", "colour": "#8c7a5b"},
                    {"code": 1, "name": "sand", "colour": "#e0b84a"},
                    {"code": 2, "name": "silt", "colour": "#6a9a58"},
                ],
            },
            "porosity": {"kind": "continuous", "units": "fraction"},
        },
        "seeds": list(range(n)),
        "engine": {"name": "bench", "parameters": {}},
        "inputs": {},
        "study": {},
    }
    (path / "ready").write_text("ok")
    return path


def _summarize(variable: str, out: Path) -> None:
    from strataloom.summary import summarize

    summarize(build_store(), output=out, variables=[variable], memory_budget=BUDGET, wells={})


_CHILD = """
import json, resource, sys
import strataloom.summary as s
from strataloom.runread import Run
from strataloom.connectivity import structure
structure(6)                                              # scipy.ndimage imported
r = Run(sys.argv[1]); _ = r.realization(0, sys.argv[2])   # zarr codecs imported
del _
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
s.summarize(r, output=sys.argv[3], variables=[sys.argv[2]], memory_budget=int(sys.argv[4]),
            wells={})
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"before_kib": before, "after_kib": after}))
"""


def peak_ratio(variable: str) -> tuple[float, float]:
    """(peak RSS rise / one float64 realization, wall seconds) of a summary in a fresh process."""
    store = build_store()
    with tempfile.TemporaryDirectory() as tmp:
        t = time.perf_counter()
        res = subprocess.run(
            [
                sys.executable,
                "-c",
                _CHILD,
                str(store),
                variable,
                str(Path(tmp) / "s.zarr"),
                str(BUDGET),
            ],
            capture_output=True,
            text=True,
            check=True,
        )
        wall = time.perf_counter() - t
    d = json.loads(res.stdout.strip().splitlines()[-1])
    one = 8 * int(np.prod(SHAPE))
    return (d["after_kib"] - d["before_kib"]) * 1024 / one, wall


class Summary:
    """Time and peak memory of summarising the ensemble, per variable kind."""

    timeout = 1800
    params = ["facies", "porosity"]  # noqa: RUF012  (asv reads plain lists)
    param_names = ["variable"]  # noqa: RUF012

    def setup_cache(self) -> str:
        return str(build_store())

    def setup(self, _cache: str, variable: str) -> None:
        self.tmp = Path(tempfile.mkdtemp())

    def teardown(self, _cache: str, variable: str) -> None:
        shutil.rmtree(self.tmp, ignore_errors=True)

    def time_summarize(self, _cache: str, variable: str) -> None:
        _summarize(variable, self.tmp / "s.zarr")

    def peakmem_summarize(self, _cache: str, variable: str) -> None:
        _summarize(variable, self.tmp / "s.zarr")

    def track_peak_ratio(self, _cache: str, variable: str) -> float:
        return peak_ratio(variable)[0]

    track_peak_ratio.unit = "× one float64 realization"  # type: ignore[attr-defined]


if __name__ == "__main__":
    if "--full" in sys.argv:
        os.environ["STRATALOOM_BENCH_FULL"] = "1"
        os.execv(sys.executable, [sys.executable, __file__])
    t = time.perf_counter()
    build_store()
    print(
        f"store: {N} realizations × {int(np.prod(SHAPE)):,} cells ({time.perf_counter() - t:.1f} s "
        "to build or find)"
    )
    for var in ("facies", "porosity"):
        ratio, wall = peak_ratio(var)
        print(
            f"{var:9s} summary: {wall:6.1f} s wall (process), peak RSS rise {ratio:.2f} × one "
            f"float64 realization ({8 * int(np.prod(SHAPE)) / 2**20:.0f} MiB)"
        )
