"""Wells: minimum-curvature trajectories, LAS and CSV reading, upscaling to cells."""

from __future__ import annotations

import lasio
import numpy as np
import pytest

import strataloom as sl
from reference.upscale_loop import upscale_loop
from strataloom.conditioning import (
    Survey,
    Well,
    minimum_curvature,
    read_las,
    read_point_table,
    read_survey,
    upscale,
)
from strataloom.errors import StudyError

# The minimum-curvature method: each survey interval is a circular arc tangent to both stations'
# directions, with the ratio factor RF = 2/beta * tan(beta/2). Source: S. J. Sawaryn and
# J. L. Thorogood (2005), "A Compendium of Directional Calculations Based on the Minimum Curvature
# Method", SPE Drilling & Completion 20(1) (SPE 84246), the standard industry practice for wellbore
# position calculation (citation recalled from memory). Because the method's model of the hole is a
# circular arc, it must reproduce an analytic circular arc exactly, and a straight hole by plain
# trigonometry.


@pytest.mark.parametrize("build_deg_per_m", [0.5, 3.0 / 30.0, 10.0 / 30.0])
@pytest.mark.parametrize("azimuth", [0.0, 37.0, 210.0])
def test_constant_build_arc_matches_circle(build_deg_per_m, azimuth):
    # analytic arc of radius R from a vertical start: TVD = R sin(theta), H = R (1 - cos theta)
    radius = 180.0 / (np.pi * build_deg_per_m)
    md = np.linspace(0.0, 170.0 / build_deg_per_m, 9)  # up to 170 degrees of build
    inc = build_deg_per_m * md
    pos = minimum_curvature(md, inc, np.full_like(md, azimuth))
    theta = np.radians(inc)
    horiz = radius * (1 - np.cos(theta))
    a = np.radians(azimuth)
    expected = np.column_stack([horiz * np.sin(a), horiz * np.cos(a), radius * np.sin(theta)])
    np.testing.assert_allclose(pos, expected, atol=1e-9 * radius)
    # points between stations follow the same arc (minimum-curvature interpolation)
    q = np.linspace(md[0], md[-1], 101)
    tq = np.radians(build_deg_per_m * q)
    hq = radius * (1 - np.cos(tq))
    exp_q = np.column_stack([hq * np.sin(a), hq * np.cos(a), radius * np.sin(tq)])
    np.testing.assert_allclose(
        Survey(md, inc, np.full_like(md, azimuth)).positions(q), exp_q, atol=1e-9 * radius
    )


def test_horizontal_turn_is_a_circle():
    # inclination 90 degrees, azimuth turning at constant rate: a horizontal circle, TVD constant
    rate = 2.0  # degrees per metre
    radius = 180.0 / (np.pi * rate)
    md = np.linspace(0, 80, 5)
    az = rate * md
    pos = minimum_curvature(md, np.full_like(md, 90.0), az)
    a = np.radians(az)
    expected = np.column_stack([radius * (1 - np.cos(a)), radius * np.sin(a), np.zeros_like(a)])
    np.testing.assert_allclose(pos, expected, atol=1e-9)


@pytest.mark.parametrize(("inc", "az"), [(0.0, 0.0), (30.0, 45.0), (60.0, 300.0), (90.0, 90.0)])
def test_straight_hole_trigonometry(inc, az):
    # a straight hole: east = L sin(i) sin(a), north = L sin(i) cos(a), tvd = L cos(i)
    md = np.array([0.0, 12.5, 40.0, 100.0])
    pos = minimum_curvature(md, np.full(4, inc), np.full(4, az))
    i, a = np.radians(inc), np.radians(az)
    expected = np.column_stack(
        [md * np.sin(i) * np.sin(a), md * np.sin(i) * np.cos(a), md * np.cos(i)]
    )
    np.testing.assert_allclose(pos, expected, atol=1e-12)


def test_survey_rejects_bad_input():
    with pytest.raises(sl.ParameterError, match="'md'"):
        Survey([0, 10, 5], [0, 1, 2], [0, 0, 0])
    with pytest.raises(sl.ParameterError, match="'inclination'"):
        Survey([0, 10], [0, 190], [0, 0])


def _write_las(path, md, facies, null=-999.25, collar=(100.0, 200.0, 50.0)):
    las = lasio.LASFile()
    las.well["WELL"].value = "LAS-1"
    las.well["NULL"].value = null
    las.well.append(lasio.HeaderItem("XCOORD", unit="m", value=collar[0]))
    las.well.append(lasio.HeaderItem("YCOORD", unit="m", value=collar[1]))
    las.params.append(lasio.HeaderItem("EKB", unit="m", value=collar[2]))
    las.append_curve("DEPT", md, unit="m")
    las.append_curve("FACIES", facies)
    las.append_curve("RES", np.linspace(1, 2, len(md)), unit="ohmm")
    with open(path, "w") as f:
        las.write(f, version=2.0)


def test_las_round_trip_with_nulls(tmp_path):
    # lasio (the reference LAS reader/writer) writes a LAS 2.0 file; our reader must get the same
    # samples back, with the NULL value (-999.25 by the LAS 2.0 convention) turned into NaN.
    md = np.arange(0.0, 10.0, 0.5)
    fac = np.where(md < 4, 0.0, 1.0)
    fac[[3, 7]] = -999.25
    path = tmp_path / "w.las"
    _write_las(path, md, fac)
    back = lasio.read(str(path))
    assert back.version["VERS"].value == 2.0
    well = read_las(path, {"facies": "FACIES"})
    assert well.name == "LAS-1"
    assert well.collar == (100.0, 200.0, 50.0)
    np.testing.assert_allclose(well.md, md)
    expected = fac.copy()
    expected[[3, 7]] = np.nan
    np.testing.assert_array_equal(well.values["facies"], expected)
    # vertical hole: z = collar elevation - md, x and y at the collar
    np.testing.assert_allclose(well.z, 50.0 - md)
    np.testing.assert_allclose(well.x, 100.0)
    np.testing.assert_allclose(well.length, 0.5)
    assert not well.deviated


