"""Crash safety, determinism and read-only access of run folders (invented small studies)."""

from __future__ import annotations

import random
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from strataloom.engines import EngineFactory
from strataloom.runread import Run
from strataloom.store import RealizationStore
from strataloom.study import load_study
from strataloom.summary import summarize
from strataloom.workflow import prepare, run_study
from study_helpers import write_small_study


def _folder_bytes(folder: Path) -> dict[str, bytes]:
    """Every file of a run folder by relative path."""
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _study(tmp_path: Path, n: int = 8) -> Path:
    # Large enough that simulating takes about half of the run after the store exists (0.4 of
    # 0.9 s here), so that random kills land while realizations are being written.
    p = write_small_study(tmp_path / "s", shape=(10, 80, 80), n=n)
    text = p.read_text().replace("summary = false", "summary = true")  # the summary is written too
    p.write_text(text)
    return p


def _cli(p: Path, out: Path) -> list[str]:
    return [sys.executable, "-m", "strataloom", "run", str(p), "--out", str(out), "--processes", "1",
            "--no-progress"]


def _wait_for(path: Path, proc: subprocess.Popen, limit: float = 60.0) -> None:
    deadline = time.monotonic() + limit
    while not path.is_file() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)


@pytest.mark.timeout(600)
def test_kill_9_at_random_moments_then_resume_gives_identical_bytes(tmp_path):
    # ten trials: the run is killed (SIGKILL, no clean-up possible) at a random moment, resumed,
    # and the folder compared byte for byte with an uninterrupted run. Even trials pick a moment
    # of the whole run (start-up, reading inputs, simulating, summarising), odd trials a moment
    # after the store exists, where most of a real run's time goes.
    n = 16
    p = _study(tmp_path, n)
    ref = tmp_path / "ref"
    t0 = time.monotonic()
    proc = subprocess.Popen(_cli(p, ref), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    _wait_for(ref / "realizations.zarr" / "zarr.json", proc)
    t_store = time.monotonic() - t0
    assert proc.wait(timeout=120) == 0
    full = time.monotonic() - t0
    expected = _folder_bytes(ref)
    assert "summary.zarr/zarr.json" in expected and "realizations.zarr/zarr.json" in expected
    rng = random.Random(8)
    study = load_study(p)
    moments = []
    for trial in range(10):
        out = tmp_path / f"trial{trial}"
        proc = subprocess.Popen(_cli(p, out), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        if trial % 2:
            _wait_for(out / "realizations.zarr" / "zarr.json", proc)
            moment = rng.uniform(0.0, full - t_store)
        else:
            moment = rng.uniform(0.0, full)
        time.sleep(moment)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        done = 0
        if (out / "realizations.zarr" / "zarr.json").is_file():
            done = int(RealizationStore.open(out / "realizations.zarr").done().sum())
        moments.append((trial, round(moment, 2), proc.returncode, done))
        run_study(study, out, processes=1, progress=False)
        got = _folder_bytes(out)
        assert sorted(got) == sorted(expected), (trial, set(got) ^ set(expected))
        different = [k for k in expected if got[k] != expected[k]]
        assert not different, (trial, moment, different)
    # some trials hit the run while it simulated
    assert any(0 < d < n for *_, d in moments), (t_store, full, moments)


def test_damaged_chunk_of_a_finished_realization_is_recomputed_on_resume(tmp_path):
    p = write_small_study(tmp_path / "s", n=4)
    study = load_study(p)
    prep = prepare(study)
    run_study(study, tmp_path / "ref", processes=1, progress=False, prepared=prep)
    run_study(study, tmp_path / "run", processes=1, progress=False, prepared=prep)
    chunk = tmp_path / "run" / "realizations.zarr" / "facies" / "c" / "2" / "0" / "0" / "0"
    chunk.write_bytes(b"\x00damaged" * 4)
    lost = tmp_path / "run" / "realizations.zarr" / "facies" / "c" / "3" / "0" / "0" / "0"
    lost.unlink()  # a chunk file lost entirely reads back as fill values
    res = run_study(study, tmp_path / "run", processes=1, progress=False, prepared=prep)
    assert sorted(res.ensemble.computed) == [2, 3]
    assert _folder_bytes(tmp_path / "ref") == _folder_bytes(tmp_path / "run")


def test_two_runs_in_fresh_interpreters_write_identical_bytes(tmp_path):
    p = write_small_study(tmp_path / "s", n=3)
    for name in ("a", "b"):
        subprocess.run(_cli(p, tmp_path / name), check=True, capture_output=True)
    assert _folder_bytes(tmp_path / "a") == _folder_bytes(tmp_path / "b")


def test_process_count_and_dask_write_identical_bytes(tmp_path):
    from distributed import Client, LocalCluster

    p = write_small_study(tmp_path / "s", n=4)
    study = load_study(p)
    prep = prepare(study)
    run_study(study, tmp_path / "one", processes=1, progress=False, prepared=prep)
    run_study(study, tmp_path / "two", processes=2, progress=False, prepared=prep)
    with (
        LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster,
        Client(cluster) as client,
    ):
        run_study(study, tmp_path / "dask", client=client, progress=False, prepared=prep)
    ref = _folder_bytes(tmp_path / "one")
    assert _folder_bytes(tmp_path / "two") == ref
    assert _folder_bytes(tmp_path / "dask") == ref


@pytest.mark.parametrize("engine", ["pattern_tree", "direct_sampler"])
def test_engine_threads_1_2_4_give_identical_realizations(engine):
    rng = np.random.default_rng(3)
    ti = (rng.random((3, 20, 20)) < 0.3).astype(np.int16)
    hard = np.full((3, 14, 14), -1, dtype=np.int16)
    hard[1, 3:10, 6] = 1
    params = {"template": {"radius": [1, 2, 2]}, "levels": 2} if engine == "pattern_tree" else {"neighbors": 8}
    out = []
    for threads in (1, 2, 4):
        fac = EngineFactory(engine, "facies", "categorical", (3, 14, 14), params, ti, hard, None, threads)
        out.append(fac().simulate(11)["facies"])
    np.testing.assert_array_equal(out[0], out[1])
    np.testing.assert_array_equal(out[0], out[2])
    assert (out[0][hard >= 0] == 1).all()


def test_readers_leave_the_run_folder_untouched(tmp_path):
    p = write_small_study(tmp_path / "s", n=2)
    run_study(load_study(p), tmp_path / "run", processes=1, progress=False)
    store = tmp_path / "run" / "realizations.zarr"
    before = _folder_bytes(store)
    # a read-only store: every file and folder without write permission
    for q in [store, *store.rglob("*")]:
        q.chmod(0o555 if q.is_dir() else 0o444)
    try:
        run = Run(tmp_path / "run")
        assert run.realization(1, "facies").shape == (4, 16, 16)
        summarize(tmp_path / "run")
        opened = RealizationStore.open(store)
        with pytest.raises(Exception, match="read"):  # opened read-only: writing is refused
            opened.write(0, {"facies": np.zeros((4, 16, 16), np.int16)})
    finally:
        for q in [store, *store.rglob("*")]:
            q.chmod(0o755 if q.is_dir() else 0o644)
    assert _folder_bytes(store) == before


def test_store_creation_killed_before_its_rename_leaves_no_store(tmp_path):
    # what a kill during creation leaves: only a temporary folder, removed by the next run
    p = write_small_study(tmp_path / "s", n=2)
    out = tmp_path / "run"
    (out / "realizations.zarr.tmp-99999999" / "facies").mkdir(parents=True)
    run_study(load_study(p), out, processes=1, progress=False)
    assert sorted(q.name for q in out.iterdir() if q.name.startswith("realizations")) == ["realizations.zarr"]


def test_check_reports_the_data_files_resolved(tmp_path, capsys):
    from strataloom.cli import main

    p = write_small_study(tmp_path / "s")
    (tmp_path / "data").mkdir()
    (tmp_path / "s" / "ti.npy").rename(tmp_path / "data" / "ti.npy")
    p.write_text(p.read_text().replace('file = "ti.npy"', 'file = "../data/./ti.npy"'))
    assert main(["check", "--no-probe", str(p)]) == 0
    (line,) = [x for x in capsys.readouterr().out.splitlines() if x.startswith("data files: ")]
    assert str((tmp_path / "data" / "ti.npy").resolve()) in line.split(", ")[0]
    assert ".." not in line and "/./" not in line


def test_the_package_loads_no_pickles_and_runs_no_code():
    # a study names data files only: nothing in the package may unpickle, evaluate or shell out
    import strataloom

    calls = re.compile(r"np\.load\((?:[^()]|\([^()]*\))*\)")
    for f in Path(strataloom.__file__).parent.rglob("*.py"):
        text = f.read_text()
        for bad in ("pickle.load", "eval(", "exec(", "shell=True", "os.system(", "allow_pickle=True",
                    "yaml.load(", "__import__("):
            assert bad not in text, f"{f.name} uses {bad}"
        for call in calls.findall(text):
            assert "allow_pickle=False" in call, f"{f.name}: {call}"


def test_a_worker_killed_by_the_system_gives_one_clear_error_and_resumes(tmp_path):
    from strataloom.ensemble import realization_seeds, run_ensemble
    from strataloom.errors import StudyError
    from strataloom.workflow import _store_attrs
    from study_helpers import DyingFactory

    p = write_small_study(tmp_path / "s", n=6)
    prep = prepare(load_study(p))
    seeds = realization_seeds(42, 6)
    store = RealizationStore.create(tmp_path / "r.zarr", attrs=_store_attrs(prep, seeds))
    with pytest.raises(StudyError, match=r"worker process died .* Run the same command again"):
        run_ensemble(DyingFactory(prep.factory(threads=1), bad_seed=seeds[2]), store, seeds, processes=2,
                     progress=False)
    assert not store.done()[2]
    res = run_ensemble(prep.factory(threads=1), store, seeds, processes=1, progress=False)
    assert 2 in res.computed and store.done().all()


_PADDED_UNDER_LIMIT = """
import resource
import numpy as np
import strataloom as sl
with open("/proc/self/status") as f:
    mapped = next(int(line.split()[1]) * 1024 for line in f if line.startswith("VmSize:"))
resource.setrlimit(resource.RLIMIT_AS, (mapped + 600 * 2**20, resource.RLIM_INFINITY))
ds = sl.DirectSampler(np.random.default_rng(0).normal(size=(20, 60, 60)), search_radius=(3, 10, 10))
try:
    ds.simulate((4, 8, 8), affinity=0.02, threads=1)   # a padded TI of about 4.7 GiB
except sl.MemoryLimitError as e:
    print(e)
ds.simulate((4, 8, 8), affinity=0.5, threads=1)
print("smaller padding ran")
"""


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs /proc to read the mapped size")
def test_padded_ti_over_an_address_space_limit_is_refused_naming_affinity():
    # under `ulimit -v`, the direct sampler's padded TI used to fail with a bare std::bad_alloc
    done = subprocess.run([sys.executable, "-c", _PADDED_UNDER_LIMIT], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
    assert re.search(r"The parameter 'affinity' of DirectSampler.simulate .* 4.7 GiB, more than the \S+ MiB "
                     r"this process can use; use affinity factors of at least 0.\d+\.", done.stdout), done.stdout
    assert "smaller padding ran" in done.stdout
