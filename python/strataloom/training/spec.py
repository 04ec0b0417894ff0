"""The training-image builder spec: a TOML file (our own keys) turned into a `TISpec`.

Every problem is reported as a `TISpecError` naming the file, the line and the key, e.g.
``ti.toml, line 14, key channels[0].width: ... must be a positive number. Got -40.0 instead.``

Reading TOML uses the standard library's ``tomllib`` (Python >= 3.11), or the ``tomli`` package on
Python 3.10. ``tomllib`` does not report where a key was written, so a small scanner maps every
key path to its line (tables, arrays of tables, dotted keys; a key inside an inline table is
reported at its table's line).
"""

from __future__ import annotations

import difflib
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import ParameterError
from .distributions import Distribution
from .fields import MODELS, PropertyModel
from .objects import _BODY_KINDS, _SECTIONS, Bodies, Channels, Levee

__all__ = ["PropertySpec", "TISpec", "TISpecError", "load_spec", "parse_spec"]

Path_ = tuple[Any, ...]


class TISpecError(ParameterError):
    """A training-image spec cannot be used as written.

    Attributes
    ----------
    source : str
        The file (or ``"<spec>"`` for a mapping).
    line : int or None
        1-based line of the offending key, when known.
    key : str
        Dotted key path, such as ``channels[0].width``.
    """

    def __init__(self, message: str, source: str, line: int | None, key: str) -> None:
        where = f"{source}, line {line}" if line else source
        super().__init__(f"{where}, key {key}: {message}" if key else f"{where}: {message}")
        self.source, self.line, self.key = source, line, key


@dataclass(frozen=True)
class PropertySpec:
    """A continuous property: one `PropertyModel` per facies code, optional clipping bounds."""

    name: str
    models: dict[int, PropertyModel]
    low: float | None = None
    high: float | None = None


@dataclass(frozen=True)
class TISpec:
    """Everything needed to build a training image (see `build_training_image`).

    Parameters
    ----------
    shape, spacing, origin
        The grid: ``(nz, ny, nx)``, cell sizes ``(dz, dy, dx)``, lower corner ``(z0, y0, x0)``.
    groups : list of Channels or Bodies
        Object groups.
    background : int
        Code of the cells no object takes.
    seed : int
        Seed of the build.
    facies_names : list of str
        Optional names per code (index = code).
    erosion_order : list of str, optional
        Group names from oldest (eroded) to youngest (eroding).
    tolerance, max_objects, patience
        See `build_objects`.
    properties : list of PropertySpec
        Continuous properties built within the facies.
    """

    shape: tuple[int, int, int]
    groups: list[Channels | Bodies]
    spacing: tuple[float, float, float] = (1.0, 1.0, 1.0)
    origin: tuple[float, float, float] = (0.0, 0.0, 0.0)
    background: int = 0
    seed: int = 0
    facies_names: list[str] = field(default_factory=list)
    erosion_order: list[str] | None = None
    tolerance: float = 0.002
    max_objects: int = 20000
    patience: int = 100
    properties: list[PropertySpec] = field(default_factory=list)


# ------------------------------------------------------------------------------ key -> line
_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEYVAL = re.compile(r"^\s*((?:[A-Za-z0-9_\-]+|\"[^\"]*\"|'[^']*')(?:\s*\.\s*(?:[A-Za-z0-9_\-]+|"
                     r"\"[^\"]*\"|'[^']*'))*)\s*=")


def _split_key(text: str) -> list[str]:
    parts = re.findall(r"\"([^\"]*)\"|'([^']*)'|([A-Za-z0-9_\-]+)", text)
    return [a or b or c for a, b, c in parts]


