"""Combining probabilities from several sources by the tau model."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _core
from . import _validate as v

__all__ = ["tau_merge"]


def tau_merge(prior: Any, sources: Any, tau: Any = None) -> np.ndarray:
    """Combine category probabilities from several sources with the tau model.

    For each category, with distances ``x = (1 - p) / p``, the combined distance is
    ``x / x0 = prod_i (x_i / x0) ** tau_i`` where ``x0`` is the prior's (Journel 2002,
    Mathematical Geology 34(5)); the results are then normalised over the categories.
    ``tau_i = 1`` for all sources is the permanence-of-ratios hypothesis.

    Parameters
    ----------
    prior : (K,) array_like
        Prior probabilities (for example the training image's or the target proportions).
    sources : (s, K) array_like
        One row of probabilities per source (for example the training image's conditional
        probability, then soft data).
    tau : (s,) array_like, optional
        Weight of each source; default 1 for every source.

    Returns
    -------
    (K,) ndarray
        Combined probabilities, summing to 1. A source that gives a category probability 0 or 1
        (with tau > 0) decides it; the first such source wins a conflict.
    """
    p0 = np.asarray(prior, dtype=np.float64)
    src = np.atleast_2d(np.asarray(sources, dtype=np.float64))
    if p0.ndim != 1 or p0.size == 0:
        raise v.fail("prior", "a 1-D array of K probabilities", f"shape {p0.shape}", "tau_merge")
    if src.ndim != 2 or src.shape[1] != p0.size:
        raise v.fail("sources", f"an (s, {p0.size}) array of probabilities", f"shape {src.shape}", "tau_merge")
    t = np.ones(src.shape[0]) if tau is None else np.atleast_1d(np.asarray(tau, dtype=np.float64))
    if t.shape != (src.shape[0],):
        raise v.fail("tau", f"one weight per source ({src.shape[0]})", f"shape {t.shape}", "tau_merge")
    for name, arr in (("prior", p0), ("sources", src)):
        if not np.isfinite(arr).all() or (arr < 0).any() or (arr > 1).any():
            raise v.fail(name, "probabilities in [0, 1]", "values outside [0, 1] or not finite", "tau_merge")
    if not np.isfinite(t).all() or (t < 0).any():
        raise v.fail("tau", "finite non-negative weights", t.tolist(), "tau_merge")
    return _core.tau_merge(np.ascontiguousarray(p0), np.ascontiguousarray(src), np.ascontiguousarray(t))
