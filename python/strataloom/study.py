"""Study files: one TOML file describing a whole simulation study.

A study names only data files (NumPy ``.npy``, CSV, LAS, SEG-Y) and settings; it cannot run code or
load pickles. Unknown keys and wrong types are errors naming the key and, where the file shows it,
the line. Relative paths are resolved against the study file's folder.

The schema (all keys are ours)::

    [study]            name, description                        (optional)
    [grid]             shape = [nz, ny, nx], spacing, origin
    [variables.NAME]   kind = "categorical" | "continuous", units,
                       categories = [{code, name, colour}, ...]  (categorical; codes 0..K-1)
    [training_image]   file = "ti.npy" or builder = "ti.toml" (+ seed), variable
    [[wells]]          file, name, collar = [x, y, z], survey, columns = {variable = column}
    [soft_data]        variable, probabilities = "p.npy"  or  attributes = [...], patch,
                       components, smoothing, regularization, segy = {axes, z_downward}
    [engine]           name = "pattern_tree" | "direct_sampler", variable, [engine.parameters]
    [geometry]         azimuth, dip (degrees or .npy maps), affinity ([fz, fy, fx], a number or
                       a .npy (3, nz, ny, nx) map)
    [zones]            map = "zones.npy", [[zones.zone]] code, training_image, parameters
    [ensemble]         realizations, seed, processes
    [output]           hard_data, soft_data, summary, report
"""

from __future__ import annotations

import hashlib
import json
import math
import numbers
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .errors import StudyError
from .geometry import MAX_AFFINITY, MAX_ZONE
from .grid import Grid

__all__ = [
    "Category",
    "EngineSpec",
    "EnsembleSpec",
    "GeometrySpec",
    "OutputSpec",
    "SoftDataSpec",
    "Study",
    "TrainingImageSpec",
    "Variable",
    "WellSpec",
    "ZoneSpec",
    "ZonesSpec",
    "load_study",
]

ENGINE_NAMES = ("pattern_tree", "direct_sampler")
_COLOUR = re.compile(r"^#[0-9a-fA-F]{6}$")
_MAX_CELLS = 2**31 - 1
#: Engine parameters that all zones must share (the pattern trees of all zones use the same levels).
_SHARED_BY_ZONES = frozenset({"levels"})


# ----------------------------------------------------------------------------------------------
# line numbers of keys (tomllib gives values only)


def _strip_comment(line: str) -> str:
    out, quote = [], None
    for ch in line:
        if quote:
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch == "#":
            break
        out.append(ch)
    return "".join(out)


def _split_key(key: str) -> tuple[str, ...]:
    return tuple(p.strip().strip("\"'") for p in key.split("."))


def key_lines(text: str) -> dict[tuple, int]:
    """Map of key paths to the 1-based line that defines them (tables, keys, inline-table keys).

    Array-of-tables entries get an integer index: ``("wells", 2, "file")``.
    """
    lines: dict[tuple, int] = {}
    current: tuple = ()
    counts: dict[tuple, int] = {}
    open_array: tuple | None = None  # key of a multi-line array being read
    element = 0
    depth = 0
    for no, raw in enumerate(text.splitlines(), start=1):
        line = _strip_comment(raw).strip()
        if not line:
            continue
        if open_array is not None:
            # one element per line: `{ code = 0, ... },` (inline tables) or plain values
            if line.startswith("{"):
                lines.setdefault((*open_array, element), no)
                for sub in re.finditer(r"[{,]\s*([A-Za-z0-9_\-]+)\s*=", line):
                    lines.setdefault((*open_array, element, sub.group(1)), no)
                element += line.count("}")
            depth += line.count("[") - line.count("]")
            if depth <= 0:
                open_array = None
            continue
        m = re.match(r"^\[\[\s*([^\]]+?)\s*\]\]$", line)
        if m:
            base = _split_key(m.group(1))
            idx = counts.get(base, 0)
            counts[base] = idx + 1
            current = (*base, idx)
            lines.setdefault(base, no)
            lines[current] = no
            continue
        m = re.match(r"^\[\s*([^\]]+?)\s*\]$", line)
        if m:
            parts = _split_key(m.group(1))
            # a sub-table of the last array-of-tables entry: [wells.x] after [[wells]]
            for base, n in counts.items():
                if parts[: len(base)] == base and len(parts) > len(base):
                    parts = (*base, n - 1, *parts[len(base) :])
                    break
            current = parts
            lines.setdefault(current, no)
            continue
        m = re.match(r"^([A-Za-z0-9_\-\.\"' ]+?)\s*=", line)
        if m:
            key = (*current, *_split_key(m.group(1)))
            lines.setdefault(key, no)
            rest = line[m.end() :]
            for sub in re.finditer(r"[{,]\s*([A-Za-z0-9_\-]+)\s*=", rest):
                lines.setdefault((*key, sub.group(1)), no)
            d = rest.count("[") - rest.count("]")
            if rest.strip().startswith("[") and d > 0:
                open_array, element, depth = key, 0, d
    return lines


