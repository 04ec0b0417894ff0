"""DirectSampler against outside facts: Markov chains, patterns, bundled textures, downscaling."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from scipy.stats import ks_2samp

import strataloom as sl
from strataloom.downscale import block_means

# An order-1 Markov chain of 3 states; the matrix is invented for the test.
P = np.array([[0.7, 0.2, 0.1], [0.15, 0.7, 0.15], [0.2, 0.3, 0.5]])


def _chain(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    cum = P.cumsum(axis=1)
    u = rng.random(n)
    x = np.empty(n, dtype=np.int64)
    x[0] = 0
    for i in range(1, n):
        x[i] = min(int(np.searchsorted(cum[x[i - 1]], u[i], side="right")), 2)
    return x


def _transitions(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    m = np.zeros((3, 3))
    np.add.at(m, (x[:-1], x[1:]), 1)
    return m / m.sum(axis=1, keepdims=True), m.sum(axis=1)


@pytest.fixture(scope="module")
def chain_ti() -> np.ndarray:
    return _chain(20000, seed=0)[None, None, :]


def test_sweep_with_one_neighbour_reproduces_the_transition_matrix(chain_ti):
    # Shannon (1948), "A Mathematical Theory of Communication": drawing each symbol from the
    # training sequence given the previous one reproduces the digram (transition) statistics.
    # Sampling error of a transition frequency: binomial standard error sqrt(p (1 - p) / n_i),
    # for the TI's own estimate and the simulation's; 4 standard errors allowed.
    ds = sl.DirectSampler(chain_ti, neighbors=1, accept_distance=0.0, scan_fraction=0.3)
    sim = ds.simulate((1, 1, 6000), seed=3, path="sweep").ravel()
    got, counts = _transitions(sim)
    _, ti_counts = _transitions(chain_ti.ravel())
    se = np.sqrt(P * (1 - P) * (1 / counts[:, None] + 1 / ti_counts[:, None]))
    assert np.all(np.abs(got - P) <= 4 * se)


def test_random_path_with_four_neighbours_reproduces_the_transition_matrix(chain_ti):
    # Same source (Shannon 1948); with neighbours on both sides the conditional is still that of
    # the chain. Tolerance 0.06 from the issue; measured here 0.012-0.039 over seeds.
    ds = sl.DirectSampler(chain_ti, neighbors=4, accept_distance=0.0, scan_fraction=0.3)
    sim = ds.simulate((1, 1, 6000), seed=3).ravel()
    got, _ = _transitions(sim)
    assert np.abs(got - P).max() <= 0.06


def test_random_path_with_one_neighbour_does_not(chain_ti):
    # Negative check of the path option: one neighbour on a random path ignores one side of each
    # node (measured here: 0.11-0.12 max error; the issue measured about 0.26 elsewhere).
    ds = sl.DirectSampler(chain_ti, neighbors=1, accept_distance=0.0, scan_fraction=0.3)
    sim = ds.simulate((1, 1, 6000), seed=3).ravel()
    got, _ = _transitions(sim)
    assert np.abs(got - P).max() > 0.08


def _checkerboard(n: int) -> np.ndarray:
    return (np.add.outer(np.arange(n), np.arange(n)) % 2).astype(np.int64)


def _stripes(n: int) -> np.ndarray:
    return np.tile((np.arange(n) // 2) % 3, (n, 1)).astype(np.int64)  # width-2 stripes, 3 codes


@pytest.mark.parametrize("pattern", ["checkerboard", "stripes", "stripes-continuous"])
def test_periodic_patterns_are_reproduced_exactly_with_zero_threshold(pattern):
    # Fact of the trade (common practice, no source): with accept_distance 0 each node copies a TI
    # location whose neighbourhood matches exactly, so a periodic TI is continued without a defect
    # once the neighbourhood spans the grid (every node after the first sees a simulated one).
    ti = _checkerboard(48) if pattern == "checkerboard" else _stripes(48)
    if pattern == "stripes-continuous":
        ti = ti / 2.0
    ds = sl.DirectSampler(ti, neighbors=8, accept_distance=0.0, scan_fraction=1.0, search_radius=24)
    sim = ds.simulate((24, 24), seed=5)
    assert ds.last_stats["exact"] == ds.last_stats["nodes"]  # every node matched exactly
    if pattern == "checkerboard":
        assert np.all(sim[1:] != sim[:-1]) and np.all(sim[:, 1:] != sim[:, :-1])
    else:
        assert np.all(sim[1:] == sim[:-1])
        row = sim[0]
        changes = np.flatnonzero(row[1:] != row[:-1])
        assert np.all(row[6:] == row[:-6]) and np.all(np.diff(changes) == 2) and len(set(row)) == 3


def _variogram(a: np.ndarray, h: int, axis: int) -> float:
    # Experimental semivariogram, gamma(h) = mean((z(x + h) - z(x))**2) / 2 (Goovaerts 1997,
    # "Geostatistics for Natural Resources Evaluation", eq. 2.1).
    a = np.asarray(a, dtype=np.float64)
    d = a[:, h:] - a[:, :-h] if axis == 1 else a[h:] - a[:-h]
    return 0.5 * float(np.mean(d * d))


LAGS = [(axis, h) for axis in (0, 1) for h in (1, 2, 4)]


@pytest.mark.parametrize("name", ["brick", "grass", "gravel"])
def test_texture_synthesis_on_scikit_image_textures(name):
    # Reference images bundled with scikit-image (skimage.data.brick / grass / gravel, shipped in
    # the wheel, no download). Histogram: two-sample Kolmogorov-Smirnov statistic
    # (scipy.stats.ks_2samp) at most 0.1. Variogram along both axes at lags 1, 2, 4: relative to
    # the TI's, within the range spanned by 300 random TI windows of the simulation's size (the
    # TI's own sampling variability), widened by 0.1 (tolerances chosen by us from that spread).
    data = pytest.importorskip("skimage.data")
    ti = getattr(data, name)()[:256, :256].astype(np.float64)
    ds = sl.DirectSampler(ti, neighbors=8, accept_distance=0.03, scan_fraction=0.3)
    size = 64
    sims = [ds.simulate((size, size), seed=s) for s in (1, 2)]
    for sim in sims:
        assert ks_2samp(sim.ravel(), ti.ravel()).statistic <= 0.1
    base = np.array([_variogram(ti, h, axis) for axis, h in LAGS])
    got = np.mean([[_variogram(s, h, axis) for axis, h in LAGS] for s in sims], axis=0) / base - 1
    rng = np.random.default_rng(0)
    windows = []
    for _ in range(300):
        y, x = rng.integers(0, 256 - size, 2)
        w = ti[y : y + size, x : x + size]
        windows.append([_variogram(w, h, axis) for axis, h in LAGS])
    rel = np.array(windows) / base - 1
    low, high = np.percentile(rel, 1, axis=0) - 0.1, np.percentile(rel, 99, axis=0) + 0.1
    assert np.all(got >= low) and np.all(got <= high), (got, low, high)


def _field(shape: tuple[int, int], seed: int) -> np.ndarray:
    # Invented data: white noise smoothed by a Gaussian kernel (a Gaussian random field).
    rng = np.random.default_rng(seed)
    return gaussian_filter(rng.standard_normal(shape), 2.0, mode="wrap")


def test_downscaling_honours_block_means_and_fine_variogram():
    # Invented data (Gaussian random fields). Targets from the issue: simulated block means
    # correlate >= 0.9 with the given coarse field, and the fine-scale semivariogram (Goovaerts
    # 1997, eq. 2.1) is within 20 % of the truth's at short lags, here lags 1 and 2 along both axes.
    # Measured: lag 1 +4 to +10 %, lag 2 -9 to -14 % (with the former linear coarse surface lag 2
    # was 21-26 % low, so this fails on it); lag 4, not asserted, 11-14 % low.
    factor = 4
    fine_train = _field((128, 128), seed=1)
    truth = _field((64, 64), seed=2)
    coarse_train = block_means(fine_train, factor)
    coarse = block_means(truth, factor)
    sims = sl.downscale(coarse_train, fine_train, coarse, realizations=2, seed=3)
    assert sims.shape == (2, 64, 64)
    for sim in sims:
        r = np.corrcoef(block_means(sim, factor).ravel(), coarse.ravel())[0, 1]
        assert r >= 0.9
        assert np.std(sim) == pytest.approx(np.std(truth), rel=0.1)
        for axis in (0, 1):
            for h in (1, 2):
                got, want = _variogram(sim, h, axis), _variogram(truth, h, axis)
                assert got == pytest.approx(want, rel=0.2), (axis, h, got / want - 1)
    exact = sl.downscale(
        coarse_train[:16, :16], fine_train[:64, :64], coarse[:8, :8], seed=3, match_block_means=True
    )[0]
    np.testing.assert_allclose(block_means(exact, factor), coarse[:8, :8], atol=1e-12)


@pytest.mark.parametrize("shape, factor", [((16, 16), (4, 4)), ((3, 8, 8), (2, 4, 4)), ((1, 12), (4, 3))])
def test_coarse_surface_is_smooth_and_keeps_block_means(shape, factor):
    # The mean-preserving (pycnophylactic) property of Tobler (1979), "Smooth pycnophylactic
    # interpolation for geographical regions", JASA 74: the spread field's block means are the
    # coarse values. Invented data (white noise), plus a checkerboard, the hardest case to converge.
    from strataloom.downscale import _spread

    coarse = np.random.default_rng(0).standard_normal(shape)
    board = (np.indices(shape).sum(axis=0) % 2).astype(np.float64)
    for c in (coarse, board):
        fine = _spread(c, factor)
        assert fine.shape == tuple(n * k for n, k in zip(shape, factor, strict=True))
        np.testing.assert_allclose(block_means(fine, factor), c, atol=1e-6 * np.ptp(c))  # _spread's tolerance
    # Smooth: no steps at block edges. Steps across block edges along x are on average at most
    # twice those inside blocks (measured 1.2-1.5 here; a repeated field has none inside blocks).
    steps = np.abs(np.diff(_spread(coarse, factor), axis=-1))
    edge = np.arange(steps.shape[-1]) % factor[-1] == factor[-1] - 1
    assert steps[..., edge].mean() < 2 * steps[..., ~edge].mean()


def _facies(seed: int) -> np.ndarray:
    # Invented data: a Gaussian random field cut at its 75th percentile (25 % of code 1).
    g = _field((128, 128), seed)
    return (g > np.quantile(g, 0.75)).astype(np.int64)


@pytest.mark.parametrize("seed", [1, 2])
def test_categorical_proportions_are_reproduced(seed):
    # Fact of the trade (common practice, no source): realizations of a stationary TI reproduce its
    # category proportions. Tolerance 0.03 on the mean of 6 realizations (chosen by us; the
    # standard error of that mean measured 0.004-0.009). Measured with the defaults (lag_power 2
    # for a categorical TI): +0.007 and -0.018. With equal lag weights (the former default) the
    # minority came out 0.045 and 0.073 low, which the second assertion checks.
    ti = _facies(seed)
    target = ti.mean()

    def bias(**kw) -> float:
        ds = sl.DirectSampler(ti, **kw)
        return float(np.mean([(ds.simulate((96, 96), seed=100 * seed + k) == 1).mean() for k in range(6)])) - target

    assert abs(bias()) <= 0.03
    assert bias(lag_power=0.0) < -0.03


def test_three_class_proportions_keep_the_middle_class():
    # Same fact of the trade (common practice, no source), on three equal classes cut from one
    # invented Gaussian random field: the middle class lies in thin bands between the others.
    # Tolerance 0.03 on the mean of 6 realizations (chosen by us). Measured with the defaults:
    # 0.329-0.336 for every class; with equal lag weights the middle class came out 0.275-0.303.
    g = _field((128, 128), seed=2)
    ti = np.digitize(g, np.quantile(g, [1 / 3, 2 / 3])).astype(np.int8)
    target = np.bincount(ti.ravel(), minlength=3) / ti.size

    def proportions(**kw) -> np.ndarray:
        ds = sl.DirectSampler(ti, **kw)
        counts = [np.bincount(ds.simulate((96, 96), seed=20 + k).ravel(), minlength=3) for k in range(6)]
        return np.mean(counts, axis=0) / 96**2

    assert np.abs(proportions() - target).max() <= 0.03
    assert proportions(lag_power=0.0)[1] < target[1] - 0.03
