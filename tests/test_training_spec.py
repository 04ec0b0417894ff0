"""The TOML builder spec: loading, building, and bad specs reported with key and line."""

import re
from pathlib import Path

import numpy as np
import pytest

import strataloom as sl
from strataloom.training import TISpecError, build_training_image, load_spec
from strataloom.training.spec import key_lines

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "ti_channels.toml"

SMALL = """\
seed = 3
background = 0
facies = ["mud", "sand", "levee", "lobe"]
erosion_order = ["lobes", "channels"]

[grid]
shape = [12, 40, 40]
spacing = [1.0, 20.0, 20.0]

[[channels]]
name = "channels"
facies = 1
proportion = 0.2
width = { uniform = [60.0, 100.0] }
thickness = 3.0
azimuth = { normal = [45.0, 5.0] }
amplitude = 50.0
wavelength = 800.0
levee = { facies = 2, width = 40.0, thickness = 1.5 }

[[bodies]]
name = "lobes"
kind = "lobe"
facies = 3
proportion = 0.1
length = 300.0
width = 150.0
thickness = { triangular = [1.0, 2.0, 3.0] }

[[properties]]
name = "porosity"
low = 0.0
high = 0.4

  [[properties.by_facies]]
  facies = 0
  mean = 0.05
  sd = 0.01
  range = 100.0

  [[properties.by_facies]]
  facies = 1
  mean = 0.25
  sd = 0.03
  range = [3.0, 400.0, 100.0]
  azimuth = 45.0
"""


