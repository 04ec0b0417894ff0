"""A study end to end: read inputs, upscale wells, calibrate soft data, run the ensemble.

:func:`prepare` turns a validated :class:`~strataloom.study.Study` into arrays (training image,
hard data, soft probabilities); :func:`check_study` summarises them with memory and time
estimates; :func:`run_study` writes a run folder (store.md layout).
"""

from __future__ import annotations

import json
import math
import os
import re
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from . import _validate as v
from .conditioning import (
    Calibration,
    HardData,
    Well,
    calibrate,
    read_las,
    read_point_table,
    read_survey,
    upscale,
)
from .engines import EngineFactory, engine_class
from .ensemble import EnsembleResult, realization_seeds, run_ensemble
from .errors import MemoryLimitError, ParameterError, ParameterTypeError, StudyError
from .geometry import affinity_factors
from .store import RealizationStore, realization_attrs
from .study import Study, _Reader, read_array

__all__ = ["Prepared", "check_study", "prepare", "read_attribute", "run_study"]

#: File of the run folder holding the requested azimuth per cell (degrees), when a study asks
#: for a rotation.
AZIMUTH_NAME = "azimuth.npy"


@dataclass
class Prepared:
    """A study's inputs, read and conditioned."""

    study: Study
    training_image: np.ndarray
    wells: list[Well]
    hard: HardData
    soft: np.ndarray | None = None
    calibration: Calibration | None = None
    notes: list[str] = field(default_factory=list)
    rotation: Any = None
    affinity: Any = None
    zones: np.ndarray | None = None
    zone_engines: tuple[tuple[int, np.ndarray, dict[str, Any]], ...] = ()

    def factory(self, threads: int | None = None) -> EngineFactory:
        """The engine recipe for this study."""
        s = self.study
        var = s.engine.variable
        kind = s.variables[var].kind
        hard = self.hard.dense(var) if len(self.hard.cells) else None
        if hard is not None and not np.any(
            hard >= 0 if kind == "categorical" else np.isfinite(hard)
        ):
            hard = None
        return EngineFactory(
            s.engine.name,
            var,
            kind,
            s.grid.shape,
            dict(s.engine.parameters),
            self.training_image,
            hard,
            self.soft,
            threads,
            self.rotation,
            self.affinity,
            self.zones,
            self.zone_engines,
        )


#: Errors an engine raises about its inputs; during a study run they are reported against the study.
ENGINE_ERRORS = (ParameterError, ParameterTypeError, MemoryLimitError)


def _study_key(study: Study, message: str) -> tuple:
    """The study key behind the engine parameter a message names."""
    m = re.search(r"parameter '([A-Za-z_]+)", message) or re.search(r"\b(memory_limit)\b", message)
    name = m.group(1) if m else ""
    params = study.engine.parameters
    if name in params:
        return ("engine", "parameters", name)
    if name in ("radius", "max_nodes", "offsets") and "template" in params:
        return ("engine", "parameters", "template")
    return {
        "soft": ("soft_data",),
        "tau": ("soft_data",),
        "hard": ("wells",),
        "training_image": ("training_image",),
        "shape": ("grid", "shape"),
        "rotation": ("geometry",),
        "affinity": ("geometry",),
        "zones": ("zones",),
        "engines": ("zones",),
    }.get(name, ("engine",))


def _study_error(study: Study, key: tuple, message: str) -> StudyError:
    """A StudyError naming ``key`` and its line in the study file (the file is read again)."""
    try:
        text = study.path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        text = ""
    r = _Reader(study.path, text, {})
    return r.error(key, message)


def engine_error(study: Study, exc: BaseException) -> StudyError:
    """An engine's refusal of a study's input, as a StudyError naming the study key and line."""
    message = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return _study_error(study, _study_key(study, message), f"is refused by the {study.engine.name} engine: {message}")


def _process_bytes(prep: Prepared) -> int:
    """Estimated memory of one worker process: the TIs, the grid's working arrays, soft data."""
    soft = 0 if prep.soft is None else prep.soft.nbytes
    ti = prep.training_image
    zones = sum(zti.nbytes for _, zti, _ in prep.zone_engines if zti is not ti)  # zone TIs
    return int(ti.nbytes) + prep.study.grid.size * (8 + 4) + int(soft) + int(zones)


