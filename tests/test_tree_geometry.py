"""Non-stationary pattern-tree simulation: rotation and affinity of the template, zones."""

import numpy as np
import pytest
from scipy import ndimage

import strataloom as sl


def straight_channels(n=120, seed=0):
    """Channels running along +y (azimuth 0): random bands across x, constant along y."""
    rng = np.random.default_rng(seed)
    row = np.zeros(n, dtype=np.int8)
    x = 0
    while x < n:
        width = rng.integers(3, 7)
        gap = rng.integers(4, 10)
        row[x:x + width] = 1
        x += width + gap
    return np.tile(row, (n, 1))


def azimuth_of_bands(img):
    """Band azimuth (degrees clockwise from +y toward +x, in [0, 180)) from the structure tensor
    built with scipy.ndimage Sobel gradients: the bands run along the eigenvector of the smallest
    eigenvalue."""
    f = ndimage.gaussian_filter(img.astype(float), 1.0)
    gy = ndimage.sobel(f, axis=0)
    gx = ndimage.sobel(f, axis=1)
    j = np.array([[np.mean(gx * gx), np.mean(gx * gy)], [np.mean(gx * gy), np.mean(gy * gy)]])
    _, vec = np.linalg.eigh(j)
    vx, vy = vec[:, 0]
    return np.degrees(np.arctan2(vx, vy)) % 180


def angle_gap(a, b):
    d = abs(a - b) % 180
    return min(d, 180 - d)


@pytest.fixture(scope="module")
def channel_tree():
    return sl.PatternTree(straight_channels(), sl.Template.ellipsoid((0, 4, 4), max_nodes=40), levels=3)


def test_measure_is_right_on_the_ti():
    assert angle_gap(azimuth_of_bands(straight_channels()), 0.0) < 1.0


def test_constant_rotation_turns_the_channels(channel_tree):
    # Structure tensor from scipy.ndimage gradients (reference library): a 30-degree rotation of
    # the template gives channels within 8 degrees of azimuth 30.
    measured = [azimuth_of_bands(channel_tree.simulate((96, 96), seed=s, rotation=30.0)) for s in range(3)]
    assert all(angle_gap(m, 30.0) < 8.0 for m in measured), measured
    plain = azimuth_of_bands(channel_tree.simulate((96, 96), seed=0))
    assert angle_gap(plain, 0.0) < 8.0


def test_rotation_map_follows_the_map(channel_tree):
    rot = np.zeros((96, 96))
    rot[:, 48:] = 60.0
    r = channel_tree.simulate((96, 96), seed=1, rotation=rot)
    assert angle_gap(azimuth_of_bands(r[:, 8:40]), 0.0) < 10.0
    assert angle_gap(azimuth_of_bands(r[:, 56:88]), 60.0) < 10.0


def _mean_run_length(img, code=1):
    runs = []
    for row in img:
        edges = np.flatnonzero(np.diff(np.r_[0, (row == code).astype(int), 0]))
        runs.extend(edges[1::2] - edges[::2])
    return float(np.mean(runs))


def test_affinity_two_along_x_doubles_body_length():
    # Common practice, no source: stretching the template by 2 along x stretches the simulated
    # bodies about twice along x (within 25 %).
    rng = np.random.default_rng(3)
    field = ndimage.gaussian_filter(rng.standard_normal((160, 160)), 2.5)
    ti = (field > np.quantile(field, 0.7)).astype(np.int8)
    tree = sl.PatternTree(ti, sl.Template.ellipsoid((0, 4, 4), max_nodes=40), levels=3)
    plain = np.mean([_mean_run_length(tree.simulate((96, 96), seed=s)) for s in range(4)])
    long = np.mean([_mean_run_length(tree.simulate((96, 96), seed=s, affinity=(1, 1, 2))) for s in range(4)])
    assert 1.5 <= long / plain <= 2.5, (plain, long)