def _write(tmp_path, text, name="ti.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _line_of(text, needle, occurrence=1):
    hits = [i for i, line in enumerate(text.splitlines(), 1) if needle in line]
    return hits[occurrence - 1]


def test_example_spec_loads():
    spec = load_spec(EXAMPLE)
    assert spec.shape == (50, 200, 200) and spec.spacing == (1.0, 10.0, 10.0)
    assert [g.name for g in spec.groups] == ["channels", "lobes"]
    assert spec.properties[0].name == "porosity" and set(spec.properties[0].models) == {0, 1, 2, 3}


def test_small_spec_builds_deterministically(tmp_path):
    p = _write(tmp_path, SMALL)
    a = build_training_image(p)
    b = build_training_image(p)
    assert np.array_equal(a.facies, b.facies)
    assert np.array_equal(a.properties["porosity"], b.properties["porosity"], equal_nan=True)
    c = build_training_image(p, seed=4)
    assert not np.array_equal(a.facies, c.facies)
    assert a.facies.shape == (12, 40, 40) and a.facies_names[3] == "lobe"
    por = a.properties["porosity"]
    assert np.isnan(por[a.facies >= 2]).all() and np.isfinite(por[a.facies <= 1]).all()
    for k, t in a.build.targets.items():
        assert abs(a.build.proportions[k] - t) <= 0.02
    assert "objects kept" in a.report()


def test_key_lines_for_nested_arrays_of_tables():
    lines = key_lines(SMALL)
    assert lines[("channels", 0, "width")] == _line_of(SMALL, "width = { uniform")
    assert lines[("properties", 0, "by_facies", 1, "azimuth")] == _line_of(SMALL, "azimuth = 45.0")
    assert lines[("bodies", 0, "thickness")] == _line_of(SMALL, "triangular")
    assert lines[("grid", "spacing")] == _line_of(SMALL, "spacing =")


def _error(tmp_path, text):
    with pytest.raises(TISpecError) as info:
        load_spec(_write(tmp_path, text))
    return info.value


# Bad specs named by the issue: negative widths, proportions summing over 1, unknown keys -> errors
# naming the key and the file line.
def test_negative_width_names_key_and_line(tmp_path):
    text = SMALL.replace("width = { uniform = [60.0, 100.0] }", "width = -80.0")
    e = _error(tmp_path, text)
    assert e.key == "channels[0].width" and e.line == _line_of(text, "width = -80.0")
    assert re.search(r"ti\.toml, line \d+, key channels\[0\]\.width: .*positive", str(e))
    assert isinstance(e, sl.ParameterError) and isinstance(e, ValueError)
    text = SMALL.replace("levee = { facies = 2, width = 40.0", "levee = { facies = 2, width = -4.0")
    e = _error(tmp_path, text)
    assert e.key == "channels[0].levee.width" and e.line == _line_of(text, "levee =")
    text = SMALL.replace("width = 150.0", "width = { uniform = [-10.0, 5.0] }")
    e = _error(tmp_path, text)
    assert e.key == "bodies[0].width" and e.line == _line_of(text, "uniform = [-10.0")


def test_proportions_summing_over_one(tmp_path):
    text = SMALL.replace("proportion = 0.2", "proportion = 0.7").replace(
        "proportion = 0.1", "proportion = 0.35")
    e = _error(tmp_path, text)
    assert e.key == "bodies[0].proportion" and e.line == _line_of(text, "proportion = 0.35")
    assert "sum to 1.05" in str(e) and f"line {_line_of(text, 'proportion = 0.7')}" in str(e)


def test_unknown_keys(tmp_path):
    text = SMALL.replace("thickness = 3.0", "thickness = 3.0\nwidht = 4.0")
    e = _error(tmp_path, text)
    assert e.key == "channels[0].widht" and e.line == _line_of(text, "widht")
    assert "did you mean 'width'" in str(e)
    text = SMALL.replace("seed = 3", "seed = 3\nrandom_seed = 4")
    e = _error(tmp_path, text)
    assert e.key == "random_seed" and e.line == 2
    text = SMALL.replace("  range = 100.0", "  range = 100.0\n  nugget = 0.1")
    e = _error(tmp_path, text)
    assert e.key == "properties[0].by_facies[0].nugget" and e.line == _line_of(text, "nugget")
    text = SMALL.replace("[grid]", "[grids]")
    e = _error(tmp_path, text)
    assert e.key == "grids" and e.line == _line_of(text, "[grids]")


@pytest.mark.parametrize(("old", "new", "key", "needle"), [
    ("shape = [12, 40, 40]", "shape = [12, 0, 40]", "grid.shape", "shape ="),
    ("kind = \"lobe\"", "kind = \"blob\"", "bodies[0].kind", "kind ="),
    ("facies = 3", "facies  = 1", "bodies[0].facies", "facies  = 1"),
    ("sd = 0.01", "sd = -0.01", "properties[0].by_facies[0].sd", "sd = -0.01"),
    ("range = 100.0", "range = [1.0, 2.0]", "properties[0].by_facies[0].range",
     "range = [1.0, 2.0]"),
    ("proportion = 0.2", "proportion = 1.2", "channels[0].proportion", "proportion = 1.2"),
    ("amplitude = 50.0", "amplitude = -5.0", "channels[0].amplitude", "amplitude ="),
    ("erosion_order = [\"lobes\", \"channels\"]", "erosion_order = [\"lobes\"]", "erosion_order",
     "erosion_order"),
    ("thickness = 3.0", "thickness = \"thick\"", "channels[0].thickness", "thickness = \"thick\""),
])
def test_bad_values_name_key_and_line(tmp_path, old, new, key, needle):
    text = SMALL.replace(old, new, 1)
    e = _error(tmp_path, text)
    assert e.key == key and e.line == _line_of(text, needle), str(e)


def test_missing_key_and_bad_toml(tmp_path):
    text = SMALL.replace("thickness = 3.0\n", "", 1)
    e = _error(tmp_path, text)
    assert "missing required key 'thickness'" in str(e) and e.line == _line_of(text, "[[channels]]")
    e = _error(tmp_path, SMALL.replace("seed = 3", "seed = = 3"))
    assert "not valid TOML" in str(e) and "line 1" in str(e)
    with pytest.raises(TISpecError, match="cannot read"):
        load_spec(tmp_path / "nothing.toml")
