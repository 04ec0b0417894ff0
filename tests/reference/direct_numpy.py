"""Slow, obvious NumPy implementation of direct sampling with the engine's documented rules.

Used by the tests (the engine must give the same realization on data whose distances are exact in
binary arithmetic) and by the benchmarks (as the "vectorised NumPy" baseline: the candidate scan is
vectorised over chunks of candidates; nodes are visited one by one in Python).

Rules (see cpp/direct/direct_sampler.hpp):
* path: the cells needing a value in `strataloom.random_path` order (the engine's workers run it
  in conflict-free batches, which give the same result), or flat C order for the sweep;
* neighbours per variable: the node itself when informed, then the template offsets in order,
  keeping informed grid cells, n at most;
* distances: continuous = sqrt(weighted mean of min(diff**2, 1)), categorical = weighted mismatch
  fraction; lags outside the TI or on masked cells count 1; variables combined by their weights;
* scan: from cell floor(u * N), u = `uniform_draws(seed, 0, [cell], stream=3)`, through the TI in
  the strided order (padded positions sorted by (position mod s, position div s), s one
  neighbourhood width along the fastest axis with a non-zero reach) with wrap-around; first
  candidate <= accept_distance, else the first best of the first ceil(scan_fraction * N); with
  nothing usable there, the first usable candidate after it;
* local geometry (optional): a node of class k compares its grid lag h with the TI lag
  rint(M_k h) (half to even), the TI padded by ``ti_reach`` instead of the template's reach.
"""

from __future__ import annotations

import math

import numpy as np

import strataloom as sl

_START_STREAM = 3  # the engine's start stream (cpp/core/random.hpp, Stream::start)