# ----------------------------------------------------------------------------------------------
# validated pieces


@dataclass(frozen=True)
class Category:
    """One facies: integer code, name, display colour ``#rrggbb``."""

    code: int
    name: str
    colour: str


@dataclass(frozen=True)
class Variable:
    """A simulated variable."""

    name: str
    kind: str  # "categorical" | "continuous"
    units: str = ""
    categories: tuple[Category, ...] = ()

    @property
    def codes(self) -> list[int]:
        return [c.code for c in self.categories]

    def store_attrs(self) -> dict[str, Any]:
        """The variable's entry in the realizations store's attributes."""
        if self.kind == "categorical":
            return {"kind": "categorical", "categories": [asdict(c) for c in self.categories]}
        out: dict[str, Any] = {"kind": "continuous"}
        if self.units:
            out["units"] = self.units
        return out


@dataclass(frozen=True)
class TrainingImageSpec:
    """Where the training image comes from: a ``.npy`` file or a builder spec (TOML)."""

    file: Path | None
    variable: str
    builder: Path | None = None
    seed: int | None = None

    @property
    def source(self) -> Path:
        """The file the training image is read or built from."""
        return self.file if self.file is not None else self.builder  # type: ignore[return-value]


@dataclass(frozen=True)
class WellSpec:
    """One well file entry."""

    file: Path
    format: str  # "csv" | "las"
    name: str | None = None
    collar: tuple[float, float, float] | None = None
    survey: Path | None = None
    columns: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class SoftDataSpec:
    """Soft data: a probability cube, or attribute cubes to calibrate."""

    variable: str
    probabilities: Path | None = None
    attributes: tuple[Path, ...] = ()
    patch: tuple[int, int, int] = (1, 2, 2)
    components: int = 8
    smoothing: float = 0.0
    regularization: float = 1.0
    segy_axes: tuple[str, str, str] = ("y", "x", "z")
    segy_z_downward: bool = True


@dataclass(frozen=True)
class EngineSpec:
    """The simulation engine and its parameters (passed to the engine unchanged)."""

    name: str
    variable: str
    parameters: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class GeometrySpec:
    """Local rotation and affinity: constants, or ``.npy`` maps on the grid."""

    azimuth: float | Path = 0.0
    dip: float | Path = 0.0
    affinity: tuple[float, float, float] | Path = (1.0, 1.0, 1.0)

    def files(self) -> list[Path]:
        """The map files named."""
        return [x for x in (self.azimuth, self.dip, self.affinity) if isinstance(x, Path)]


@dataclass(frozen=True)
class ZoneSpec:
    """One zone: its code, its training image (None: the study's) and engine-parameter overrides."""

    code: int
    training_image: Path | None = None
    parameters: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class ZonesSpec:
    """Regions: an integer zone map on the grid and one entry per zone code."""

    map: Path
    zones: tuple[ZoneSpec, ...]


@dataclass(frozen=True)
class EnsembleSpec:
    """Ensemble size, master seed, default process count (0 = all cores)."""

    realizations: int
    seed: int
    processes: int = 0


@dataclass(frozen=True)
class OutputSpec:
    """Which optional products a run writes."""

    hard_data: bool = True
    soft_data: bool = True
    summary: bool = True
    report: bool = True


# ----------------------------------------------------------------------------------------------
# the reader


