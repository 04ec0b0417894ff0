"""Engine adapters: one small interface between the ensemble layer and the simulation engines.

An adapter is built from a study's engine section and answers ``simulate(seed)`` with a dict of
realization arrays, one per variable, each ``(nz, ny, nx)``. The ensemble layer only ever sees a
picklable *factory* (``factory()`` builds the adapter, ``factory.token`` identifies it), so the
same code runs in local processes and on Dask workers, and each worker builds an engine once.
"""

from __future__ import annotations

import hashlib
import inspect
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from .errors import StudyError

__all__ = ["EngineAdapter", "EngineFactory", "constructor_parameters", "engine_class", "validate_parameters"]


class EngineAdapter(Protocol):
    """What the ensemble layer needs from an engine."""

    variables: tuple[str, ...]

    def simulate(self, seed: int) -> dict[str, np.ndarray]:
        """One realization per variable, ``(nz, ny, nx)`` arrays."""
        ...


class _ParamError(ValueError):
    def __init__(self, key: tuple, message: str) -> None:
        super().__init__(message)
        self.key = key


# parameters the study file itself understands, per engine: name -> (kind, where it goes)
_KNOWN: dict[str, dict[str, str]] = {
    "pattern_tree": {
        "template": "template",
        "levels": "int",
        "min_replicates": "int",
        "threads": "int",
    },
    "direct_sampler": {
        "neighbors": "int",
        "accept_distance": "float",
        "scan_fraction": "float",
        "threads": "int",
    },
}
_CLASS = {"pattern_tree": "PatternTree", "direct_sampler": "DirectSampler"}


def engine_class(name: str) -> Any | None:
    """The engine class of the installed package, or None when this build lacks it."""
    import strataloom

    return getattr(strataloom, _CLASS[name], None)


def _accepted(name: str) -> set[str]:
    """Keyword names the installed engine accepts in its constructor or its simulate()."""
    cls = engine_class(name)
    out = set(_KNOWN[name])
    if cls is None:
        return out
    for fn in (cls.__init__, cls.simulate):
        try:
            sig = inspect.signature(fn)
        except (TypeError, ValueError):
            continue
        for p in sig.parameters.values():
            if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD) and p.name not in (
                "self",
                "training_image",
                "ti",
                "shape",
                "hard",
                "soft",
                "auxiliary",
                "seed",
                "progress",
                "return_source",
                "rotation",
                "affinity",
            ):
                out.add(p.name)
    return out


def constructor_parameters(name: str) -> set[str]:
    """Study parameters that belong to the engine itself (its constructor), not to simulate()."""
    cls = engine_class(name)
    known = {k for k in _KNOWN[name] if k != "threads"}
    if cls is None:
        return known
    try:
        sig = inspect.signature(cls.__init__)
    except (TypeError, ValueError):
        return known
    return known | {
        p.name for p in sig.parameters.values()
        if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD) and p.name not in ("self", "training_image")
    }


#: Keywords of simulate() that the study sets elsewhere ([geometry]).
_ELSEWHERE = {"rotation": "[geometry] azimuth and dip", "affinity": "[geometry] affinity"}


def validate_parameters(name: str, params: Mapping[str, Any]) -> dict[str, Any]:
    """Check the ``[engine.parameters]`` table; values are passed on unchanged.

    Raises a ValueError with a ``key`` attribute (the offending sub-key) on unknown keys or wrong
    types of the keys the study knows; the engine itself checks ranges when it is built.
    """
    accepted = _accepted(name)
    out: dict[str, Any] = {}
    for k, val in params.items():
        if k in _ELSEWHERE:
            raise _ParamError((k,), f"is set in the study's {_ELSEWHERE[k]}, not among the engine parameters.")
        if k not in accepted:
            raise _ParamError(
                (k,),
                f"is not a parameter of the {name} engine (known: {', '.join(sorted(accepted))}).",
            )
        kind = _KNOWN[name].get(k)
        if kind == "int" and (isinstance(val, bool) or not isinstance(val, int)):
            raise _ParamError((k,), f"must be an integer; got {val!r}.")
        if kind == "float" and (isinstance(val, bool) or not isinstance(val, int | float)):
            raise _ParamError((k,), f"must be a number; got {val!r}.")
        if kind == "template":
            out[k] = _template_spec(val)
            continue
        out[k] = val
    return out


def _template_spec(val: Any) -> dict[str, Any]:
    if not isinstance(val, dict):
        raise _ParamError(
            ("template",),
            "must be a table such as {radius = [2, 6, 6], max_nodes = 48} or {box = [1, 2, 2]}.",
        )
    keys = set(val)
    if keys - {"radius", "max_nodes", "box"} or ("radius" in keys) == ("box" in keys):
        raise _ParamError(
            ("template",),
            "must hold either 'radius' (with optional 'max_nodes') or"
            f" 'box'; got keys {sorted(keys)}.",
        )
    for k in ("radius", "box"):
        if k in val and (
            not isinstance(val[k], list)
            or len(val[k]) != 3
            or not all(isinstance(x, int | float) and not isinstance(x, bool) for x in val[k])
        ):
            raise _ParamError(
                ("template", k), f"must be a list of 3 numbers (z, y, x); got {val[k]!r}."
            )
    if "max_nodes" in val and (
        isinstance(val["max_nodes"], bool) or not isinstance(val["max_nodes"], int)
    ):
        raise _ParamError(
            ("template", "max_nodes"), f"must be an integer; got {val['max_nodes']!r}."
        )
    return dict(val)


def _make_template(spec: Mapping[str, Any]) -> Any:
    from .template import Template

    if "box" in spec:
        return Template.box(tuple(int(x) for x in spec["box"]))
    return Template.ellipsoid(
        tuple(float(x) for x in spec["radius"]), max_nodes=spec.get("max_nodes")
    )


