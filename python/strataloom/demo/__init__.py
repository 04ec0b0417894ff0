"""The demo: an invented alluvial aquifer, written as a study and run end to end.

Everything here is invented for demonstration. "Willowbend Valley" is a fictional alluvial aquifer:
sinuous channel sands and their levee silts in floodplain mud, a dozen wells (eight vertical wells
in one point table, four LAS logs of which three are deviated), and a resistivity-like attribute
cube that responds to the facies through blur and noise, as an airborne electromagnetic survey
might. The "true" geology that the wells and the attribute sample is drawn from the same invented
channel generator as the training image, with another seed.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["SIZES", "TI_SPEC", "channel_belt", "run_demo", "write_demo"]

#: grid shape, realizations, training-image shape per demo size
SIZES: dict[str, dict[str, Any]] = {
    "default": {"shape": (16, 64, 64), "realizations": 20, "ti": (24, 120, 120)},
    "large": {"shape": (40, 160, 160), "realizations": 8, "ti": (40, 160, 160)},
}
SPACING = (1.0, 25.0, 25.0)  # dz, dy, dx in metres
ORIGIN = (60.0, 0.0, 0.0)  # base of the model at 60 m elevation
FACIES = [
    (0, "floodplain mud", "#8c7a5b"),
    (1, "channel sand", "#e8c35a"),
    (2, "levee silt", "#b5a27a"),
]


TI_SPEC = """\
# Training-image builder spec for the demo (invented): meandering channel sands with levee silts
# in floodplain mud, channels running east.
seed = {seed}
background = 0
facies = ["floodplain mud", "channel sand", "levee silt"]

[grid]
shape = [{nz}, {ny}, {nx}]
spacing = [{dz}, {dy}, {dx}]
origin = [0.0, 0.0, 0.0]

