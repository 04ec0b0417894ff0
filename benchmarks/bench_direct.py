"""asv benchmarks of the direct sampler (continuous 2-D and 3-D, categorical 2-D).

Inputs are invented Gaussian random fields (smoothed white noise), made in `setup`.
Speed targets live in benchmarks/compare.py, which prints them beside the measurements.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

import strataloom as sl


def _field(shape: tuple[int, ...], sigma: float, seed: int) -> np.ndarray:
    from scipy.ndimage import gaussian_filter

    return gaussian_filter(np.random.default_rng(seed).standard_normal(shape), sigma, mode="wrap")


class Direct2D:
    """2-D continuous, 30 neighbours: the case of the ns-per-comparison target."""

    timeout = 120

    def setup(self) -> None:
        self.ti = _field((200, 200), 4.0, 0)
        self.ds = sl.DirectSampler(self.ti, neighbors=30, accept_distance=0.05, scan_fraction=0.3)

    def time_simulate_100x100(self) -> None:
        self.ds.simulate((100, 100), seed=1, threads=1)

    def track_ns_per_comparison(self) -> float:
        self.ds.simulate((100, 100), seed=1, threads=1)
        return float(self.ds.last_stats["ns_per_comparison"])

    track_ns_per_comparison.unit = "ns"  # type: ignore[attr-defined]


class Categorical2D:
    """2-D categorical (3 facies from thresholds of a Gaussian field), 30 neighbours.

    lag_power 0: the byte kernel (64 candidates per vector value); 2 (the categorical default):
    the 64-candidate lower bound, then exact distances for the blocks that may win.
    """

    timeout = 120
    params: ClassVar[list[float]] = [0.0, 2.0]
    param_names: ClassVar[list[str]] = ["lag_power"]

    def setup(self, lag_power: float) -> None:
        f = _field((200, 200), 4.0, 1)
        ti = np.digitize(f, np.quantile(f, [0.33, 0.66])).astype(np.int8)
        self.ds = sl.DirectSampler(
            ti, neighbors=30, accept_distance=0.05, scan_fraction=0.3, lag_power=lag_power
        )

    def time_simulate_100x100(self, lag_power: float) -> None:
        self.ds.simulate((100, 100), seed=1, threads=1)

    def track_ns_per_comparison(self, lag_power: float) -> float:
        self.ds.simulate((100, 100), seed=1, threads=1)
        return float(self.ds.last_stats["ns_per_comparison"])

    track_ns_per_comparison.unit = "ns"  # type: ignore[attr-defined]


class Direct3D:
    """3-D continuous, 64**3 cells, by thread count."""

    timeout = 600
    params: ClassVar[list[int]] = [1, 2]
    param_names: ClassVar[list[str]] = ["threads"]

    def setup(self, threads: int) -> None:
        self.ds = sl.DirectSampler(
            _field((48, 48, 48), 3.0, 2), neighbors=30, accept_distance=0.05, scan_fraction=0.3
        )

    def time_simulate_64_cubed(self, threads: int) -> None:
        self.ds.simulate((64, 64, 64), seed=1, threads=threads)
