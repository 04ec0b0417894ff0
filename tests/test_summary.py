"""Streaming ensemble summaries against in-memory NumPy/SciPy results."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.stats

import strataloom as sl
from storehelp import write_store
from strataloom.errors import MemoryLimitError, StudyError
from strataloom.runread import Run
from strataloom.summary import (
    CategoricalSummary,
    ContinuousSummary,
    exact_quantiles,
    normalised_entropy,
    open_summary,
    summarize,
)

# Invented random ensembles, only for the tests.
RNG = np.random.default_rng(20261201)


def _ensemble(n=9, shape=(4, 7, 6), k=3):
    facies = RNG.integers(0, k, (n, *shape)).astype(np.int16)
    poro = RNG.gamma(2.0, 0.05, (n, *shape)).astype(np.float32)
    return facies, poro


@pytest.mark.parametrize("budget", [10**9, 9 * 7 * 6 * 4, 9 * 6 * 4 * 2, 9 * 6 * 4])
@pytest.mark.parametrize("chunk_z", [None, 2])
def test_streaming_summary_equals_in_memory_numpy(tmp_path, budget, chunk_z):
    facies, poro = _ensemble()
    done = np.array([1, 1, 0, 1, 1, 1, 0, 1, 1])
    write_store(tmp_path, {"facies": facies, "porosity": poro}, done=done, chunk_z=chunk_z)
    out = summarize(tmp_path, memory_budget=budget)
    ds = open_summary(out)
    sel = np.flatnonzero(done)
    f, p = facies[sel], poro[sel]
    prob = np.stack([(f == c).mean(axis=0) for c in range(3)])
    np.testing.assert_allclose(ds["facies_probability"].values, prob, rtol=1e-6)
    # most likely: first maximum, as numpy.argmax
    np.testing.assert_array_equal(ds["facies_most_likely"].values, prob.argmax(axis=0))
    # reference library: scipy.stats.entropy with base K is the entropy normalised by log K
    ref = scipy.stats.entropy(prob, base=3, axis=0)
    np.testing.assert_allclose(ds["facies_entropy"].values, ref, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(
        ds["porosity_mean"].values, p.astype(np.float64).mean(axis=0), rtol=1e-6
    )
    np.testing.assert_allclose(
        ds["porosity_variance"].values, p.astype(np.float64).var(axis=0), rtol=1e-5
    )
    for q, name in [(0.1, "p10"), (0.5, "p50"), (0.9, "p90")]:
        np.testing.assert_allclose(
            ds[f"porosity_{name}"].values, np.quantile(p, q, axis=0), rtol=1e-6
        )
    np.testing.assert_array_equal(ds["realization"].values, sel)
    meta = json.loads(ds.attrs["strataloom"])
    props = np.stack([[np.mean(r == c) for c in range(3)] for r in f])
    np.testing.assert_allclose(
        meta["tables"]["facies"]["proportion"]["P50"], np.quantile(props, 0.5, axis=0)
    )
    assert list(tmp_path.glob("summary.zarr.*")) == []


def test_entropy_matches_scipy_and_bounds():
    p = RNG.dirichlet(np.ones(4), size=50).T
    p[:, 0] = [1, 0, 0, 0]
    p[:, 1] = 0.25
    h = normalised_entropy(p)
    # reference library: scipy.stats.entropy (natural log) divided by log K
    np.testing.assert_allclose(h, scipy.stats.entropy(p, axis=0) / np.log(4), rtol=1e-12)
    assert h[0] == 0.0 and h[1] == pytest.approx(1.0)


def test_welford_is_stable_for_large_offsets():
    # Welford 1962 (Technometrics 4(3)): the update keeps precision where E[x²] - E[x]² cancels.
    x = 1e8 + RNG.standard_normal((200, 50))
    acc = ContinuousSummary((50,))
    for row in x:
        acc.add(row)
    mean, var = acc.result()
    np.testing.assert_allclose(var, x.var(axis=0), rtol=1e-7)
    np.testing.assert_allclose(mean, x.mean(axis=0), rtol=1e-14)


def test_exact_quantiles_with_nan_equal_numpy_nanquantile():
    x = RNG.standard_normal((11, 40)).astype(np.float32)
    x[RNG.random(x.shape) < 0.2] = np.nan
    x[:, 0] = np.nan
    with np.errstate(all="ignore"), pytest.warns(RuntimeWarning):
        ref = np.nanquantile(x.astype(np.float64), [0.1, 0.5, 0.9], axis=0)
    got = exact_quantiles(x.copy())
    np.testing.assert_allclose(got, ref, rtol=1e-6, equal_nan=True)


def test_categorical_summary_leaves_out_unknown_codes():
    acc = CategoricalSummary([0, 1], (3,))
    acc.add(np.array([0, 1, -1]))
    acc.add(np.array([0, 0, -1]))
    np.testing.assert_allclose(acc.probability(0), [1.0, 0.5, np.nan])
    np.testing.assert_array_equal(acc.most_likely(), [0, 0, -1])


def test_memory_budget_too_small_names_the_parameter(tmp_path):
    _, poro = _ensemble()
    write_store(tmp_path, {"porosity": poro})
    with pytest.raises(MemoryLimitError, match="memory_budget"):
        summarize(tmp_path, memory_budget=100)
    assert list(tmp_path.glob("summary.zarr*")) == []


def test_failed_summary_keeps_the_previous_one(tmp_path):
    facies, _ = _ensemble()
    write_store(tmp_path, {"facies": facies})
    summarize(tmp_path)
    before = open_summary(tmp_path)["facies_entropy"].values.copy()

    def boom(done, total):
        raise RuntimeError("stop")

    with pytest.raises(RuntimeError):
        summarize(tmp_path, progress=boom)
    np.testing.assert_array_equal(open_summary(tmp_path)["facies_entropy"].values, before)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["realizations.zarr", "summary.zarr"]


def test_open_run_returns_a_lazy_xarray_dataset(tmp_path):
    facies, poro = _ensemble(n=5)
    done = [1, 0, 1, 1, 0]
    write_store(
        tmp_path,
        {"facies": facies, "porosity": poro},
        done=done,
        spacing=(2, 10, 10),
        origin=(100, 0, 50),
    )
    ds = sl.open_run(tmp_path)
    assert ds["facies"].dims == ("realization", "z", "y", "x")
    np.testing.assert_array_equal(ds["realization"].values, [0, 2, 3])
    np.testing.assert_array_equal(ds["facies"].values, facies[[0, 2, 3]])
    np.testing.assert_allclose(ds["x"].values, 55 + 10 * np.arange(6))
    np.testing.assert_allclose(ds["z"].values, [101, 103, 105, 107])
    np.testing.assert_array_equal(
        ds["porosity"].isel(realization=1, x=[0, 3]).values, poro[2][:, :, [0, 3]]
    )
    assert json.loads(ds.attrs["strataloom"])["format"] == "realizations"
    full = sl.open_run(tmp_path, completed_only=False)
    assert full.sizes["realization"] == 5 and full["done"].values.tolist() == [1, 0, 1, 1, 0]


def test_run_folder_errors_are_clear(tmp_path):
    with pytest.raises(StudyError, match=r"no realizations\.zarr"):
        Run(tmp_path)
    facies, _ = _ensemble(n=2)
    write_store(tmp_path, {"facies": facies}, extra={"format": "something else"})
    with pytest.raises(StudyError, match="format 'realizations'"):
        Run(tmp_path)
    with pytest.raises(sl.ParameterTypeError, match="'path'"):
        Run(3)


def test_summary_needs_a_finished_realization(tmp_path):
    facies, _ = _ensemble(n=2)
    write_store(tmp_path, {"facies": facies}, done=[0, 0])
    with pytest.raises(sl.ParameterError, match="at least one finished realization"):
        summarize(tmp_path)


def test_without_quantiles_only_mean_and_variance_are_written(tmp_path):
    _, poro = _ensemble()
    write_store(tmp_path, {"porosity": poro})
    ds = open_summary(summarize(tmp_path, quantiles=False, memory_budget=9 * 6 * 4 * 7))
    assert "porosity_p50" not in ds and "porosity_mean" in ds
    # Welford's running variance against numpy.var (population, ddof=0)
    np.testing.assert_allclose(
        ds["porosity_variance"].values, poro.astype(float).var(axis=0), rtol=1e-5
    )
