"""DirectSampler: agreement with the brute-force NumPy reference, hard data, determinism, Ctrl-C."""

from __future__ import annotations

import os
import signal
import threading
import time

import numpy as np
import pytest

import strataloom as sl
from reference.direct_numpy import distance_table, simulate_reference


def _dyadic(rng: np.random.Generator, shape: tuple[int, ...], levels: int = 5) -> np.ndarray:
    """Values on k / (levels - 1) with both ends present, so normalising by the range is exact."""
    a = rng.integers(0, levels, size=shape).astype(np.float64) / (levels - 1)
    a.flat[0], a.flat[1] = 0.0, 1.0
    return a


CASES = {
    "continuous-random": dict(kinds=["continuous"], path="random", accept=0.0, scan=0.5, hard=0.0),
    "continuous-accept": dict(
        kinds=["continuous"], path="random", accept=0.26, scan=0.4, hard=0.05
    ),
    "categorical-sweep": dict(kinds=["categorical"], path="sweep", accept=0.0, scan=0.7, hard=0.1),
    "mixed-partial-hard": dict(
        kinds=["continuous", "categorical"], path="random", accept=0.1, scan=0.3, hard=0.15
    ),
}


@pytest.mark.parametrize("name", list(CASES))
def test_engine_matches_the_numpy_reference(name):
    # The engine against tests/reference/direct_numpy.py, an independent slow implementation of
    # the documented rules (common practice, no source: fast kernel checked against an obvious one).
    case = CASES[name]
    rng = np.random.default_rng(len(name))
    tshape, gshape = (1, 13, 16), (1, 15, 14)
    kinds = case["kinds"]
    ti = {}
    for i, k in enumerate(kinds):
        if k == "continuous":
            a = _dyadic(rng, tshape)
            a[0, 5, 5] = np.nan  # a masked cell
        else:
            a = rng.integers(0, 3, size=tshape)
            a[0, 6, 2] = -1
        ti[f"v{i}"] = a
    hard = {}
    for i, k in enumerate(kinds):
        known = rng.random(gshape) < case["hard"]
        if k == "continuous":
            hard[f"v{i}"] = np.where(known, _dyadic(rng, gshape), np.nan)
        else:
            hard[f"v{i}"] = np.where(known, rng.integers(0, 3, size=gshape), -1)
    weights = {f"v{i}": 1.0 + i for i in range(len(kinds))}
    ds = sl.DirectSampler(
        ti,
        neighbors=6,
        accept_distance=case["accept"],
        scan_fraction=case["scan"],
        search_radius=(0, 3, 3),
        weights=weights,
        lag_power=0.0,  # equal lag weights keep the distances exact in binary arithmetic
    )
    out, source = ds.simulate(gshape, hard=hard, seed=11, path=case["path"], return_source=True)

    names = list(ti)
    ref_ti = [
        np.where(ti[n] < 0, -1, ti[n]).astype(float) if k == "categorical" else ti[n]
        for n, k in zip(names, kinds, strict=True)
    ]
    ref_state = [
        np.where(hard[n] < 0, np.nan, hard[n]).astype(float) if k == "categorical" else hard[n]
        for n, k in zip(names, kinds, strict=True)
    ]
    ref, ref_source = simulate_reference(
        ref_ti,
        [k == "categorical" for k in kinds],
        ref_state,
        [False] * len(kinds),
        ds.template.offsets,
        6,
        case["accept"],
        case["scan"],
        [weights[n] for n in names],
        11,
        path=case["path"],
    )
    np.testing.assert_array_equal(source, ref_source)
    for n, r in zip(names, ref, strict=True):
        np.testing.assert_array_equal(np.asarray(out[n], dtype=float), r)


@pytest.mark.parametrize(("rotation", "affinity"), [(30.0, None), ("map", (1.0, 0.5, 2.0))])
def test_turned_lags_match_the_numpy_reference(rotation, affinity):
    # Rotation and affinity against the same independent reference (common practice, no source):
    # each node's lags turned by its class's matrix, rounded half to even, then the plain rules.
    rng = np.random.default_rng(9)
    tshape, gshape = (1, 14, 15), (1, 12, 13)
    ti = _dyadic(rng, tshape)
    hard = np.where(rng.random(gshape) < 0.05, _dyadic(rng, gshape), np.nan)
    if rotation == "map":
        rotation = np.where(np.arange(13)[None, None, :] < 6, 20.0, 75.0) * np.ones(gshape)
    ds = sl.DirectSampler(ti, neighbors=6, accept_distance=0.0, scan_fraction=0.5, search_radius=(0, 3, 3),
                          lag_power=0.0)  # equal lag weights: distances exact in binary arithmetic
    out, source = ds.simulate(gshape, hard=hard, seed=5, rotation=rotation, affinity=affinity, return_source=True)
    from strataloom.geometry import grid_to_ti, local_geometry

    geo = local_geometry(rotation, affinity, gshape, "test")
    rows, classes = np.unique(geo.rows(int(np.prod(gshape))), axis=0, return_inverse=True)
    matrices = grid_to_ti(rows)
    reach = np.asarray(ds.template.reach)
    pad = np.maximum(reach, np.floor(np.abs(matrices) @ reach + 0.5).max(axis=0).astype(np.int64))
    ref, ref_source = simulate_reference(
        [ti], [False], [hard], [False], ds.template.offsets, 6, 0.0, 0.5, [1.0], 5,
        matrices=matrices.reshape(-1, 9), classes=classes.reshape(gshape), ti_reach=tuple(int(r) for r in pad),
    )
    np.testing.assert_array_equal(source, ref_source)
    np.testing.assert_array_equal(out, ref[0])


