"""Strata Loom: multiple-point geostatistical simulation of facies and properties."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

from . import training
from .errors import MemoryLimitError, ParameterError, ParameterTypeError, StudyError
from .grid import Grid
from .paths import conflict_free_batches, random_path, uniform_draws
from .tau import tau_merge
from .template import Template
from .tree import PatternTree
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

try:
    __version__ = _version("strataloom")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0+unknown"

__all__ = [
    "Bodies",
    "Channels",
    "Grid",
    "Levee",
    "MemoryLimitError",
    "ParameterError",
    "ParameterTypeError",
    "PatternTree",
    "PropertyModel",
    "StudyError",
    "Template",
    "TrainingImage",
    "__version__",
    "build_training_image",
    "conflict_free_batches",
    "gaussian_field",
    "random_path",
    "tau_merge",
    "rank_training_images",
    "training",
    "uniform_draws",
]
