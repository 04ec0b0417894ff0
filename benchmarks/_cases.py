"""Inputs shared by the benchmarks (test inputs made on the fly, not checked results)."""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def facies_ti(shape: tuple[int, int, int], seed: int = 0, proportions=(0.6, 0.25, 0.15),
              sigma: tuple[float, float, float] = (1.5, 4.0, 4.0)) -> np.ndarray:
    """A K-facies image from thresholded smoothed Gaussian noise."""
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma=[s if n > 1 else 0 for s, n in zip(sigma, shape)])
    cuts = np.quantile(field, np.cumsum(proportions)[:-1])
    return np.digitize(field, cuts).astype(np.int8)
