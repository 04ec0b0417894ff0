"""Ensembles: seeds, the realizations store layout, hard-data honouring, resume, Dask."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from strataloom.ensemble import realization_seeds, run_ensemble
from strataloom.store import RealizationStore
from strataloom.study import load_study
from strataloom.workflow import prepare, run_study
from study_helpers import write_small_study


def _tree_bytes(folder: Path) -> dict[str, bytes]:
    """Every file of a run folder's realizations store and conditioning data, by relative path."""
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_seeds_follow_numpy_seed_sequence():
    # numpy.random.SeedSequence.spawn (numpy documentation, "Parallel random number generation"):
    # child i depends on (master entropy, i) only, so seeds do not change with the ensemble size
    seeds = realization_seeds(2024, 10)
    ref = [int(c.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1)) for c in np.random.SeedSequence(2024).spawn(10)]
    assert seeds == ref
    assert realization_seeds(2024, 4) == seeds[:4]
    assert len(set(seeds)) == 10 and all(0 <= s < 2**63 for s in seeds)
    assert realization_seeds(2025, 4) != seeds[:4]


def test_small_study_end_to_end_honours_hard_data(tmp_path):
    import xarray as xr

    p = write_small_study(tmp_path / "s", shape=(4, 16, 16), n=5, soft=True, products=True)
    study = load_study(p)
    summary = run_study(study, tmp_path / "run", processes=1, progress=False)
    assert summary.ensemble.computed == [0, 1, 2, 3, 4]
    store = RealizationStore.open(tmp_path / "run" / "realizations.zarr", mode="r")
    assert store.done().all()
    hard = summary.prepared.hard
    assert len(hard.cells) >= 10
    # every hard datum in every realization equals its upscaled well value
    facies = store.array("facies")[:]
    for i in range(5):
        got = facies[i][tuple(hard.cells.T)]
        np.testing.assert_array_equal(got, hard.values["facies"])
    # the run folder's hard_data.npz holds the same data (store.md)
    with np.load(tmp_path / "run" / "hard_data.npz") as npz:
        np.testing.assert_array_equal(npz["cells"], hard.cells)
        np.testing.assert_array_equal(npz["values_facies"], hard.values["facies"])
        assert npz["cells"].dtype == np.int64
    soft = np.load(tmp_path / "run" / "soft_data.npy")
    assert soft.shape == (2, 4, 16, 16) and soft.dtype == np.float32
    np.testing.assert_allclose(soft.sum(axis=0), 1.0, atol=1e-5)
    # layout of store.md
    arr = store.array("facies")
    assert arr.shape == (5, 4, 16, 16) and arr.chunks == (1, 4, 16, 16)
    assert arr.dtype == np.int16 and arr.fill_value == -1
    assert tuple(arr.metadata.dimension_names) == ("realization", "z", "y", "x")
    attrs = store.attrs
    assert attrs["format"] == "realizations" and attrs["format_version"] == 1
    assert attrs["grid"] == {
        "shape": [4, 16, 16],
        "spacing": [1.0, 10.0, 10.0],
        "origin": [0.0, 0.0, 0.0],
    }
    assert attrs["variables"]["facies"]["categories"][1] == {
        "code": 1,
        "name": "sand",
        "colour": "#e3c16f",
    }
    assert attrs["seeds"] == realization_seeds(42, 5)
    assert attrs["engine"]["name"] == "pattern_tree"
    assert attrs["hard_data"] == {"variable": "facies", "file": "hard_data.npz"}
    assert set(attrs["inputs"]) == {
        "ti.npy",
        "attr.npy",
        "wells/points.csv",
        "wells/dev.las",
        "wells/dev_survey.csv",
    }
    assert attrs["study"]["grid"]["shape"] == [4, 16, 16]
    # readable by xarray.open_zarr (store.md contract)
    ds = xr.open_zarr(tmp_path / "run" / "realizations.zarr")
    assert ds["facies"].dims == ("realization", "z", "y", "x")
    np.testing.assert_array_equal(ds["facies"].values, facies)
    assert json.loads(json.dumps(ds.attrs["strataloom"])) == attrs
    cal = json.loads((tmp_path / "run" / "calibration.json").read_text())  # strict JSON
    assert cal["scores"]["wells"] == 4 and 0 <= cal["scores"]["accuracy"] <= 1
    # the summary and report steps of [output] ran on the finished store
    assert (tmp_path / "run" / "summary.zarr").is_dir()
    assert (tmp_path / "run" / "report.html").stat().st_size > 1000
    assert any(line.startswith("report ") for line in summary.extras)
    # the run keeps the training image it used, so `strataloom report DIR` finds it alone
    np.testing.assert_array_equal(np.load(tmp_path / "run" / "training_image.npy"), summary.prepared.training_image)
    from strataloom.commands import _load_ti

    np.testing.assert_array_equal(_load_ti(None, tmp_path / "run"), summary.prepared.training_image)
    # realizations differ from each other but share the data
    assert len({facies[i].tobytes() for i in range(5)}) == 5