def test_auxiliary_variable_matches_the_reference():
    rng = np.random.default_rng(3)
    tshape, gshape = (1, 14, 14), (1, 12, 12)
    fine = _dyadic(rng, tshape)
    trend = _dyadic(rng, tshape, levels=3)
    ds = sl.DirectSampler(
        {"fine": fine, "trend": trend},
        neighbors=5,
        accept_distance=0.05,
        scan_fraction=0.6,
        search_radius=2,
        auxiliary=["trend"],
        weights={"fine": 1.0, "trend": 3.0},
        lag_power=0.0,  # equal lag weights keep the distances exact in binary arithmetic
    )
    aux = _dyadic(rng, gshape, levels=3)
    out, source = ds.simulate(gshape, auxiliary={"trend": aux}, seed=4, return_source=True)
    assert set(out) == {"fine"}
    ref, ref_source = simulate_reference(
        [fine, trend],
        [False, False],
        [np.full(gshape, np.nan), aux],
        [False, True],
        ds.template.offsets,
        5,
        0.05,
        0.6,
        [1.0, 3.0],
        4,
    )
    np.testing.assert_array_equal(source, ref_source)
    np.testing.assert_array_equal(out["fine"], ref[0])


@pytest.mark.parametrize("kind", ["categorical", "continuous"])
def test_full_scan_with_zero_threshold_finds_a_zero_distance_match_when_one_exists(kind):
    # Brute force over the whole TI (tests/reference/direct_numpy.py, distance_table): with
    # scan_fraction=1 and accept_distance=0 the copied location has the smallest distance, and that
    # is 0 whenever some TI location matches exactly (common practice, no source).
    rng = np.random.default_rng(7)
    tshape, gshape = (1, 24, 24), (1, 31, 31)
    if kind == "categorical":
        ti = (np.add.outer(np.arange(24) // 3, np.arange(24) // 2) % 3)[None].astype(np.int64)
        ti[0, rng.integers(0, 24, 40), rng.integers(0, 24, 40)] = rng.integers(0, 3, 40)
        grid = (np.add.outer(np.arange(31) // 3, np.arange(31) // 2) % 3)[None].astype(float)
        grid[0, rng.integers(0, 31, 60), rng.integers(0, 31, 60)] = rng.integers(0, 3, 60)
    else:
        ti = _dyadic(rng, tshape, levels=3)
        grid = np.tile(ti, (1, 2, 2))[:, :31, :31].copy()
        grid[0, rng.integers(0, 31, 80), rng.integers(0, 31, 80)] = 0.5
    unknown = [(0, y, x) for y in range(1, 31, 6) for x in range(2, 31, 6)]
    hard = grid.copy()
    for c in unknown:
        hard[c] = -1 if kind == "categorical" else np.nan
    ds = sl.DirectSampler(
        ti, neighbors=8, accept_distance=0.0, scan_fraction=1.0, search_radius=(0, 2, 2), lag_power=0.0
    )
    _, source = ds.simulate(gshape, hard=hard, seed=5, return_source=True)
    offsets = ds.template.offsets
    exact = 0
    for c in unknown:
        lags = []
        for o in offsets:
            p = np.add(c, o)
            if np.all(p >= 0) and np.all(p < gshape):
                lags.append((o, hard[tuple(p)]))
        lags = lags[:8]
        table = distance_table(
            [ti.astype(float)],
            [kind == "categorical"],
            [(np.array([o for o, _ in lags]), np.array([x for _, x in lags]))],
            [1.0],
        )
        got = table[source[c]]
        assert got == pytest.approx(table.min(), abs=1e-6)
        exact += table.min() == 0
        if table.min() == 0:
            assert got == 0
    assert exact >= 5  # the setup does contain exact matches


def test_hard_data_are_honoured_and_sources_point_at_copied_values():
    rng = np.random.default_rng(1)
    ti = rng.normal(size=(30, 30))
    hard = np.where(rng.random((25, 28)) < 0.2, rng.normal(size=(25, 28)) * 5, np.nan)
    ds = sl.DirectSampler(ti, neighbors=12, scan_fraction=0.2)
    out, src = ds.simulate((25, 28), hard=hard, seed=3, return_source=True)
    known = ~np.isnan(hard)
    np.testing.assert_array_equal(out[known], hard[known])  # bit for bit, even outside the TI range
    assert np.all(src[known] == -1) and np.all(src[~known] >= 0)
    np.testing.assert_array_equal(out[~known], ti.ravel()[src[~known]])
    full = ds.simulate((25, 28), hard=np.nan_to_num(hard, nan=1.5), seed=3)
    np.testing.assert_array_equal(full, np.nan_to_num(hard, nan=1.5))
    assert ds.last_stats["nodes"] == 0


def test_partly_informed_nodes_keep_their_known_variable():
    rng = np.random.default_rng(2)
    a = rng.normal(size=(20, 20))
    b = (a > 0).astype(np.int32)  # b is a function of a in the TI
    ds = sl.DirectSampler({"a": a, "b": b}, neighbors=10, accept_distance=0.0, scan_fraction=1.0)
    hard_b = np.where(rng.random((18, 18)) < 0.5, rng.integers(0, 2, (18, 18)), -1)
    out, src = ds.simulate((18, 18), hard={"b": hard_b}, seed=9, return_source=True)
    known = hard_b >= 0
    np.testing.assert_array_equal(out["b"][known], hard_b[known])
    assert np.all(src >= 0)  # every node got a value of `a`
    np.testing.assert_array_equal(out["a"], a.ravel()[src])
    assert out["b"].dtype == np.int32
    # where b was simulated it comes from the same TI cell as a
    np.testing.assert_array_equal(out["b"][~known], b.ravel()[src[~known]])


@pytest.mark.parametrize("path", ["random", "sweep"])
def test_result_is_identical_for_1_2_and_4_threads(path):
    rng = np.random.default_rng(4)
    ti = {"k": rng.normal(size=(6, 20, 20)), "f": rng.integers(0, 3, (6, 20, 20))}
    ds = sl.DirectSampler(ti, neighbors=10, scan_fraction=0.1, search_radius=(1, 3, 3))
    # some nodes partly informed (only "f" given): later nodes' given variables are read early
    hard = {"f": np.where(rng.random((8, 24, 24)) < 0.2, rng.integers(0, 3, (8, 24, 24)), -1)}
    runs = [
        ds.simulate((8, 24, 24), hard=hard, seed=21, threads=t, path=path, return_source=True)
        for t in (1, 2, 4, 4)
    ]
    for out, src in runs[1:]:
        np.testing.assert_array_equal(src, runs[0][1])
        np.testing.assert_array_equal(out["k"], runs[0][0]["k"])
        np.testing.assert_array_equal(out["f"], runs[0][0]["f"])
    other = ds.simulate((8, 24, 24), seed=22, return_source=True)[1]
    assert np.mean(other != runs[0][1]) > 0.5


def test_engine_counters_and_progress():
    rng = np.random.default_rng(5)
    ds = sl.DirectSampler(rng.normal(size=(40, 40)), neighbors=16)
    seen = []
    ds.simulate((30, 30), seed=1, progress=lambda d, t: seen.append((d, t)))
    st = ds.last_stats
    assert st["nodes"] == 900 and seen[-1] == (900, 900)
    assert st["comparisons"] > 0 and st["candidates"] >= 900
    assert 0 <= st["accepted"] <= 900 and st["ns_per_comparison"] > 0


@pytest.mark.skipif(not hasattr(signal, "pthread_kill"), reason="needs POSIX signals")
def test_ctrl_c_raises_keyboard_interrupt_within_a_second():
    rng = np.random.default_rng(6)
    ds = sl.DirectSampler(
        rng.normal(size=(20, 50, 50)), neighbors=40, accept_distance=0.0, scan_fraction=1.0
    )
    before = len(os.listdir("/proc/self/task"))
    main = threading.main_thread().ident
    timer = threading.Timer(0.3, lambda: signal.pthread_kill(main, signal.SIGINT))
    t0 = time.monotonic()
    timer.start()
    with pytest.raises(KeyboardInterrupt):
        ds.simulate((60, 60, 60), seed=1, threads=2)
    elapsed = time.monotonic() - t0
    timer.join()
    assert elapsed < 1.5
    assert len(os.listdir("/proc/self/task")) <= before
