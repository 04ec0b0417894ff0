"""Object-based builder: proportions, channel geometry, azimuth, erosion order, determinism."""

import math

import numpy as np
import pytest
import scipy.ndimage as ndi

import strataloom as sl
from strataloom.training import Bodies, Channels, Levee, anisotropy, build_objects

SP2 = (1.0, 2.0, 2.0)  # plan-view cells of 2 m


def _channels(**kw):
    base = dict(facies=1, proportion=0.25, width={"uniform": [40.0, 70.0]},
                thickness={"uniform": [2.0, 4.0]}, azimuth={"normal": [35.0, 10.0]},
                wavelength={"uniform": [600.0, 1000.0]}, amplitude={"uniform": [40.0, 120.0]},
                levee=Levee(2, 25.0, 1.5))
    base.update(kw)
    return Channels(**base)


def _lobes(**kw):
    base = dict(kind="lobe", facies=3, proportion=0.15, length={"uniform": [150.0, 300.0]},
                width={"uniform": [80.0, 150.0]}, thickness={"uniform": [1.0, 3.0]},
                azimuth={"uniform": [0.0, 180.0]})
    base.update(kw)
    return Bodies(**base)


# The acceptance figure: achieved proportions within 0.02 of the target for channel and lobe
# TIs of 2-D and 3-D size (a requirement of the project, checked against an independent count).
@pytest.mark.parametrize("shape", [(200, 200), (30, 100, 100)], ids=["2d", "3d"])
@pytest.mark.parametrize("groups", ["channels", "lobes", "both"])
def test_achieved_proportions_within_002_of_target(shape, groups):
    g = {"channels": [_channels()], "lobes": [_lobes(proportion=0.3)],
         "both": [_lobes(), _channels()]}[groups]
    r = build_objects(shape, g, spacing=(1.0, 10.0, 10.0), seed=11)
    counts = np.bincount(r.facies.ravel().astype(np.int64), minlength=4) / r.facies.size
    for code, target in r.targets.items():
        assert abs(counts[code] - target) <= 0.02, (code, counts[code], target)
        assert r.proportions[code] == pytest.approx(counts[code], abs=1e-12)  # the report is true
    assert r.facies.dtype == np.int8
    assert r.facies.shape == ((1, *shape) if len(shape) == 2 else shape)


# Width check named by the issue: twice the maximum of scipy.ndimage's Euclidean distance transform
# across a channel (reference library: scipy.ndimage.distance_transform_edt) within 15 % of the
# specified width, for straight channels.
@pytest.mark.parametrize("width", [24.0, 40.0])
def test_straight_channel_width_by_distance_transform(width):
    measured = []
    for seed in range(4):
        g = [Channels(facies=1, proportion=0.06, width=width, thickness=1.0, azimuth=50.0,
                      amplitude=0.0)]
        r = build_objects((200, 200), g, spacing=SP2, seed=seed)
        mask = r.facies[0] == 1
        edt = ndi.distance_transform_edt(mask, sampling=SP2[1:])
        edt[:30, :] = edt[-30:, :] = edt[:, :30] = edt[:, -30:] = 0  # across, not at the grid edge
        labels, n = ndi.label(mask)
        measured += [2.0 * ndi.maximum(edt, labels, i) for i in range(1, n + 1)]
    measured = [m for m in measured if m > 0]
    assert abs(np.median(measured) - width) <= 0.15 * width, measured


def test_box_section_width_and_rounded_thickness_in_3d():
    # the same distance-transform width check in every layer of a 3-D box-section channel, and the
    # thickest column of a rounded channel equal to the specified thickness (common practice, no
    # source: a half-ellipse section is deepest on its centreline)
    g = [Channels(facies=1, proportion=0.02, width=30.0, thickness=6.0, azimuth=120.0,
                  section="box")]
    r = build_objects((20, 120, 120), g, spacing=(1.0, 2.0, 2.0), seed=3)
    widths = []
    for layer in r.facies == 1:
        if layer.any():
            edt = ndi.distance_transform_edt(layer, sampling=(2.0, 2.0))
            widths.append(2.0 * edt[20:-20, 20:-20].max())  # across, away from the grid edge
    assert widths and abs(np.median(widths) - 30.0) <= 0.15 * 30.0
    g = [Channels(facies=1, proportion=0.02, width=30.0, thickness=6.0, azimuth=120.0)]
    inside = []
    for seed in range(20):  # channels wholly inside the grid's height
        r = build_objects((40, 120, 120), g, spacing=(0.5, 2.0, 2.0), seed=seed)
        if len(r.objects) == 1 and 6.5 < r.objects[0]["top"] < 19.5:
            inside.append((r.facies == 1).sum(axis=0).max() * 0.5)
    assert len(inside) >= 3
    assert np.allclose(inside, 6.0, atol=0.5)


# Azimuth check named by the issue: recovered from the TI's variogram anisotropy (major axis of the
# indicator variogram map, common practice, no source) within 10 degrees of the specified one.
@pytest.mark.parametrize(("azimuth", "spacing"), [(20.0, (1, 10, 10)), (65.0, (1, 10, 10)),
                                                  (110.0, (1, 5, 10)), (155.0, (1, 10, 10))])
def test_azimuth_recovered_from_variogram_anisotropy(azimuth, spacing):
    g = [Channels(facies=1, proportion=0.25, width=60.0, thickness=3.0, azimuth=azimuth,
                  wavelength={"uniform": [600.0, 1000.0]}, amplitude={"uniform": [40.0, 100.0]})]
    r = build_objects((160, 160), g, spacing=spacing, seed=5)
    found, ratio = anisotropy(r.facies, 1, spacing=spacing)
    diff = abs((found - azimuth + 90.0) % 180.0 - 90.0)
    assert diff <= 10.0, (found, azimuth)
    assert ratio > 1.3