def test_las_deviated_with_survey_and_explicit_collar(tmp_path):
    md = np.arange(0.0, 30.0, 1.0)
    _write_las(tmp_path / "d.las", md, np.zeros_like(md))
    (tmp_path / "s.csv").write_text("md,inc,azi\n0,0,90\n10,0,90\n30,30,90\n")
    survey = read_survey(tmp_path / "s.csv")
    well = read_las(tmp_path / "d.las", {"facies": "facies"}, collar=(0.0, 0.0, 0.0), survey=survey)
    assert well.deviated
    ref = survey.positions(md)
    np.testing.assert_allclose(well.x, ref[:, 0])
    np.testing.assert_allclose(well.z, -ref[:, 2])
    assert well.x[-1] > 3.0  # azimuth 90 builds towards east
    np.testing.assert_allclose(well.y, 0.0, atol=1e-9)


def test_las_errors(tmp_path):
    with pytest.raises(StudyError, match="does not exist"):
        read_las(tmp_path / "none.las", {"facies": "FACIES"})
    md = np.arange(0.0, 3.0)
    _write_las(tmp_path / "w.las", md, np.zeros(3))
    with pytest.raises(StudyError, match="no curve 'GR'"):
        read_las(tmp_path / "w.las", {"facies": "GR"})
    (tmp_path / "bad.las").write_text("this is not a LAS file\n")
    with pytest.raises(StudyError, match="cannot be read"):
        read_las(tmp_path / "bad.las", {"facies": "FACIES"})


def test_point_table_groups_by_well_column(tmp_path):
    (tmp_path / "p.csv").write_text("well,x,y,z,facies\nA,1,1,1,0\nA,1,1,2,1\nB,5,5,1,1\n")
    wells = read_point_table(tmp_path / "p.csv", ["facies"])
    assert [w.name for w in wells] == ["A", "B"]
    np.testing.assert_array_equal(wells[0].values["facies"], [0, 1])
    (tmp_path / "q.csv").write_text("x,y,z\n1,1,1\n")
    with pytest.raises(StudyError, match="column 'facies'"):
        read_point_table(tmp_path / "q.csv", ["facies"])
    (tmp_path / "r.csv").write_text("x,y,z,facies\n1,one,1,0\n")
    with pytest.raises(StudyError, match="row 2"):
        read_point_table(tmp_path / "r.csv", ["facies"])


def test_upscale_matches_brute_force():
    rng = np.random.default_rng(3)
    grid = sl.Grid((4, 5, 6), spacing=(2.0, 10.0, 10.0), origin=(-8.0, 0.0, 0.0))
    wells = []
    for i in range(5):
        n = 60
        z = rng.uniform(-10, 2, n)  # some samples above and below the grid
        wells.append(
            Well(
                name=f"W{i}",
                x=np.full(n, rng.uniform(0, 60)),
                y=np.full(n, rng.uniform(0, 50)),
                z=z,
                values={
                    "facies": rng.integers(0, 3, n).astype(float),
                    "por": rng.uniform(0, 0.3, n),
                },
                length=rng.uniform(0.1, 1.0, n),
            )
        )
    hd = upscale(
        grid,
        wells,
        {"facies": "categorical", "por": "continuous"},
        categories={"facies": [0, 1, 2]},
    )
    ref = upscale_loop(grid, wells, "facies")  # tests/reference/upscale_loop.py
    got = {
        tuple(int(x) for x in c): int(v) for c, v in zip(hd.cells, hd.values["facies"], strict=True)
    }
    assert got == ref
    outside = sum(int(np.sum((w.z < -8) | (w.z >= 0))) for w in wells)
    assert hd.report.outside_total == outside
    assert hd.report.inside == 300 - outside
    # conflicts: every cell with more than one code present
    assert len(hd.report.conflicts) > 0
    for c in hd.report.conflicts:
        assert len(c.codes) > 1
    # continuous: length-weighted mean, checked by hand for one cell
    c0 = tuple(hd.cells[0])
    num = den = 0.0
    for w in wells:
        cells = grid.locate(w.points())
        sel = np.all(cells == c0, axis=1)
        num += np.sum(w.length[sel] * w.values["por"][sel])
        den += np.sum(w.length[sel])
    assert hd.values["por"][0] == pytest.approx(num / den)
    dense = hd.dense("facies")
    assert dense.shape == grid.shape and np.sum(dense >= 0) == len(hd.cells)


def test_upscale_tie_and_unknown_code():
    grid = sl.Grid((1, 1, 2))
    w = Well(
        "T",
        x=np.array([0.5, 0.5, 1.5]),
        y=np.full(3, 0.5),
        z=np.full(3, 0.5),
        values={"facies": np.array([1.0, 0.0, 1.0])},
        length=np.ones(3),
    )
    hd = upscale(grid, [w], {"facies": "categorical"})
    np.testing.assert_array_equal(hd.values["facies"], [0, 1])  # tie goes to the smaller code
    assert hd.report.conflicts[0].tie and hd.report.conflicts[0].cell == (0, 0, 0)
    with pytest.raises(StudyError, match=r"code 1 .* not in the facies table"):
        upscale(grid, [w], {"facies": "categorical"}, categories={"facies": [0]})
