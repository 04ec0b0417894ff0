"""QC checks: pattern histograms and Jensen–Shannon divergence, data checks, copies, picks."""

from __future__ import annotations

import itertools
from collections import Counter

import numpy as np
import pytest
from scipy.spatial.distance import jensenshannon

import strataloom as sl
from storehelp import write_store
from strataloom.qc import (
    check_run,
    copy_diagnostics,
    js_divergence,
    k_medoids,
    pattern_divergence,
    pattern_histogram,
    representative_by_measure,
    soft_agreement,
    ti_half_baseline,
)

RNG = np.random.default_rng(5)


@pytest.mark.parametrize("size", [3, 10, 50])
def test_js_divergence_equals_scipy(size):
    p, q = RNG.random(size), RNG.random(size)
    p[0] = 0.0
    # reference library: scipy.spatial.distance.jensenshannon (the square root of the divergence)
    assert js_divergence(p, q) == pytest.approx(jensenshannon(p, q, base=2) ** 2, rel=1e-10)
    assert js_divergence(p, p) == pytest.approx(0.0, abs=1e-15)
    assert js_divergence([1, 0], [0, 1]) == pytest.approx(1.0)


def test_pattern_histogram_equals_a_counter_of_windows():
    f = RNG.integers(0, 3, (3, 7, 8))
    f[1, 2, 3] = -1  # unknown cell: windows over it are left out
    keys, counts = pattern_histogram(f, [0, 1, 2], (2, 3, 2))
    ref = Counter()
    for z, y, x in itertools.product(range(2), range(5), range(7)):
        w = f[z : z + 2, y : y + 3, x : x + 2]
        if (w >= 0).all():
            ref[tuple(w.ravel())] += 1
    got = {}
    for k, c in zip(keys, counts, strict=True):
        digits = []
        for _ in range(12):
            digits.append(int(k % 3))
            k //= 3
        got[tuple(reversed(digits))] = int(c)
    assert got == dict(ref)


def test_ti_half_baseline_is_zero_for_identical_halves_and_large_for_different_ones():
    tile = RNG.integers(0, 2, (1, 20, 20))
    same = np.concatenate([tile, tile], axis=2)
    assert ti_half_baseline(same, [0, 1]) == pytest.approx(0.0, abs=1e-12)
    diff = np.concatenate([np.zeros((1, 20, 20), int), RNG.integers(0, 2, (1, 20, 20))], axis=2)
    assert ti_half_baseline(diff, [0, 1]) > 0.5
    a = pattern_histogram(tile, [0, 1])
    assert pattern_divergence(a, a) == 0.0


def test_soft_agreement_bins():
    soft = RNG.random((2, 1, 30, 30))
    soft[1] = 1 - soft[0]
    res = soft_agreement(soft, soft, bins=5)
    np.testing.assert_allclose(res["soft_mean"], res["simulated_mean"])
    assert res["cells"].sum() == 2 * 900
    off = soft_agreement(np.clip(soft + 0.3, 0, 1), soft, bins=5)
    assert np.nanmax(off["simulated_mean"] - off["soft_mean"]) > 0.2


def test_copy_diagnostics_on_a_constructed_source_map():
    # Invented source map: left 6 columns copied as one block from the TI (same shift),
    # right columns copied cell by cell from scattered TI cells (no two neighbours aligned).
    ti_shape = (1, 40, 40)
    src = np.full((1, 10, 10), -1, np.int64)
    yy, xx = np.mgrid[0:10, 0:6]
    src[0, :, :6] = np.ravel_multi_index((np.zeros_like(yy), yy + 5, xx + 7), ti_shape)
    scattered = np.arange(30) * 53 % 1600
    rest = np.argwhere(np.ones((10, 3), bool))
    for (y, x), s in zip(rest, scattered, strict=True):
        src[0, y, 6 + x] = s  # shifts differ from neighbour to neighbour
    res = copy_diagnostics(src, ti_shape, min_size=27)
    assert res["copied"] == 90 and res["largest"] == 60 and res["patches"] == 1
    assert res["share"] == pytest.approx(60 / 90)
    with pytest.raises(sl.ParameterError, match="'source'"):
        copy_diagnostics(np.full((1, 2, 2), 10**6), ti_shape)


