"""Study files: schema, validation messages (one line, naming key and line), CLI exit codes."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import strataloom as sl
from strataloom.cli import main
from strataloom.study import key_lines, load_study
from study_helpers import cli_check_error, write_small_study


def _edit(path, old, new):
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new, 1))


def _line_of(path, needle):
    for no, line in enumerate(path.read_text().splitlines(), start=1):
        if needle in line:
            return no
    raise AssertionError(needle)


def test_load_valid_study_resolves_paths(tmp_path):
    p = write_small_study(tmp_path / "s")
    other = tmp_path / "elsewhere"
    other.mkdir()
    cwd = os.getcwd()
    os.chdir(other)  # relative paths resolve against the study's folder, not the working directory
    try:
        s = load_study(os.path.relpath(p, other))
    finally:
        os.chdir(cwd)
    assert s.grid == sl.Grid((4, 16, 16), (1.0, 10.0, 10.0), (0.0, 0.0, 0.0))
    assert s.training_image.file == (tmp_path / "s" / "ti.npy").resolve()
    assert [w.format for w in s.wells] == ["csv", "las"]
    assert s.wells[1].collar == (55.0, 45.0, 4.0)
    assert s.variables["facies"].codes == [0, 1]
    assert s.engine.parameters["levels"] == 2
    js = s.to_json()
    assert js["training_image"]["file"] == "ti.npy"
    assert js["wells"][1]["survey"] == "wells/dev_survey.csv"
    assert set(s.input_hashes()) == {
        "ti.npy",
        "wells/points.csv",
        "wells/dev.las",
        "wells/dev_survey.csv",
    }


def test_key_lines_tables_arrays_and_inline():
    text = (
        '[grid]\nshape = [1, 2, 3]\n\n[[wells]]\nfile = "a.csv"\n[[wells]]\n'
        'file = "b.las"  # c\ncolumns = { facies = "F" }\n'
    )
    lines = key_lines(text)
    assert lines[("grid", "shape")] == 2
    assert lines[("wells", 0, "file")] == 5
    assert lines[("wells", 1, "file")] == 7
    assert lines[("wells", 1, "columns", "facies")] == 8


@pytest.mark.parametrize(
    ("old", "new", "expect", "line_of"),
    [
        # missing keys
        ("[grid]\nshape", "[gridx]\nshape", "'gridx' is not a known key", "[gridx]"),
        ("shape = [4, 16, 16]\n", "", "'grid' needs the key 'shape'", "[grid]"),
        (
            "[ensemble]\nrealizations = 4\n",
            "[ensemble]\n",
            "needs the key 'realizations'",
            "[ensemble]",
        ),
        # wrong types
        ("shape = [4, 16, 16]", 'shape = "4x16x16"', "'grid.shape' must be a list of 3", "shape ="),
        (
            "shape = [4, 16, 16]",
            "shape = [4, 16.5, 16]",
            "'grid.shape[1]' must be an integer",
            "shape =",
        ),
        ("seed = 42", "seed = -1", "'ensemble.seed' must be an integer in [0,", "seed ="),
        (
            "levels = 2",
            'levels = "two"',
            "'engine.parameters.levels' must be an integer",
            "levels =",
        ),
        ('colour = "#e3c16f"', 'colour = "yellow"', "colour' must be a colour", "yellow"),
        # unknown keys
        (
            "levels = 2",
            "levels = 2\nlevles = 3",
            "'engine.parameters.levles' is not a parameter",
            "levles",
        ),
        (
            "origin = [0.0, 0.0, 0.0]",
            "origin = [0.0, 0.0, 0.0]\nrotation = 10",
            "'grid.rotation' is not a known key",
            "rotation",
        ),
        (
            'name = "DEV-1"',
            'name = "DEV-1"\nsurvy = "x.csv"',
            "'wells[1].survy' is not a known key",
            "survy",
        ),
        # values
        ('name = "pattern_tree"', 'name = "kriging"', "'engine.name' must be one of", "kriging"),
        ("{ code = 1, name", "{ code = 2, name", "must have the codes 0..1", "categories = ["),
        (
            'file = "ti.npy"',
            'file = "ti.txt"',
            "'training_image.file' must name a .npy file",
            "ti.txt",
        ),
    ],
)
def test_bad_study_one_line_naming_key_and_line(tmp_path, capsys, old, new, expect, line_of):
    p = write_small_study(tmp_path)
    _edit(p, old, new)
    err = cli_check_error(capsys, p)
    assert expect in err
    assert f"line {_line_of(p, line_of)}" in err


def test_toml_syntax_error_names_line(tmp_path, capsys):
    p = write_small_study(tmp_path)
    _edit(p, "seed = 42", "seed = = 42")
    err = cli_check_error(capsys, p)
    assert "not valid TOML" in err and f"line {_line_of(p, 'seed = = 42')}" in err


@pytest.mark.parametrize(
    ("setup", "expect"),
    [
        (lambda d: (d / "ti.npy").unlink(), "training image file .* does not exist"),
        (lambda d: (d / "ti.npy").write_bytes(b"not an array"), "not a readable .npy array"),
        (
            lambda d: np.save(d / "ti.npy", np.array([{"a": 1}], dtype=object)),
            "not a readable .npy array",
        ),  # pickles are refused
        (lambda d: (d / "wells" / "dev.las").write_text("garbage\n"), "LAS file .* cannot be read"),
        (
            lambda d: (d / "wells" / "points.csv").write_text("x,y,z\n1,2,3\n"),
            "no column for any study variable",
        ),
        (lambda d: (d / "wells" / "dev_survey.csv").unlink(), "survey file .* does not exist"),
        (
            lambda d: np.save(d / "ti.npy", np.array([[[0, 1, 2]]], dtype=np.int16)),
            r"holds codes \[0, 1, 2\], but the facies table of 'facies' has codes \[0, 1\]",
        ),
        (
            lambda d: np.save(d / "ti.npy", np.zeros((2, 5, 5), dtype=np.int16)),
            r"holds codes \[0\], but the facies table",
        ),
        (
            lambda d: (d / "study.toml").write_text(
                (d / "study.toml")
                .read_text()
                .replace("collar = [55.0, 45.0,", "collar = [5055.0, 45.0,")
            ),
            "'DEV-1' .* lies entirely outside",
        ),
    ],
)
def test_bad_data_files_one_line(tmp_path, capsys, setup, expect):
    import re

    p = write_small_study(tmp_path)
    setup(tmp_path)
    err = cli_check_error(capsys, p)
    assert re.search(expect, err), err


def test_missing_study_file_and_real_exit_code(tmp_path):
    # the installed console entry point, as a user runs it
    out = subprocess.run(
        [sys.executable, "-m", "strataloom", "check", str(tmp_path / "none.toml")],
        capture_output=True,
        text=True,
        check=False,
    )
    assert out.returncode == 2
    assert len(out.stderr.strip().splitlines()) == 1
    assert "does not exist" in out.stderr


def test_check_prints_summary_and_estimates(tmp_path, capsys):
    p = write_small_study(tmp_path, soft=True)
    assert main(["check", str(p)]) == 0
    out = capsys.readouterr().out
    assert "grid 4 x 16 x 16 = 1,024 cells" in out
    assert "wells: 4 (1 deviated)" in out
    assert "memory: store 8.0 KiB" in out  # 4 realizations * 1024 cells * 2 bytes
    assert "time: about" in out
    assert "leave-one-well-out accuracy" in out


def test_documented_example_study_is_valid(tmp_path):
    # the full example of docs/study-file.md must load as written (files are only read by a run)
    doc = (Path(__file__).parents[1] / "docs" / "study-file.md").read_text()
    block = doc.split("```toml\n", 1)[1].split("```", 1)[0]
    (tmp_path / "study.toml").write_text(block)
    s = load_study(tmp_path / "study.toml")
    assert s.grid.shape == (16, 72, 72)
    assert [c.name for c in s.variables["facies"].categories] == [
        "floodplain mud",
        "channel sand",
        "levee silt",
    ]
    assert s.wells[1].collar == (812.5, 640.0, 78.0)
    assert s.soft_data is not None and s.soft_data.components == 6
    assert s.engine.parameters["tau"] == [1.0, 1.0]
    assert s.geometry is not None and s.geometry.azimuth == 30.0 and s.geometry.affinity == (1.0, 1.0, 1.5)
    assert s.zones is not None and s.zones.zones[1].parameters == {"min_replicates": 3}


def test_demo_study_is_valid_and_calibrates(tmp_path):
    from strataloom.demo import write_demo
    from strataloom.workflow import prepare

    s = load_study(write_demo(tmp_path))
    prep = prepare(s)
    assert len(prep.wells) == 12 and sum(w.deviated for w in prep.wells) == 3
    assert prep.hard.report.outside_total > 0  # one deviated well leaves the model
    cal = prep.calibration.scores
    assert cal["accuracy"] > cal["baseline_accuracy"] and cal["brier"] < cal["baseline_brier"]


def test_training_image_from_builder_spec(tmp_path, capsys):
    from strataloom.demo import TI_SPEC
    from strataloom.workflow import read_training_image

    p = write_small_study(tmp_path)
    (tmp_path / "ti.toml").write_text(
        TI_SPEC.format(seed=3, nz=6, ny=40, nx=40, dz=1.0, dy=25.0, dx=25.0)
    )
    p.write_text(p.read_text().replace('file = "ti.npy"', 'builder = "ti.toml"\nseed = 9'))
    s = load_study(p)
    assert s.training_image.builder == (tmp_path / "ti.toml").resolve()
    assert "ti.toml" in s.input_hashes()
    # three facies built, but this study's facies table has two: one clear line
    with pytest.raises(sl.StudyError, match=r"holds codes \[0, 1, 2\].*codes \[0, 1\]"):
        read_training_image(s)
    p.write_text(p.read_text().replace('builder = "ti.toml"', 'file = "ti.npy"'))
    err = cli_check_error(capsys, p)
    assert "'training_image.seed' applies to a 'builder' spec only" in err
