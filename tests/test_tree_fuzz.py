"""Fuzzing the pattern-tree API: random small inputs never crash and keep the invariants."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import strataloom as sl


@st.composite
def runs(draw):
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    three_d = draw(st.booleans())
    ti_shape = (draw(st.integers(3, 6)) if three_d else 1, draw(st.integers(4, 12)), draw(st.integers(4, 12)))
    k = draw(st.integers(1, 4))
    ti = rng.integers(0, k, size=ti_shape)
    ti[rng.random(ti_shape) < draw(st.floats(0, 0.3))] = -1
    ti.flat[0] = 0
    radius = (1 if three_d else 0, draw(st.integers(1, 2)), draw(st.integers(1, 2)))
    levels = draw(st.integers(1, 2))
    if any(r << (levels - 1) >= n for r, n in zip(radius, ti_shape, strict=True) if r):
        levels = 1
    grid = (draw(st.integers(1, 4)) if three_d else 1, draw(st.integers(1, 10)), draw(st.integers(1, 10)))
    codes = np.unique(ti[ti >= 0])
    hard = np.full(grid, -1)
    pick = rng.random(grid) < draw(st.floats(0, 0.5))
    hard[pick] = rng.choice(codes, size=pick.sum())
    kk = int(ti.max()) + 1
    soft = None
    if draw(st.booleans()):
        p = rng.random((kk, *grid))
        p /= p.sum(axis=0)
        p[:, rng.random(grid) < 0.5] = np.nan
        soft = p
    return ti, radius, levels, grid, hard, pick, soft, draw(st.integers(1, 3))


@settings(suppress_health_check=[HealthCheck.too_slow], deadline=None)
@given(runs())
def test_random_runs_keep_the_invariants(case):
    ti, radius, levels, grid, hard, pick, soft, min_rep = case
    try:
        tree = sl.PatternTree(ti, sl.Template.box(radius), levels=levels, min_replicates=min_rep)
    except ValueError as e:  # a refused input must say which parameter
        assert "template" in str(e)
        return
    out = tree.simulate(grid, hard=hard, soft=soft, seed=3, threads=2)
    present = np.flatnonzero(tree.category_counts)
    assert out.shape == grid
    assert np.isin(out, present).all(), "a code the TI does not hold was simulated"
    np.testing.assert_array_equal(out[pick], hard[pick])
    probs, _, kept = tree.conditional(np.zeros((0, 3), int), np.zeros(0, int))
    assert kept == 0 and np.isclose(probs.sum(), 1) and (probs >= 0).all()


@pytest.mark.parametrize("k", [1, 2, 5])
def test_single_and_many_categories(k):
    ti = np.arange(36).reshape(6, 6) % k
    tree = sl.PatternTree(ti, sl.Template.box((0, 1, 1)))
    out = tree.simulate((5, 5), seed=1)
    assert set(np.unique(out)) <= set(range(k))
