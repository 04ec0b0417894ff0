"""Strata Loom: multiple-point geostatistical simulation of facies and properties."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

from .direct import DirectSampler
from .downscale import downscale
from .errors import MemoryLimitError, ParameterError, ParameterTypeError, StudyError
from .grid import Grid
from .paths import conflict_free_batches, random_path, uniform_draws
from .template import Template

try:
    __version__ = _version("strataloom")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0+unknown"

__all__ = [
    "DirectSampler",
    "Grid",
    "MemoryLimitError",
    "ParameterError",
    "ParameterTypeError",
    "StudyError",
    "Template",
    "__version__",
    "conflict_free_batches",
    "downscale",
    "random_path",
    "uniform_draws",
]
