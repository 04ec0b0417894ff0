"""Facies bodies, well volumes, well-to-well connection and connectivity functions."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import ndimage

import strataloom as sl
from storehelp import write_store
from strataloom.connectivity import (
    body_sizes,
    connectivity_function,
    label_bodies,
    well_bodies,
    wells_from_hard_data,
)
from strataloom.summary import open_summary, summarize

RNG = np.random.default_rng(7)
CATS2 = {
    "facies": [
        {"code": 0, "name": "mud", "colour": "#8c7a5b"},
        {"code": 1, "name": "sand", "colour": "#e0b84a"},
    ]
}


@pytest.mark.parametrize("connectivity,rank_conn", [(6, 1), (26, 3)])
def test_summary_well_volumes_equal_scipy_ndimage_label(tmp_path, connectivity, rank_conn):
    # Reference library: scipy.ndimage.label with generate_binary_structure(3, 1) (faces) or (3, 3).
    n, shape = 6, (5, 12, 11)
    facies = (RNG.random((n, *shape)) < 0.35).astype(np.int16)
    wells = {
        "A": np.array([[z, 2, 3] for z in range(5)]),
        "B": np.array([[z, 9, 8] for z in range(5)]),
        "C": np.array([[0, 6, 0], [1, 6, 1], [2, 7, 2]]),
    }
    write_store(tmp_path, {"facies": facies}, categories=CATS2, spacing=(0.5, 2.0, 2.0))
    ds = open_summary(summarize(tmp_path, wells=wells, connectivity=connectivity))
    vol = ds["facies_well_volume"].values
    con = ds["facies_well_connection"].values
    structure = ndimage.generate_binary_structure(3, rank_conn)
    expect_con = np.zeros((3, 3))
    for i in range(n):
        lab, _ = ndimage.label(facies[i] == 1, structure=structure)
        touched = []
        for w, cells in enumerate(wells.values()):
            labs = set(lab[tuple(cells.T)].tolist()) - {0}
            touched.append(labs)
            expect = sum(int((lab == b).sum()) for b in labs) * 0.5 * 2.0 * 2.0
            assert vol[i, w, 1] == pytest.approx(expect)
        for a in range(3):
            for b in range(3):
                expect_con[a, b] += bool(touched[a] & touched[b])
    np.testing.assert_allclose(con[:, :, 1], expect_con / n)


def test_label_and_sizes_match_scipy_on_random_fields():
    for conn, rank in [(6, 1), (26, 3)]:
        m = RNG.random((6, 15, 14)) < 0.4
        lab, nb = label_bodies(m, conn)
        ref, nref = ndimage.label(m, structure=ndimage.generate_binary_structure(3, rank))
        assert nb == nref
        np.testing.assert_array_equal(lab, ref)
        np.testing.assert_array_equal(
            body_sizes(lab, nb)[1:], ndimage.sum_labels(m, ref, range(1, nref + 1))
        )


def _channel_case():
    # Constructed realizations (invented) with known answers, grid (1, 7, 9), sand = 1.
    base = np.zeros((3, 1, 7, 9), dtype=np.int16)
    base[0, 0, 3, :] = 1  # one channel joins W1 (x=0) and W2 (x=8)
    base[1, 0, 3, :4] = 1  # two sand bodies, separate
    base[1, 0, 3, 5:] = 1
    base[2, 0, 3, 0] = 1  # W1 in sand, W2 in mud
    base[:, 0, 0, 4] = 1  # W3 sits in a 1-cell sand lens in every realization
    return base


def test_well_to_well_probability_on_constructed_cases(tmp_path):
    facies = _channel_case()
    wells = {"W1": np.array([[0, 3, 0]]), "W2": np.array([[0, 3, 8]]), "W3": np.array([[0, 0, 4]])}
    write_store(tmp_path, {"facies": facies}, categories=CATS2)
    ds = open_summary(summarize(tmp_path, wells=wells))
    p = ds["facies_well_connection"].values[:, :, 1]
    # known answers by construction: W1-W2 joined in 1 of 3; W1 always in sand; W2 in 2 of 3;
    # W3 alone
    np.testing.assert_allclose(p, [[1, 1 / 3, 0], [1 / 3, 2 / 3, 0], [0, 0, 1]])
    vol = ds["facies_well_volume"].values[:, :, 1]
    np.testing.assert_allclose(vol, [[9, 9, 1], [4, 4, 1], [1, 0, 1]])
    meta = json.loads(ds.attrs["strataloom"])
    assert meta["tables"]["facies"]["wells"] == ["W1", "W2", "W3"]
    assert meta["connectivity"] == 6


def test_diagonal_link_counts_only_with_26_connectivity():
    m = np.zeros((1, 3, 3), bool)
    m[0, 0, 0] = m[0, 1, 1] = True
    wells = {"a": np.array([[0, 0, 0]]), "b": np.array([[0, 1, 1]])}
    for conn, joined in [(6, False), (26, True)]:
        lab, nb = label_bodies(m, conn)
        _, con = well_bodies(lab, body_sizes(lab, nb), wells)
        assert con[0, 1] == joined


def _brute_connectivity(mask, axis, max_lag, rank):
    lab, _ = ndimage.label(mask, structure=ndimage.generate_binary_structure(3, rank))
    out = []
    idx = np.argwhere(mask)
    for h in range(1, max_lag + 1):
        both = same = 0
        for c in idx:
            d = c.copy()
            d[axis] += h
            if d[axis] < mask.shape[axis] and mask[tuple(d)]:
                both += 1
                same += lab[tuple(c)] == lab[tuple(d)]
        out.append(same / both if both else np.nan)
    return np.array(out)


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_connectivity_function_equals_pair_count(axis):
    m = RNG.random((4, 9, 10)) < 0.55
    lab, _ = label_bodies(m, 6)
    got = connectivity_function(lab, 5, axis)
    np.testing.assert_allclose(got, _brute_connectivity(m, axis, 5, 1), equal_nan=True)


def test_wells_from_hard_data_groups_chains():
    cells = np.array(
        [
            [0, 1, 1],
            [1, 1, 1],
            [2, 1, 1],  # vertical well
            [0, 5, 5],
            [1, 5, 6],
            [2, 6, 7],  # deviated well, edge/corner steps
            [1, 9, 0],
        ]
    )  # a single sample
    wells = wells_from_hard_data(cells, (3, 10, 10))
    assert list(wells) == ["W1", "W2", "W3"]
    assert len(wells["W1"]) == 3 and len(wells["W2"]) == 3 and len(wells["W3"]) == 1
    np.testing.assert_array_equal(wells["W2"], [[0, 5, 5], [1, 5, 6], [2, 6, 7]])


def test_bad_connectivity_and_wells_name_the_parameter(tmp_path):
    with pytest.raises(sl.ParameterError, match="'connectivity'"):
        label_bodies(np.ones((2, 2), bool), 8)
    write_store(tmp_path, {"facies": _channel_case()}, categories=CATS2)
    with pytest.raises(sl.ParameterError, match=r"wells\['x'\]"):
        summarize(tmp_path, wells={"x": np.array([[0, 99, 0]])})