def check_memory(study: Study, per_process: int, processes: int) -> None:
    """StudyError when ``processes`` workers of ``per_process`` bytes exceed this machine's memory."""
    have = v.physical_memory()
    if not have or per_process * processes <= have:
        return
    if per_process > have:
        raise _study_error(
            study, ("grid", "shape"),
            f"needs about {v.size_text(per_process)} per process, more than the {v.size_text(have)} of memory of "
            "this machine; use a coarser grid or split the model into parts.",
        )
    most = max(1, have // per_process)
    raise _study_error(
        study, ("ensemble", "processes"),
        f"asks for {processes} processes of about {v.size_text(per_process)} each, "
        f"{v.size_text(per_process * processes)} in all, more than the {v.size_text(have)} of memory of this "
        f"machine; use at most {most} processes (--processes {most}).",
    )


def read_training_image(study: Study) -> np.ndarray:
    """The training image, checked against the variable's facies table."""
    spec = study.training_image
    if spec.builder is not None:
        from .training import build_training_image

        if not spec.builder.is_file():
            raise StudyError(f"The training-image spec '{spec.builder}' does not exist.")
        ti = np.asarray(build_training_image(spec.builder, seed=spec.seed).facies)
    else:
        ti = read_array(spec.file, "training image")  # type: ignore[arg-type]
    return _checked_ti(ti, study, spec.source.name, subset=False)


def _checked_ti(ti: np.ndarray, study: Study, label: str, subset: bool) -> np.ndarray:
    """A TI checked for the engine's variable: the facies table's codes (all of them, or with
    ``subset`` some of them) or float values."""
    var = study.variables[study.training_image.variable]
    if ti.ndim not in (2, 3) or ti.size == 0:
        raise StudyError(f"The training image '{label}' must be a 2-D or 3-D array; got shape {ti.shape}.")
    if var.kind == "categorical":
        if not np.issubdtype(ti.dtype, np.integer):
            raise StudyError(
                f"The training image '{label}' must hold integer facies codes "
                f"for '{var.name}'; got dtype {ti.dtype}."
            )
        present = sorted(int(c) for c in np.unique(ti[ti >= 0]))
        if (not subset and present != var.codes) or (subset and not set(present) <= set(var.codes)):
            raise StudyError(
                f"The training image '{label}' holds codes {present}, but the "
                f"facies table of '{var.name}' has codes {var.codes}; "
                + ("a zone's image may hold only those." if subset else "they must match.")
            )
    elif not np.issubdtype(ti.dtype, np.floating):
        ti = ti.astype(np.float64)
    return ti


def _map(study: Study, path: Path, key: str, shape: tuple[int, ...], kind: str) -> np.ndarray:
    """A map named by the study key ``key``, of ``shape``: finite floats or integers."""
    a = read_array(path, f"'{key}' map")
    if a.shape != shape and not (len(shape) == 3 and shape[0] == 1 and a.shape == shape[1:]):
        raise StudyError(f"{study.path.name}: '{key}' map '{path.name}' has shape {a.shape}; expected {shape}.")
    a = a.reshape(shape)
    if kind == "int":
        if not np.issubdtype(a.dtype, np.integer):
            raise StudyError(f"{study.path.name}: '{key}' map '{path.name}' must hold integers; got {a.dtype}.")
        return np.ascontiguousarray(a)
    if not np.issubdtype(a.dtype, np.number) or not np.isfinite(a).all():
        raise StudyError(f"{study.path.name}: '{key}' map '{path.name}' must hold finite numbers.")
    return np.ascontiguousarray(a, dtype=np.float64)


def read_geometry(study: Study) -> tuple[Any, Any]:
    """(rotation, affinity) for the engine from the study's [geometry]: constants or maps."""
    g = study.geometry
    if g is None:
        return None, None
    shape = study.grid.shape
    az = _map(study, g.azimuth, "geometry.azimuth", shape, "float") if isinstance(g.azimuth, Path) else g.azimuth
    dip = _map(study, g.dip, "geometry.dip", shape, "float") if isinstance(g.dip, Path) else g.dip
    if isinstance(g.affinity, Path):
        aff = _map(study, g.affinity, "geometry.affinity", (3, *shape), "float")
        try:  # the engines' one check of affinity factors
            affinity_factors(aff, shape, "the study")
        except ParameterError as e:
            name = g.affinity.name
            raise StudyError(f"{study.path.name}: 'geometry.affinity' map '{name}' is refused: {e}") from None
    else:
        aff = g.affinity
    rotation = (az, dip) if isinstance(dip, np.ndarray) or dip != 0.0 else az
    return rotation, aff


def read_zones(study: Study, ti: np.ndarray) -> tuple[np.ndarray | None, tuple]:
    """The zone map and, per zone code, (code, training image, parameter overrides)."""
    z = study.zones
    if z is None:
        return None, ()
    zones = _map(study, z.map, "zones.map", study.grid.shape, "int")
    given = {e.code for e in z.zones}
    missing = sorted(int(c) for c in np.unique(zones) if int(c) not in given)
    if missing:
        raise StudyError(
            f"{study.path.name}: 'zones.map' map '{z.map.name}' uses zone codes {missing} that have no "
            "[[zones.zone]] entry; add one per code."
        )
    engines = []
    for e in z.zones:
        zti = ti if e.training_image is None else _checked_ti(
            read_array(e.training_image, "zone training image"), study, e.training_image.name, subset=True)
        if study.engine.name == "pattern_tree" and int(zti.max()) != int(ti.max()):
            raise StudyError(
                f"The training image '{e.training_image.name if e.training_image else ''}' of zone {e.code} "
                f"must hold the largest facies code {int(ti.max())} (pattern trees of all zones count the "
                "same categories)."
            )
        engines.append((e.code, zti, dict(e.parameters)))
    return zones, tuple(engines)


def read_wells(study: Study) -> list[Well]:
    """Every well of the study, placed in space."""
    names = list(study.variables)
    out: list[Well] = []
    for spec in study.wells:
        if spec.format == "csv":
            variables = [v for v in names if v in spec.columns or _has_column(spec.file, v)]
            if not variables:
                raise StudyError(
                    f"The well file '{spec.file.name}' has no column for any study "
                    f"variable ({', '.join(names)})."
                )
            out.extend(read_point_table(spec.file, variables, name=spec.name, columns=spec.columns))
        else:
            curves = dict(spec.columns) or {v: v for v in names}
            survey = read_survey(spec.survey) if spec.survey is not None else None
            out.append(
                read_las(spec.file, curves, name=spec.name, collar=spec.collar, survey=survey)
            )
    return out


def _has_column(path: Path, name: str) -> bool:
    try:
        with open(path, encoding="utf-8") as f:
            for line in f:
                if line.strip() and not line.lstrip().startswith("#"):
                    cols = [
                        c.strip().lower()
                        for c in line.replace(";", ",").replace("\t", ",").split(",")
                    ]
                    return name.lower() in cols
    except OSError as e:
        raise StudyError(f"The well file '{path}' cannot be read: {e.strerror}.") from e
    return False


def read_attribute(path: Path, study: Study) -> np.ndarray:
    """An attribute cube on the grid: ``.npy`` (nz, ny, nx), or SEG-Y aligned with the grid."""
    shape = study.grid.shape
    if path.suffix.lower() == ".npy":
        a = np.asarray(read_array(path, "attribute"), dtype=np.float64)
    else:
        try:
            import segyio
        except ImportError as e:
            raise StudyError(
                f"Reading '{path.name}' needs segyio: pip install strataloom[segy]."
            ) from e
        if not path.is_file():
            raise StudyError(f"The attribute file '{path}' does not exist.")
        try:
            cube = np.asarray(segyio.tools.cube(str(path)), dtype=np.float64)
        except Exception as e:
            raise StudyError(
                f"The SEG-Y file '{path.name}' cannot be read as a regular cube: {e}"
            ) from e
        soft = study.soft_data
        axes = soft.segy_axes if soft is not None else ("y", "x", "z")
        order = [axes.index(a) for a in ("z", "y", "x")]
        a = np.transpose(cube, order)
        if soft is None or soft.segy_z_downward:
            a = a[::-1]  # samples run downwards; grid z runs upwards
    if a.shape != shape:
        raise StudyError(f"The attribute '{path.name}' has shape {a.shape}; the grid is {shape}.")
    return np.ascontiguousarray(a)


def prepare(study: Study, *, calibrate_soft: bool = True) -> Prepared:
    """Read the study's data and condition it (upscaling, calibration)."""
    ti = read_training_image(study)
    wells = read_wells(study)
    kinds = {k: v.kind for k, v in study.variables.items()}
    cats = {k: v.codes for k, v in study.variables.items() if v.kind == "categorical"}
    present = [k for k in kinds if all(k in w.values for w in wells)] if wells else list(kinds)
    hard = upscale(study.grid, wells, {k: kinds[k] for k in present}, categories=cats)
    for name, info in hard.report.per_well.items():
        if info["inside"] == 0:
            w = next(w for w in wells if w.name == name)
            g = study.grid
            lo = np.asarray(g.origin)
            hi = lo + np.asarray(g.spacing) * np.asarray(g.shape)
            raise StudyError(
                f"Well '{name}' ({Path(w.source).name}) lies entirely outside the grid: x "
                f"{w.x.min():g}..{w.x.max():g}, y {w.y.min():g}..{w.y.max():g}, z "
                f"{w.z.min():g}..{w.z.max():g}; the grid spans x {lo[2]:g}..{hi[2]:g}, "
                f"y {lo[1]:g}..{hi[1]:g}, z {lo[0]:g}..{hi[0]:g}."
            )
    prepared = Prepared(study, ti, wells, hard)
    prepared.rotation, prepared.affinity = read_geometry(study)
    prepared.zones, prepared.zone_engines = read_zones(study, ti)
    sd = study.soft_data
    if sd is not None:
        k = len(study.variables[sd.variable].categories)
        if sd.probabilities is not None:
            p = np.asarray(read_array(sd.probabilities, "soft data"), dtype=np.float64)
            if p.shape != (k, *study.grid.shape):
                raise StudyError(
                    f"The soft data '{sd.probabilities.name}' has shape {p.shape}; "
                    f"expected (K, nz, ny, nx) = {(k, *study.grid.shape)}."
                )
            informed = ~np.isnan(p).any(axis=0)
            q = p[:, informed]
            if q.size and (not np.isfinite(q).all() or q.min() < 0 or q.max() > 1):
                raise StudyError(
                    f"The soft data '{sd.probabilities.name}' must hold probabilities in [0, 1] "
                    f"(NaN where a cell has none); it holds values in [{q.min():g}, {q.max():g}]."
                )
            sums = q.sum(axis=0)
            if sums.size and np.abs(sums - 1).max() > 1e-3:
                raise StudyError(
                    f"The soft data '{sd.probabilities.name}' must sum to 1 over the {k} "
                    f"categories of each informed cell; sums run from {sums.min():g} to "
                    f"{sums.max():g}. Normalise them or set NaN where a cell has none."
                )
            prepared.soft = p.astype(np.float32)
        elif calibrate_soft:
            cubes = [read_attribute(a, study) for a in sd.attributes]
            labels = hard.values.get(sd.variable)
            if labels is None:
                raise StudyError(f"Calibration needs wells with '{sd.variable}' values.")
            sel = labels >= 0
            cal = calibrate(
                cubes,
                hard.flat[sel],
                labels[sel],
                hard.wells[sel],
                k,
                patch=sd.patch,
                components=sd.components,
                smoothing=sd.smoothing,
                regularization=sd.regularization,
                seed=study.ensemble.seed,
            )
            prepared.soft = cal.probabilities
            prepared.calibration = cal
    return prepared


def _store_attrs(prepared: Prepared, seeds: list[int]) -> dict[str, Any]:
    from . import __version__

    s = prepared.study
    var = s.engine.variable
    hard_ref = None
    if s.output.hard_data and len(prepared.hard.cells):
        hard_ref = {"variable": var, "file": "hard_data.npz"}
    return realization_attrs(
        version=__version__,
        grid=s.grid,
        variables={var: s.variables[var].store_attrs()},
        seeds=seeds,
        engine={"name": s.engine.name, "parameters": s.engine.parameters},
        inputs=s.input_hashes(),
        study=_study_record(s),
        hard_data=hard_ref,
    )


def _finite_or_none(x: Any) -> Any:
    """JSON-safe copy: NaN and infinities (scores that need two wells) become null."""
    if isinstance(x, dict):
        return {k: _finite_or_none(v) for k, v in x.items()}
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _study_record(study: Study) -> dict[str, Any]:
    """The study as stored: run-time choices (process count) left out, so they do not block a
    resume."""
    rec = study.to_json()
    rec["ensemble"].pop("processes", None)
    return rec


def _atomic_save_npy(path: Path, array: np.ndarray) -> None:
    tmp = path.with_name(path.name + ".tmp.npy")
    np.save(tmp, array)
    os.replace(tmp, path)


@dataclass
class RunSummary:
    """What :func:`run_study` did."""

    out: Path
    store: Path
    ensemble: EnsembleResult
    prepared: Prepared
    extras: list[str] = field(default_factory=list)


def run_study(
    study: Study,
    out: str | Path,
    *,
    processes: int | None = None,
    client: Any = None,
    scheduler: str | None = None,
    progress: bool = True,
    overwrite: bool = False,
    prepared: Prepared | None = None,
) -> RunSummary:
    """Run a study's ensemble into the folder ``out`` (resuming a compatible earlier run).

    Parameters
    ----------
    study : Study
    out : path-like
        The run folder; created if needed.
    processes : int, optional
        Local processes (default: the study's ``[ensemble] processes``, 0 = all cores).
    client : distributed.Client, optional
        Run on a Dask cluster instead.
    scheduler : str, optional
        Address of a Dask scheduler.
    progress : bool, default True
        Rich progress bars.
    overwrite : bool, default False
        Replace a store left by a different study.
    prepared : Prepared, optional
        Inputs already prepared (skips reading them again).
    """
    prep = prepared if prepared is not None else prepare(study)
    if engine_class(study.engine.name) is None:
        prep.factory()()  # the clear "engine not in this build" error, before any file is written
    n = study.ensemble.realizations
    if client is None and scheduler is None:
        p = processes if processes is not None else study.ensemble.processes
        check_memory(study, _process_bytes(prep), max(1, min(p or os.cpu_count() or 1, n)))
    out_dir = Path(out)
    out_dir.mkdir(parents=True, exist_ok=True)
    seeds = realization_seeds(study.ensemble.seed, n)
    store = RealizationStore.create(
        out_dir / "realizations.zarr", attrs=_store_attrs(prep, seeds), overwrite=overwrite
    )
    # The training image used, so that summaries, QC and reports of this folder need nothing else.
    _atomic_save_npy(out_dir / "training_image.npy", np.asarray(prep.training_image))
    if study.output.hard_data and len(prep.hard.cells):
        prep.hard.save(out_dir / "hard_data.npz")
    if prep.rotation is not None:
        # The requested azimuth per cell, for the local-orientation QC of the report.
        az = prep.rotation[0] if isinstance(prep.rotation, tuple) else prep.rotation
        full = np.broadcast_to(np.asarray(az, dtype=np.float32), study.grid.shape)
        _atomic_save_npy(out_dir / AZIMUTH_NAME, np.ascontiguousarray(full))
    if study.output.soft_data and prep.soft is not None:
        _atomic_save_npy(out_dir / "soft_data.npy", prep.soft.astype(np.float32))
    if prep.calibration is not None:
        cal = prep.calibration
        record = {
            "scores": cal.scores,
            "per_well": cal.per_well,
            "explained_variance": cal.explained_variance,
        }
        text = json.dumps(_finite_or_none(record), indent=2, allow_nan=False)
        tmp = out_dir / "calibration.json.tmp"
        tmp.write_text(text)
        os.replace(tmp, out_dir / "calibration.json")
    if processes is None:
        processes = study.ensemble.processes or None
    local_p = processes or os.cpu_count() or 1
    threads = None
    if client is None and scheduler is None:
        threads = max(1, (os.cpu_count() or 1) // max(1, min(local_p, n)))
    factory = prep.factory(threads=threads)
    try:
        result = run_ensemble(
            factory,
            store,
            seeds,
            processes=processes,
            client=client,
            scheduler=scheduler,
            progress=progress,
        )
    except ENGINE_ERRORS as e:
        raise engine_error(study, e) from e
    summary = RunSummary(out_dir, store.path, result, prep)
    finished = bool(store.done().all())
    if finished and (study.output.summary or study.output.report):
        summary.extras.extend(_summaries(study, prep, out_dir))
    return summary


def _summaries(study: Study, prep: Prepared, out_dir: Path) -> list[str]:
    """Summary store and report of a finished run, as the study's [output] asks."""
    lines = []
    if study.output.summary or study.output.report:
        from .summary import summarize

        t0 = time.perf_counter()
        path = summarize(out_dir)
        lines.append(f"summary {path} ({time.perf_counter() - t0:.1f} s)")
    if study.output.report:
        from .report import build_report

        t0 = time.perf_counter()
        ti = prep.training_image
        categorical = study.variables[study.engine.variable].kind == "categorical"
        path = build_report(out_dir, ti=ti if categorical else None, title=study.name)
        lines.append(f"report {path} ({time.perf_counter() - t0:.1f} s)")
    return lines


def check_study(
    study: Study,
    *,
    probe: bool = True,
    processes: int | None = None,
    prepared: Prepared | None = None,
) -> list[str]:
    """Read everything a run needs and summarise it, with memory and time estimates.

    Parameters
    ----------
    study : Study
    probe : bool, default True
        Build the engine and time one small realization to estimate the run time.
    processes : int, optional
        Processes the estimate assumes (default: the study's, else all cores).
    prepared : Prepared, optional
        Inputs already prepared (skips reading them again).
    """
    prep = prepared if prepared is not None else prepare(study)
    g = study.grid
    lines = [
        f"study '{study.name}' ({study.path.name})",
        f"grid {g.shape[0]} x {g.shape[1]} x {g.shape[2]} = {g.size:,} cells, spacing "
        f"{tuple(g.spacing)}, origin {tuple(g.origin)}",
    ]
    ti = prep.training_image
    var = study.variables[study.training_image.variable]
    if var.kind == "categorical":
        counts = np.bincount(ti[ti >= 0].ravel(), minlength=len(var.categories))
        props = ", ".join(f"{c.name} {counts[c.code] / counts.sum():.2f}" for c in var.categories)
        lines.append(
            f"training image {study.relative(study.training_image.source)}: shape "
            f"{ti.shape}, proportions {props}"
        )
    else:
        lines.append(
            f"training image {study.relative(study.training_image.source)}: shape "
            f"{ti.shape}, mean {np.nanmean(ti):.4g}"
        )
    lines.append("data files: " + ", ".join(str(f.resolve()) for f in study.input_files()))
    dev = sum(w.deviated for w in prep.wells)
    lines.append(f"wells: {len(prep.wells)} ({dev} deviated)")
    lines.extend("  " + s for s in prep.hard.report.lines())
    if prep.calibration is not None:
        lines.extend("soft data: " + s for s in prep.calibration.lines())
    elif prep.soft is not None:
        lines.append(f"soft data: {study.relative(study.soft_data.probabilities)}")  # type: ignore[union-attr]
    lines.extend(_geometry_lines(study, prep))
    n = study.ensemble.realizations
    p = processes or study.ensemble.processes or os.cpu_count() or 1
    p = max(1, min(p, n))
    itemsize = 2 if study.variables[study.engine.variable].kind == "categorical" else 4
    store_bytes = n * g.size * itemsize
    per_proc = _process_bytes(prep)
    lines.append(
        f"engine {study.engine.name}, {n} realizations, master seed "
        f"{study.ensemble.seed}, {p} processes"
    )
    check_memory(study, per_proc, p)
    timing = None
    if probe:
        try:
            timing = _probe(prep, per_proc)
        except ENGINE_ERRORS as e:
            raise engine_error(study, e) from e
        if timing is not None:
            per_proc += timing[1]
    lines.append(
        f"memory: store {v.size_text(store_bytes)} on disk before compression, about "
        f"{v.size_text(per_proc)} per process, {v.size_text(per_proc * p)} in all"
    )
    if timing is not None:
        sec_cell, _, build = timing
        est = build + sec_cell * g.size * math.ceil(n / p)
        lines.append(
            f"time: about {_duration(est)} ({sec_cell * g.size:.2f} s per realization "
            f"on one thread, engine build {build:.1f} s)"
        )
    elif probe:
        lines.append(f"time: no estimate (the {study.engine.name} engine is not in this build)")
    return lines


def _geometry_lines(study: Study, prep: Prepared) -> list[str]:
    """What `check` says about [geometry] and [zones]."""

    def shown(x: Any, unit: str = "") -> str:
        a = np.asarray(x, dtype=np.float64)
        if a.ndim == 0:
            return f"{float(a):g}{unit}"
        if a.shape == (3,):
            return "(" + ", ".join(f"{float(f):g}" for f in a) + ")"
        return f"map {a.min():g}..{a.max():g}{unit}"

    lines = []
    if study.geometry is not None:
        rot = prep.rotation
        az, dip = rot if isinstance(rot, tuple) else (rot, 0.0)
        lines.append(f"geometry: azimuth {shown(az, ' deg')}, dip {shown(dip, ' deg')}, "
                     f"affinity (z, y, x) {shown(prep.affinity)}")
    if prep.zones is not None:
        codes, counts = np.unique(prep.zones, return_counts=True)
        share = dict(zip(codes.tolist(), (counts / counts.sum()).tolist(), strict=True))
        assert study.zones is not None
        for e in study.zones.zones:
            ti = study.relative(e.training_image) if e.training_image else "the study's training image"
            extra = f", parameters {e.parameters}" if e.parameters else ""
            lines.append(f"zone {e.code}: {share.get(e.code, 0.0):.2f} of the grid, {ti}{extra}")
    return lines


def _probe(prep: Prepared, base: int) -> tuple[float, int, float] | None:
    """(seconds per cell on one thread, engine bytes, engine build seconds), or None."""
    del base
    s = prep.study
    if engine_class(s.engine.name) is None:
        return None
    nz, ny, nx = s.grid.shape
    # a sub-grid of at most ~20,000 cells with the same layer count ratio
    f = min(1.0, (20000 / (nz * ny * nx)) ** (1 / 3))
    sub = (max(1, round(nz * f)), max(1, round(ny * f)), max(1, round(nx * f)))
    var = s.engine.variable
    k = len(s.variables[var].categories)
    soft = None
    if prep.soft is not None:
        soft = np.full((k, *sub), np.nan)
    corner = tuple(slice(0, n) for n in sub)

    def crop(x: Any) -> Any:
        if isinstance(x, tuple):
            return tuple(crop(p) for p in x)
        if isinstance(x, np.ndarray) and x.ndim == 4:
            return x[(slice(None), *corner)]
        return x[corner] if isinstance(x, np.ndarray) and x.ndim == 3 else x

    zones = None if prep.zones is None else crop(prep.zones)
    fac = EngineFactory(
        s.engine.name,
        var,
        s.variables[var].kind,
        sub,
        dict(s.engine.parameters),
        prep.training_image,
        None,
        soft,
        1,
        crop(prep.rotation),
        crop(prep.affinity),
        zones,
        tuple(e for e in prep.zone_engines if zones is not None and e[0] in set(np.unique(zones).tolist())),
    )
    t0 = time.perf_counter()
    adapter = fac()
    build = time.perf_counter() - t0
    t0 = time.perf_counter()
    adapter.simulate(0)
    sec = (time.perf_counter() - t0) / (sub[0] * sub[1] * sub[2])
    mem = int(getattr(getattr(adapter, "_engine", None), "memory_bytes", 0) or 0)
    return sec, mem, build




def _duration(s: float) -> str:
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        return f"{s / 60:.1f} min"
    return f"{s / 3600:.1f} h"
