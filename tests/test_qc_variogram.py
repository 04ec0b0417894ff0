"""FFT variograms against brute-force and analytic variograms; the two-point baseline."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import multivariate_normal

import strataloom as sl
from reference.variogram import variogram_axis
from strataloom.qc import (
    TruncatedGaussian,
    _indicator_gamma_model,
    _upper_orthant,
    fit_truncated_gaussian,
    indicator_variograms,
    truncated_gaussian,
    variogram_axes,
)

RNG = np.random.default_rng(11)


@pytest.mark.parametrize("shape", [(1, 13, 17), (5, 8, 9), (9, 4, 3), (2, 2, 2)])
@pytest.mark.parametrize("masked", [False, True])
def test_fft_variogram_equals_brute_force(shape, masked):
    f = RNG.standard_normal(shape)
    mask = RNG.random(shape) > 0.3 if masked else None
    got = variogram_axes(f, 8, mask=mask)
    for ax in range(3):
        # reference: brute-force NumPy variogram in tests/reference/variogram.py
        np.testing.assert_allclose(
            got[ax], variogram_axis(f, ax, 8, mask), rtol=1e-9, atol=1e-12, equal_nan=True
        )


def test_fft_variogram_skips_nan_cells():
    f = RNG.standard_normal((3, 10, 10))
    f[RNG.random(f.shape) < 0.2] = np.nan
    got = variogram_axes(f, 6)
    for ax in range(3):
        np.testing.assert_allclose(got[ax], variogram_axis(f, ax, 6), rtol=1e-9, equal_nan=True)


def _ar1_lines(rho, lines, length, seed):
    # Stationary AR(1) with unit variance: covariance rho**h, the exponential model
    # C(h) = exp(-h / L), L = -1 / ln(rho) (Chilès & Delfiner 2012, "Geostatistics: Modeling
    # Spatial Uncertainty", 2nd ed., exponential covariance).
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((lines, length))
    x = np.empty_like(e)
    x[:, 0] = e[:, 0]
    s = np.sqrt(1 - rho * rho)
    for t in range(1, length):
        x[:, t] = rho * x[:, t - 1] + s * e[:, t]
    return x


def test_variogram_of_a_known_covariance_matches_the_analytic_model():
    rho = 0.8
    x = _ar1_lines(rho, 3000, 200, seed=1)
    got = variogram_axes(x[:, None, :].transpose(1, 0, 2), 15)[2]
    h = np.arange(1, 16)
    # analytic semivariogram gamma(h) = C(0) - C(h) = 1 - rho**h (Chilès & Delfiner 2012)
    np.testing.assert_allclose(got, 1 - rho**h, atol=0.02)


def test_indicator_variogram_of_a_thresholded_gaussian_matches_sheppard():
    rho = 0.85
    x = _ar1_lines(rho, 3000, 150, seed=2)
    ind = (x > 0).astype(np.int16)[None]
    got = indicator_variograms(ind, [0, 1], 12)[1, 2]
    h = np.arange(1, 13)
    # Sheppard (1899) orthant probability: for a bigaussian pair with correlation r split at the
    # median, gamma_I = P(Y1 > 0, Y2 < 0) = arccos(r) / (2 pi) (also Chilès & Delfiner 2012, ch. 7).
    np.testing.assert_allclose(got, np.arccos(rho**h) / (2 * np.pi), atol=0.01)
    np.testing.assert_allclose(
        _indicator_gamma_model(0.5, rho**h), np.arccos(rho**h) / (2 * np.pi), atol=1e-9
    )


@pytest.mark.parametrize("t,r", [(0.7, 0.6), (-0.4, 0.3), (1.5, 0.95), (0.2, -0.5)])
def test_bigaussian_orthant_matches_scipy(t, r):
    # reference library: scipy.stats.multivariate_normal.cdf; P(Y1 > t, Y2 > t) = Phi2(-t, -t; r)
    ref = multivariate_normal(mean=[0, 0], cov=[[1, r], [r, 1]]).cdf([-t, -t])
    assert _upper_orthant(t, [r])[0] == pytest.approx(ref, abs=1e-6)


def test_truncated_gaussian_reproduces_proportions_and_the_model_variogram():
    model = TruncatedGaussian(
        codes=[0, 1],
        proportions=[0.5, 0.5],
        thresholds=[0.0],
        model="exponential",
        ranges=[float("inf"), 9.0, 24.0],
        facies=1,
    )
    g = []
    props = []
    for s in range(4):
        tg = truncated_gaussian(model, (1, 160, 160), seed=s)
        props.append(np.mean(tg == 1))
        g.append(indicator_variograms(tg, [0, 1], 10)[1])
    g = np.mean(g, axis=0)
    assert np.mean(props) == pytest.approx(0.5, abs=0.04)
    h = np.arange(1, 11)
    for ax, a in [(1, 9.0), (2, 24.0)]:
        # Sheppard's formula with rho(h) = exp(-3 h / a), the practical-range exponential model
        np.testing.assert_allclose(g[ax], np.arccos(np.exp(-3 * h / a)) / (2 * np.pi), atol=0.025)


def test_truncated_gaussian_fit_recovers_ranges():
    true = TruncatedGaussian(
        codes=[0, 2, 1],
        proportions=[0.5, 0.2, 0.3],
        thresholds=[0.0, 0.5244],
        model="exponential",
        ranges=[3.0, 12.0, 20.0],
        facies=1,
    )
    ti = truncated_gaussian(true, (20, 100, 120), seed=5)
    props = [np.mean(ti == c) for c in (0, 1, 2)]
    fit = fit_truncated_gaussian(indicator_variograms(ti, [0, 1, 2], 15)[1], props, [0, 1, 2], 1)
    assert fit.model == "exponential"
    assert fit.codes[-1] == 1
    np.testing.assert_allclose(fit.ranges, [3, 12, 20], rtol=0.2)
    tg = truncated_gaussian(fit, (10, 60, 60), seed=9)
    np.testing.assert_allclose([np.mean(tg == c) for c in (0, 1, 2)], props, atol=0.08)


def test_variogram_parameters_are_checked():
    with pytest.raises(sl.ParameterTypeError, match="'max_lag'"):
        variogram_axes(np.zeros((3, 3)), 2.5)
    with pytest.raises(sl.ParameterError, match="'mask'"):
        variogram_axes(np.zeros((3, 3)), 2, mask=np.ones((2, 2), bool))
    with pytest.raises(sl.ParameterError, match="'facies'"):
        fit_truncated_gaussian(np.zeros((3, 4)), [0.5, 0.5], [0, 1], 5)


def test_indicator_variograms_equal_brute_force_with_unknown_cells():
    f = RNG.integers(-1, 3, (4, 9, 11))  # -1: not a declared code, left out
    got = indicator_variograms(f, [0, 1, 2], 6)
    valid = f >= 0
    for k in range(3):
        for ax in range(3):
            # reference: brute-force NumPy variogram in tests/reference/variogram.py
            ref = variogram_axis((f == k).astype(float), ax, 6, valid)
            np.testing.assert_allclose(got[k, ax], ref, rtol=1e-9, atol=1e-12, equal_nan=True)
