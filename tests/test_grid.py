"""Grid index math, coordinates and multiple-grid levels."""

import numpy as np
import pytest

import strataloom as sl


@pytest.mark.parametrize("shape", [(1, 1, 1), (3, 4, 5), (7, 1, 2), (2, 9, 1)])
def test_index_matches_numpy_ravel_multi_index(shape):
    # Reference library: numpy.ravel_multi_index / unravel_index (C order).
    g = sl.Grid(shape)
    rng = np.random.default_rng(0)
    cells = np.column_stack([rng.integers(0, n, 50) for n in shape])
    np.testing.assert_array_equal(g.index(cells), np.ravel_multi_index(cells.T, shape))
    flat = rng.integers(0, g.size, 50)
    np.testing.assert_array_equal(g.cell(flat), np.column_stack(np.unravel_index(flat, shape)))


def test_two_dimensional_shape_is_one_layer():
    assert sl.Grid((4, 6)).shape == (1, 4, 6)


def test_centre_and_locate_round_trip():
    g = sl.Grid((3, 4, 5), spacing=(2.0, 0.5, 10.0), origin=(-5.0, 100.0, 0.0))
    cells = np.array([[0, 0, 0], [2, 3, 4], [1, 2, 0]])
    centres = g.centre(cells)
    np.testing.assert_allclose(centres[1], [-5 + 2.5 * 2, 100 + 3.5 * 0.5, 45.0])
    np.testing.assert_array_equal(g.locate(centres), cells)


def test_locate_outside_gives_minus_one():
    g = sl.Grid((2, 2, 2))
    out = g.locate([[0.5, 0.5, 2.0], [-0.1, 0.5, 0.5], [1.0, 1.0, 1.0]])
    np.testing.assert_array_equal(out, [[-1, -1, -1], [-1, -1, -1], [1, 1, 1]])


def test_level_cells_visit_every_cell_once():
    g = sl.Grid((5, 9, 6))
    seen = np.concatenate([g.level_cells(level, coarsest=2) for level in (2, 1, 0)])
    assert np.array_equal(np.sort(seen), np.arange(g.size))
    coarse = g.cell(g.level_cells(2, coarsest=2))
    assert (coarse % 4 == 0).all()
    assert g.level_shape(2) == (2, 3, 2)


@pytest.mark.parametrize(
    ("kwargs", "exc", "word"),
    [
        ({"shape": (-1, 2, 2)}, ValueError, "shape"),
        ({"shape": (0, 2)}, ValueError, "shape"),
        ({"shape": (2.5, 2, 2)}, TypeError, "shape"),
        ({"shape": 5}, TypeError, "shape"),
        ({"shape": (2, 2, 2), "spacing": (1, 0, 1)}, ValueError, "spacing"),
        ({"shape": (2, 2, 2), "spacing": (1, -1, 1)}, ValueError, "spacing"),
        ({"shape": (2, 2, 2), "spacing": (1, 1)}, ValueError, "spacing"),
        ({"shape": (2, 2, 2), "origin": (np.nan, 0, 0)}, ValueError, "origin"),
        ({"shape": (2**20, 2**20, 2**20)}, ValueError, "shape"),
    ],
)
def test_bad_arguments_name_the_parameter(kwargs, exc, word):
    with pytest.raises(exc, match=word):
        sl.Grid(**kwargs)


def test_index_outside_grid_is_refused():
    g = sl.Grid((2, 2, 2))
    with pytest.raises(ValueError, match="cells"):
        g.index([[0, 0, 2]])
    with pytest.raises(ValueError, match="index"):
        g.cell([8])
    with pytest.raises(TypeError, match="cells"):
        g.index([[0.5, 0, 0]])
