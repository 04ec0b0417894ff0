"""Strata Loom: multiple-point geostatistical simulation of facies and properties."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

from . import training
from .direct import DirectSampler
from .downscale import downscale
from .errors import MemoryLimitError, ParameterError, ParameterTypeError, StudyError
from .export import export_run
from .grid import Grid
from .paths import conflict_free_batches, random_path, uniform_draws
from .qc import check_run
from .report import build_report
from .runread import Run, open_run
from .summary import open_summary, summarize
from .tau import tau_merge
from .template import Template
from .training import (
    Bodies,
    Channels,
    Levee,
    PropertyModel,
    TrainingImage,
    build_training_image,
    gaussian_field,
    rank_training_images,
)
from .tree import PatternTree, simulate_zones, turned_image

try:
    __version__ = _version("strataloom")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0+unknown"

__all__ = [
    "Bodies",
    "Channels",
    "DirectSampler",
    "Grid",
    "Levee",
    "MemoryLimitError",
    "ParameterError",
    "ParameterTypeError",
    "PatternTree",
    "PropertyModel",
    "Run",
    "StudyError",
    "Template",
    "TrainingImage",
    "__version__",
    "build_report",
    "build_training_image",
    "check_run",
    "conflict_free_batches",
    "downscale",
    "export_run",
    "gaussian_field",
    "open_run",
    "open_summary",
    "random_path",
    "rank_training_images",
    "simulate_zones",
    "summarize",
    "tau_merge",
    "training",
    "turned_image",
    "uniform_draws",
]