def test_rerun_is_a_no_op_and_other_study_is_refused(tmp_path):
    p = write_small_study(tmp_path / "s", n=3)
    study = load_study(p)
    run_study(study, tmp_path / "run", processes=1, progress=False)
    again = run_study(study, tmp_path / "run", processes=1, progress=False)
    assert again.ensemble.computed == [] and again.ensemble.already_done == 3
    p.write_text(p.read_text().replace("seed = 42", "seed = 43"))
    from strataloom.errors import StudyError

    with pytest.raises(StudyError, match="different study"):
        run_study(load_study(p), tmp_path / "run", processes=1, progress=False)
    run_study(load_study(p), tmp_path / "run", processes=1, progress=False, overwrite=True)


def test_local_processes_equal_in_process_run(tmp_path):
    p = write_small_study(tmp_path / "s", n=4)
    study = load_study(p)
    run_study(study, tmp_path / "one", processes=1, progress=False)
    run_study(study, tmp_path / "two", processes=2, progress=True)  # rich bars, worker queue
    assert _tree_bytes(tmp_path / "one") == _tree_bytes(tmp_path / "two")


def test_dask_local_cluster_equals_local_run(tmp_path):
    from distributed import Client, LocalCluster

    p = write_small_study(tmp_path / "s", n=4)
    study = load_study(p)
    run_study(study, tmp_path / "local", processes=1, progress=False)
    with (
        LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster,
        Client(cluster) as client,
    ):
        res = run_study(study, tmp_path / "dask", client=client, progress=False)
    assert sorted(res.ensemble.computed) == [0, 1, 2, 3]
    assert _tree_bytes(tmp_path / "local") == _tree_bytes(tmp_path / "dask")


def test_dask_resumes_what_a_local_run_left(tmp_path):
    from distributed import Client, LocalCluster

    p = write_small_study(tmp_path / "s", n=4)
    study = load_study(p)
    prep = prepare(study)
    run_study(study, tmp_path / "full", processes=1, progress=False, prepared=prep)
    run_study(study, tmp_path / "part", processes=1, progress=False, prepared=prep)
    store = RealizationStore.open(tmp_path / "part" / "realizations.zarr", mode="r+")
    store._group["done"][1] = 0  # as if realization 1 had been interrupted
    store._group["done"][3] = 0
    with (
        LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster,
        Client(cluster) as client,
    ):
        res = run_study(study, tmp_path / "part", client=client, progress=False, prepared=prep)
    assert sorted(res.ensemble.computed) == [1, 3]
    assert _tree_bytes(tmp_path / "full") == _tree_bytes(tmp_path / "part")


def _done_count(store_path: Path) -> int:
    try:
        return int(RealizationStore.open(store_path, mode="r").done().sum())
    except Exception:  # store not created yet or metadata being written
        return -1


def test_killed_run_resumes_to_identical_store(tmp_path):
    n = 14
    p = write_small_study(tmp_path / "s", shape=(8, 48, 48), n=n)
    ref = tmp_path / "ref"
    run_study(load_study(p), ref, processes=1, progress=False)
    out = tmp_path / "killed"
    cmd = [
        sys.executable,
        "-m",
        "strataloom",
        "run",
        str(p),
        "--out",
        str(out),
        "--processes",
        "1",
        "--no-progress",
    ]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    store_path = out / "realizations.zarr"
    deadline = time.monotonic() + 60
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            if _done_count(store_path) >= 2:
                break
            time.sleep(0.01)
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    done_at_kill = _done_count(store_path)
    assert 2 <= done_at_kill < n, f"kill came too late or too early ({done_at_kill} done)"
    resumed = subprocess.run(cmd[:-1], capture_output=True, text=True, check=False)  # with bars
    assert resumed.returncode == 0, resumed.stderr
    assert f"({done_at_kill} already done)" in resumed.stdout
    assert _tree_bytes(ref) == _tree_bytes(out)


class _CountingFactory:
    """A picklable engine factory over the real pattern tree that records calls (test double)."""

    token = "counting"

    def __init__(self, inner):
        self.inner = inner
        self.seeds: list[int] = []

    def __call__(self):
        adapter = self.inner()
        outer = self

        class A:
            variables = adapter.variables

            def simulate(self, seed):
                outer.seeds.append(seed)
                return adapter.simulate(seed)

        return A()


def test_run_ensemble_computes_only_missing(tmp_path):
    p = write_small_study(tmp_path / "s", n=6)
    study = load_study(p)
    prep = prepare(study)
    run_study(study, tmp_path / "run", processes=1, progress=False, prepared=prep)
    store = RealizationStore.open(tmp_path / "run" / "realizations.zarr", mode="r+")
    before = store.read("facies", 4).copy()
    store._group["done"][4] = 0
    store._group["facies"][4] = np.full((4, 16, 16), -1, dtype=np.int16)  # half-written garbage
    seeds = store.attrs["seeds"]
    fac = _CountingFactory(prep.factory(threads=1))
    res = run_ensemble(fac, store, seeds, processes=1, progress=False)
    assert res.computed == [4] and fac.seeds == [seeds[4]]
    np.testing.assert_array_equal(store.read("facies", 4), before)


