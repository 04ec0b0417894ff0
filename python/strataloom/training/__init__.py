"""Training images: object-based builder, property fields, statistics and ranking against wells.

Facies codes are int8 arrays of shape (nz, ny, nx), x fastest, codes 0..K-1 (negative = masked),
as the pattern-tree engine and the direct sampler read them.
"""

from __future__ import annotations

from .distributions import Distribution
from .fields import PropertyModel, gaussian_field, property_field
from .image import TrainingImage, build_training_image
from .io import read_vti, write_sections_png, write_vti
from .objects import Bodies, Channels, Levee, ObjectBuild, build_objects
from .ranking import Ranking, rank_training_images
from .spec import PropertySpec, TISpec, TISpecError, load_spec, parse_spec
from .stats import (
    BodySizes,
    Statistics,
    anisotropy,
    body_sizes,
    connected_share,
    connectivity_function,
    describe,
    indicator_variogram,
    label_bodies,
    proportions,
    variogram_map,
)

__all__ = [
    "Bodies",
    "BodySizes",
    "Channels",
    "Distribution",
    "Levee",
    "ObjectBuild",
    "PropertyModel",
    "PropertySpec",
    "Ranking",
    "Statistics",
    "TISpec",
    "TISpecError",
    "TrainingImage",
    "anisotropy",
    "body_sizes",
    "build_objects",
    "build_training_image",
    "connected_share",
    "connectivity_function",
    "describe",
    "gaussian_field",
    "indicator_variogram",
    "label_bodies",
    "load_spec",
    "parse_spec",
    "property_field",
    "proportions",
    "rank_training_images",
    "read_vti",
    "variogram_map",
    "write_sections_png",
    "write_vti",
]
