"""Fuzzing the direct sampler: random small inputs never crash and keep the invariants.

Invariants (common practice, no source): every simulated value is one the training image holds
(the method copies TI values, Mariethoz et al. 2010, Water Resources Research 46, W11536), hard data
are honoured exactly, and the result does not depend on the thread count.
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
    return ti, grid, hard, pick, params, path, draw(st.integers(0, 2**40))


@settings(suppress_health_check=[HealthCheck.too_slow], deadline=None)
@given(cases())
def test_random_direct_runs_keep_the_invariants(case):
    ti, grid, hard, pick, params, path, seed = case
    ds = sl.DirectSampler(ti, **params)
    out = ds.simulate(grid, hard=hard, seed=seed, threads=1, path=path)
    assert out.shape == grid
    if np.issubdtype(ti.dtype, np.integer):
        assert np.isin(out, np.unique(ti[ti >= 0])).all(), "a code the TI does not hold was simulated"
    else:
        assert np.isfinite(out).all()
        assert np.isin(out, ti[~np.isnan(ti)]).all(), "a value the TI does not hold was simulated"
    np.testing.assert_array_equal(out[pick], hard[pick])
    np.testing.assert_array_equal(ds.simulate(grid, hard=hard, seed=seed, threads=3, path=path), out)
