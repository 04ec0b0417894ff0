"""Soft-data calibration: scores against the prior baseline, Brier score, smoothing, SEG-Y input."""

from __future__ import annotations

import numpy as np
import pytest

from strataloom.conditioning import brier_score, calibrate, patch_features
from strataloom.study import load_study
from strataloom.workflow import prepare, read_attribute
from study_helpers import channel_image, write_small_study

SHAPE = (8, 40, 40)


def _wells(truth, n=10, seed=0):
    rng = np.random.default_rng(seed)
    flat, lab, names = [], [], []
    for i in range(n):
        y, x = rng.integers(0, SHAPE[1]), rng.integers(0, SHAPE[2])
        for z in range(SHAPE[0]):
            flat.append(np.ravel_multi_index((z, y, x), SHAPE))
            lab.append(truth[z, y, x])
            names.append(f"W{i}")
    return np.array(flat), np.array(lab), np.array(names)


@pytest.fixture(scope="module")
def truth():
    # invented facies model: sinuous sand channels (1) in mud (0)
    return channel_image(SHAPE, seed=3, n_channels=8, width=(2, 4))


def test_brier_score_matches_scikit_learn_binary():
    # Brier (1950), "Verification of forecasts expressed in terms of probability", Monthly Weather
    # Review 78(1): the original score sums over categories; scikit-learn's brier_score_loss for
    # a binary outcome is the mean of (p1 - y)**2, i.e. half the two-category sum.
    from sklearn.metrics import brier_score_loss

    rng = np.random.default_rng(1)
    p1 = rng.uniform(0, 1, 50)
    y = rng.integers(0, 2, 50)
    ours = brier_score(np.column_stack([1 - p1, p1]), y)
    assert ours == pytest.approx(2 * brier_score_loss(y, p1))


def test_attribute_with_signal_beats_prior_baseline(truth):
    flat, lab, names = _wells(truth)
    rng = np.random.default_rng(0)
    cube = truth + rng.normal(0.0, 0.8, SHAPE)  # invented: attribute = facies + noise
    cal = calibrate([cube], flat, lab, names, 2, patch=(0, 1, 1), components=4)
    s = cal.scores
    assert s["wells"] == 10 and s["cells"] == 80
    # leave-one-well-out must beat the prior-proportion baseline on both scores
    assert s["accuracy"] > s["baseline_accuracy"] + 0.1
    assert s["brier"] < s["baseline_brier"] - 0.1
    # the baseline is the majority facies of the other wells; check it by hand
    base = np.mean(
        [
            (np.mean(lab[names != w]) > 0.5) == lab[names == w][k]
            for w in np.unique(names)
            for k in range(SHAPE[0])
        ]
    )
    assert s["baseline_accuracy"] == pytest.approx(base)
    p = cal.probabilities
    assert p.shape == (2, *SHAPE) and p.dtype == np.float32
    np.testing.assert_allclose(p.sum(axis=0), 1.0, atol=1e-5)
    # probabilities follow the facies: mean sand probability higher in sand cells
    assert p[1][truth == 1].mean() > p[1][truth == 0].mean() + 0.3

    # control: a pure-noise cube carries no information and must not beat the baseline
    noise = rng.normal(0.0, 1.0, SHAPE)
    ctrl = calibrate([noise], flat, lab, names, 2, patch=(0, 1, 1), components=4).scores
    assert ctrl["brier"] > s["brier"] + 0.1
    assert ctrl["brier"] > ctrl["baseline_brier"] - 0.03


def test_smoothing_and_patch_features(truth):
    flat, lab, names = _wells(truth)
    cube = truth + np.random.default_rng(2).normal(0.0, 0.8, SHAPE)
    raw = calibrate([cube], flat, lab, names, 2, patch=(0, 1, 1), components=4)
    smooth = calibrate([cube], flat, lab, names, 2, patch=(0, 1, 1), components=4, smoothing=1.5)
    np.testing.assert_allclose(smooth.probabilities.sum(axis=0), 1.0, atol=1e-5)
    # a Gaussian filter lowers the cell-to-cell variation (scipy.ndimage.gaussian_filter)
    assert (
        np.abs(np.diff(smooth.probabilities[1], axis=2)).mean()
        < 0.7 * np.abs(np.diff(raw.probabilities[1], axis=2)).mean()
    )
    # patch vectors are the box values in C order, mirrored at borders (numpy.pad 'symmetric')
    a = np.arange(2 * 3 * 4, dtype=float).reshape(2, 3, 4)
    f = patch_features([a], np.array([0, 23]), (0, 1, 1))
    np.testing.assert_array_equal(
        f[0], np.pad(a, ((0, 0), (1, 1), (1, 1)), mode="symmetric")[0, 0:3, 0:3].ravel()
    )
    np.testing.assert_array_equal(f[1].reshape(3, 3)[1, 1], a[1, 2, 3])


def test_calibration_rejects_bad_input(truth):
    flat, lab, names = _wells(truth)
    from strataloom.errors import StudyError

    with pytest.raises(StudyError, match="shape"):
        calibrate([np.zeros(SHAPE), np.zeros((2, 2, 2))], flat, lab, names, 2)
    with pytest.raises(StudyError, match=r"0\.\.1"):
        calibrate([np.zeros(SHAPE)], flat, lab + 5, names, 2)


def test_segy_attribute_aligned_with_grid(tmp_path):
    # segyio (the reference SEG-Y library) writes the cube; our reader maps inline -> y,
    # crossline -> x and samples (downwards) -> z (upwards)
    import segyio

    p = write_small_study(tmp_path, shape=(4, 16, 16), soft=True)
    cube = np.random.default_rng(3).normal(size=(4, 16, 16)).astype(np.float32)
    # (inline, crossline, sample) = (y, x, depth) with depth running down from the top layer
    segy_data = np.ascontiguousarray(np.transpose(cube[::-1], (1, 2, 0)))
    segyio.tools.from_array(
        str(tmp_path / "attr.sgy"), segy_data, format=segyio.SegySampleFormat.IEEE_FLOAT_4_BYTE
    )
    p.write_text(p.read_text().replace('attributes = ["attr.npy"]', 'attributes = ["attr.sgy"]'))
    study = load_study(p)
    got = read_attribute(study.soft_data.attributes[0], study)
    np.testing.assert_array_equal(got, cube)
    prep = prepare(study)
    assert prep.soft is not None and prep.soft.shape == (2, 4, 16, 16)