[[channels]]
name = "channels"
facies = 1
proportion = 0.14
width = {{ uniform = [100.0, 200.0] }}
thickness = {{ triangular = [2.0, 3.0, 4.5] }}
azimuth = {{ normal = [90.0, 10.0] }}
wavelength = {{ uniform = [900.0, 1600.0] }}
amplitude = {{ uniform = [80.0, 220.0] }}
section = "rounded"
levee = {{ facies = 2, width = {{ uniform = [40.0, 80.0] }}, thickness = 1.0 }}
"""


def channel_belt(shape: tuple[int, int, int], seed: int) -> np.ndarray:
    """The demo's invented geology on a grid of ``shape`` (the builder spec's objects).

    Built with :func:`strataloom.training.build_training_image` from :data:`TI_SPEC`.
    """
    import tomllib

    from ..training import build_training_image

    nz, ny, nx = shape
    dz, dy, dx = SPACING
    spec = tomllib.loads(TI_SPEC.format(seed=seed, nz=nz, ny=ny, nx=nx, dz=dz, dy=dy, dx=dx))
    return np.asarray(build_training_image(spec).facies, dtype=np.int16)


def _survey_text(stations: list[tuple[float, float, float]]) -> str:
    return "md,inclination,azimuth\n" + "".join(f"{m:g},{i:g},{a:g}\n" for m, i, a in stations)


def write_demo(folder: str | Path, size: str = "default", seed: int = 7) -> Path:
    """Write the invented study into ``folder``; returns the study file's path."""
    import lasio

    from ..conditioning import Survey

    if size not in SIZES:
        from .._validate import fail

        raise fail("size", f"one of {', '.join(SIZES)}", size, "write_demo")
    cfg = SIZES[size]
    nz, ny, nx = cfg["shape"]
    root = Path(folder)
    (root / "wells").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    tz, ty, tx = cfg["ti"]
    (root / "channels_ti.toml").write_text(
        TI_SPEC.format(
            seed=seed + 1, nz=tz, ny=ty, nx=tx, dz=SPACING[0], dy=SPACING[1], dx=SPACING[2]
        )
    )
    truth = channel_belt(cfg["shape"], seed=seed + 2)
    dz, dy, dx = SPACING
    z0, y0, x0 = ORIGIN
    top = z0 + nz * dz

    def facies_at(xs: np.ndarray, ys: np.ndarray, zs: np.ndarray) -> np.ndarray:
        iz = np.floor((zs - z0) / dz).astype(int)
        iy = np.floor((ys - y0) / dy).astype(int)
        ix = np.floor((xs - x0) / dx).astype(int)
        ok = (iz >= 0) & (iz < nz) & (iy >= 0) & (iy < ny) & (ix >= 0) & (ix < nx)
        out = np.zeros(len(xs), dtype=np.int64)
        out[ok] = truth[iz[ok], iy[ok], ix[ok]]
        out[~ok] = rng.integers(0, 3, int((~ok).sum()))  # outside the model: invented values
        # invented logging errors: 2 % of samples misread
        wrong = rng.random(len(xs)) < 0.02
        out[wrong] = rng.integers(0, 3, int(wrong.sum()))
        return out

    # eight vertical wells in one point table, samples every 0.5 m
    ext_y, ext_x = ny * dy, nx * dx
    rows = ["well,x,y,z,facies"]
    for k in range(8):
        wx, wy = rng.uniform(0.08, 0.92) * ext_x, rng.uniform(0.08, 0.92) * ext_y
        zs = np.arange(top - 0.25, z0, -0.5)
        fac = facies_at(np.full(len(zs), wx), np.full(len(zs), wy), zs)
        rows.extend(
            f"WB-{k + 1:02d},{wx:.2f},{wy:.2f},{z:.2f},{f}" for z, f in zip(zs, fac, strict=True)
        )
    (root / "wells" / "vertical_wells.csv").write_text(
        "# invented demo data: eight vertical wells, facies codes 0 mud, 1 sand, 2 levee silt\n"
        + "\n".join(rows)
        + "\n"
    )

    # four LAS wells: one vertical, three deviated (one leaves the model through its side)
    las_wells = []
    kicks = [None, (4.0, 35.0, 60.0), (2.0, 55.0, 200.0), (3.0, 75.0, 100.0)]
    for k, kick in enumerate(kicks):
        name = f"WB-{k + 9:02d}"
        cx, cy = rng.uniform(0.2, 0.8) * ext_x, rng.uniform(0.2, 0.8) * ext_y
        if k == 3:
            cx = 0.88 * ext_x  # drilled towards the eastern edge
        collar_z = top + 2.0  # kelly bushing 2 m above the model top
        if kick is None:
            survey = None
            md = np.arange(0.0, nz * dz + 2.0, 0.25)
            stations = None
        else:
            kick_md, inc, az = kick
            total = (nz * dz + 2.0) / np.cos(np.radians(inc)) * 1.15
            stations = [
                (0.0, 0.0, az),
                (kick_md, 0.0, az),
                (kick_md + 12.0, inc, az),
                (total, inc, az),
            ]
            survey = Survey(*np.array(stations).T)
            md = np.arange(0.0, total, 0.25)
        pos = (
            survey.positions(md)
            if survey is not None
            else np.column_stack([np.zeros_like(md), np.zeros_like(md), md])
        )
        xs, ys, zs = cx + pos[:, 0], cy + pos[:, 1], collar_z - pos[:, 2]
        fac = facies_at(xs, ys, zs).astype(float)
        fac[zs > top] = -999.25  # no log above the model top (casing): LAS null value
        res = np.where(fac == 1, 55.0, np.where(fac == 2, 22.0, 7.0)) * np.exp(
            rng.normal(0, 0.15, len(md))
        )
        res[fac < 0] = -999.25
        las = lasio.LASFile()
        las.well["WELL"].value = name
        las.well["COMP"].value = "Invented demo data"
        las.well["NULL"].value = -999.25
        las.well.append(lasio.HeaderItem("XCOORD", unit="m", value=round(cx, 2)))
        las.well.append(lasio.HeaderItem("YCOORD", unit="m", value=round(cy, 2)))
        las.params.append(
            lasio.HeaderItem("EKB", unit="m", value=collar_z, descr="collar elevation")
        )
        las.append_curve("DEPT", md, unit="m", descr="measured depth from collar")
        las.append_curve("FACIES", fac, descr="0 mud, 1 sand, 2 levee silt")
        las.append_curve("RES", res, unit="ohm.m", descr="invented resistivity")
        with open(root / "wells" / f"{name}.las", "w") as f:
            las.write(f, version=2.0)
        if stations is not None:
            (root / "wells" / f"{name}_survey.csv").write_text(_survey_text(stations))
        las_wells.append((name, stations is not None))

    # an invented resistivity-like cube: facies response, vertical/lateral blur, noise
    from scipy.ndimage import gaussian_filter

    log_res = np.select([truth == 1, truth == 2], [np.log10(55.0), np.log10(22.0)], np.log10(7.0))
    log_res = gaussian_filter(log_res, sigma=(1.2, 1.0, 1.0)) + rng.normal(0, 0.12, truth.shape)
    np.save(root / "resistivity.npy", (10.0**log_res).astype(np.float32))
    np.save(root / "truth_do_not_use.npy", truth)  # for comparing results with the invented truth

    wells_toml = '[[wells]]\nfile = "wells/vertical_wells.csv"\n\n'
    for name, deviated in las_wells:
        wells_toml += f'[[wells]]\nfile = "wells/{name}.las"\ncolumns = {{ facies = "FACIES" }}\n'
        if deviated:
            wells_toml += f'survey = "wells/{name}_survey.csv"\n'
        wells_toml += "\n"
    cats = "".join(f'  {{ code = {c}, name = "{n}", colour = "{col}" }},\n' for c, n, col in FACIES)
    study = f"""\
# Strata Loom demo study: Willowbend Valley, an invented alluvial aquifer (all data invented).

[study]
name = "Willowbend Valley aquifer (invented demo)"
description = "Channel sands and levee silts in floodplain mud; 12 wells, resistivity cube."

[grid]
shape = [{nz}, {ny}, {nx}]          # nz, ny, nx
spacing = [{dz}, {dy}, {dx}]        # dz, dy, dx in metres
origin = [{z0}, {y0}, {x0}]         # z0 (elevation of the base), y0 (north), x0 (east)

[variables.facies]
kind = "categorical"
categories = [
{cats}]

[training_image]
builder = "channels_ti.toml"   # a training-image builder spec (strataloom ti build)

{wells_toml}[soft_data]
attributes = ["resistivity.npy"]
patch = [1, 2, 2]          # half-sizes (z, y, x) of the feature box, in cells
components = 6             # PCA components
smoothing = 0.7            # Gaussian sigma in cells applied to the probabilities

[engine]
name = "pattern_tree"

[engine.parameters]
template = {{ radius = [1, 4, 4], max_nodes = 32 }}
levels = 3
min_replicates = 2
tau = [1.0, 1.0]           # training image, soft data

[ensemble]
realizations = {cfg["realizations"]}
seed = 20261201

[output]
hard_data = true
soft_data = true
"""
    path = root / "study.toml"
    path.write_text(study)
    return path


