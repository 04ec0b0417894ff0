"""Brute-force NumPy reference for training-image pattern counts.

Implements the counting contract literally: the replicates of a data event {(offset_i, value_i)}
are the unmasked centres c (code >= 0) for which every c + offset_i lies inside the image, is
unmasked and equals value_i. Node dropping removes the informed node that comes last in template
order while fewer than `min_replicates` centres match.
"""

from __future__ import annotations

import numpy as np


def shifted(ti: np.ndarray, offset) -> np.ndarray:
    """Array s with s[c] = ti[c + offset] inside the image and -2 outside."""
    out = np.full(ti.shape, -2, dtype=np.int64)
    src = []
    dst = []
    for n, o in zip(ti.shape, offset, strict=True):
        if abs(o) >= n:
            return out
        src.append(slice(max(o, 0), n + min(o, 0)))
        dst.append(slice(max(-o, 0), n - max(o, 0)))
    out[tuple(dst)] = ti[tuple(src)]
    return out


def replicate_counts(ti: np.ndarray, offsets, values, categories: int) -> np.ndarray:
    """Counts per centre category of the centres matching every (offset, value)."""
    ok = ti >= 0
    for o, val in zip(offsets, values, strict=True):
        ok &= shifted(ti, o) == val
    return np.bincount(ti[ok], minlength=categories)


def conditional(ti, template_offsets, offsets, values, categories, min_replicates=1):
    """(counts, replicates, kept) with node dropping from the last node in template order."""
    index = [next(i for i, t in enumerate(template_offsets) if tuple(t) == tuple(o)) for o in offsets]
    order = np.argsort(index)
    offs = [tuple(offsets[i]) for i in order]
    vals = [int(values[i]) for i in order]
    for kept in range(len(offs), 0, -1):
        counts = replicate_counts(ti, offs[:kept], vals[:kept], categories)
        if counts.sum() >= min_replicates and counts.sum() > 0:
            return counts, int(counts.sum()), kept
    counts = np.bincount(ti[ti >= 0], minlength=categories)
    return counts, int(counts.sum()), 0
