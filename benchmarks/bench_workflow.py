"""asv benchmarks of the study workflow: trajectories, upscaling, calibration, the demo.

Targets (from the workflow issue): the default demo finishes in at most 180 s on a 2-core
machine; ``--size large`` runs at least 1,000,000 cells.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np

import strataloom as sl
from strataloom.conditioning import Survey, Well, calibrate, upscale


class Trajectories:
    def setup(self) -> None:
        md = np.linspace(0, 3000, 301)
        self.survey = Survey(md, np.linspace(0, 85, 301), np.linspace(10, 140, 301))
        self.query = np.linspace(0, 3000, 200_000)

    def time_positions_200k_depths(self) -> None:
        self.survey.positions(self.query)


class Upscale:
    def setup(self) -> None:
        rng = np.random.default_rng(0)
        self.grid = sl.Grid((40, 160, 160), (1.0, 25.0, 25.0))
        self.wells = [
            Well(
                f"W{i}",
                x=np.full(4000, rng.uniform(0, 4000)),
                y=np.full(4000, rng.uniform(0, 4000)),
                z=np.linspace(0, 40, 4000),
                values={"facies": rng.integers(0, 3, 4000).astype(float)},
                length=np.full(4000, 0.01),
            )
            for i in range(25)
        ]

    def time_upscale_100k_samples(self) -> None:
        upscale(self.grid, self.wells, {"facies": "categorical"})


class Calibrate:
    timeout = 300

    def setup(self) -> None:
        rng = np.random.default_rng(1)
        shape = (16, 72, 72)
        self.truth = (rng.random(shape) < 0.2).astype(int)
        self.cube = self.truth + rng.normal(0, 0.8, shape)
        cells = rng.choice(self.truth.size, 200, replace=False)
        self.cells = cells
        self.labels = self.truth.ravel()[cells]
        self.wells = np.array([f"W{i % 12}" for i in range(200)])

    def time_calibrate_83k_cells(self) -> None:
        calibrate([self.cube], self.cells, self.labels, self.wells, 2, patch=(1, 2, 2))


class Demo:
    timeout = 900
    number = 1
    repeat = 1

    def track_demo_default_seconds(self) -> float:
        """Wall time of ``strataloom demo`` at the default size (target: <= 180 s)."""
        from strataloom.demo import run_demo

        with tempfile.TemporaryDirectory() as d:
            out = run_demo(Path(d), progress=False, echo=lambda s: None)
        return float(out["seconds"])

    track_demo_default_seconds.unit = "seconds"  # type: ignore[attr-defined]
