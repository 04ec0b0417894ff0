"""Template construction, ordering, symmetry and level scaling."""

import numpy as np
import pytest

import strataloom as sl


def _aniso(offsets, radius):
    r = np.where(np.asarray(radius, float) > 0, radius, 1.0)
    return np.sqrt(((offsets / r) ** 2).sum(axis=1))


@pytest.mark.parametrize("r", [1, 2, 3])
def test_box_count(r):
    # Common practice, no source: a (2r+1)^3 box less its centre.
    assert len(sl.Template.box(r)) == (2 * r + 1) ** 3 - 1


def test_box_two_dimensional():
    t = sl.Template.box((2, 3))
    assert len(t) == 5 * 7 - 1
    assert (t.offsets[:, 0] == 0).all()


@pytest.mark.parametrize("radius", [(2.0, 3.5, 5.0), (0.0, 4.0, 2.0), (1.5, 1.5, 1.5)])
def test_ellipsoid_membership_matches_inequality(radius):
    # The ellipsoid inequality (dz/rz)^2 + (dy/ry)^2 + (dx/rx)^2 <= 1 (analytic geometry).
    t = sl.Template.ellipsoid(radius)
    r = [int(np.floor(x)) for x in radius]
    grid = np.stack(np.meshgrid(*[np.arange(-k, k + 1) for k in r], indexing="ij"), -1).reshape(-1, 3)
    grid = grid[(grid != 0).any(axis=1)]
    inside = np.ones(len(grid), bool)
    terms = np.zeros(len(grid))
    for a in range(3):
        if radius[a] > 0:
            terms += (grid[:, a] / radius[a]) ** 2
        else:
            inside &= grid[:, a] == 0
    expected = {tuple(o) for o in grid[inside & (terms <= 1 + 1e-12)]}
    assert {tuple(o) for o in t.offsets} == expected


def test_order_is_nearest_first_with_documented_tie_break():
    radius = (1.0, 3.0, 2.0)
    t = sl.Template.ellipsoid(radius)
    d = _aniso(t.offsets, radius)
    assert (np.diff(d) >= -1e-12).all()
    plain = (t.offsets**2).sum(axis=1)
    keys = list(zip(np.round(d, 12), plain, *t.offsets.T, strict=True))
    assert keys == sorted(keys)


def test_templates_are_symmetric():
    for t in (sl.Template.box((1, 2, 3)), sl.Template.ellipsoid((2, 3, 4))):
        s = {tuple(o) for o in t.offsets}
        assert s == {(-a, -b, -c) for a, b, c in s}


def test_max_nodes_keeps_the_nearest():
    full = sl.Template.ellipsoid((3, 3, 3))
    cut = sl.Template.ellipsoid((3, 3, 3), max_nodes=20)
    np.testing.assert_array_equal(cut.offsets, full.offsets[:20])


def test_level_scaling():
    t = sl.Template.ellipsoid((1, 2, 2), max_nodes=12)
    np.testing.assert_array_equal(t.at_level(3).offsets, t.offsets * 8)
    assert t.at_level(0) == t


def test_custom_offsets_keep_their_order():
    t = sl.Template([[0, 0, 2], [0, 1, 0], [1, 0, 0]])
    np.testing.assert_array_equal(t.offsets[0], [0, 0, 2])
    assert sl.Template([[0, 1], [1, 0]]).offsets.tolist() == [[0, 0, 1], [0, 1, 0]]
    assert not t.offsets.flags.writeable


@pytest.mark.parametrize(
    ("make", "exc", "word"),
    [
        (lambda: sl.Template([[0.5, 0, 1]]), TypeError, "offsets"),
        (lambda: sl.Template([[0, 0, 0]]), ValueError, "centre"),
        (lambda: sl.Template([[0, 0, 1], [0, 0, 1]]), ValueError, "repeat"),
        (lambda: sl.Template(np.zeros((0, 3), int)), ValueError, "offsets"),
        (lambda: sl.Template([1, 2, 3]), ValueError, "offsets"),
        (lambda: sl.Template.box(100), ValueError, "radius"),
        (lambda: sl.Template.box(-1), ValueError, "radius"),
        (lambda: sl.Template.box(1.5), TypeError, "radius"),
        (lambda: sl.Template.box(0), ValueError, "radius"),
        (lambda: sl.Template.ellipsoid((0, 0, 0)), ValueError, "radius"),
        (lambda: sl.Template.ellipsoid(300), ValueError, "radius"),
        (lambda: sl.Template.ellipsoid(2, max_nodes=0), ValueError, "max_nodes"),
        (lambda: sl.Template.ellipsoid("3"), TypeError, "radius"),
        (lambda: sl.Template.box(1).at_level(25), ValueError, "level"),
    ],
)
def test_bad_templates_are_refused(make, exc, word):
    with pytest.raises(exc, match=word):
        make()
