"""asv benchmarks of the pattern-tree engine (modest sizes; compare.py runs the issue's sizes)."""

from __future__ import annotations

import numpy as np
from scipy.ndimage import gaussian_filter

import strataloom as sl


def facies_ti(shape: tuple[int, int, int], seed: int = 0) -> np.ndarray:
    """Invented data: three facies (60/25/15 %) from thresholded smoothed Gaussian noise."""
    field = gaussian_filter(np.random.default_rng(seed).standard_normal(shape), (1.5, 4.0, 4.0))
    return np.digitize(field, np.quantile(field, [0.6, 0.85])).astype(np.int8)


class TreeBuild:
    """Building the trees: 3 levels, 50-node template, 200k-cell 3-D TI."""

    def setup(self):
        self.ti = facies_ti((20, 100, 100))
        self.tpl = sl.Template.ellipsoid((2, 5, 5), max_nodes=50)

    def time_build(self):
        sl.PatternTree(self.ti, self.tpl, levels=3)

    def peakmem_build(self):
        sl.PatternTree(self.ti, self.tpl, levels=3)

    def track_bytes_per_node(self):
        tree = sl.PatternTree(self.ti, self.tpl, levels=3)
        return tree.bytes_per_node

    track_bytes_per_node.unit = "bytes"


class TreeSimulate:
    """A later 3-D realization of 64k cells, 3 levels, 50-node template, 1 and 2 threads (the
    tree's one-time ordered trees are prepared in setup)."""

    params = (1, 2)
    param_names = ("threads",)

    def setup(self, threads):
        self.tree = sl.PatternTree(facies_ti((20, 100, 100)), sl.Template.ellipsoid((2, 5, 5), max_nodes=50),
                                   levels=3)
        self.tree.simulate((16, 64, 64), seed=0, threads=threads)

    def time_simulate(self, threads):
        self.tree.simulate((16, 64, 64), seed=1, threads=threads)


class TreeFirstRealization:
    """The first realization of a fresh tree: includes building the ordered trees of the staged
    levels (setup runs before every sample, so each sample starts from a fresh tree)."""

    number = 1
    repeat = 3
    warmup_time = 0.0

    def setup(self):
        self.tree = sl.PatternTree(facies_ti((20, 100, 100)), sl.Template.ellipsoid((2, 5, 5), max_nodes=50),
                                   levels=3)

    def time_first_simulate(self):
        self.tree.simulate((16, 64, 64), seed=1, threads=1)

    def peakmem_first_simulate(self):
        self.tree.simulate((16, 64, 64), seed=1, threads=1)


class TreeSimulate2D:
    """One level, 2-D: a 64 x 64 realization from a 100 x 100 TI with a 30-node template (the
    engine side of compare.py's comparison with a NumPy scan of the TI per node)."""

    def setup(self):
        field = gaussian_filter(np.random.default_rng(0).standard_normal((100, 100)), 3.0)
        ti = np.digitize(field, np.quantile(field, [0.6, 0.85])).astype(np.int8)
        self.tree = sl.PatternTree(ti, sl.Template.ellipsoid((0, 4, 4), max_nodes=30), levels=1)
        self.tree.simulate((64, 64), seed=0, threads=1)

    def time_simulate(self):
        self.tree.simulate((64, 64), seed=1, threads=1)
