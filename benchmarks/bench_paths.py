"""asv benchmarks of simulation paths: the shuffle and the conflict-free batches, run before every
level of every realization (on a 64 x 64 grid they were a tenth of a pattern-tree realization)."""

from __future__ import annotations

import strataloom as sl


class PathPreparation:
    """A level's random path and its conflict-free batches, for a small and a 10**6-cell grid."""

    params = ("64x64", "100x100x100")
    param_names = ("shape",)

    def setup(self, shape):
        dims = tuple(int(n) for n in shape.split("x"))
        self.grid = sl.Grid(dims)
        self.path = sl.random_path(self.grid, 0, seed=1)
        self.reach = (0, 4, 4) if len(dims) == 2 else (2, 5, 5)

    def time_random_path(self, shape):
        sl.random_path(self.grid, 0, seed=2)

    def time_conflict_free_batches(self, shape):
        sl.conflict_free_batches(self.grid, 0, self.reach, self.path, max_batch=256)
