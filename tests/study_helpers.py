"""Small invented studies for the workflow tests (invented data, for tests only)."""

from __future__ import annotations

from pathlib import Path

import lasio
import numpy as np


def channel_image(shape, seed, n_channels=5, width=(1.5, 3.0)):
    """Invented sinuous channels (code 1) in mud (code 0)."""
    rng = np.random.default_rng(seed)
    nz, ny, nx = shape
    z, y, x = np.mgrid[0:nz, 0:ny, 0:nx]
    out = np.zeros(shape, dtype=np.int16)
    for _ in range(n_channels):
        c = rng.uniform(0, ny) + rng.uniform(2, 6) * np.sin(
            2 * np.pi * x / rng.uniform(20, 50) + rng.uniform(0, 6)
        )
        out[(np.abs(y - c) < rng.uniform(*width)) & (np.abs(z - rng.uniform(0, nz)) < 1.5)] = 1
    return out


STUDY = """\
[study]
name = "small test study"

[grid]
shape = [{nz}, {ny}, {nx}]
spacing = [1.0, 10.0, 10.0]
origin = [0.0, 0.0, 0.0]

[variables.facies]
kind = "categorical"
categories = [
  {{ code = 0, name = "mud", colour = "#8c7a5b" }},
  {{ code = 1, name = "sand", colour = "#e3c16f" }},
]

[training_image]
file = "ti.npy"

[[wells]]
file = "wells/points.csv"

[[wells]]
file = "wells/dev.las"
name = "DEV-1"
collar = [55.0, 45.0, {top}]
survey = "wells/dev_survey.csv"
columns = {{ facies = "FAC" }}
{soft}
[engine]
name = "pattern_tree"

[engine.parameters]
template = {{ radius = [1, 3, 3], max_nodes = 20 }}
levels = 2
min_replicates = 2

[ensemble]
realizations = {n}
seed = 42

[output]
summary = {products}
report = {products}
"""


def write_small_study(folder: Path, *, shape=(4, 16, 16), n=4, soft=False, products=False) -> Path:
    """Write an invented small study (TI, 3 vertical wells in one CSV, one deviated LAS well)."""
    folder = Path(folder)
    (folder / "wells").mkdir(parents=True, exist_ok=True)
    nz, ny, nx = shape
    np.save(folder / "ti.npy", channel_image((6, 40, 40), seed=1))
    truth = channel_image(shape, seed=2, n_channels=3)
    rows = ["well,x,y,z,facies"]
    for name, (iy, ix) in {"A": (2, 3), "B": (8, 10), "C": (13, 5)}.items():
        for iz in range(nz):
            rows.append(f"{name},{ix * 10 + 5},{iy * 10 + 5},{iz + 0.5},{truth[iz, iy, ix]}")
    (folder / "wells" / "points.csv").write_text("\n".join(rows) + "\n")
    md = np.arange(0.0, 12.0, 0.25)
    (folder / "wells" / "dev_survey.csv").write_text(
        "md,inclination,azimuth\n0,0,90\n1,0,90\n12,80,90\n"
    )
    las = lasio.LASFile()
    las.well["NULL"].value = -999.25
    las.append_curve("DEPT", md, unit="m")
    fac = (np.arange(len(md)) // 8 % 2).astype(float)
    fac[5] = -999.25
    las.append_curve("FAC", fac)
    with open(folder / "wells" / "dev.las", "w") as f:
        las.write(f, version=2.0)
    soft_text = ""
    if soft:
        rng = np.random.default_rng(5)
        cube = truth * 2.0 + rng.normal(0, 0.6, shape)
        np.save(folder / "attr.npy", cube)
        soft_text = '\n[soft_data]\nattributes = ["attr.npy"]\npatch = [0, 1, 1]\ncomponents = 3\n'
    path = folder / "study.toml"
    path.write_text(
        STUDY.format(
            nz=nz, ny=ny, nx=nx, top=float(nz), n=n, soft=soft_text, products=str(products).lower()
        )
    )
    return path


class FailingFactory:
    """Wraps an engine factory; its engine raises for one seed (a test double for failures)."""

    def __init__(self, inner, bad_seed):
        self.inner = inner
        self.bad_seed = bad_seed
        self.token = "failing-" + inner.token

    def __call__(self):
        return _FailingAdapter(self.inner(), self.bad_seed)


class _FailingAdapter:
    def __init__(self, adapter, bad_seed, die=False):
        self.adapter = adapter
        self.bad_seed = bad_seed
        self.die = die
        self.variables = adapter.variables

    def simulate(self, seed):
        if seed == self.bad_seed:
            if self.die:  # as if the operating system had killed the worker (out of memory)
                import os
                import signal

                os.kill(os.getpid(), signal.SIGKILL)
            raise RuntimeError(f"engine failure for seed {seed}")
        return self.adapter.simulate(seed)


class DyingFactory(FailingFactory):
    """Its engine's worker process is killed outright for one seed (a test double)."""

    def __call__(self):
        return _FailingAdapter(self.inner(), self.bad_seed, die=True)


def cli_check_error(capsys, path) -> str:
    """`strataloom check --no-probe path` must fail with exit code 2 and one line, no traceback."""
    from strataloom.cli import main

    code = main(["check", "--no-probe", str(path)])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1, err
    assert "Traceback" not in err
    return err