def test_cli_run_on_a_dask_scheduler_address(tmp_path):
    # `strataloom run --scheduler ADDRESS` from another process, against a local (loopback) cluster
    from distributed import LocalCluster

    p = write_small_study(tmp_path / "s", n=3)
    run_study(load_study(p), tmp_path / "local", processes=1, progress=False)
    with LocalCluster(
        n_workers=1,
        threads_per_worker=1,
        processes=False,
        dashboard_address=None,
        host="127.0.0.1",
        protocol="tcp://",
    ) as cluster:
        out = subprocess.run(
            [
                sys.executable,
                "-m",
                "strataloom",
                "run",
                str(p),
                "--out",
                str(tmp_path / "dask"),
                "--scheduler",
                cluster.scheduler_address,
                "--no-progress",
            ],
            capture_output=True,
            text=True,
            check=False,
            timeout=120,
        )
    assert out.returncode == 0, out.stderr
    assert "Dask cluster" in out.stdout
    assert _tree_bytes(tmp_path / "local") == _tree_bytes(tmp_path / "dask")


def test_engine_failure_stops_the_pool_and_keeps_done_flags_true(tmp_path):
    from strataloom.workflow import _store_attrs
    from study_helpers import FailingFactory

    p = write_small_study(tmp_path / "s", n=6)
    study = load_study(p)
    prep = prepare(study)
    seeds = realization_seeds(42, 6)
    store = RealizationStore.create(tmp_path / "r.zarr", attrs=_store_attrs(prep, seeds))
    bad = FailingFactory(prep.factory(threads=1), bad_seed=seeds[3])
    with pytest.raises(RuntimeError, match="engine failure"):
        run_ensemble(bad, store, seeds, processes=2, progress=False)
    done = store.done()
    assert not done[3]
    for i in np.flatnonzero(done):  # whatever was flagged done is complete
        assert (store.read("facies", int(i)) >= 0).all()
    res = run_ensemble(prep.factory(threads=1), store, seeds, processes=1, progress=False)
    assert 3 in res.computed and store.done().all()


def test_direct_sampler_study_honours_continuous_hard_data(tmp_path):
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(4)
    (tmp_path / "wells").mkdir()
    # invented porosity-like training image: smoothed noise scaled to 0.05..0.30
    field = gaussian_filter(rng.normal(size=(6, 40, 40)), sigma=(1, 3, 3))
    ti = 0.05 + 0.25 * (field - field.min()) / (field.max() - field.min())
    np.save(tmp_path / "ti.npy", ti.astype(np.float64))
    rows = ["well,x,y,z,porosity"]
    for name, (x, y) in {"P1": (25.0, 35.0), "P2": (105.0, 75.0), "P3": (145.0, 125.0)}.items():
        for z in np.arange(0.25, 4.0, 0.5):
            rows.append(f"{name},{x},{y},{z},{rng.uniform(0.05, 0.3):.4f}")
    (tmp_path / "wells" / "p.csv").write_text("\n".join(rows) + "\n")
    (tmp_path / "study.toml").write_text(
        "[grid]\nshape = [4, 16, 16]\nspacing = [1.0, 10.0, 10.0]\n\n"
        '[variables.porosity]\nkind = "continuous"\nunits = "fraction"\n\n'
        '[training_image]\nfile = "ti.npy"\n\n[[wells]]\nfile = "wells/p.csv"\n\n'
        '[engine]\nname = "direct_sampler"\n\n[engine.parameters]\nneighbors = 12\n'
        "accept_distance = 0.05\nscan_fraction = 0.3\n\n"
        "[ensemble]\nrealizations = 3\nseed = 5\n\n[output]\nsummary = false\nreport = false\n"
    )
    study = load_study(tmp_path / "study.toml")
    res = run_study(study, tmp_path / "run", processes=1, progress=False)
    hard = res.prepared.hard
    assert len(hard.cells) == 3 * 4  # two samples per cell, averaged (length-weighted mean)
    store = RealizationStore.open(tmp_path / "run" / "realizations.zarr", mode="r")
    arr = store.array("porosity")
    assert arr.dtype == np.float32 and np.isnan(arr.fill_value)
    assert store.attrs["variables"]["porosity"] == {"kind": "continuous", "units": "fraction"}
    for i in range(3):
        r = store.read("porosity", i)
        assert np.isfinite(r).all()
        np.testing.assert_array_equal(r[tuple(hard.cells.T)], hard.values["porosity"].astype(np.float32))
        assert 0.05 - 1e-6 <= r.min() and r.max() <= 0.30 + 1e-6  # values copied from the TI
