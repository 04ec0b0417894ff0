"""Soft data from attribute cubes: per-cell facies probabilities by logistic regression.

Each cell is described by the attribute values in a small box around it (its *patch*), all cubes
together, standardised per cube. PCA reduces the patch vectors to a few components, and a
multinomial logistic regression fitted on the cells crossed by wells maps components to facies
probabilities. Leave-one-well-out scores (accuracy of the most probable facies, multi-category Brier
score) are reported beside those of the prior-proportion baseline, so a user sees whether the
attribute tells more than the well proportions alone. Optional Gaussian smoothing (sigma in cells)
is applied to the probabilities, which are then renormalised.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import _validate as v
from ..errors import StudyError

__all__ = ["Calibration", "brier_score", "calibrate", "patch_features"]


def brier_score(probabilities: np.ndarray, truth: np.ndarray) -> float:
    """Mean multi-category Brier score: ``mean_i sum_k (p_ik - [y_i == k])**2``.

    Parameters
    ----------
    probabilities : (n, K) array
    truth : (n,) int array of category indices 0..K-1
    """
    p = np.asarray(probabilities, dtype=np.float64)
    onehot = np.zeros_like(p)
    onehot[np.arange(len(truth)), np.asarray(truth, dtype=np.int64)] = 1.0
    return float(np.mean(np.sum((p - onehot) ** 2, axis=1)))


def _standardised(cubes: Sequence[np.ndarray], shape: tuple[int, int, int]) -> list[np.ndarray]:
    out = []
    for i, c in enumerate(cubes):
        a = np.asarray(c, dtype=np.float64)
        if a.shape != shape:
            raise StudyError(f"Attribute cube {i + 1} has shape {a.shape}; the grid is {shape}.")
        finite = np.isfinite(a)
        if not finite.any():
            raise StudyError(f"Attribute cube {i + 1} holds no finite value.")
        mu, sd = a[finite].mean(), a[finite].std()
        a = (a - mu) / (sd if sd > 0 else 1.0)
        a[~finite] = 0.0  # missing attribute = the cube's mean
        out.append(a)
    return out


def patch_features(
    cubes: Sequence[np.ndarray], flat: np.ndarray, patch: tuple[int, int, int]
) -> np.ndarray:
    """Patch vectors of the cells ``flat``: every cube's values in the box of half-sizes ``patch``.

    Borders are mirrored. Returns ``(len(flat), n_cubes * prod(2 * patch + 1))`` float64.
    """
    shape = cubes[0].shape
    idx = np.unravel_index(np.asarray(flat, dtype=np.int64), shape)
    pz, py, px = patch
    feats = []
    for c in cubes:
        padded = np.pad(c, ((pz, pz), (py, py), (px, px)), mode="symmetric")
        view = np.lib.stride_tricks.sliding_window_view(
            padded, (2 * pz + 1, 2 * py + 1, 2 * px + 1)
        )
        feats.append(view[idx].reshape(len(flat), -1))
    return np.concatenate(feats, axis=1)


@dataclass
class Calibration:
    """Result of :func:`calibrate`.

    Attributes
    ----------
    probabilities : (K, nz, ny, nx) ndarray of float32
        Facies probabilities per cell, summing to 1.
    scores : dict
        ``accuracy``, ``brier`` (leave-one-well-out), ``baseline_accuracy``, ``baseline_brier``
        (prior proportions of the training wells), ``wells``, ``cells``.
    per_well : dict of str to dict
        Held-out accuracy and Brier score per well.
    explained_variance : float
        Share of patch variance kept by the PCA components.
    """

    probabilities: np.ndarray
    scores: dict[str, float]
    per_well: dict[str, dict[str, float]] = field(default_factory=dict)
    explained_variance: float = float("nan")

    def lines(self) -> list[str]:
        s = self.scores
        out = [
            f"calibration on {s['cells']:.0f} cells of {s['wells']:.0f} wells, PCA keeps "
            f"{100 * self.explained_variance:.0f}% of the patch variance"
        ]
        if np.isfinite(s["accuracy"]):
            out.append(
                f"leave-one-well-out accuracy {s['accuracy']:.3f} (prior baseline "
                f"{s['baseline_accuracy']:.3f}), Brier score {s['brier']:.3f} (baseline "
                f"{s['baseline_brier']:.3f})"
            )
        else:
            out.append("leave-one-well-out scores need at least two wells")
        return out


def _fit(features: np.ndarray, labels: np.ndarray, k: int, c: float) -> Any:
    """A fitted model; a constant-proportion model when only one category is present."""
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    present = np.unique(labels)
    if len(present) < 2:
        return ("constant", np.bincount(labels, minlength=k) / len(labels))
    model = make_pipeline(StandardScaler(), LogisticRegression(C=c, max_iter=2000))
    model.fit(features, labels)
    return ("model", model)


def _predict(fitted: Any, features: np.ndarray, k: int) -> np.ndarray:
    kind, obj = fitted
    if kind == "constant":
        return np.tile(obj, (len(features), 1))
    out = np.zeros((len(features), k))
    out[:, obj.classes_] = obj.predict_proba(features)
    return out


def calibrate(
    cubes: Sequence[np.ndarray],
    cells_flat: np.ndarray,
    labels: np.ndarray,
    wells: np.ndarray,
    n_categories: int,
    *,
    patch: Sequence[int] = (1, 2, 2),
    components: int = 8,
    smoothing: float = 0.0,
    regularization: float = 1.0,
    pca_cells: int = 20000,
    seed: int = 0,
) -> Calibration:
    """Fit facies probabilities from attribute cubes and upscaled well facies.

    Parameters
    ----------
    cubes : sequence of (nz, ny, nx) arrays
        Attribute cubes aligned with the grid (NaN = no value).
    cells_flat : (m,) int array
        Flat indices of the cells with a well facies.
    labels : (m,) int array
        Facies codes 0..K-1 at those cells.
    wells : (m,) array of str
        Well of each cell, for leave-one-well-out scores.
    n_categories : int
        K.
    patch : (pz, py, px), default (1, 2, 2)
        Half-sizes of the feature box in cells.
    components : int, default 8
        PCA components kept (at most the patch length).
    smoothing : float, default 0
        Gaussian sigma in cells applied to the probabilities (0 = none).
    regularization : float, default 1
        Inverse L2 strength ``C`` of the logistic regression.
    pca_cells : int, default 20000
        Cells drawn at random (plus the well cells) to fit the PCA.
    seed : int, default 0
        Seed of that draw.

    Returns
    -------
    Calibration
    """
    from sklearn.decomposition import PCA

    if not cubes:
        raise v.fail("cubes", "at least one attribute cube", "none", "calibrate")
    k = v.integer(n_categories, "n_categories", low=2, owner="calibrate")
    pz, py, px = (v.integer(p, "patch", low=0, high=10, owner="calibrate") for p in patch)
    ncomp = v.integer(components, "components", low=1, high=500, owner="calibrate")
    sigma = v.real(smoothing, "smoothing", low=0.0, owner="calibrate")
    c = v.real(regularization, "regularization", low=0.0, low_open=True, owner="calibrate")
    shape = tuple(np.asarray(cubes[0]).shape)
    if len(shape) != 3:
        raise StudyError(f"Attribute cubes must be 3-D (nz, ny, nx); got shape {shape}.")
    std = _standardised(cubes, shape)  # type: ignore[arg-type]
    flat = np.asarray(cells_flat, dtype=np.int64)
    y = np.asarray(labels, dtype=np.int64)
    groups = np.asarray(wells).astype(str)
    if len(flat) == 0:
        raise StudyError("Calibration needs wells with facies inside the grid; none were found.")
    if np.any((y < 0) | (y >= k)):
        raise StudyError(f"Facies codes for calibration must lie in 0..{k - 1}.")
    n_cells = int(np.prod(shape))
    patch3 = (pz, py, px)
    rng = np.random.default_rng(seed)
    sample = rng.choice(n_cells, size=min(pca_cells, n_cells), replace=False)
    fit_cells = np.unique(np.concatenate([sample, flat]))
    n_feat = len(std) * (2 * pz + 1) * (2 * py + 1) * (2 * px + 1)
    pca = PCA(
        n_components=min(ncomp, n_feat, len(fit_cells)),
        svd_solver="covariance_eigh",
        random_state=0,
    )
    pca.fit(patch_features(std, fit_cells, patch3))
    x_well = pca.transform(patch_features(std, flat, patch3))

    # leave-one-well-out
    names = list(dict.fromkeys(groups))
    per_well: dict[str, dict[str, float]] = {}
    p_all = np.zeros((len(flat), k))
    p_base = np.zeros((len(flat), k))
    if len(names) >= 2:
        for name in names:
            test = groups == name
            fitted = _fit(x_well[~test], y[~test], k, c)
            p_all[test] = _predict(fitted, x_well[test], k)
            prior = np.bincount(y[~test], minlength=k) / np.sum(~test)
            p_base[test] = prior
            per_well[name] = {
                "accuracy": float(np.mean(np.argmax(p_all[test], 1) == y[test])),
                "brier": brier_score(p_all[test], y[test]),
                "cells": int(test.sum()),
            }
        scores = {
            "accuracy": float(np.mean(np.argmax(p_all, 1) == y)),
            "brier": brier_score(p_all, y),
            "baseline_accuracy": float(np.mean(np.argmax(p_base, 1) == y)),
            "baseline_brier": brier_score(p_base, y),
        }
    else:
        scores = {
            "accuracy": float("nan"),
            "brier": float("nan"),
            "baseline_accuracy": float("nan"),
            "baseline_brier": float("nan"),
        }
    scores["wells"] = float(len(names))
    scores["cells"] = float(len(flat))

    # final model on every well, applied slab by slab
    fitted = _fit(x_well, y, k, c)
    probs = np.empty((k, n_cells), dtype=np.float64)
    slab = max(1, 200000 // max(1, shape[1] * shape[2]))
    plane = shape[1] * shape[2]
    for z0 in range(0, shape[0], slab):
        cells = np.arange(z0 * plane, min(shape[0], z0 + slab) * plane, dtype=np.int64)
        probs[:, cells] = _predict(fitted, pca.transform(patch_features(std, cells, patch3)), k).T
    probs = probs.reshape((k, *shape))
    if sigma > 0:
        from scipy.ndimage import gaussian_filter

        for i in range(k):
            probs[i] = gaussian_filter(probs[i], sigma=sigma, mode="reflect")
        probs /= probs.sum(axis=0, keepdims=True)
    return Calibration(
        probabilities=probs.astype(np.float32),
        scores=scores,
        per_well=per_well,
        explained_variance=float(np.sum(pca.explained_variance_ratio_)),
    )
