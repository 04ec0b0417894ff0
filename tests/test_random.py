"""Counter-based draws, paths and conflict-free batches."""

import numpy as np
import pytest
from scipy import stats

import strataloom as sl


def test_same_key_same_draw():
    cells = np.arange(1000)
    a = sl.uniform_draws(42, 1, cells)
    np.testing.assert_array_equal(a, sl.uniform_draws(42, 1, cells))
    # order of evaluation does not matter: a permuted request gives the permuted draws
    perm = np.random.default_rng(1).permutation(1000)
    np.testing.assert_array_equal(sl.uniform_draws(42, 1, cells[perm]), a[perm])
    assert not np.array_equal(a, sl.uniform_draws(43, 1, cells))
    assert not np.array_equal(a, sl.uniform_draws(42, 2, cells))
    assert not np.array_equal(a, sl.uniform_draws(42, 1, cells, stream=101))


@pytest.mark.parametrize(("seed", "level"), [(0, 0), (12345, 3), (2**62, 7)])
def test_draws_are_uniform_by_chi_square(seed, level):
    # Reference library: scipy.stats.chisquare against equal expected counts in 50 bins.
    u = sl.uniform_draws(seed, level, np.arange(200_000))
    assert (u >= 0).all() and (u < 1).all()
    counts, _ = np.histogram(u, bins=50, range=(0, 1))
    assert stats.chisquare(counts).pvalue > 1e-4
    # consecutive cells are not correlated (lag-1 pairs on a 10 x 10 grid of cells)
    pairs, _, _ = np.histogram2d(u[:-1:2], u[1::2], bins=10, range=[[0, 1], [0, 1]])
    assert stats.chisquare(pairs.ravel()).pvalue > 1e-4


def test_random_path_is_a_permutation_that_depends_on_seed_only():
    g = sl.Grid((4, 10, 12))
    p = sl.random_path(g, 0, seed=9)
    assert np.array_equal(np.sort(p), np.arange(g.size))
    np.testing.assert_array_equal(p, sl.random_path(g, 0, seed=9))
    assert not np.array_equal(p, sl.random_path(g, 0, seed=10))
    # about as many inversions as a random permutation: n(n-1)/4 (common practice, no source)
    n = len(p)
    inv = sum(int((p[i] > p[i + 1 :]).sum()) for i in range(n))
    assert abs(inv - n * (n - 1) / 4) < 4 * np.sqrt(n**3 / 36)


def test_batches_are_conflict_free_and_cover_the_path():
    g = sl.Grid((6, 30, 30))
    path = sl.random_path(g, 1, seed=3, coarsest=2)
    reach = (1, 2, 3)
    order, starts = sl.conflict_free_batches(g, 1, reach, path, max_batch=50)
    assert np.array_equal(np.sort(order), np.sort(path))
    assert starts[0] == 0 and starts[-1] == len(path) and (np.diff(starts) >= 1).all()
    assert np.diff(starts).max() <= 50
    cells = g.cell(order) // 2
    for b in range(len(starts) - 1):
        c = cells[starts[b] : starts[b + 1]]
        d = np.abs(c[:, None, :] - c[None, :, :])
        near = (d <= np.array(reach)).all(axis=-1)
        np.fill_diagonal(near, False)
        assert not near.any()
    again, starts2 = sl.conflict_free_batches(g, 1, reach, path, max_batch=50)
    np.testing.assert_array_equal(order, again)
    np.testing.assert_array_equal(starts, starts2)
    # Nodes within reach of each other keep their path order, so running the batches in turn gives
    # what a sequential visit of the path gives (common practice, no source).
    rank = np.empty(g.size, dtype=np.int64)
    rank[order] = np.arange(len(order))
    along = g.cell(path) // 2
    d = np.abs(along[:, None, :] - along[None, :, :])
    i, j = np.nonzero(np.triu((d <= np.array(reach)).all(axis=-1), k=1))
    assert len(i) > 1000
    assert (rank[path[i]] < rank[path[j]]).all()


def test_a_max_batch_past_the_path_changes_nothing():
    # Batches cannot hold more than the path; a huge cap must neither overflow nor hang.
    g = sl.Grid((1, 20, 20))
    path = sl.random_path(g, 0, seed=5)
    order, starts = sl.conflict_free_batches(g, 0, (0, 2, 2), path, max_batch=len(path) + 1)
    big_order, big_starts = sl.conflict_free_batches(g, 0, (0, 2, 2), path, max_batch=2**62)
    np.testing.assert_array_equal(order, big_order)
    np.testing.assert_array_equal(starts, big_starts)


def test_bad_random_arguments():
    with pytest.raises(ValueError, match="seed"):
        sl.uniform_draws(-1, 0, [0])
    with pytest.raises(TypeError, match="cells"):
        sl.uniform_draws(0, 0, [0.5])
    with pytest.raises(ValueError, match="cells"):
        sl.uniform_draws(0, 0, [-3])
    with pytest.raises(TypeError, match="grid"):
        sl.random_path((3, 3), 0, seed=0)
    with pytest.raises(ValueError, match="path"):
        sl.conflict_free_batches(sl.Grid((2, 2)), 0, (0, 1, 1), [7], max_batch=4)
