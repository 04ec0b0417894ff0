"""Strata Loom: multiple-point geostatistical simulation of facies and properties."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

from . import training
from .direct import DirectSampler
from .downscale import downscale
from .ensemble import realization_seeds, run_ensemble
from .errors import MemoryLimitError, ParameterError, ParameterTypeError, StudyError
from .export import export_run
from .grid import Grid
from .paths import conflict_free_batches, random_path, uniform_draws
from .qc import check_run
from .report import build_report
from .runread import Run, open_run
from .store import RealizationStore
from .study import Study, load_study
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
from .tree import PatternTree, turned_image
from .workflow import check_study, prepare, run_study
from .zones import simulate_zones

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
    "RealizationStore",
    "Run",
    "Study",
    "StudyError",
    "Template",
    "TrainingImage",
    "__version__",
    "build_report",
    "build_training_image",
    "check_run",
    "check_study",
    "conflict_free_batches",
    "downscale",
    "export_run",
    "gaussian_field",
    "load_study",
    "open_run",
    "open_summary",
    "prepare",
    "random_path",
    "rank_training_images",
    "realization_seeds",
    "run_ensemble",
    "run_study",
    "simulate_zones",
    "summarize",
    "tau_merge",
    "training",
    "turned_image",
    "uniform_draws",
]