def test_zones_follow_their_own_training_images():
    # Common practice, no source: each zone's proportions match its own TI within 0.03.
    rng = np.random.default_rng(4)
    fa = ndimage.gaussian_filter(rng.standard_normal((150, 150)), 2.0)
    fb = ndimage.gaussian_filter(rng.standard_normal((150, 150)), 2.0)
    ti_a = (fa > np.quantile(fa, 0.8)).astype(np.int8)   # 20 % code 1
    ti_b = (fb > np.quantile(fb, 0.4)).astype(np.int8)   # 60 % code 1
    tpl = sl.Template.ellipsoid((0, 4, 4), max_nodes=30)
    trees = [sl.PatternTree(ti_a, tpl, levels=3), sl.PatternTree(ti_b, tpl, levels=3)]
    zones = np.zeros((64, 96), dtype=int)
    zones[:, 48:] = 1
    sims = [sl.simulate_zones(trees, zones, (64, 96), seed=s) for s in range(10)]
    left = np.mean([r[:, :48].mean() for r in sims])
    right = np.mean([r[:, 48:].mean() for r in sims])
    assert abs(left - ti_a.mean()) < 0.03, left
    assert abs(right - ti_b.mean()) < 0.03, right
    # the same with a mapping, and identical for any thread count
    a = sl.simulate_zones({0: trees[0], 1: trees[1]}, zones, (64, 96), seed=2, threads=1)
    b = sl.simulate_zones(trees, zones, (64, 96), seed=2, threads=2)
    np.testing.assert_array_equal(a, b)


def test_geometry_keeps_hard_data_and_thread_independence(channel_tree):
    hard = np.full((48, 48), -1)
    hard[::7, ::5] = 1
    runs = [channel_tree.simulate((48, 48), hard=hard, seed=5, rotation=45.0, affinity=1.5, threads=t)
            for t in (1, 2, 4)]
    np.testing.assert_array_equal(runs[0], runs[1])
    np.testing.assert_array_equal(runs[0], runs[2])
    assert (runs[0][hard >= 0] == 1).all()


@pytest.mark.parametrize(
    ("kwargs", "word"),
    [
        ({"rotation": np.zeros((3, 3))}, "rotation"),
        ({"rotation": np.nan}, "rotation"),
        ({"affinity": 0.0}, "affinity"),
        ({"affinity": (1, 2)}, "affinity"),
        ({"affinity": 40.0}, "affinity"),
    ],
)
def test_bad_geometry(channel_tree, kwargs, word):
    with pytest.raises(ValueError, match=word):
        channel_tree.simulate((20, 20), **kwargs)


def test_bad_zones(channel_tree):
    with pytest.raises(ValueError, match="zones"):
        sl.simulate_zones([channel_tree], np.ones((10, 10), int), (10, 10))
    with pytest.raises(ValueError, match="zones"):
        sl.simulate_zones([channel_tree], np.zeros((5, 10), int), (10, 10))
    other = sl.PatternTree(np.arange(36).reshape(6, 6) % 3, sl.Template.box((0, 1, 1)), levels=3)
    with pytest.raises(ValueError, match="engines"):
        sl.simulate_zones([channel_tree, other], np.zeros((10, 10), int), (10, 10))
    with pytest.raises(TypeError, match="engines"):
        sl.simulate_zones(channel_tree, np.zeros((10, 10), int), (10, 10))


def test_dip_needs_a_3d_training_image(channel_tree):
    # A flat TI cannot be tipped: refused rather than silently dropped.
    with pytest.raises(ValueError, match="2-D training image"):
        channel_tree.simulate((4, 20, 20), rotation=(0.0, 20.0))


def test_turned_trees_share_the_memory_limit():
    # The trees of the turned training images and the ordered trees built while simulating all
    # draw on the one memory_limit of the tree they come from.
    ti, tpl = straight_channels(), sl.Template.ellipsoid((0, 4, 4), max_nodes=40)
    alone = sl.PatternTree(ti, tpl, levels=3).memory_bytes
    limit = int(3.5 * alone)
    tree = sl.PatternTree(ti, tpl, levels=3, memory_limit=limit)
    two_classes = np.zeros((48, 48))
    two_classes[:, 24:] = 60.0
    tree.simulate((48, 48), seed=1, rotation=two_classes)
    assert alone < tree.memory_bytes <= limit
    fan = np.repeat(np.arange(0.0, 180.0, 10.0), 4)[None, :].repeat(24, axis=0)  # 18 classes
    with pytest.raises(sl.MemoryLimitError, match="rotation and affinity classes"):
        tree.simulate(fan.shape, seed=1, rotation=fan)
    assert tree.memory_bytes <= limit
