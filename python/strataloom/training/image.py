"""`TrainingImage` (facies codes plus co-located properties) and the spec-driven builder."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .. import _validate as v
from .fields import property_field
from .io import _npy, write_sections_png, write_vti
from .objects import ObjectBuild, build_objects
from .spec import TISpec, load_spec, parse_spec
from .stats import Statistics, describe

__all__ = ["TrainingImage", "build_training_image"]


@dataclass
class TrainingImage:
    """A categorical training image with optional continuous properties on the same grid.

    Attributes
    ----------
    facies : (nz, ny, nx) ndarray of int8
        Codes 0..K-1 (the pattern-tree engine and the direct sampler read these).
    properties : dict of str to (nz, ny, nx) ndarray of float32
        Co-located continuous properties (NaN where a facies has no model).
    spacing, origin : tuple of 3 float
        Cell sizes ``(dz, dy, dx)`` and lower corner ``(z0, y0, x0)``.
    facies_names : list of str
        Names per code, where given.
    build : ObjectBuild, optional
        Targets, achieved proportions and object records of an object-based build.
    """

    facies: np.ndarray
    properties: dict[str, np.ndarray] = field(default_factory=dict)
    spacing: tuple[float, float, float] = (1.0, 1.0, 1.0)
    origin: tuple[float, float, float] = (0.0, 0.0, 0.0)
    facies_names: list[str] = field(default_factory=list)
    build: ObjectBuild | None = None

    def statistics(self, *, connectivity: int = 6, max_lag: int | None = None) -> Statistics:
        """`describe` applied to the facies codes with this image's spacing."""
        return describe(self.facies, spacing=self.spacing, connectivity=connectivity,
                        max_lag=max_lag)

    def report(self) -> str:
        """Targets against achieved proportions, one line per code."""
        lines = [f"{'code':>4}  {'name':<16} {'target':>8} {'achieved':>9}"]
        props = (self.build.proportions if self.build else
                 {k: float(np.mean(self.facies == k)) for k in np.unique(self.facies)})
        targets = self.build.targets if self.build else {}
        for k in sorted(props):
            name = self.facies_names[k] if k < len(self.facies_names) else ""
            t = f"{targets[k]:.4f}" if k in targets else "-"
            lines.append(f"{k:>4}  {name:<16} {t:>8} {props[k]:>9.4f}")
        if self.build:
            counts = ", ".join(f"{n}: {c}" for n, c in self.build.counts.items())
            lines.append(f"objects kept: {counts}; drawn but not kept: {self.build.rejected}")
            err = self.build.largest_error()
            if err > 0.02:
                lines.append(f"note: a target is missed by {err:.3f}; objects may be too large "
                             "for the grid, or raise max_objects / patience")
        return "\n".join(lines)

    def save(self, folder: str | Path, *, stem: str = "ti", png: bool = True) -> dict[str, Path]:
        """Write ``STEM_facies.npy``, one ``STEM_NAME.npy`` per property, ``STEM.vti``,
        ``STEM_sections.png`` (unless ``png=False``) and ``STEM.json`` (grid, names, report).

        Returns
        -------
        dict of str to Path
            What was written, by kind.
        """
        out = Path(folder)
        out.mkdir(parents=True, exist_ok=True)
        written = {"facies": _npy(out / f"{stem}_facies.npy", self.facies)}
        for name, a in self.properties.items():
            written[name] = _npy(out / f"{stem}_{name}.npy", a)
        written["vti"] = write_vti(out / f"{stem}.vti", {"facies": self.facies, **self.properties},
                                   spacing=self.spacing, origin=self.origin)
        if png:
            written["png"] = write_sections_png(out / f"{stem}_sections.png", self.facies,
                                                properties=self.properties, spacing=self.spacing,
                                                facies_names=self.facies_names, title=stem)
        meta: dict[str, Any] = {"shape": list(self.facies.shape), "spacing": list(self.spacing),
                                "origin": list(self.origin), "facies_names": self.facies_names,
                                "properties": list(self.properties)}
        if self.build:
            meta.update(targets={str(k): t for k, t in self.build.targets.items()},
                        achieved={str(k): p for k, p in self.build.proportions.items()},
                        objects=self.build.counts, rejected=self.build.rejected)
        written["json"] = out / f"{stem}.json"
        written["json"].write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
        return written


def build_training_image(spec: TISpec | Mapping[str, Any] | str | Path, *,
                         seed: int | None = None) -> TrainingImage:
    """Build a training image from a spec: objects first, then the properties within facies.

    Parameters
    ----------
    spec : TISpec, mapping or path
        A `TISpec`, a mapping in the TOML layout, or the path of a TOML spec file.
    seed : int, optional
        Overrides the spec's seed.

    Returns
    -------
    TrainingImage
    """
    if isinstance(spec, str | Path):
        spec = load_spec(spec)
    elif isinstance(spec, Mapping):
        spec = parse_spec(spec)
    elif not isinstance(spec, TISpec):
        raise v.fail_type("spec", "a TISpec, a mapping or the path of a TOML spec", spec,
                          "build_training_image")
    s = spec.seed if seed is None else v.seed(seed, owner="build_training_image")
    result = build_objects(spec.shape, spec.groups, spacing=spec.spacing, origin=spec.origin,
                           background=spec.background, seed=s, erosion_order=spec.erosion_order,
                           tolerance=spec.tolerance, max_objects=spec.max_objects,
                           patience=spec.patience)
    props = {p.name: property_field(result.facies, p.models, spacing=spec.spacing, seed=s,
                                    stream=i + 1, low=p.low, high=p.high)
             for i, p in enumerate(spec.properties)}
    return TrainingImage(result.facies, props, tuple(spec.spacing), tuple(spec.origin),  # type: ignore[arg-type]
                         list(spec.facies_names), result)