def _digest(*parts: Any) -> str:
    h = hashlib.sha256()
    for p in parts:
        if isinstance(p, np.ndarray):
            h.update(str((p.dtype.str, p.shape)).encode())
            h.update(np.ascontiguousarray(p).tobytes())
        else:
            h.update(repr(p).encode())
    return h.hexdigest()[:32]


@dataclass
class EngineFactory:
    """Picklable recipe of a study engine: builds the adapter on the worker that runs it.

    Parameters
    ----------
    name : {"pattern_tree", "direct_sampler"}
    variable : str
        The simulated variable.
    kind : {"categorical", "continuous"}
    shape : (nz, ny, nx)
    parameters : dict
        ``[engine.parameters]`` as validated.
    training_image : ndarray
    hard : ndarray or None
        Dense hard data of the grid's shape (-1 / NaN unknown).
    soft : ndarray or None
        ``(K, nz, ny, nx)`` probabilities (pattern tree) or an auxiliary cube (direct sampler).
    threads : int or None
        Threads inside one realization (None: the engine's default).
    rotation, affinity : constants or maps, optional
        Local geometry, passed to the engine's simulate (see `strataloom.geometry`).
    zones : (nz, ny, nx) array of int, optional
        Zone code of every cell; then ``zone_engines`` gives, per code, ``(code, training image,
        parameter overrides)`` and the run goes through `strataloom.simulate_zones`.
    """

    name: str
    variable: str
    kind: str
    shape: tuple[int, int, int]
    parameters: dict[str, Any]
    training_image: np.ndarray
    hard: np.ndarray | None = None
    soft: np.ndarray | None = None
    threads: int | None = None
    rotation: Any = None
    affinity: Any = None
    zones: np.ndarray | None = None
    zone_engines: tuple[tuple[int, np.ndarray, dict[str, Any]], ...] = ()
    token: str = field(init=False, default="")

    def __post_init__(self) -> None:
        self.token = _digest(
            self.name,
            self.variable,
            self.kind,
            self.shape,
            sorted(self.parameters.items()),
            self.training_image,
            self.hard,
            self.soft,
            self.threads,
            *_geometry_parts(self.rotation),
            *_geometry_parts(self.affinity),
            self.zones,
            *[p for code, ti, params in self.zone_engines for p in (code, ti, sorted(params.items()))],
        )

    def __call__(self) -> EngineAdapter:
        cls = engine_class(self.name)
        if cls is None:
            raise StudyError(
                f"The {self.name.replace('_', ' ')} engine is not part of this "
                "strataloom build; choose another [engine] name or update strataloom."
            )
        params = dict(self.parameters)
        threads = params.pop("threads", self.threads)
        if self.name == "pattern_tree":
            return _PatternTreeAdapter(cls, self, params, threads)
        return _DirectSamplerAdapter(cls, self, params, threads)


def _split(cls: Any, params: dict[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """Parameters for the constructor and for simulate(), by the engine's signatures."""
    try:
        sim = set(inspect.signature(cls.simulate).parameters)
    except (TypeError, ValueError):
        sim = set()
    init = {k: v for k, v in params.items() if k not in sim}
    call = {k: v for k, v in params.items() if k in sim}
    return init, call


def _geometry_parts(x: Any) -> list[Any]:
    """Hashable pieces of a rotation or affinity value (arrays kept whole for the digest)."""
    if isinstance(x, tuple):
        return [np.asarray(p) if isinstance(p, np.ndarray) else p for p in x]
    return [x]


def _build(cls: Any, ti: np.ndarray, init: dict[str, Any]) -> Any:
    init = dict(init)
    if "template" in init:
        init["template"] = _make_template(init["template"])
    return cls(ti, **init)


class _Adapter:
    """One engine built once from a factory (one per zone with zones); `simulate(seed)` gives
    {variable: realization}."""

    #: Data of the factory the engine's simulate() takes besides hard data.
    extra: tuple[str, ...] = ()

    def __init__(self, cls: Any, f: EngineFactory, params: dict[str, Any], threads: Any) -> None:
        init, self._call = _split(cls, params)
        self._zones: dict[int, Any] | None = None
        if f.zones is None:
            self._engine = _build(cls, f.training_image, init)
        else:
            self._zones = {}
            shared = None  # zones with the study's TI and no overrides share one engine
            for code, ti, own in f.zone_engines:
                if ti is f.training_image and not own:
                    shared = shared if shared is not None else _build(cls, ti, init)
                    self._zones[code] = shared
                else:
                    self._zones[code] = _build(cls, ti, {**init, **own})
            self._engine = next(iter(self._zones.values()))
        self._f = f
        self._threads = threads
        self.variables = (f.variable,)

    def simulate(self, seed: int, progress: Any = None) -> dict[str, np.ndarray]:
        f = self._f
        data = {name: getattr(f, name) for name in self.extra}
        geometry = {k: x for k, x in (("rotation", f.rotation), ("affinity", f.affinity)) if x is not None}
        if self._zones is not None:
            from .zones import simulate_zones

            out = simulate_zones(
                self._zones, f.zones, f.shape, hard=f.hard, seed=seed, threads=self._threads,
                progress=progress, **geometry, **data, **self._call,
            )
        else:
            out = self._engine.simulate(
                f.shape, hard=f.hard, seed=seed, threads=self._threads, progress=progress, **geometry, **data,
                **self._call,
            )
        return {f.variable: np.asarray(out)}


class _PatternTreeAdapter(_Adapter):
    extra = ("soft",)


class _DirectSamplerAdapter(_Adapter):
    """Single-variable direct sampling with hard data (auxiliary variables: not in studies yet)."""