def key_lines(text: str) -> dict[Path_, int]:
    """Map each key path (with list indices for arrays of tables) to its 1-based line."""
    lines: dict[Path_, int] = {}
    counts: dict[Path_, int] = {}
    current: Path_ = ()
    depth = 0
    in_string = False
    for no, raw in enumerate(text.splitlines(), 1):
        if raw.count('"""') % 2 or raw.count("'''") % 2:
            in_string = not in_string
            if not in_string:
                continue
        if in_string:
            continue
        line = re.sub(r"\"(?:\\.|[^\"\\])*\"|'[^']*'", '""', raw)  # blank out strings
        line = line.split("#", 1)[0]
        if depth > 0:
            depth += line.count("[") + line.count("{") - line.count("]") - line.count("}")
            continue
        m = _HEADER.match(raw) if raw.lstrip().startswith("[") else None
        if m:
            keys = _split_key(m.group(2))
            resolved: list[Any] = []
            for k in keys[:-1]:
                resolved.append(k)
                if tuple(resolved) in counts:
                    resolved.append(counts[tuple(resolved)] - 1)
            resolved.append(keys[-1])
            if m.group(1) == "[[":
                base = tuple(resolved)
                counts[base] = counts.get(base, 0) + 1
                lines.setdefault(base, no)
                resolved.append(counts[base] - 1)
            current = tuple(resolved)
            lines[current] = no
            continue
        m = _KEYVAL.match(line)
        if m:
            path = current + tuple(_split_key(m.group(1)))
            lines[path] = no
            rest = line[m.end():]
            depth = rest.count("[") + rest.count("{") - rest.count("]") - rest.count("}")
    return lines


# ------------------------------------------------------------------------------ parsing
_TOP = ("seed", "background", "facies", "erosion_order", "tolerance", "max_objects", "patience",
        "grid", "channels", "bodies", "properties")
_GRID = ("shape", "spacing", "origin")
_CHANNEL = ("name", "facies", "proportion", "width", "thickness", "azimuth", "wavelength",
            "amplitude", "section", "levee")
_LEVEE = ("facies", "width", "thickness")
_BODY = ("name", "kind", "facies", "proportion", "length", "width", "thickness", "azimuth")
_PROPERTY = ("name", "low", "high", "by_facies")
_BY_FACIES = ("facies", "mean", "sd", "range", "model", "azimuth")


class _Ctx:
    def __init__(self, source: str, lines: dict[Path_, int]) -> None:
        self.source, self.lines = source, lines

    def line(self, path: Path_) -> int | None:
        p = tuple(path)
        while p:
            if p in self.lines:
                return self.lines[p]
            p = p[:-1]
        return None

    @staticmethod
    def name(path: Path_) -> str:
        out = ""
        for k in path:
            out += f"[{k}]" if isinstance(k, int) else (f".{k}" if out else str(k))
        return out

    def error(self, path: Path_, message: str) -> TISpecError:
        return TISpecError(message, self.source, self.line(path), self.name(path))

    def table(self, value: Any, path: Path_, known: tuple[str, ...],
              required: tuple[str, ...] = ()) -> Mapping[str, Any]:
        if not isinstance(value, Mapping):
            raise self.error(path, f"must be a table, got {type(value).__name__}")
        for k in value:
            if k not in known:
                close = difflib.get_close_matches(k, known, n=1)
                hint = f" (did you mean '{close[0]}'?)" if close else ""
                raise self.error((*path, k), f"unknown key '{k}'{hint}; known keys here: "
                                 f"{', '.join(known)}")
        for k in required:
            if k not in value:
                raise self.error(path, f"missing required key '{k}'")
        return value

    def array_of_tables(self, value: Any, path: Path_) -> list[Mapping[str, Any]]:
        if isinstance(value, Mapping):
            value = [value]
        if not isinstance(value, list):
            raise self.error(path, f"must be an array of tables ([[{self.name(path)}]]), "
                             f"got {type(value).__name__}")
        return value

    def check(self, path: Path_, fn: Any, *args: Any, **kw: Any) -> Any:
        """Run a validator, re-raising its message at ``path``."""
        try:
            return fn(*args, **kw)
        except (ValueError, TypeError) as e:
            raise self.error(path, str(e)) from e