def test_same_seed_same_image_other_seed_other_image():
    g = [_lobes(), _channels()]
    a = build_objects((12, 60, 60), g, spacing=(1.0, 10.0, 10.0), seed=7)
    b = build_objects((12, 60, 60), g, spacing=(1.0, 10.0, 10.0), seed=7)
    c = build_objects((12, 60, 60), g, spacing=(1.0, 10.0, 10.0), seed=8)
    assert np.array_equal(a.facies, b.facies) and a.objects == b.objects
    assert not np.array_equal(a.facies, c.facies)


def _straight_channel_cells(rec, shape, spacing):
    """Cells of a straight box-section channel recomputed from its record (no erosion)."""
    nz, ny, nx = shape
    z = (np.arange(nz) + 0.5) * spacing[0]
    y = (np.arange(ny) + 0.5) * spacing[1]
    x = (np.arange(nx) + 0.5) * spacing[2]
    th = math.radians(rec["azimuth"])
    lateral = (x[None, :] - rec["x"]) * math.cos(th) - (y[:, None] - rec["y"]) * math.sin(th)
    plan = np.abs(lateral) <= rec["width"] / 2
    vert = (z <= rec["top"]) & (z >= rec["top"] - rec["thickness"])
    return vert[:, None, None] & plan[None]


@pytest.mark.parametrize("channels_last", [True, False])
def test_erosion_order(channels_last):
    shape, spacing = (16, 50, 50), (1.0, 10.0, 10.0)
    ch = Channels(facies=1, proportion=0.12, width=60.0, thickness=3.0, azimuth=80.0,
                  section="box")
    lobes = _lobes(proportion=0.3, thickness=4.0)
    order = ["lobes", "channels"] if channels_last else ["channels", "lobes"]
    r = build_objects(shape, [ch, lobes], spacing=spacing, seed=2, erosion_order=order)
    inside = np.zeros(shape, bool)
    for rec in r.objects:
        if rec["kind"] == "channel":
            inside |= _straight_channel_cells(rec, shape, spacing)
    lobe_in_channels = np.count_nonzero(r.facies[inside] == 3)
    if channels_last:  # channels cut the lobes: every channel cell stays channel
        assert lobe_in_channels == 0
        assert np.all(r.facies[inside] == 1)
    else:  # lobes are younger and cut the channels
        assert lobe_in_channels > 0


def test_levees_lie_along_channel_banks():
    # every levee cell lies within the levee width of a channel cell (distance by
    # scipy.ndimage.distance_transform_edt, reference library), and levees exist on both sides
    g = [Channels(facies=1, proportion=0.08, width=30.0, thickness=1.0, azimuth=0.0,
                  levee=Levee(facies=2, width=12.0, thickness=1.0))]
    r = build_objects((150, 150), g, spacing=SP2, seed=1)
    plan = r.facies[0]
    assert (plan == 2).any()
    dist = ndi.distance_transform_edt(plan != 1, sampling=SP2[1:])
    assert dist[plan == 2].max() <= 12.0 + 2.0  # one cell of discretisation
    assert 2 not in set(np.unique(plan[dist == 0]))  # levees never replace channel cells


def test_lens_and_ellipsoid_shapes():
    # a single body's footprint area against pi a b (ellipse area, common practice, no source)
    for kind in ("lens", "ellipsoid", "lobe"):
        g = [Bodies(kind, 1, 0.01, length=200.0, width=80.0, thickness=4.0, azimuth=30.0)]
        r = build_objects((40, 100, 100), g, spacing=(0.5, 5.0, 5.0), seed=6)
        rec = r.objects[0]
        assert r.counts[g[0].name] >= 1
        if len(r.objects) == 1 and 5 < rec["x"] < 495 and 5 < rec["y"] < 495:
            area = np.count_nonzero((r.facies == 1).any(axis=0)) * 25.0
            assert area <= math.pi * 100.0 * 40.0 * 1.1


def test_bad_parameters_name_the_parameter():
    with pytest.raises(sl.ParameterError, match="'width' of Channels"):
        Channels(facies=1, proportion=0.2, width=-10.0, thickness=2.0)
    with pytest.raises(sl.ParameterError, match="'thickness' of Bodies"):
        Bodies("lobe", 1, 0.2, length=10.0, width=5.0, thickness={"uniform": [-1.0, 2.0]})
    with pytest.raises(sl.ParameterError, match=r"'width' of Channels.*within"):
        Channels(facies=1, proportion=0.2, width={"normal": [30.0, 5.0]}, thickness=2.0)
    with pytest.raises(sl.ParameterError, match="'proportion'"):
        build_objects((20, 20), [_channels(proportion=0.6), _lobes(proportion=0.5)])
    with pytest.raises(sl.ParameterError, match="'background'"):
        build_objects((20, 20), [_channels(facies=0)])
    with pytest.raises(sl.ParameterError, match="'facies'"):
        build_objects((20, 20), [_channels(), _lobes(facies=1)])
    with pytest.raises(sl.ParameterError, match="'erosion_order'"):
        build_objects((20, 20), [_channels()], erosion_order=["rivers"])
    with pytest.raises(sl.ParameterError, match="'kind' of Bodies"):
        Bodies("blob", 1, 0.1, 10.0, 10.0, 1.0)
    with pytest.raises(sl.ParameterError, match="'section' of Channels"):
        _channels(section="round")
    with pytest.raises(sl.ParameterTypeError, match="'groups\\[0\\]'"):
        build_objects((20, 20), ["channels"])