class _Reader:
    """Typed access to the parsed TOML with errors naming the key and line."""

    def __init__(self, path: Path, text: str, data: dict) -> None:
        self.path = path
        self.lines = key_lines(text)
        self.data = data

    def where(self, key: tuple) -> str:
        k = key
        while k:
            if k in self.lines:
                return f"{self.path.name}, line {self.lines[k]}"
            k = k[:-1]
        return self.path.name

    @staticmethod
    def dotted(key: tuple) -> str:
        out = ""
        for part in key:
            out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
        return out

    def error(self, key: tuple, message: str) -> StudyError:
        return StudyError(f"{self.where(key)}: '{self.dotted(key)}' {message}")

    def table(self, value: Any, key: tuple, allowed: Mapping[str, bool]) -> dict:
        """A table whose keys are all in ``allowed`` (key -> required)."""
        if not isinstance(value, dict):
            raise self.error(key, f"must be a table; got {_shown(value)}.")
        for k in value:
            if k not in allowed:
                names = ", ".join(sorted(allowed))
                raise self.error(
                    (*key, k),
                    f"is not a known key of [{self.dotted(key) or 'study'}] (known keys: {names}).",
                )
        for k, required in allowed.items():
            if required and k not in value:
                raise self.error(key, f"needs the key '{k}'.")
        return value

    def integer(
        self, value: Any, key: tuple, low: int | None = None, high: int | None = None
    ) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"must be an integer; got {_shown(value)}.")
        if (low is not None and value < low) or (high is not None and value > high):
            rng = f">= {low}" if high is None else f"in [{low}, {high}]"
            raise self.error(key, f"must be an integer {rng}; got {value}.")
        return int(value)

    def number(
        self, value: Any, key: tuple, low: float | None = None, positive: bool = False
    ) -> float:
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise self.error(key, f"must be a number; got {_shown(value)}.")
        x = float(value)
        if not math.isfinite(x) or (positive and x <= 0) or (low is not None and x < low):
            need = (
                "a positive number"
                if positive
                else (f"a number >= {low:g}" if low is not None else "a finite number")
            )
            raise self.error(key, f"must be {need}; got {value}.")
        return x

    def string(self, value: Any, key: tuple, choices: tuple[str, ...] | None = None) -> str:
        if not isinstance(value, str):
            raise self.error(key, f"must be a string; got {_shown(value)}.")
        if choices is not None and value not in choices:
            raise self.error(
                key, f"must be one of {', '.join(repr(c) for c in choices)}; got {value!r}."
            )
        return value

    def boolean(self, value: Any, key: tuple) -> bool:
        if not isinstance(value, bool):
            raise self.error(key, f"must be true or false; got {_shown(value)}.")
        return value

    def triple(self, value: Any, key: tuple, conv: Callable[[Any, tuple], Any]) -> tuple:
        if not isinstance(value, list) or len(value) != 3:
            raise self.error(key, f"must be a list of 3 values (z, y, x); got {_shown(value)}.")
        return tuple(conv(x, (*key, i)) for i, x in enumerate(value))

    def file(self, value: Any, key: tuple, folder: Path, suffixes: tuple[str, ...]) -> Path:
        s = self.string(value, key)
        p = Path(s)
        if not p.is_absolute():
            p = folder / p
        if p.suffix.lower() not in suffixes:
            raise self.error(key, f"must name a {' or '.join(suffixes)} file; got {s!r}.")
        return p


def _shown(value: Any) -> str:
    kind = {
        dict: "a table",
        list: "a list",
        str: "a string",
        bool: "a boolean",
        int: "an integer",
        float: "a number",
    }.get(type(value), type(value).__name__)
    text = repr(value)
    return f"{kind} {text}" if len(text) <= 40 else kind


