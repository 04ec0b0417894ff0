"""Regions with their own geology: one engine (training image and parameters) per zone of a map.

Both engines simulate all zones in one run on one grid, so nodes read their neighbours whatever
their zone and the borders between zones see both sides' simulated values.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from . import _validate as v
from .direct import DirectSampler
from .direct import _simulate_zones as _direct_zones
from .geometry import MAX_ZONE
from .tree import PatternTree
from .tree import _simulate_zones as _tree_zones

__all__ = ["simulate_zones"]

_OWNER = "simulate_zones"


def simulate_zones(engines: Any, zones: Any, shape: Any, *, hard: Any = None, seed: int = 0,
                   threads: int | None = None, rotation: Any = None, affinity: Any = None,
                   progress: Callable[[int, int], Any] | None = None, **options: Any) -> Any:
    """Simulate one realization whose zones each follow their own training image.

    Parameters
    ----------
    engines : mapping int -> engine, or sequence of engines
        The engine of each zone code (a sequence gives codes 0, 1, ...): all `PatternTree` or all
        `DirectSampler`. Pattern trees must share the number of categories and of levels; direct
        samplers the variable names, kinds and auxiliary variables. Each keeps its own template or
        search window and thresholds.
    zones : (nz, ny, nx) or (ny, nx) array of int
        Zone code of every cell; every code used must have an engine.
    shape : sequence of int
        ``(nz, ny, nx)`` or ``(ny, nx)``.
    hard, seed, threads, rotation, affinity, progress
        As for the engines' ``simulate``; rotation and affinity apply on top of the zones.
    **options
        Further keywords of the engine kind's ``simulate``: ``soft``, ``tau``,
        ``target_proportions``, ``steering``, ``max_conditioning`` (pattern trees; the tau model's
        prior is each zone's TI proportions, or the target) or ``auxiliary``, ``path``,
        ``return_source`` (direct samplers; continuous variables are compared in units of the range
        over all zones' training images, and ``source`` indexes each node's own zone TI).

    Returns
    -------
    ndarray, or what `DirectSampler.simulate` returns
        Shaped like ``shape``.
    """
    listed = _listed(engines)
    kinds = {type(e) for e in listed if e is not None}
    if len(kinds) != 1:
        raise v.fail("engines", "engines of one kind (all PatternTree or all DirectSampler)",
                     sorted(k.__name__ for k in kinds), _OWNER)
    shp = v.shape3(shape, "shape", owner=_OWNER)
    z = np.asarray(zones)
    if not np.issubdtype(z.dtype, np.integer):
        raise v.fail_type("zones", "an integer array of zone codes", z, _OWNER)
    if z.ndim == 2:
        z = z[np.newaxis]
    if z.shape != shp:
        raise v.fail("zones", f"an array of the grid's shape {shp}", f"shape {np.asarray(zones).shape}", _OWNER)
    used = np.unique(z)
    missing = [int(c) for c in used if c < 0 or c >= len(listed) or listed[int(c)] is None]
    if missing:
        raise v.fail("zones", "codes that each have an engine in `engines` (add one per code)",
                     f"zone codes {missing}", _OWNER)
    index = np.ascontiguousarray(z, dtype=np.int64)
    common = {"hard": hard, "seed": seed, "threads": threads, "rotation": rotation, "affinity": affinity,
              "progress": progress}
    if kinds == {PatternTree}:
        _known_options(options, ("soft", "tau", "target_proportions", "steering", "max_conditioning"))
        return _tree_zones(listed, index, shape, **common, **options, owner=_OWNER)
    _known_options(options, ("auxiliary", "path", "return_source"))
    return _direct_zones(listed, index, shape, **common, **options)


def _known_options(options: Mapping[str, Any], allowed: tuple[str, ...]) -> None:
    for key in options:
        if key not in allowed:
            raise v.fail(key, f"a keyword of this engine kind's simulate (one of {allowed})", key, _OWNER)


def _listed(engines: Any) -> list[Any]:
    """Engines by zone code (None for codes without one)."""
    allowed = (PatternTree, DirectSampler)
    if isinstance(engines, Mapping):
        codes = list(engines)
        if not codes or not all(isinstance(c, (int, np.integer)) and not isinstance(c, bool)
                                and 0 <= c <= MAX_ZONE for c in codes):
            raise v.fail("engines", f"a mapping from zone codes 0..{MAX_ZONE} to engines", codes, _OWNER)
        listed: list[Any] = [None] * (int(max(codes)) + 1)
        for c, e in engines.items():
            listed[int(c)] = e
    elif isinstance(engines, Sequence) and not isinstance(engines, (str, bytes)):
        listed = list(engines)
        if len(listed) > MAX_ZONE + 1:
            raise v.fail("engines", f"at most {MAX_ZONE + 1} zones", len(listed), _OWNER)
    else:
        raise v.fail_type("engines", "a mapping from zone code to PatternTree or DirectSampler", engines, _OWNER)
    if not any(e is not None for e in listed):
        raise v.fail("engines", "at least one engine", listed, _OWNER)
    for c, e in enumerate(listed):
        if e is not None and not isinstance(e, allowed):
            raise v.fail_type(f"engines[{c}]", "a PatternTree or a DirectSampler", e, _OWNER)
    return listed