def run_demo(
    folder: str | Path,
    *,
    size: str = "default",
    processes: int | None = None,
    progress: bool = True,
    echo: Callable[[str], Any] = print,
) -> dict[str, Any]:
    """Write the demo study into ``folder`` and run it: check, calibration, ensemble, QC figures.

    Returns a dict of measured figures (timings, calibration scores, hard-data mismatches).
    """
    from ..study import load_study
    from ..workflow import check_study, prepare, run_study

    t_all = time.perf_counter()
    root = Path(folder)
    echo(f"writing the invented demo study into {root}/ (size {size})")
    path = write_demo(root, size=size)
    study = load_study(path)
    t0 = time.perf_counter()
    prep = prepare(study)
    t_prepare = time.perf_counter() - t0
    for line in check_study(study, probe=True, processes=processes, prepared=prep):
        echo(line)
    summary = run_study(study, root / "run", processes=processes, progress=progress, prepared=prep)
    e = summary.ensemble
    echo(
        f"{len(e.computed)} realizations of {study.grid.size:,} cells on {e.where} in "
        f"{e.seconds:.1f} s ({e.already_done} already done)"
    )

    # quick checks against the data and the invented truth
    from ..store import RealizationStore

    store = RealizationStore.open(summary.store, mode="r")
    arr = store.array("facies")
    hard = prep.hard
    idx = tuple(hard.cells.T)
    mismatches = 0
    props = np.zeros(3)
    truth = np.load(root / "truth_do_not_use.npy", allow_pickle=False)
    agree = 0.0
    n = store.size
    etype = np.zeros((3, *study.grid.shape))
    for i in range(n):
        r = np.asarray(arr[i])
        mismatches += int(np.sum(r[idx] != hard.values["facies"]))
        props += np.bincount(r.ravel(), minlength=3)[:3]
        agree += float(np.mean(r == truth))
        for k in range(3):
            etype[k] += r == k
    props /= props.sum()
    etype /= n
    best = float(np.mean(np.argmax(etype, axis=0) == truth))
    echo(
        f"hard data honoured: {mismatches} mismatches over {n} realizations x {len(hard.cells)} "
        "cells"
    )
    echo(
        "simulated proportions: "
        + ", ".join(f"{name} {p:.2f}" for (_, name, _), p in zip(FACIES, props, strict=True))
    )
    echo(
        f"agreement with the invented truth: {agree / n:.3f} per realization, {best:.3f} for the "
        "most probable facies of the ensemble"
    )
    extras = summary.extras
    for line in extras:
        echo(line)
    total = time.perf_counter() - t_all
    echo(f"demo finished in {total:.1f} s; results in {root / 'run'}")
    cal = prep.calibration
    return {
        "seconds": total,
        "prepare_seconds": t_prepare,
        "ensemble_seconds": e.seconds,
        "mismatches": mismatches,
        "proportions": props.tolist(),
        "truth_agreement": agree / n,
        "etype_agreement": best,
        "calibration": None if cal is None else cal.scores,
        "extras": extras,
        "cells": study.grid.size,
        "realizations": n,
    }
