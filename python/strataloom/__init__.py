"""Strata Loom: multiple-point geostatistical simulation of facies and properties."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

from .errors import MemoryLimitError, ParameterError, ParameterTypeError, StudyError
from .export import export_run
from .grid import Grid
from .paths import conflict_free_batches, random_path, uniform_draws
from .qc import check_run
from .report import build_report
from .runread import Run, open_run
from .summary import open_summary, summarize
from .template import Template

try:
    __version__ = _version("strataloom")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0+unknown"

__all__ = [
    "Grid",
    "MemoryLimitError",
    "ParameterError",
    "ParameterTypeError",
    "Run",
    "StudyError",
    "Template",
    "__version__",
    "build_report",
    "check_run",
    "conflict_free_batches",
    "export_run",
    "open_run",
    "open_summary",
    "random_path",
    "summarize",
    "uniform_draws",
]
