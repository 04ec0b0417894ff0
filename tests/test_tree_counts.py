"""Pattern-tree counts against a brute-force count of the counting contract."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import strataloom as sl
from reference import counting


@st.composite
def tree_cases(draw):
    three_d = draw(st.booleans())
    shape = (draw(st.integers(2, 5)) if three_d else 1, draw(st.integers(3, 9)), draw(st.integers(3, 9)))
    k = draw(st.integers(1, 3))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    ti = rng.integers(0, k, size=shape)
    if draw(st.booleans()):
        ti[rng.random(shape) < 0.15] = -1
    if (ti < 0).all():
        ti[0, 0, 0] = 0
    radius = (1 if three_d else 0, 1, draw(st.integers(1, 2)))
    tpl = sl.Template.box(radius)
    max_level = 0
    while max_level < 2 and all(r << (max_level + 1) < n or r == 0 for r, n in zip(radius, shape, strict=True)):
        max_level += 1
    levels = max_level + 1
    level = draw(st.integers(0, max_level))
    m = draw(st.integers(0, len(tpl)))
    chosen = rng.choice(len(tpl), size=m, replace=False)
    values = rng.integers(0, int(ti.max()) + 1, size=m)
    min_rep = draw(st.integers(1, 4))
    return ti, tpl, levels, level, chosen, values, min_rep


@settings(suppress_health_check=[HealthCheck.too_slow])
@given(tree_cases())
def test_counts_equal_brute_force(case):
    # Reference: tests/reference/counting.py, a literal NumPy count of the contract.
    ti, tpl, levels, level, chosen, values, min_rep = case
    k = int(ti.max()) + 1
    tree = sl.PatternTree(ti, tpl, levels=levels, min_replicates=min_rep)
    level_offsets = tpl.offsets * (1 << level)
    offsets = level_offsets[chosen]
    probs, replicates, kept = tree.conditional(offsets, values, level=level)
    counts, ref_rep, ref_kept = counting.conditional(ti, level_offsets, offsets, values, k, min_rep)
    assert (replicates, kept) == (ref_rep, ref_kept)
    np.testing.assert_allclose(probs, counts / counts.sum())
    # the TI-scan path of the core gives the same answer
    order = np.argsort([list(map(tuple, level_offsets.tolist())).index(tuple(o)) for o in offsets.tolist()])
    idx = np.sort(chosen).astype(np.int32)
    scan_counts, scan_rep, scan_kept = tree._tree.conditional(level, idx, values[order].astype(np.uint8), min_rep,
                                                              scan=True)
    assert (scan_rep, scan_kept) == (ref_rep, ref_kept)
    np.testing.assert_array_equal(scan_counts, counts)


def test_border_centres_count_as_the_contract_says():
    # A 1 x 3 image "0 1 0": the event "right neighbour is 1" matches only the first centre; the
    # last centre, whose right neighbour is outside, is not a replicate (common practice, no source).
    tree = sl.PatternTree(np.array([[0, 1, 0]]), sl.Template([[0, 0, 1], [0, 0, -1]]))
    probs, rep, kept = tree.conditional([[0, 0, 1]], [1])
    assert (rep, kept) == (1, 1) and probs.tolist() == [1.0, 0.0]
    probs, rep, kept = tree.conditional([[0, 0, -1]], [0])
    assert (rep, kept) == (1, 1) and probs.tolist() == [0.0, 1.0]


def test_worked_example_three_of_four():
    # Common practice, no source: four replicates of an event, three with centre A, one with B,
    # give P(A) = 0.75. Event: left neighbour = 1 and right neighbour = 1; A = 0, B = 2.
    ti = np.array([[1, 0, 1, 3, 3, 1, 0, 1, 3, 3, 1, 0, 1, 3, 3, 1, 2, 1]])
    tree = sl.PatternTree(ti, sl.Template([[0, 0, -1], [0, 0, 1]]))
    probs, rep, kept = tree.conditional([[0, 0, -1], [0, 0, 1]], [1, 1])
    assert rep == 4 and kept == 2
    np.testing.assert_allclose(probs, [0.75, 0.0, 0.25, 0.0])


def test_node_dropping_removes_the_last_template_node():
    # In "0 0 1 1" repeated no centre has 1 on both sides: the event (right = 1, left = 1) has no
    # replicate, so its last template node (left) is dropped and right = 1 alone is used.
    ti = np.array([[0, 0, 1, 1, 0, 0, 1, 1]])
    tpl = sl.Template([[0, 0, 1], [0, 0, -1]])
    tree = sl.PatternTree(ti, tpl, min_replicates=1)
    probs, rep, kept = tree.conditional([[0, 0, -1], [0, 0, 1]], [1, 1])
    assert (kept, rep) == (1, 4)
    np.testing.assert_allclose(probs, [0.5, 0.5])
    tree5 = sl.PatternTree(ti, tpl, min_replicates=5)
    probs, rep, kept = tree5.conditional([[0, 0, 1]], [1])
    assert (kept, rep) == (0, 8)
    np.testing.assert_allclose(probs, [0.5, 0.5])


def test_proportions_and_storage_figures():
    ti = np.array([[0, 0, 1, 2], [2, -1, 1, 0]])
    tree = sl.PatternTree(ti, sl.Template.box((0, 1, 1)))
    np.testing.assert_allclose(tree.proportions, [3 / 7, 2 / 7, 2 / 7])
    assert tree.node_count(0) > 1
    assert tree.memory_bytes > 0


def test_memory_limit_stops_the_build():
    ti = np.random.default_rng(0).integers(0, 3, size=(20, 40, 40))
    with pytest.raises(MemoryError, match="memory_limit"):
        sl.PatternTree(ti, sl.Template.box(2), memory_limit=2_000_000)
