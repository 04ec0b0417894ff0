"""Conditioning data: wells and their trajectories, upscaling to cells, soft-data calibration."""

from __future__ import annotations

from .calibrate import Calibration, brier_score, calibrate, patch_features
from .trajectories import Survey, minimum_curvature
from .upscale import Conflict, HardData, UpscaleReport, upscale
from .wells import Well, read_las, read_point_table, read_survey, vertical_survey

__all__ = [
    "Calibration",
    "Conflict",
    "HardData",
    "Survey",
    "UpscaleReport",
    "Well",
    "brier_score",
    "calibrate",
    "minimum_curvature",
    "patch_features",
    "read_las",
    "read_point_table",
    "read_survey",
    "upscale",
    "vertical_survey",
]
