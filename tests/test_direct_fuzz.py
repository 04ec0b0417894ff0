"""Fuzzing the direct sampler: random small inputs never crash and keep the invariants.

Invariants (common practice, no source): every simulated value is one the training image holds
(the method copies TI values, Mariethoz et al. 2010, Water Resources Research 46, W11536), hard data
are honoured exactly, and the result does not depend on the thread count. The cases also draw
constant or per-cell rotation, affinity factors in [0.25, 4] and one or two zones (each zone copies
from its own TI). The data are random, invented for the test.
"""

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import strataloom as sl


@st.composite
def cases(draw):
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    three_d = draw(st.booleans())
    ti_shape = (draw(st.integers(2, 5)) if three_d else 1, draw(st.integers(3, 12)), draw(st.integers(3, 12)))
    categorical = draw(st.booleans())
    if categorical:
        k = draw(st.integers(1, 4))
        ti = rng.integers(0, k, size=ti_shape)
        masked = rng.random(ti_shape) < draw(st.floats(0, 0.4))
        ti[masked] = -1
        ti.flat[0] = 0
    else:
        ti = rng.normal(size=ti_shape)
        ti[rng.random(ti_shape) < draw(st.floats(0, 0.4))] = np.nan
        ti.flat[0] = 0.5
    grid = (draw(st.integers(1, 4)) if three_d else 1, draw(st.integers(1, 9)), draw(st.integers(1, 9)))
    informed = ti[ti >= 0] if categorical else ti[~np.isnan(ti)]
    pick = rng.random(grid) < draw(st.floats(0, 0.5))
    if categorical:
        hard = np.full(grid, -1, dtype=np.int64)
    else:
        hard = np.full(grid, np.nan)
    hard[pick] = rng.choice(informed, size=int(pick.sum()))
    params = {
        "neighbors": draw(st.integers(1, 12)),
        "accept_distance": draw(st.floats(0, 1)),
        "scan_fraction": draw(st.floats(0.05, 1)),
        "search_radius": draw(st.none() | st.integers(1, 4)),
    }
    path = draw(st.sampled_from(["random", "sweep"]))
    # a second zone: the TI with its values shifted (so the zones hold no value in common) and
    # its own parameters
    second = None
    if draw(st.booleans()):
        second = np.where(ti >= 0, ti + 4, -1) if categorical else ti + 10.0
    zones = (rng.random(grid) < 0.5).astype(np.int64) if second is not None else None
    geometry = {}
    rotation = draw(st.sampled_from(["none", "constant", "map"]))
    dip = three_d and grid[0] > 1 and draw(st.booleans())
    if rotation == "constant":
        azimuth = draw(st.floats(-180, 180))
        geometry["rotation"] = (azimuth, draw(st.floats(-60, 60))) if dip else azimuth
    elif rotation == "map":
        azimuth = rng.uniform(-180, 180, size=grid)
        geometry["rotation"] = (azimuth, rng.uniform(-60, 60, size=grid)) if dip else azimuth
    factors = st.floats(0.25, 4)
    affinity = draw(st.sampled_from(["none", "constant", "axes"]))
    if affinity == "constant":
        geometry["affinity"] = draw(factors)
    elif affinity == "axes":
        geometry["affinity"] = tuple(draw(factors) for _ in range(3))
    return ti, second, zones, grid, hard, pick, params, path, geometry, draw(st.integers(0, 2**40))


@settings(suppress_health_check=[HealthCheck.too_slow], deadline=None)
@given(cases())
def test_random_direct_runs_keep_the_invariants(case):
    ti, second, zones, grid, hard, pick, params, path, geometry, seed = case
    ds = sl.DirectSampler(ti, **params)
    tis = [ti]
    if second is None:
        def run(threads):
            return ds.simulate(grid, hard=hard, seed=seed, threads=threads, path=path, **geometry)
    else:
        other = sl.DirectSampler(second, **{**params, "neighbors": max(1, params["neighbors"] // 2)})
        tis.append(second)

        def run(threads):
            return sl.simulate_zones([ds, other], zones, grid, hard=hard, seed=seed, threads=threads,
                                     path=path, **geometry)
    out = run(1)
    assert out.shape == grid
    if np.issubdtype(ti.dtype, np.integer):
        held = np.unique(np.concatenate([t[t >= 0] for t in tis]))
        assert np.isin(out, held).all(), "a code the TI does not hold was simulated"
    else:
        assert np.isfinite(out).all()
        held = np.concatenate([t[~np.isnan(t)] for t in tis])
        assert np.isin(out, held).all(), "a value the TI does not hold was simulated"
    if zones is not None:  # each node copies from its own zone's TI
        for z, t in enumerate(tis):
            own = (zones == z) & ~pick
            informed = t[t >= 0] if np.issubdtype(ti.dtype, np.integer) else t[~np.isnan(t)]
            assert np.isin(out[own], informed).all()
    np.testing.assert_array_equal(out[pick], hard[pick])
    np.testing.assert_array_equal(run(3), out)
