"""Gaussian property fields against analytic covariance models, and property fields per facies."""

import numpy as np
import pytest

import strataloom as sl
from strataloom.training import PropertyModel, gaussian_field, property_field


def chiles_delfiner_variogram(h, model, scale_range):
    """Analytic semivariograms of unit sill, written from Chilès & Delfiner (2012), Geostatistics:
    Modeling Spatial Uncertainty, 2nd ed., Wiley, Sect. 2.5 (covariance models), with their scale
    parameter a expressed through the practical range r: exponential C(h) = exp(-h/a), a = r/3;
    Gaussian C(h) = exp(-(h/a)^2), a = r/sqrt(3); spherical C(h) = 1 - 3/2 (h/a) + 1/2 (h/a)^3 for
    h < a, a = r."""
    h = np.asarray(h, dtype=float)
    if model == "exponential":
        return 1.0 - np.exp(-h / (scale_range / 3.0))
    if model == "gaussian":
        return 1.0 - np.exp(-((h / (scale_range / np.sqrt(3.0))) ** 2))
    s = np.minimum(h / scale_range, 1.0)
    return 1.5 * s - 0.5 * s ** 3


def _sample_variograms(fields, axis, lags):
    """Classical (Matheron) estimator per field: half the mean squared increment."""
    out = []
    for f in fields:
        f = np.moveaxis(f, axis, 0)
        out.append([0.5 * np.mean((f[h:] - f[:-h]) ** 2) for h in lags])
    return np.array(out)


# Sample variogram against the analytic model within sampling tolerance: the tolerance is four
# standard errors of the mean over independent fields (plus 0.01 for the float round-off of FFTs).
@pytest.mark.parametrize("model", ["exponential", "gaussian", "spherical"])
def test_sample_variogram_matches_analytic_model(model):
    r = 24.0
    fields = [gaussian_field((160, 160), range=r, model=model, seed=100 + s)[0] for s in range(24)]
    lags = np.array([1, 2, 4, 8, 12, 16, 24, 32])
    for axis in (0, 1):
        g = _sample_variograms(fields, axis, lags)
        mean, se = g.mean(axis=0), g.std(axis=0, ddof=1) / np.sqrt(len(fields))
        ref = chiles_delfiner_variogram(lags, model, r)
        assert np.all(np.abs(mean - ref) <= 4.0 * se + 0.01), (axis, mean.round(3), ref.round(3))
    # the model with a range three times off fails the same check (the test can fail)
    wrong = chiles_delfiner_variogram(lags, model, 3.0 * r)
    assert np.any(np.abs(mean - wrong) > 4.0 * se + 0.01)


def test_anisotropic_ranges_and_azimuth():
    # ranges (z, along azimuth, across); at azimuth 0 the along-range is the y range; at 90 the x
    # range (model: exponential, Chilès & Delfiner 2012 as above)
    lags = np.array([2, 5, 10])
    for azimuth, (ry, rx) in ((0.0, (40.0, 10.0)), (90.0, (10.0, 40.0))):
        fields = [gaussian_field((1, 200, 200), range=(1.0, 40.0, 10.0), azimuth=azimuth,
                                 seed=s)[0] for s in range(12)]
        for axis, rr in ((0, ry), (1, rx)):
            g = _sample_variograms(fields, axis, lags)
            mean, se = g.mean(axis=0), g.std(axis=0, ddof=1) / np.sqrt(len(fields))
            assert np.all(np.abs(mean - chiles_delfiner_variogram(lags, "exponential", rr))
                          <= 4.0 * se + 0.01)


def test_vertical_range_and_physical_spacing():
    # a 3-D field with dz = 0.5 m, vertical range 4 m: lag 2 cells = 1 m (Chilès & Delfiner 2012)
    fields = [gaussian_field((48, 64, 64), range=(4.0, 200.0, 200.0), spacing=(0.5, 10.0, 10.0),
                             seed=s) for s in range(4)]
    lags = np.array([1, 2, 4, 8])
    g = _sample_variograms(fields, 0, lags)
    mean, se = g.mean(axis=0), g.std(axis=0, ddof=1) / np.sqrt(len(fields))
    ref = chiles_delfiner_variogram(lags * 0.5, "exponential", 4.0)
    assert np.all(np.abs(mean - ref) <= 4.0 * se + 0.01), (mean, ref)


def test_field_moments_and_determinism():
    a = gaussian_field((64, 64, 64), range=6.0, seed=3)
    b = gaussian_field((64, 64, 64), range=6.0, seed=3)
    assert np.array_equal(a, b)
    assert not np.array_equal(a, gaussian_field((64, 64, 64), range=6.0, seed=4))
    # standard normal marginal: mean 0, variance 1 (sampling error of a correlated field is small
    # for range << size; common practice, no source)
    assert abs(a.mean()) < 0.05 and abs(a.var() - 1.0) < 0.05


def test_property_field_per_facies():
    rng = np.random.default_rng(0)
    fac = np.zeros((40, 80, 80), np.int8)
    fac[:, :, 40:] = 1
    fac[rng.random(fac.shape) < 0.01] = -1  # masked cells get NaN
    models = {0: PropertyModel(0.08, 0.02, 5.0), 1: PropertyModel(0.25, 0.04, (3.0, 20.0, 8.0),
                                                                  "gaussian", 30.0)}
    p = property_field(fac, models, spacing=(1.0, 1.0, 1.0), seed=5)
    assert p.dtype == np.float32 and p.shape == fac.shape
    assert np.isnan(p[fac < 0]).all() and np.isfinite(p[fac >= 0]).all()
    for k, m in models.items():
        vals = p[fac == k]
        assert abs(vals.mean() - m.mean) < 0.25 * m.sd
        assert abs(vals.std() - m.sd) < 0.15 * m.sd
    # changing facies 1's model leaves facies 0's values unchanged (one generator per facies)
    q = property_field(fac, {**models, 1: PropertyModel(0.3, 0.01, 2.0)}, seed=5)
    assert np.array_equal(p[fac == 0], q[fac == 0]) and not np.array_equal(p[fac == 1], q[fac == 1])
    c = property_field(fac, models, seed=5, low=0.05, high=0.3)
    assert np.nanmin(c) >= 0.05 and np.nanmax(c) <= 0.3


def test_bad_field_parameters():
    with pytest.raises(sl.ParameterError, match="'model' of gaussian_field"):
        gaussian_field((8, 8), range=3.0, model="cubic-ish")
    with pytest.raises(sl.ParameterError, match="'range' of gaussian_field"):
        gaussian_field((8, 8), range=-1.0)
    with pytest.raises(sl.ParameterError, match="'sd' of PropertyModel"):
        PropertyModel(0.1, -0.01, 5.0)
    with pytest.raises(sl.ParameterTypeError, match="'facies' of property_field"):
        property_field(np.zeros((4, 4)), {0: PropertyModel(0.1, 0.01, 2.0)})
    with pytest.raises(sl.ParameterError, match="'high' of property_field"):
        property_field(np.zeros((4, 4), int), {0: PropertyModel(0.1, 0.01, 2.0)}, low=1, high=0)
