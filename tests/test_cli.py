"""Command-line entry point."""

import subprocess
import sys

import strataloom as sl
from strataloom.cli import main


def test_version(capsys):
    try:
        main(["--version"])
    except SystemExit as e:
        assert e.code == 0
    assert capsys.readouterr().out.strip() == f"strataloom {sl.__version__}"


def test_console_script_runs():
    out = subprocess.run([sys.executable, "-m", "strataloom", "--help"], capture_output=True, text=True,
                         check=False)
    assert out.returncode == 0
    assert "strataloom" in out.stdout


def test_unknown_command_is_one_line_and_exit_2():
    out = subprocess.run([sys.executable, "-m", "strataloom", "frobnicate"], capture_output=True, text=True,
                         check=False)
    assert out.returncode == 2
    assert len(out.stderr.strip().splitlines()) == 1
    assert "Traceback" not in out.stderr