@dataclass
class Study:
    """A validated study.

    Use :func:`load_study`. Paths are absolute; :meth:`to_json` gives them relative to
    :attr:`folder` again.
    """

    path: Path
    name: str
    description: str
    grid: Grid
    variables: dict[str, Variable]
    training_image: TrainingImageSpec
    wells: list[WellSpec]
    soft_data: SoftDataSpec | None
    engine: EngineSpec
    ensemble: EnsembleSpec
    output: OutputSpec
    geometry: GeometrySpec | None = None
    zones: ZonesSpec | None = None

    @property
    def folder(self) -> Path:
        return self.path.parent

    def relative(self, p: Path) -> str:
        """``p`` relative to the study folder when inside it, else absolute (POSIX form)."""
        try:
            return p.resolve().relative_to(self.folder.resolve()).as_posix()
        except ValueError:
            return p.resolve().as_posix()

    def input_files(self) -> list[Path]:
        """Every data file the study names, in a fixed order."""
        files = [self.training_image.source]
        for w in self.wells:
            files.append(w.file)
            if w.survey is not None:
                files.append(w.survey)
        if self.soft_data is not None:
            if self.soft_data.probabilities is not None:
                files.append(self.soft_data.probabilities)
            files.extend(self.soft_data.attributes)
        if self.geometry is not None:
            files.extend(self.geometry.files())
        if self.zones is not None:
            files.append(self.zones.map)
            files.extend(z.training_image for z in self.zones.zones if z.training_image is not None)
        return files

    def input_hashes(self) -> dict[str, str]:
        """SHA-256 of each input file, keyed by its path relative to the study folder."""
        out = {}
        for p in self.input_files():
            out[self.relative(p)] = _sha256(p)
        return out

    def to_json(self) -> dict[str, Any]:
        """The validated study as plain JSON types (paths relative to the study folder)."""

        def rel(p: Path | None) -> str | None:
            return None if p is None else self.relative(p)

        soft = None
        if self.soft_data is not None:
            s = self.soft_data
            soft = {
                "variable": s.variable,
                "probabilities": rel(s.probabilities),
                "attributes": [rel(a) for a in s.attributes],
                "patch": list(s.patch),
                "components": s.components,
                "smoothing": s.smoothing,
                "regularization": s.regularization,
                "segy": {"axes": list(s.segy_axes), "z_downward": s.segy_z_downward},
            }
        out = {
            "name": self.name,
            "description": self.description,
            "grid": {
                "shape": list(self.grid.shape),
                "spacing": list(self.grid.spacing),
                "origin": list(self.grid.origin),
            },
            "variables": {
                k: {
                    "kind": v.kind,
                    "units": v.units,
                    "categories": [asdict(c) for c in v.categories],
                }
                for k, v in self.variables.items()
            },
            "training_image": {
                "file": rel(self.training_image.file),
                "builder": rel(self.training_image.builder),
                "seed": self.training_image.seed,
                "variable": self.training_image.variable,
            },
            "wells": [
                {
                    "file": rel(w.file),
                    "format": w.format,
                    "name": w.name,
                    "collar": None if w.collar is None else list(w.collar),
                    "survey": rel(w.survey),
                    "columns": dict(w.columns),
                }
                for w in self.wells
            ],
            "soft_data": soft,
            "engine": {
                "name": self.engine.name,
                "variable": self.engine.variable,
                "parameters": _jsonable(self.engine.parameters),
            },
            "ensemble": {
                "realizations": self.ensemble.realizations,
                "seed": self.ensemble.seed,
                "processes": self.ensemble.processes,
            },
            "output": asdict(self.output),
        }
        if self.geometry is not None:
            g = self.geometry
            out["geometry"] = {
                k: rel(x) if isinstance(x, Path) else (list(x) if isinstance(x, tuple) else x)
                for k, x in (("azimuth", g.azimuth), ("dip", g.dip), ("affinity", g.affinity))
            }
        if self.zones is not None:
            out["zones"] = {
                "map": rel(self.zones.map),
                "zone": [
                    {"code": z.code, "training_image": rel(z.training_image),
                     "parameters": _jsonable(z.parameters)}
                    for z in self.zones.zones
                ],
            }
        return out


def _jsonable(x: Any) -> Any:
    return json.loads(json.dumps(x))


