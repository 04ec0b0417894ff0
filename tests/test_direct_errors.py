"""DirectSampler and downscale: every bad input gets one clear message naming the parameter."""

from __future__ import annotations

import numpy as np
import pytest

import strataloom as sl

RNG = np.random.default_rng(0)
TI = RNG.normal(size=(12, 12))


@pytest.mark.parametrize(
    ("kwargs", "exc", "pattern"),
    [
        (
            {"neighbors": 0},
            sl.ParameterError,
            r"'neighbors' of DirectSampler must be an integer in \[1",
        ),
        (
            {"neighbors": 2.5},
            sl.ParameterTypeError,
            r"'neighbors' of DirectSampler must be an integer",
        ),
        (
            {"scan_fraction": 0.0},
            sl.ParameterError,
            r"'scan_fraction' of DirectSampler .* \(0, 1\]",
        ),
        ({"scan_fraction": 1.5}, sl.ParameterError, r"'scan_fraction' .* Got 1\.5 instead"),
        ({"accept_distance": -0.1}, sl.ParameterError, r"'accept_distance' .* \[0, 1\]"),
        (
            {"weights": 0.0},
            sl.ParameterError,
            r"'weights' of DirectSampler must be a finite number",
        ),
        ({"weights": -1.0}, sl.ParameterError, r"'weights'"),
        (
            {"search_radius": (0, 0.5, 0.5)},
            sl.ParameterError,
            r"'search_radius' .* at least one cell",
        ),
        ({"search_radius": "big"}, sl.ParameterTypeError, r"'search_radius'"),
        ({"lag_power": float("nan")}, sl.ParameterError, r"'lag_power'"),
        ({"kinds": "discrete"}, sl.ParameterError, r"'kinds' of DirectSampler must be one of"),
    ],
)
def test_bad_hyperparameters_are_refused_with_the_parameter_named(kwargs, exc, pattern):
    with pytest.raises(exc, match=pattern):
        sl.DirectSampler(TI, **kwargs)


def test_parameters_changed_after_construction_are_checked_again():
    ds = sl.DirectSampler(TI)
    ds.scan_fraction = 2.0
    with pytest.raises(sl.ParameterError, match=r"'scan_fraction'"):
        ds.simulate((5, 5))


def test_mismatched_variable_shapes():
    with pytest.raises(
        sl.ParameterError, match=r"training_image\['b'\].*shape of training_image\['a'\]"
    ):
        sl.DirectSampler({"a": TI, "b": TI[:10]})


def test_nan_only_training_image():
    with pytest.raises(sl.ParameterError, match=r"at least one informed value"):
        sl.DirectSampler(np.full((6, 6), np.nan))
    with pytest.raises(sl.ParameterError, match=r"at least one informed value"):
        sl.DirectSampler(np.full((6, 6), -1, dtype=np.int32))


def test_training_image_without_a_jointly_informed_cell():
    a = TI.copy()
    b = np.zeros((12, 12), dtype=np.int64)
    a[:6] = np.nan
    b[6:] = -1
    ds = sl.DirectSampler({"a": a, "b": b}, neighbors=4)
    with pytest.raises(sl.ParameterError, match=r"'training_image'.*every simulated variable"):
        ds.simulate((5, 5))


def test_weights_mapping_naming_an_unknown_variable():
    with pytest.raises(sl.ParameterError, match=r"'weights' .* variables \['a', 'b'\]"):
        sl.DirectSampler({"a": TI, "b": TI}, weights={"c": 1.0})


def test_auxiliary_missing_on_the_grid():
    ds = sl.DirectSampler({"fine": TI, "trend": TI}, auxiliary=["trend"], neighbors=4)
    with pytest.raises(sl.ParameterError, match=r"'auxiliary'.*declared auxiliary variable 'tr"):
        ds.simulate((5, 5))
    holes = np.zeros((5, 5))
    holes[2, 2] = np.nan
    with pytest.raises(
        sl.ParameterError, match=r"auxiliary\['trend'\].*informed at every grid node"
    ):
        ds.simulate((5, 5), auxiliary={"trend": holes})
    with pytest.raises(sl.ParameterError, match=r"auxiliary\['trend'\].*shape \(1, 5, 5\)"):
        ds.simulate((5, 5), auxiliary={"trend": np.zeros((4, 5))})
    with pytest.raises(sl.ParameterError, match=r"'auxiliary'.*declare it"):
        sl.DirectSampler({"fine": TI, "trend": TI}).simulate(
            (5, 5), auxiliary={"trend": np.zeros((5, 5))}
        )
    with pytest.raises(sl.ParameterError, match=r"'auxiliary'.*at least one variable to simulate"):
        sl.DirectSampler({"fine": TI, "trend": TI}, auxiliary=["fine", "trend"])


def test_bad_simulate_arguments():
    ds = sl.DirectSampler(TI, neighbors=4)
    with pytest.raises(sl.ParameterError, match=r"'hard' .* shape \(1, 6, 7\).*\(6, 6\)"):
        ds.simulate((6, 7), hard=np.zeros((6, 6)))
    with pytest.raises(sl.ParameterTypeError, match=r"'hard'"):
        ds.simulate((6, 7), hard={"value": np.zeros((6, 7))})
    with pytest.raises(sl.ParameterError, match=r"'path' .* one of"):
        ds.simulate((6, 7), path="zigzag")
    with pytest.raises(sl.ParameterError, match=r"'threads'"):
        ds.simulate((6, 7), threads=0)
    with pytest.raises(sl.ParameterError, match=r"'shape'"):
        ds.simulate((0, 7))
    with pytest.raises(sl.ParameterError, match=r"'hard'.*finite values"):
        ds.simulate((6, 7), hard=np.full((6, 7), np.inf))
    cat = sl.DirectSampler(np.arange(36).reshape(6, 6) % 3)
    with pytest.raises(sl.ParameterError, match=r"'hard'.*integer category codes"):
        cat.simulate((6, 6), hard=np.full((6, 6), 0.5))


def test_downscale_bad_inputs():
    fine = RNG.normal(size=(16, 16))
    coarse = fine.reshape(4, 4, 4, 4).mean(axis=(1, 3))
    with pytest.raises(sl.ParameterError, match=r"'fine_train'.*multiple"):
        sl.downscale(coarse, fine[:15], coarse)
    with pytest.raises(sl.ParameterError, match=r"'coarse_target'.*NaN"):
        sl.downscale(coarse, fine, np.full((2, 2), np.nan))
    gap = coarse.copy()
    gap[1, 2] = np.nan
    with pytest.raises(sl.ParameterError, match=r"'coarse_train'.*1 NaN or infinite cells"):
        sl.downscale(gap, fine, coarse)
    with pytest.raises(sl.ParameterError, match=r"'realizations'"):
        sl.downscale(coarse, fine, coarse, realizations=0)