def test_k_medoids_finds_the_exhaustive_optimum():
    centres = np.array([[0, 0], [10, 0], [0, 10]])
    pts = np.concatenate([c + RNG.standard_normal((6, 2)) for c in centres])
    d = np.linalg.norm(pts[:, None] - pts[None], axis=-1)
    med, assign = k_medoids(d, 3)
    # reference: exhaustive search over all 3-subsets (common practice, no source)
    best = min(
        itertools.combinations(range(len(pts)), 3), key=lambda m: d[list(m)].min(axis=0).sum()
    )
    assert tuple(med) == tuple(sorted(best))
    assert np.bincount(assign).tolist() == [6, 6, 6]


def test_representatives_by_measure():
    x = np.array([5.0, 1.0, 3.0, 9.0, 7.0, 2.0, 8.0, 4.0, 6.0, 10.0])
    # numpy.quantile of 1..10: P10 = 1.9, P50 = 5.5, P90 = 9.1
    # -> nearest values 2, 5 (tie -> first), 9
    assert representative_by_measure(x) == {"P10": 5, "P50": 0, "P90": 3}


def _qc_run(tmp_path, honour=True):
    n, shape = 6, (3, 16, 18)
    reals = (RNG.random((n, *shape)) < 0.3).astype(np.int16)
    cells = np.array([[z, 4, 4] for z in range(3)] + [[z, 12, 14] for z in range(3)])
    vals = np.array([1, 1, 1, 0, 0, 0])
    reals[:, cells[:, 0], cells[:, 1], cells[:, 2]] = vals
    if not honour:
        reals[2, 0, 4, 4] = 0
    soft = np.stack([1 - reals.mean(0), reals.mean(0)]).astype(np.float32)
    cats = {
        "facies": [
            {"code": 0, "name": "mud", "colour": "#777777"},
            {"code": 1, "name": "sand", "colour": "#ddbb44"},
        ]
    }
    write_store(
        tmp_path,
        {"facies": reals},
        categories=cats,
        soft=soft,
        hard={"cells": cells, "values_facies": vals},
    )
    ti = (RNG.random((4, 30, 30)) < 0.3).astype(np.int16)
    return ti


def test_check_run_verdicts(tmp_path):
    ti = _qc_run(tmp_path)
    res = check_run(tmp_path, ti=ti, target_proportions=[0.7, 0.3], baseline=True, baseline_count=2)
    names = [d["check"] for d in res.verdicts]
    assert names == [
        "Hard data honoured",
        "Proportions against the target",
        "Proportions against the TI",
        "Soft data agreement",
        "Indicator variograms against the TI",
        "Pattern histograms against the TI",
        "Connectivity functions against the TI",
    ]
    by = {d["check"]: d["verdict"] for d in res.verdicts}
    assert res.hard["share"] == 1.0 and by["Hard data honoured"] == "pass"
    assert by["Soft data agreement"] == "pass"  # soft = the ensemble's own probabilities
    assert res.facies == 1 and res.pattern_size == (2, 3, 3)
    assert res.pattern_js.shape == (6,) and res.pattern_baseline > 0
    assert res.baseline_connectivity_fn.shape == (2, 3, res.max_lag)
    assert set(res.by_measure) == {"P10", "P50", "P90"} and len(res.medoids) == 3


def test_check_run_flags_a_broken_hard_datum(tmp_path):
    _qc_run(tmp_path, honour=False)
    res = check_run(tmp_path)
    assert res.hard["share"] == pytest.approx(35 / 36)
    assert res.verdicts[0]["verdict"] == "fail"


def test_check_run_parameters(tmp_path):
    _qc_run(tmp_path)
    with pytest.raises(sl.ParameterError, match="'target_proportions'"):
        check_run(tmp_path, target_proportions=[0.5, 0.6])
    with pytest.raises(sl.ParameterError, match="'facies'"):
        check_run(tmp_path, facies=7)
    with pytest.raises(sl.ParameterTypeError, match="'ti'"):
        check_run(tmp_path, ti=np.zeros((3, 3)))
