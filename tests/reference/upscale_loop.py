"""Slow, obvious upscaling of categorical well samples: per-cell dictionaries of length sums.

Reference for `strataloom.conditioning.upscale` (most frequent code by sample length, ties to the
smaller code; common practice, no source).
"""

from __future__ import annotations

import numpy as np


def upscale_loop(grid, wells, variable: str) -> dict[tuple[int, int, int], int]:
    """Cell -> chosen code, looping over every sample in Python."""
    tally: dict = {}
    for w in wells:
        for p, val, ln in zip(w.points(), w.values[variable], w.length, strict=True):
            c = tuple(int(np.floor((p[k] - grid.origin[k]) / grid.spacing[k])) for k in range(3))
            if any(c[k] < 0 or c[k] >= grid.shape[k] for k in range(3)) or not np.isfinite(val):
                continue
            tally.setdefault(c, {}).setdefault(int(val), 0.0)
            tally[c][int(val)] += ln
    return {c: min(d, key=lambda code: (-d[code], code)) for c, d in tally.items()}