def _sha256(p: Path) -> str:
    h = hashlib.sha256()
    try:
        with open(p, "rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
    except OSError as e:
        raise StudyError(f"The input file '{p}' cannot be read: {e.strerror}.") from e
    return h.hexdigest()


_TOP = {
    "study": False,
    "grid": True,
    "variables": True,
    "training_image": True,
    "wells": False,
    "soft_data": False,
    "engine": True,
    "geometry": False,
    "zones": False,
    "ensemble": True,
    "output": False,
}


def load_study(path: str | Path) -> Study:
    """Read and validate a study file.

    Parameters
    ----------
    path : path-like
        The ``.toml`` study file.

    Returns
    -------
    Study

    Raises
    ------
    StudyError
        On a missing file, a TOML syntax error, an unknown key, a missing key or a wrong type; the
        message names the key and line.
    """
    if not isinstance(path, str | Path):
        raise StudyError(f"The study path must be a path to a .toml file; got {type(path).__name__}.")
    p = Path(path)
    try:
        raw_bytes = p.read_bytes()
    except FileNotFoundError as e:
        raise StudyError(f"The study file '{p}' does not exist.") from e
    except OSError as e:
        raise StudyError(f"The study file '{p}' cannot be read: {e.strerror}.") from e
    try:
        text = raw_bytes.decode("utf-8")
        data = tomllib.loads(text)
    except UnicodeDecodeError as e:
        raise StudyError(f"The study file '{p}' is not UTF-8 text.") from e
    except tomllib.TOMLDecodeError as e:
        raise StudyError(f"{p.name}: not valid TOML: {e}") from e
    p = p.resolve()
    r = _Reader(p, text, data)
    folder = p.parent
    r.table(data, (), _TOP)

    meta = r.table(data.get("study", {}), ("study",), {"name": False, "description": False})
    name = r.string(meta.get("name", p.stem), ("study", "name"))
    description = r.string(meta.get("description", ""), ("study", "description"))

    g = r.table(data["grid"], ("grid",), {"shape": True, "spacing": False, "origin": False})
    shape = r.triple(g["shape"], ("grid", "shape"), lambda x, k: r.integer(x, k, low=1))
    if math.prod(shape) > _MAX_CELLS:
        raise r.error(("grid", "shape"), f"has {math.prod(shape)} cells; at most {_MAX_CELLS}.")
    spacing = r.triple(
        g.get("spacing", [1.0, 1.0, 1.0]),
        ("grid", "spacing"),
        lambda x, k: r.number(x, k, positive=True),
    )
    origin = r.triple(g.get("origin", [0.0, 0.0, 0.0]), ("grid", "origin"), r.number)
    grid = Grid(shape, spacing, origin)

    variables = _variables(r, data["variables"])
    categorical = [k for k, v in variables.items() if v.kind == "categorical"]

    t = r.table(
        data["training_image"],
        ("training_image",),
        {"file": False, "builder": False, "seed": False, "variable": False},
    )
    ti_var = r.string(
        t.get("variable", (categorical or list(variables))[0]),
        ("training_image", "variable"),
        tuple(variables),
    )
    if ("file" in t) == ("builder" in t):
        raise r.error(
            ("training_image",),
            "needs exactly one of 'file' (a .npy array) or 'builder' (a training-image spec, "
            ".toml).",
        )
    if "seed" in t and "builder" not in t:
        raise r.error(("training_image", "seed"), "applies to a 'builder' spec only.")
    ti = TrainingImageSpec(
        r.file(t["file"], ("training_image", "file"), folder, (".npy",)) if "file" in t else None,
        ti_var,
        r.file(t["builder"], ("training_image", "builder"), folder, (".toml",))
        if "builder" in t
        else None,
        r.integer(t["seed"], ("training_image", "seed"), 0, 2**63 - 1) if "seed" in t else None,
    )

    wells_raw = data.get("wells", [])
    if not isinstance(wells_raw, list):
        raise r.error(("wells",), "must be an array of tables ([[wells]] entries).")
    wells = [_well(r, w, i, folder, variables) for i, w in enumerate(wells_raw)]

    soft = None
    if "soft_data" in data:
        soft = _soft(r, data["soft_data"], folder, variables, categorical)

    e = r.table(data["engine"], ("engine",), {"name": True, "variable": False, "parameters": False})
    ename = r.string(e["name"], ("engine", "name"), ENGINE_NAMES)
    evar = r.string(e.get("variable", ti_var), ("engine", "variable"), tuple(variables))
    params = e.get("parameters", {})
    if not isinstance(params, dict):
        raise r.error(("engine", "parameters"), f"must be a table; got {_shown(params)}.")
    from .engines import validate_parameters

    try:
        params = validate_parameters(ename, params)
    except (ValueError, TypeError) as err:
        key = ("engine", "parameters", *getattr(err, "key", ()))
        raise r.error(key, str(err)) from err
    if ename == "pattern_tree" and variables[evar].kind != "categorical":
        raise r.error(
            ("engine", "variable"),
            f"names '{evar}', which is continuous; the pattern "
            "tree simulates a categorical variable.",
        )
    if ename == "direct_sampler" and soft is not None:
        raise r.error(
            ("soft_data",),
            "is used by the pattern_tree engine; direct-sampler auxiliary variables are not part "
            "of the study schema yet.",
        )
    engine = EngineSpec(ename, evar, params)
    geometry = _geometry(r, data["geometry"], folder, grid) if "geometry" in data else None
    zones = _zones(r, data["zones"], folder, ename) if "zones" in data else None

    en = r.table(
        data["ensemble"], ("ensemble",), {"realizations": True, "seed": True, "processes": False}
    )
    ensemble = EnsembleSpec(
        r.integer(en["realizations"], ("ensemble", "realizations"), 1, 100000),
        r.integer(en["seed"], ("ensemble", "seed"), 0, 2**63 - 1),
        r.integer(en.get("processes", 0), ("ensemble", "processes"), 0, 1024),
    )

    o = r.table(data.get("output", {}), ("output",), {k: False for k in asdict(OutputSpec())})
    output = OutputSpec(**{k: r.boolean(v, ("output", k)) for k, v in o.items()})
    return Study(
        p, name, description, grid, variables, ti, wells, soft, engine, ensemble, output, geometry, zones
    )


def _map_or_number(r: _Reader, value: Any, key: tuple, folder: Path) -> float | Path:
    if isinstance(value, str):
        return r.file(value, key, folder, (".npy",))
    return r.number(value, key)


def _geometry(r: _Reader, raw: Any, folder: Path, grid: Grid) -> GeometrySpec:
    key = ("geometry",)
    g = r.table(raw, key, {"azimuth": False, "dip": False, "affinity": False})
    azimuth = _map_or_number(r, g.get("azimuth", 0.0), (*key, "azimuth"), folder)
    dip = _map_or_number(r, g.get("dip", 0.0), (*key, "dip"), folder)
    if grid.shape[0] == 1 and dip != 0.0:
        raise r.error((*key, "dip"), "needs a 3-D grid (nz > 1); a 2-D grid takes an azimuth alone.")
    raw_aff = g.get("affinity", [1.0, 1.0, 1.0])
    affinity: tuple[float, float, float] | Path
    if isinstance(raw_aff, str):
        affinity = r.file(raw_aff, (*key, "affinity"), folder, (".npy",))
    else:
        if not isinstance(raw_aff, list):
            raw_aff = [raw_aff] * 3
        affinity = r.triple(raw_aff, (*key, "affinity"), lambda x, k: r.number(x, k, positive=True))
        if max(affinity) > MAX_AFFINITY:
            raise r.error((*key, "affinity"), f"must hold factors in (0, {MAX_AFFINITY:g}]; got {list(affinity)}.")
    return GeometrySpec(azimuth, dip, affinity)


def _zones(r: _Reader, raw: Any, folder: Path, engine: str) -> ZonesSpec:
    from .engines import constructor_parameters, validate_parameters

    key = ("zones",)
    z = r.table(raw, key, {"map": True, "zone": True})
    zmap = r.file(z["map"], (*key, "map"), folder, (".npy",))
    entries = z["zone"]
    if not isinstance(entries, list) or not entries:
        raise r.error((*key, "zone"), "must be an array of tables ([[zones.zone]] entries), one per zone code.")
    out: list[ZoneSpec] = []
    seen: set[int] = set()
    own = constructor_parameters(engine)
    for i, e in enumerate(entries):
        ek = (*key, "zone", i)
        e = r.table(e, ek, {"code": True, "training_image": False, "parameters": False})
        code = r.integer(e["code"], (*ek, "code"), 0, MAX_ZONE)
        if code in seen:
            raise r.error((*ek, "code"), f"repeats zone code {code}; give each code once.")
        seen.add(code)
        ti = r.file(e["training_image"], (*ek, "training_image"), folder, (".npy",)) if "training_image" in e else None
        params = e.get("parameters", {})
        if not isinstance(params, dict):
            raise r.error((*ek, "parameters"), f"must be a table; got {_shown(params)}.")
        try:
            params = validate_parameters(engine, params)
        except (ValueError, TypeError) as err:
            raise r.error((*ek, "parameters", *getattr(err, "key", ())), str(err)) from err
        for k in params:
            if k not in own or k in _SHARED_BY_ZONES:
                raise r.error(
                    (*ek, "parameters", k),
                    "is an option of the simulation shared by all zones; set it in [engine.parameters] "
                    f"(per zone: {', '.join(sorted(own - _SHARED_BY_ZONES))}).",
                )
        out.append(ZoneSpec(code, ti, params))
    return ZonesSpec(zmap, tuple(out))


def _variables(r: _Reader, raw: Any) -> dict[str, Variable]:
    if not isinstance(raw, dict) or not raw:
        raise r.error(("variables",), "must be a table with one sub-table per variable.")
    out = {}
    for name, spec in raw.items():
        key = ("variables", name)
        if not re.match(r"^[A-Za-z][A-Za-z0-9_]*$", name) or name == "done":
            raise r.error(key, "must be a name of letters, digits and '_' (not 'done').")
        s = r.table(spec, key, {"kind": True, "units": False, "categories": False})
        kind = r.string(s["kind"], (*key, "kind"), ("categorical", "continuous"))
        units = r.string(s.get("units", ""), (*key, "units"))
        cats: list[Category] = []
        if kind == "categorical":
            if "categories" not in s:
                raise r.error(key, "needs the key 'categories' (the facies table).")
            if not isinstance(s["categories"], list) or len(s["categories"]) < 2:
                raise r.error((*key, "categories"), "must be a list of at least 2 categories.")
            for i, c in enumerate(s["categories"]):
                ck = (*key, "categories", i)
                c = r.table(c, ck, {"code": True, "name": True, "colour": True})
                code = r.integer(c["code"], (*ck, "code"), 0, 255)
                cname = r.string(c["name"], (*ck, "name"))
                colour = r.string(c["colour"], (*ck, "colour"))
                if not _COLOUR.match(colour):
                    raise r.error((*ck, "colour"), f"must be a colour '#rrggbb'; got {colour!r}.")
                if any(c.name == cname for c in cats):
                    raise r.error((*ck, "name"), f"repeats the category name {cname!r}; give each "
                                  "category its own name.")
                cats.append(Category(code, cname, colour))
            codes = sorted(c.code for c in cats)
            if codes != list(range(len(cats))):
                raise r.error(
                    (*key, "categories"),
                    f"must have the codes 0..{len(cats) - 1}, each "
                    f"once; got {[c.code for c in cats]}.",
                )
            cats.sort(key=lambda c: c.code)
        elif "categories" in s:
            raise r.error((*key, "categories"), "is only for categorical variables.")
        out[name] = Variable(name, kind, units, tuple(cats))
    return out


def _well(r: _Reader, raw: Any, i: int, folder: Path, variables: dict[str, Variable]) -> WellSpec:
    key = ("wells", i)
    w = r.table(
        raw, key, {"file": True, "name": False, "collar": False, "survey": False, "columns": False}
    )
    f = r.file(w["file"], (*key, "file"), folder, (".csv", ".txt", ".las"))
    fmt = "las" if f.suffix.lower() == ".las" else "csv"
    name = r.string(w["name"], (*key, "name")) if "name" in w else None
    collar = None
    if "collar" in w:
        c = w["collar"]
        if not isinstance(c, list) or len(c) != 3:
            raise r.error((*key, "collar"), f"must be a list [x, y, z]; got {_shown(c)}.")
        collar = tuple(r.number(x, (*key, "collar", j)) for j, x in enumerate(c))
    survey = None
    if "survey" in w:
        survey = r.file(w["survey"], (*key, "survey"), folder, (".csv", ".txt"))
        if fmt != "las":
            raise r.error(
                (*key, "survey"), "applies to LAS wells only (point tables hold x, y, z)."
            )
    if fmt == "csv" and collar is not None:
        raise r.error((*key, "collar"), "applies to LAS wells only (point tables hold x, y, z).")
    cols = w.get("columns", {})
    if not isinstance(cols, dict):
        raise r.error(
            (*key, "columns"), f'must be a table {{variable = "column"}}; got {_shown(cols)}.'
        )
    allowed = set(variables) | ({"x", "y", "z", "well"} if fmt == "csv" else set())
    columns = {}
    for k, val in cols.items():
        if k not in allowed:
            raise r.error(
                (*key, "columns", k),
                f"is not a variable of the study (variables: {', '.join(sorted(allowed))}).",
            )
        columns[k] = r.string(val, (*key, "columns", k))
    return WellSpec(f, fmt, name, collar, survey, columns)  # type: ignore[arg-type]


def _soft(
    r: _Reader, raw: Any, folder: Path, variables: dict[str, Variable], categorical: list[str]
) -> SoftDataSpec:
    key = ("soft_data",)
    s = r.table(
        raw,
        key,
        {
            "variable": False,
            "probabilities": False,
            "attributes": False,
            "patch": False,
            "components": False,
            "smoothing": False,
            "regularization": False,
            "segy": False,
        },
    )
    if not categorical:
        raise r.error(key, "needs a categorical variable to give probabilities for.")
    var = r.string(s.get("variable", categorical[0]), (*key, "variable"), tuple(categorical))
    if ("probabilities" in s) == ("attributes" in s):
        raise r.error(
            key,
            "needs exactly one of 'probabilities' (a ready cube) or 'attributes' "
            "(cubes to calibrate).",
        )
    prob = None
    attrs: tuple[Path, ...] = ()
    if "probabilities" in s:
        prob = r.file(s["probabilities"], (*key, "probabilities"), folder, (".npy",))
    else:
        a = s["attributes"]
        if not isinstance(a, list) or not a:
            raise r.error(
                (*key, "attributes"), f"must be a non-empty list of files; got {_shown(a)}."
            )
        attrs = tuple(
            r.file(x, (*key, "attributes", j), folder, (".npy", ".sgy", ".segy"))
            for j, x in enumerate(a)
        )
    patch = r.triple(
        s.get("patch", [1, 2, 2]), (*key, "patch"), lambda x, k: r.integer(x, k, 0, 10)
    )
    segy = r.table(s.get("segy", {}), (*key, "segy"), {"axes": False, "z_downward": False})
    axes = segy.get("axes", ["y", "x", "z"])
    if not isinstance(axes, list) or sorted(axes) != ["x", "y", "z"]:
        raise r.error(
            (*key, "segy", "axes"),
            f"must list the grid axes of the inline, crossline "
            f'and sample directions, e.g. ["y", "x", "z"]; got {_shown(axes)}.',
        )
    return SoftDataSpec(
        variable=var,
        probabilities=prob,
        attributes=attrs,
        patch=patch,
        components=r.integer(s.get("components", 8), (*key, "components"), 1, 500),
        smoothing=r.number(s.get("smoothing", 0.0), (*key, "smoothing"), low=0.0),
        regularization=r.number(
            s.get("regularization", 1.0), (*key, "regularization"), positive=True
        ),
        segy_axes=tuple(axes),  # type: ignore[arg-type]
        segy_z_downward=r.boolean(segy.get("z_downward", True), (*key, "segy", "z_downward")),
    )


def read_array(path: Path, what: str) -> np.ndarray:
    """Load a ``.npy`` file without pickles; errors name the file."""
    try:
        return np.load(path, allow_pickle=False)
    except FileNotFoundError as e:
        raise StudyError(f"The {what} file '{path}' does not exist.") from e
    except (ValueError, OSError, EOFError) as e:
        raise StudyError(f"The {what} file '{path}' is not a readable .npy array: {e}") from e