def simulate_reference(
    ti: list[np.ndarray],
    categorical: list[bool],
    state: list[np.ndarray],
    auxiliary: list[bool],
    offsets: np.ndarray,
    neighbors: int,
    accept_distance: float,
    scan_fraction: float,
    weights: list[float],
    seed: int,
    path: str = "random",
    lag_power: float = 0.0,
    chunk: int = 2048,
    matrices: np.ndarray | None = None,
    classes: np.ndarray | None = None,
    ti_reach: tuple[int, int, int] | None = None,
) -> tuple[list[np.ndarray], np.ndarray]:
    """Direct sampling on normalised data.

    Parameters
    ----------
    ti : list of (nz, ny, nx) float arrays
        Normalised continuous values (NaN masked) or category codes (negative masked).
    state : list of grid arrays
        Normalised values, NaN where unknown. Not modified.

    Returns
    -------
    state : list of arrays, source : int64 array (flat TI index, -1 where not simulated)
    """
    nvar = len(ti)
    tshape = ti[0].shape
    n_ti = int(np.prod(tshape))
    gshape = state[0].shape
    st = [s.astype(np.float64).copy() for s in state]
    offsets = np.asarray(offsets, dtype=np.int64)
    grid_reach = np.abs(offsets).max(axis=0)
    reach = grid_reach if ti_reach is None else np.asarray(ti_reach, dtype=np.int64)
    # Padded TI: every lag from a real cell lands inside; padding counts as a full mismatch.
    padded = []
    for v in range(nvar):
        a = ti[v].astype(np.float64)
        if categorical[v]:
            a = np.where((a >= 0) & ~np.isnan(a), a, -1.0)
            fill = -1.0
        else:
            a = np.where(np.isnan(a), 1e4, a)
            fill = 1e4
        padded.append(np.pad(a, [(r, r) for r in reach], constant_values=fill).ravel())
    pshape = tuple(n + 2 * r for n, r in zip(tshape, reach, strict=True))
    informed = np.zeros(n_ti, dtype=np.uint32)
    for v in range(nvar):
        a = ti[v].ravel()
        ok = ((a >= 0) & ~np.isnan(a)) if categorical[v] else ~np.isnan(a)
        informed |= ok.astype(np.uint32) << np.uint32(v)
    tz, ty, tx = np.unravel_index(np.arange(n_ti), tshape)
    ti_pos = ((tz + reach[0]) * pshape[1] + ty + reach[1]) * pshape[2] + tx + reach[2]
    lag_delta = (offsets[:, 0] * pshape[1] + offsets[:, 1]) * pshape[2] + offsets[:, 2]
    # Scan order: padded positions at the stride of one neighbourhood width along the fastest axis
    # with a non-zero reach, phase after phase (the engine's transposed layout).
    total = int(np.prod(pshape))
    axis_stride = (pshape[1] * pshape[2], pshape[2], 1)
    stride = 1
    for a in (2, 1, 0):
        if reach[a] > 0:
            stride = (2 * int(reach[a]) + 1) * axis_stride[a]
            break
    stride = min(stride, total)
    per_phase = -(-total // stride)
    slot = (ti_pos % stride) * per_phase + ti_pos // stride
    scan_order = np.argsort(slot, kind="stable")
    rank = np.empty(n_ti, dtype=np.int64)
    rank[scan_order] = np.arange(n_ti)
    lag_weight = (1.0 + np.sqrt((offsets.astype(np.float64) ** 2).sum(axis=1))) ** -lag_power
    limit = min(max(math.ceil(scan_fraction * n_ti), 1), n_ti)

    def need_at(cell: int) -> int:
        need = 0
        for v in range(nvar):
            if not auxiliary[v] and np.isnan(st[v].flat[cell]):
                need |= 1 << v
        return need

    cells = [c for c in range(int(np.prod(gshape))) if need_at(c)]
    grid = sl.Grid(gshape)
    if path == "random" and cells:
        order = sl.random_path(grid, 0, seed)
        wanted = np.zeros(grid.size, dtype=bool)
        wanted[cells] = True
        cells = [int(c) for c in order[wanted[order]]]
    source = np.full(int(np.prod(gshape)), -1, dtype=np.int64)
    starts = sl.uniform_draws(seed, 0, np.asarray(cells, dtype=np.int64), _START_STREAM)

    for node, u in zip(cells, starts, strict=True):
        need = need_at(node)
        at = np.array(np.unravel_index(node, gshape))
        where = at[None, :] + offsets
        inside = np.all((where >= 0) & (where < np.array(gshape)), axis=1)
        flat = np.ravel_multi_index(tuple(np.where(inside[:, None], where, 0).T), gshape)
        node_delta = lag_delta
        if matrices is not None:
            m = np.asarray(matrices[int(classes.flat[node])], dtype=np.float64).reshape(3, 3)
            h = offsets.astype(np.float64)
            turned = np.stack(
                [np.rint(m[a, 0] * h[:, 0] + m[a, 1] * h[:, 1] + m[a, 2] * h[:, 2]) for a in range(3)],
                axis=1,
            ).astype(np.int64)
            node_delta = (turned[:, 0] * pshape[1] + turned[:, 1]) * pshape[2] + turned[:, 2]
        lags = []  # per variable: (deltas, values, weights) or None
        for v in range(nvar):
            centre = st[v].flat[node]
            vals = st[v].ravel()[flat]
            ok = inside & ~np.isnan(vals)
            idx = np.flatnonzero(ok)
            d, x, w = node_delta[idx], vals[idx], lag_weight[idx]
            if not np.isnan(centre):
                d, x, w = np.r_[0, d], np.r_[centre, x], np.r_[1.0, w]
            d, x, w = d[:neighbors], x[:neighbors], w[:neighbors]
            lags.append((d, x, w) if len(d) else None)
        active = [v for v in range(nvar) if lags[v] is not None]
        total = sum(weights[v] for v in active)
        start = min(int(u * n_ti), n_ti - 1)

        def distances(
            q: np.ndarray, active=active, lags=lags, total=total, need=need
        ) -> np.ndarray:
            dist = np.zeros(len(q))
            pos = ti_pos[q]
            for v in active:
                d, x, w = lags[v]
                vals = padded[v][pos[:, None] + d[None, :]]
                if categorical[v]:
                    part = ((vals != x[None, :]) * w[None, :]).sum(axis=1) / w.sum()
                else:
                    part = np.sqrt(
                        (np.minimum((vals - x[None, :]) ** 2, 1.0) * w[None, :]).sum(axis=1)
                        / w.sum()
                    )
                dist += weights[v] / total * part
            usable = (informed[q] & need) == need
            return np.where(usable, dist, np.inf)

        chosen = -1
        best, best_q = np.inf, -1
        scanned = 0
        while scanned < limit and chosen < 0:
            q = scan_order[(rank[start] + scanned + np.arange(min(chunk, limit - scanned))) % n_ti]
            dist = distances(q)
            hit = np.flatnonzero(dist <= accept_distance)
            if hit.size:
                chosen = int(q[hit[0]])
                break
            j = int(np.argmin(dist))
            if dist[j] < best:
                best, best_q = float(dist[j]), int(q[j])
            scanned += len(q)
        if chosen < 0:
            chosen = best_q
        while chosen < 0 and scanned < n_ti:
            q = scan_order[(rank[start] + scanned + np.arange(min(chunk, n_ti - scanned))) % n_ti]
            usable = np.flatnonzero(np.isfinite(distances(q)))
            if usable.size:
                chosen = int(q[usable[0]])
            scanned += len(q)
        if chosen < 0:
            raise ValueError("no usable training-image cell")
        for v in range(nvar):
            if need & (1 << v):
                st[v].flat[node] = ti[v].flat[chosen]
        source[node] = chosen
    return st, source.reshape(gshape)


def distance_table(
    ti: list[np.ndarray], categorical: list[bool], lag_sets: list, weights: list[float]
) -> np.ndarray:
    """Distance of every TI cell for fixed neighbour sets, by brute force over the whole TI.

    ``lag_sets[v]`` is None or an (offsets (k, 3), values (k,)) pair for variable v, unit lag
    weights. Returns a flat array of N distances (inf where a candidate lacks a needed variable is
    not applied here: the caller masks).
    """
    tshape = ti[0].shape
    n_ti = int(np.prod(tshape))
    cells = np.array(np.unravel_index(np.arange(n_ti), tshape)).T
    active = [v for v in range(len(ti)) if lag_sets[v] is not None]
    total = sum(weights[v] for v in active)
    out = np.zeros(n_ti)
    for v in active:
        offs, vals = lag_sets[v]
        acc = np.zeros(n_ti)
        for o, x in zip(np.asarray(offs), vals, strict=True):
            p = cells + o
            inside = np.all((p >= 0) & (p < np.array(tshape)), axis=1)
            y = np.full(n_ti, np.nan)
            y[inside] = ti[v][tuple(p[inside].T)]
            if categorical[v]:
                miss = ~((y >= 0) & (y == x))
                acc += miss
            else:
                dd = np.where(np.isnan(y), 1.0, np.minimum((y - x) ** 2, 1.0))
                acc += dd
        mean = acc / len(vals)
        out += weights[v] / total * (mean if categorical[v] else np.sqrt(mean))
    return out