def load_spec(path: str | Path) -> TISpec:
    """Read a TOML builder spec.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    TISpec

    Raises
    ------
    TISpecError
        For TOML syntax errors, unknown or missing keys and invalid values (with file, line, key).
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as e:
        raise TISpecError(f"cannot read the spec ({e.strerror})", str(p), None, "") from e
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise TISpecError(f"not valid TOML: {e}", str(p), None, "") from e
    return parse_spec(data, source=str(p), lines=key_lines(text))


def _number_list(ctx: _Ctx, path: Path_, value: Any, n: int, what: str) -> list[float]:
    if isinstance(value, bool) or not isinstance(value, list) or len(value) != n or not all(
            isinstance(x, int | float) and not isinstance(x, bool) for x in value):
        raise ctx.error(path, f"must be {what}, got {value!r}")
    return [float(x) for x in value]


def parse_spec(data: Mapping[str, Any], *, source: str = "<spec>",
               lines: dict[Path_, int] | None = None) -> TISpec:
    """A `TISpec` from parsed TOML (or any mapping of the same layout)."""
    ctx = _Ctx(source, lines or {})
    top = ctx.table(data, (), _TOP, ("grid",))
    grid = ctx.table(top["grid"], ("grid",), _GRID, ("shape",))
    shape = grid["shape"]
    if (not isinstance(shape, list) or len(shape) not in (2, 3)
            or not all(isinstance(x, int) and not isinstance(x, bool) and x > 0 for x in shape)):
        raise ctx.error(("grid", "shape"), f"must be [nz, ny, nx] (or [ny, nx]) positive integers, "
                        f"got {shape!r}")
    shape = ([1, *shape]) if len(shape) == 2 else shape
    spacing = _number_list(ctx, ("grid", "spacing"), grid.get("spacing", [1.0, 1.0, 1.0]), 3,
                           "[dz, dy, dx], 3 positive numbers")
    if min(spacing) <= 0:
        raise ctx.error(("grid", "spacing"), f"must be 3 positive numbers, got {spacing!r}")
    origin = _number_list(ctx, ("grid", "origin"), grid.get("origin", [0.0, 0.0, 0.0]), 3,
                          "[z0, y0, x0], 3 numbers")

    def integer(key: str, default: int, low: int, high: int) -> int:
        x = top.get(key, default)
        if isinstance(x, bool) or not isinstance(x, int) or not low <= x <= high:
            raise ctx.error((key,), f"must be an integer in [{low}, {high}], got {x!r}")
        return int(x)

    seed = integer("seed", 0, 0, 2**63 - 1)
    background = integer("background", 0, 0, 126)
    max_objects = integer("max_objects", 20000, 1, 10**7)
    patience = integer("patience", 100, 1, 10**6)
    tol = top.get("tolerance", 0.002)
    if isinstance(tol, bool) or not isinstance(tol, int | float) or not 0 <= tol <= 0.5:
        raise ctx.error(("tolerance",), f"must be a number in [0, 0.5], got {tol!r}")
    names = top.get("facies", [])
    if not isinstance(names, list) or not all(isinstance(x, str) for x in names):
        raise ctx.error(("facies",), "must be a list of facies names (index = code), "
                        f"got {names!r}")

    groups: list[Channels | Bodies] = []
    props: list[tuple[Path_, Any]] = []
    for i, t in enumerate(ctx.array_of_tables(top.get("channels", []), ("channels",))):
        path: Path_ = ("channels", i)
        t = ctx.table(t, path, _CHANNEL, ("facies", "proportion", "width", "thickness"))
        groups.append(_channels(ctx, path, t, i))
        props.append(((*path, "proportion"), t["proportion"]))
    for i, t in enumerate(ctx.array_of_tables(top.get("bodies", []), ("bodies",))):
        path = ("bodies", i)
        t = ctx.table(t, path, _BODY, ("kind", "facies", "proportion", "length", "width",
                                       "thickness"))
        groups.append(_bodies(ctx, path, t, i))
        props.append(((*path, "proportion"), t["proportion"]))
    if not groups:
        raise ctx.error((), "needs at least one [[channels]] or [[bodies]] table")
    total = sum(float(p) for _, p in props)
    if total >= 1.0:
        parts = ", ".join(f"{ctx.name(k)} = {p:g} (line {ctx.line(k)})" for k, p in props)
        raise ctx.error(props[-1][0], f"the target proportions sum to {total:g} ({parts}); they "
                        "must sum to less than 1, the background takes the rest")
    seen: dict[str, Path_] = {}
    for g, (k, _) in zip(groups, props, strict=True):
        if g.name in seen:
            raise ctx.error((*k[:-1], "name"), f"group name '{g.name}' is already used by "
                            f"{ctx.name(seen[g.name])}; give each group its own name")
        seen[g.name] = k[:-1]
    codes: dict[int, Path_] = {}
    for g, (k, _) in zip(groups, props, strict=True):
        if g.facies in codes:
            raise ctx.error((*k[:-1], "facies"), f"facies {g.facies} is already used by "
                            f"{ctx.name(codes[g.facies])}; each group needs its own facies code")
        if g.facies == background:
            raise ctx.error((*k[:-1], "facies"), f"facies {g.facies} is the background code")
        codes[g.facies] = k[:-1]
    for g, (k, _) in zip(groups, props, strict=True):
        if isinstance(g, Channels) and g.levee is not None and (
                g.levee.facies in codes or g.levee.facies == background):
            raise ctx.error((*k[:-1], "levee", "facies"),
                            f"levee facies {g.levee.facies} must differ from the background and "
                            "from every group's facies")
    order = top.get("erosion_order")
    if order is not None:
        if not isinstance(order, list) or sorted(map(str, order)) != sorted(seen):
            raise ctx.error(("erosion_order",), "must list every group name once, oldest "
                            f"(eroded) first: {', '.join(seen)}; got {order!r}")
        order = [str(x) for x in order]

    properties = [_property(ctx, ("properties", i), t) for i, t in
                  enumerate(ctx.array_of_tables(top.get("properties", []), ("properties",)))]
    pnames = [p.name for p in properties]
    if len(set(pnames)) != len(pnames) or "facies" in pnames:
        raise ctx.error(("properties",), f"property names must be distinct and not 'facies', "
                        f"got {pnames!r}")
    return TISpec(shape=tuple(shape), spacing=tuple(spacing), origin=tuple(origin),  # type: ignore[arg-type]
                  groups=groups, background=background, seed=seed, facies_names=list(names),
                  erosion_order=order, tolerance=float(tol), max_objects=max_objects,
                  patience=patience, properties=properties)


def _dist(ctx: _Ctx, path: Path_, value: Any, **kw: Any) -> Distribution:
    return ctx.check(path, Distribution.parse, value, str(path[-1]), **kw)


def _facies_code(ctx: _Ctx, path: Path_, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= 126:
        raise ctx.error(path, f"must be a facies code, an integer in [0, 126], got {value!r}")
    return int(value)


def _proportion(ctx: _Ctx, path: Path_, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 < value < 1:
        raise ctx.error(path, f"must be a target proportion in (0, 1), got {value!r}")
    return float(value)


def _channels(ctx: _Ctx, path: Path_, t: Mapping[str, Any], i: int) -> Channels:
    kw: dict[str, Any] = {
        "facies": _facies_code(ctx, (*path, "facies"), t["facies"]),
        "proportion": _proportion(ctx, (*path, "proportion"), t["proportion"]),
        "name": str(t.get("name", f"channels{i}" if i else "channels")),
    }
    for key in ("width", "thickness", "wavelength"):
        if key in t:
            kw[key] = _dist(ctx, (*path, key), t[key], positive=True)
    if "azimuth" in t:
        kw["azimuth"] = _dist(ctx, (*path, "azimuth"), t["azimuth"])
    if "amplitude" in t:
        kw["amplitude"] = _dist(ctx, (*path, "amplitude"), t["amplitude"], low=0.0)
    if "section" in t:
        if t["section"] not in _SECTIONS:
            raise ctx.error((*path, "section"), f"must be one of {', '.join(_SECTIONS)}, "
                            f"got {t['section']!r}")
        kw["section"] = t["section"]
    if "levee" in t:
        lp = (*path, "levee")
        lv = ctx.table(t["levee"], lp, _LEVEE, _LEVEE)
        kw["levee"] = Levee(facies=_facies_code(ctx, (*lp, "facies"), lv["facies"]),
                            width=_dist(ctx, (*lp, "width"), lv["width"], positive=True),
                            thickness=_dist(ctx, (*lp, "thickness"), lv["thickness"],
                                            positive=True))
    return ctx.check(path, Channels, **kw)


def _bodies(ctx: _Ctx, path: Path_, t: Mapping[str, Any], i: int) -> Bodies:
    if t["kind"] not in _BODY_KINDS:
        raise ctx.error((*path, "kind"), f"must be one of {', '.join(_BODY_KINDS)}, "
                        f"got {t['kind']!r}")
    kw: dict[str, Any] = {
        "kind": t["kind"],
        "facies": _facies_code(ctx, (*path, "facies"), t["facies"]),
        "proportion": _proportion(ctx, (*path, "proportion"), t["proportion"]),
        "name": str(t.get("name", t["kind"] + "s")),
    }
    for key in ("length", "width", "thickness"):
        kw[key] = _dist(ctx, (*path, key), t[key], positive=True)
    if "azimuth" in t:
        kw["azimuth"] = _dist(ctx, (*path, "azimuth"), t["azimuth"])
    return ctx.check(path, Bodies, **kw)


def _property(ctx: _Ctx, path: Path_, t: Any) -> PropertySpec:
    t = ctx.table(t, path, _PROPERTY, ("name", "by_facies"))
    name = t["name"]
    if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name):
        raise ctx.error((*path, "name"), f"must be a name of letters, digits and _, got {name!r}")
    bounds = []
    for key in ("low", "high"):
        x = t.get(key)
        if x is not None and (isinstance(x, bool) or not isinstance(x, int | float)):
            raise ctx.error((*path, key), f"must be a number, got {x!r}")
        bounds.append(None if x is None else float(x))
    if bounds[0] is not None and bounds[1] is not None and bounds[0] >= bounds[1]:
        raise ctx.error((*path, "high"), f"must be greater than low ({bounds[0]:g}), "
                        f"got {bounds[1]:g}")
    models: dict[int, PropertyModel] = {}
    for j, z in enumerate(ctx.array_of_tables(t["by_facies"], (*path, "by_facies"))):
        zp = (*path, "by_facies", j)
        z = ctx.table(z, zp, _BY_FACIES, ("facies", "mean", "sd", "range"))
        code = _facies_code(ctx, (*zp, "facies"), z["facies"])
        if code in models:
            raise ctx.error((*zp, "facies"), f"facies {code} already has a model in this property")
        if z.get("model", "exponential") not in MODELS:
            raise ctx.error((*zp, "model"), f"must be one of {', '.join(MODELS)}, "
                            f"got {z['model']!r}")
        for key in ("mean", "sd", "azimuth"):
            x = z.get(key, 0.0)
            if isinstance(x, bool) or not isinstance(x, int | float) or (key == "sd" and x < 0):
                what = "a number >= 0" if key == "sd" else "a number"
                raise ctx.error((*zp, key), f"must be {what}, got {x!r}")
        r = z["range"]
        ok = (isinstance(r, int | float) and not isinstance(r, bool) and r > 0) or (
            isinstance(r, list) and len(r) == 3 and all(
                isinstance(x, int | float) and not isinstance(x, bool) and x > 0 for x in r))
        if not ok:
            raise ctx.error((*zp, "range"), "must be a positive practical range or 3 of them "
                            f"[along z, along azimuth, across], got {r!r}")
        models[code] = ctx.check(zp, PropertyModel, mean=z["mean"], sd=z["sd"], range=r,
                                 model=z.get("model", "exponential"), azimuth=z.get("azimuth", 0.0))
    return PropertySpec(name, models, bounds[0], bounds[1])
