"""TI statistics: FFT variograms against brute force, percolation, connectivity, body sizes."""

import itertools

import numpy as np
import pytest

import strataloom as sl
from strataloom.training import (
    anisotropy,
    body_sizes,
    connected_share,
    connectivity_function,
    describe,
    indicator_variogram,
    label_bodies,
    proportions,
    variogram_map,
)


def brute_variogram(a, code, lag):
    """Reference: the indicator semivariogram at lag vector (dz, dy, dx) by looping over pairs."""
    num = pairs = 0
    nz, ny, nx = a.shape
    for z, y, x in itertools.product(range(nz), range(ny), range(nx)):
        z2, y2, x2 = z + lag[0], y + lag[1], x + lag[2]
        inside = 0 <= z2 < nz and 0 <= y2 < ny and 0 <= x2 < nx
        if inside and a[z, y, x] >= 0 and a[z2, y2, x2] >= 0:
            pairs += 1
            num += (a[z, y, x] == code) != (a[z2, y2, x2] == code)
    return num / (2 * pairs) if pairs else np.nan


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_axis_variogram_equals_brute_force_with_mask(axis):
    rng = np.random.default_rng(axis)
    a = rng.integers(-1, 3, size=(6, 7, 9))  # -1 = masked
    lags, g = indicator_variogram(a, 1, axis, max_lag=a.shape[axis] - 1)
    for h, gh in zip(lags, g, strict=True):
        lag = [0, 0, 0]
        lag[axis] = int(h)
        assert gh == pytest.approx(brute_variogram(a, 1, lag), abs=1e-12)


def test_variogram_map_equals_brute_force():
    rng = np.random.default_rng(9)
    a = rng.integers(-1, 2, size=(4, 6, 7))
    m = variogram_map(a, 0, (2, 3, 3))
    for lag in [(0, 0, 1), (1, -2, 3), (-2, 3, -1), (2, 0, 0)]:
        got = m[2 + lag[0], 3 + lag[1], 3 + lag[2]]
        assert got == pytest.approx(brute_variogram(a, 0, lag), abs=1e-12)


def test_bernoulli_field_variogram_is_flat_at_p_times_1_minus_p():
    # an i.i.d. indicator has gamma(h) = p (1 - p) at every lag h >= 1 (variance of a Bernoulli
    # variable; common practice, no source)
    a = (np.random.default_rng(1).random((40, 60, 60)) < 0.3).astype(np.int8)
    for axis in "zyx":
        _, g = indicator_variogram(a, 1, axis, max_lag=10)
        assert np.allclose(g, 0.3 * 0.7, atol=0.01)


# Site percolation on the simple cubic lattice: threshold p_c = 0.3116 with face (6) neighbours
# (Stauffer & Aharony 1994, Introduction to Percolation Theory, 2nd ed.; value recalled from
# memory) and about 0.097 with 26 neighbours (recalled from memory). Below p_c the largest body
# holds a vanishing share; above, almost everything.
def test_largest_body_share_follows_percolation_thresholds():
    rng = np.random.default_rng(2)
    low = (rng.random((48, 48, 48)) < 0.22).astype(np.int8)
    high = (rng.random((48, 48, 48)) < 0.42).astype(np.int8)
    assert connected_share(low, 1, 6) < 0.05
    assert connected_share(low, 1, 26) > 0.9
    assert connected_share(high, 1, 6) > 0.85
    # 2-D square lattice: p_c = 0.5927 with 4 neighbours (Stauffer & Aharony 1994; recalled
    # from memory)
    plan = (rng.random((300, 300)) < 0.5).astype(np.int8)
    assert connected_share(plan, 1, 6) < 0.3


def test_connectivity_function_limits():
    # for h far beyond the correlation length, two cells of the facies are connected only through
    # the spanning cluster, so tau(h) -> (share of the facies in it)^2 (percolation theory,
    # Stauffer & Aharony 1994; recalled from memory)
    a = (np.random.default_rng(3).random((40, 40, 80)) < 0.45).astype(np.int8)
    _, tau = connectivity_function(a, 1, "x", max_lag=40)
    assert np.allclose(tau[20:], connected_share(a, 1, 6) ** 2, atol=0.03)
    # two slabs, cells 0-9 and 20-29 along x: tau(h) = same-slab pairs / all pairs (counted here)
    b = np.zeros((2, 3, 30), np.int8)
    b[..., :10] = b[..., 20:] = 1
    lags, tau = connectivity_function(b, 1, "x", max_lag=29)
    x = np.flatnonzero(b[0, 0])
    for h, t in zip(lags, tau, strict=True):
        same = sum(1 for i in x if i + h in x and (i < 10) == (i + h < 10))
        both = sum(1 for i in x if i + h in x)
        assert (np.isnan(t) and both == 0) or t == pytest.approx(same / both)


def test_body_sizes_of_placed_boxes():
    # invented test data: three boxes of known size on cells of (0.5, 2, 4) m
    a = np.zeros((10, 20, 30), np.int8)
    a[0:4, 0:5, 0:6] = 1
    a[5:10, 10:12, 10:25] = 1
    a[0:1, 18:20, 28:30] = 1
    s = body_sizes(a, 1, spacing=(0.5, 2.0, 4.0))
    assert s.count == 3
    assert list(s.cells) == [150, 120, 4]
    assert np.allclose(s.extent, [[2.5, 4.0, 60.0], [2.0, 10.0, 24.0], [0.5, 4.0, 8.0]])
    # diagonal neighbours join with 26-connectivity only
    d = np.zeros((3, 3, 3), np.int8)
    d[0, 0, 0] = d[1, 1, 1] = 1
    assert label_bodies(d, 1, 6)[1] == 2 and label_bodies(d, 1, 26)[1] == 1


def test_anisotropy_of_oriented_stripes():
    # stripes along azimuth 60 (clockwise from +y): the continuity direction is 60 by construction
    y, x = np.mgrid[0:120, 0:120]
    th = np.radians(60.0)
    across = x * np.cos(th) - y * np.sin(th)
    a = ((across // 6) % 3 == 0).astype(np.int8)[None]
    az, ratio = anisotropy(a, 1)
    assert abs(az - 60.0) < 2.0 and ratio > 3.0


def test_describe_and_proportions():
    a = np.array([[[0, 0, 1, 2], [2, 2, -1, 1]]])
    assert np.allclose(proportions(a), [2 / 7, 2 / 7, 3 / 7])
    assert np.allclose(proportions(a, ncodes=5), [2 / 7, 2 / 7, 3 / 7, 0, 0])
    st = describe(a)
    assert set(st.variograms) == {"y", "x"} and st.variograms["x"].shape == (3, 2)
    assert st.connectivity_functions["x"].shape == (3, 2)
    # describe agrees with the single-purpose functions on a built image
    b = (np.random.default_rng(4).random((10, 30, 40)) < 0.4).astype(np.int8)
    st = describe(b, spacing=(1.0, 2.0, 3.0), connectivity=26, max_lag=7, tau_lag=5)
    for k in (0, 1):
        assert st.connected_share[k] == pytest.approx(connected_share(b, k, 26))
        assert np.array_equal(st.bodies[k].cells, body_sizes(b, k, 26, (1.0, 2.0, 3.0)).cells)
        assert np.allclose(st.variograms["y"][k], indicator_variogram(b, k, "y", 7)[1])
        assert np.allclose(st.connectivity_functions["z"][k],
                           connectivity_function(b, k, "z", 5, 26)[1])
    assert "largest body" in st.table() and st.as_dict()["proportions"] == list(st.proportions)


def test_bad_statistics_arguments():
    a = np.zeros((4, 4), np.int8)
    with pytest.raises(sl.ParameterError, match="'connectivity' of label_bodies"):
        label_bodies(a, 0, connectivity=8)
    with pytest.raises(sl.ParameterError, match="'axis' of indicator_variogram"):
        indicator_variogram(a, 0, axis="w")
    with pytest.raises(sl.ParameterTypeError, match="'ti' of proportions"):
        proportions(np.zeros((3, 3)))
    with pytest.raises(sl.ParameterError, match="'code' of anisotropy"):
        anisotropy(a, 0)
