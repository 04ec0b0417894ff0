"""The pattern-tree engine: categorical multiple-point simulation.

Training-image data events are counted once, by template node, into one tree per multiple-grid
level (the search-tree approach of Strebelle 2002, Mathematical Geology 34(1)); a simulation then
visits the grid level by level, coarsest first, reads each node's data event, asks the tree for the
conditional probability of each category (dropping informed nodes while too few replicates
match: the farthest first, or on finer grids those informed last in the grid's refinement),
merges soft data by the tau model, optionally steers toward target proportions, and draws the
category. Everything runs in the compiled core, off the GIL.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from . import _core
from . import _validate as v
from .errors import MemoryLimitError
from .geometry import local_geometry, refuse_flat_dip, turn_matrix
from .template import Template

__all__ = ["GEOMETRY_STEP", "PatternTree", "turned_image"]

_OWNER = "PatternTree"
#: Largest category code a training image may hold (codes are stored in one byte).
MAX_CODE = 253


def _as_codes(ti: Any) -> np.ndarray:
    a = v.as_volume(ti, "training_image", owner=_OWNER)
    if not np.issubdtype(a.dtype, np.integer):
        raise v.fail_type("training_image", "an integer array of category codes (negative = masked)", a, _OWNER)
    if a.max() > MAX_CODE:
        raise v.fail("training_image", f"codes 0..{MAX_CODE} (negative = masked)",
                     f"a largest code of {int(a.max())}", _OWNER)
    if (a < 0).all():
        raise v.fail("training_image", "an array with at least one code >= 0 (negative = masked)",
                     "an entirely masked array", _OWNER)
    return np.where(a < 0, 255, a).astype(np.uint8)


class PatternTree:
    """Counts of training-image patterns for categorical multiple-point simulation.

    Parameters
    ----------
    training_image : (ny, nx) or (nz, ny, nx) array of int
        Category codes ``0..K-1`` (``K = max + 1``); negative values are masked (no data: never a
        centre nor a match).
    template : Template or (n, 3) array of int
        Search template; level ``g`` uses its offsets times ``2**g``. Order matters: node dropping
        removes informed nodes from the end.
    levels : int, default 1
        Number of multiple grids; one tree per level.
    min_replicates : int, default 1
        Fewest training-image replicates a data event must have; below it, informed nodes are
        dropped from the last in template order (in simulation, on levels with a coarser one, from
        the last in the order the level's cells are refined: see DEVELOPERS.md).
    memory_limit : int, optional
        Bytes the trees may use; default half the physical memory. A build that would need more
        stops with `MemoryLimitError` before exhausting the machine. The ordered trees built on
        the first simulation and the trees of training images turned for rotation and affinity
        classes share it (ordered trees that do not fit are skipped: same results, slower).

    Notes
    -----
    Counting contract: the replicates of a data event ``{(offset_i, value_i)}`` are the unmasked
    centres ``c`` for which every ``c + offset_i`` lies inside the TI, is unmasked and equals
    ``value_i``. Nodes not in the event are marginalised.
    """

    def __init__(self, training_image: Any, template: Any, *, levels: int = 1, min_replicates: int = 1,
                 memory_limit: int | None = None) -> None:
        self.training_image = training_image
        self.template = template
        self.levels = levels
        self.min_replicates = min_replicates
        self.memory_limit = memory_limit
        codes = _as_codes(training_image)
        self._ndim = np.asarray(training_image).ndim
        tpl = template if isinstance(template, Template) else Template(template)
        self._template = tpl
        lv = v.integer(levels, "levels", low=1, high=12, owner=_OWNER)
        self._min_replicates = v.integer(min_replicates, "min_replicates", low=1, owner=_OWNER)
        limit = _core.default_memory_limit() if memory_limit is None else v.integer(
            memory_limit, "memory_limit", low=1, owner=_OWNER)
        k = int(codes[codes != 255].max()) + 1
        self._tree = _core.PatternTree(np.ascontiguousarray(codes), k, np.ascontiguousarray(tpl.offsets), lv, limit)
        self._codes = codes
        self._limit = limit
        self._turned: dict[tuple, PatternTree] = {}  # trees of the TI turned and stretched, by class
        self.last_stats: dict[str, list] | None = None

    def _variant(self, key: tuple) -> PatternTree:
        """The tree of this TI turned by (azimuth, dip) and stretched by affinity (built once)."""
        if key == (0.0, 0.0, (1.0, 1.0, 1.0)):
            return self
        if key not in self._turned:
            turned = turned_image(np.where(self._codes == 255, -1, self._codes.astype(np.int16)), *key)
            tree = copy.copy(self)  # same template, levels and settings
            tree.training_image = turned
            tree._codes = _as_codes(turned)
            tree._turned = {}
            tree.last_stats = None
            try:
                # One memory_limit for this tree and every turned one, ordered trees included.
                tree._tree = _core.PatternTree(np.ascontiguousarray(tree._codes), self.categories,
                                               np.ascontiguousarray(self._template.offsets), self._tree.levels,
                                               self._limit, share_budget_with=self._tree)
            except MemoryLimitError as exc:
                raise MemoryLimitError(
                    f"{exc} The trees of the training image turned and stretched for the rotation and "
                    f"affinity classes ({len(self._turned)} built before this one) share it with the tree "
                    "itself: use fewer classes (a constant, or a map with fewer distinct values) or raise "
                    "memory_limit.") from None
            self._turned[key] = tree
        return self._turned[key]

    # ----------------------------------------------------------------- description
    @property
    def categories(self) -> int:
        """Number of categories ``K`` (largest code + 1)."""
        return int(self._tree.categories)

    @property
    def category_counts(self) -> np.ndarray:
        """Unmasked training-image cells per category."""
        return np.asarray(self._tree.category_counts)

    @property
    def proportions(self) -> np.ndarray:
        """Training-image proportion of each category (over unmasked cells)."""
        c = self.category_counts.astype(np.float64)
        return c / c.sum()

    @property
    def memory_bytes(self) -> int:
        """Bytes held by the trees, the padded training image, the ordered trees built for
        simulation and the trees of turned training images (rotation and affinity classes), which
        all share ``memory_limit``."""
        return int(self._tree.memory_bytes) + sum(t.memory_bytes for t in self._turned.values())

    @property
    def bytes_per_node(self) -> float:
        """Bytes of the per-node arrays divided by the stored nodes, over all levels (4 K + 8)."""
        nodes = sum(self.node_count(g) for g in range(self._tree.levels))
        return float(self._tree.node_bytes) / nodes

    def node_count(self, level: int = 0) -> int:
        """Number of stored tree nodes (distinct pattern prefixes, root included) at ``level``."""
        return int(self._tree.node_count(v.integer(level, "level", low=0, high=self._tree.levels - 1,
                                                   owner="PatternTree.node_count")))

    def __repr__(self) -> str:
        nodes = sum(self.node_count(g) for g in range(self._tree.levels))
        return (f"PatternTree(K={self.categories}, template={len(self._template)} nodes, "
                f"levels={self._tree.levels}, nodes={nodes}, memory={self.memory_bytes / 2**20:.1f} MiB)")

    # ----------------------------------------------------------------- queries
    def conditional(self, offsets: Any, values: Any, level: int = 0) -> tuple[np.ndarray, int, int]:
        """Probability of each centre category given a data event, with node dropping.

        Parameters
        ----------
        offsets : (m, 3) array of int
            Offsets of the informed nodes; each must be a node of the level's template (the
            template's offsets times ``2**level``). Any subset, in any order.
        values : (m,) array of int
            Codes at those offsets.
        level : int, default 0

        Returns
        -------
        probs : (K,) ndarray
            Conditional probabilities (the TI proportions when no node is kept).
        replicates : int
            Training-image centres matching the kept nodes.
        kept : int
            Informed nodes kept: the first ``kept`` of the event in template order.
        """
        lv = v.integer(level, "level", low=0, high=self._tree.levels - 1, owner="PatternTree.conditional")
        off = np.asarray(offsets)
        if off.size == 0:
            off = off.reshape(0, 3)
        if off.ndim != 2 or off.shape[1] != 3 or not np.issubdtype(off.dtype, np.integer):
            raise v.fail("offsets", "an (m, 3) integer array of (dz, dy, dx)", f"shape {off.shape}",
                         "PatternTree.conditional")
        val = np.asarray(values)
        if val.shape != (len(off),) or (val.size and not np.issubdtype(val.dtype, np.integer)):
            raise v.fail("values", f"{len(off)} integer codes, one per offset", f"shape {val.shape}",
                         "PatternTree.conditional")
        if val.size and (val.min() < 0 or val.max() >= self.categories):
            raise v.fail("values", f"codes in 0..{self.categories - 1}", val.tolist(), "PatternTree.conditional")
        level_offsets = self._template.offsets * (1 << lv)
        lookup = {tuple(o): i for i, o in enumerate(level_offsets.tolist())}
        index = []
        for o in off.tolist():
            if tuple(o) not in lookup:
                raise v.fail("offsets", f"offsets of the level-{lv} template (the template times {1 << lv})",
                             tuple(o), "PatternTree.conditional")
            index.append(lookup[tuple(o)])
        if len(set(index)) != len(index):
            raise v.fail("offsets", "distinct offsets", off.tolist(), "PatternTree.conditional")
        order = np.argsort(index, kind="stable")
        idx = np.asarray(index, dtype=np.int32)[order]
        vals = val.astype(np.uint8)[order] if val.size else np.zeros(0, np.uint8)
        counts, replicates, kept = self._tree.conditional(lv, idx, vals, self._min_replicates)
        counts = np.asarray(counts, dtype=np.float64)
        return counts / counts.sum(), int(replicates), int(kept)

    # ----------------------------------------------------------------- simulation
    def simulate(self, shape: Any, *, hard: Any = None, soft: Any = None, tau: Any = None,
                 target_proportions: Any = None, steering: float = 0.5, seed: int = 0,
                 threads: int | None = None, max_conditioning: int | None = None,
                 rotation: Any = None, affinity: Any = None,
                 progress: Callable[[int, int], Any] | None = None) -> np.ndarray:
        """Simulate one realization.

        Parameters
        ----------
        shape : sequence of int
            ``(nz, ny, nx)`` or ``(ny, nx)``.
        hard : array of int, optional
            Hard data of the grid's shape: a code where known, -1 (any negative) where unknown.
            Honoured exactly; on coarse levels each datum is also moved to the nearest free node of
            that level so the coarse structure sees it, and taken back afterwards.
        soft : array or sequence of arrays, optional
            Soft probabilities ``(K, nz, ny, nx)`` (``(K, ny, nx)`` for a 2-D shape), NaN where a
            cell has none; several sources may be given as a list.
        tau : float or sequence of float, optional
            Tau-model weights: ``tau[0]`` for the training image, then one per soft source;
            default 1 each (permanence of ratios). A single number applies to every soft source.
        target_proportions : sequence of float, optional
            Wanted proportion of each category; also the tau model's prior. Default: the
            training image's proportions, no steering.
        steering : float, default 0.5
            Strength in [0, 1] of the pull of the running simulated proportions toward
            ``target_proportions``: probabilities get ``gain * (target - current)`` added, with
            ``gain = steering / (1 - steering)`` capped at 50.
        seed : int, default 0
        threads : int, optional
            Worker threads (default: all cores). The result does not depend on it.
        max_conditioning : int, optional
            Use at most this many informed nodes per data event (nearest first in template
            order); default all.
        rotation : float, (azimuth, dip), array or pair of arrays, optional
            Turns the TI's structures: azimuth in degrees clockwise from +y toward +x (a TI
            direction along +y then points along the azimuth), dip in degrees tipping that
            direction toward -z (3-D only). Constants or ``(nz, ny, nx)`` maps; maps are grouped
            into classes of `GEOMETRY_STEP` degrees.
        affinity : float, (fz, fy, fx) or (3, nz, ny, nx) array, optional
            Stretches the TI's structures per axis before rotation: 2 along x makes bodies about
            twice as long along x. Factors in (0, 16]; maps are grouped into classes a quarter
            of a power of two apart.
        progress : callable, optional
            Called as ``progress(done, total)`` about ten times a second, on the calling thread.

        Returns
        -------
        ndarray of int16, shaped like ``shape``

        Notes
        -----
        Rotation and affinity are honoured by simulating each class of cells with a tree built
        from the TI turned and stretched by that class's values (nearest-cell resampling),
        built on first use and kept; cells read their neighbours whatever their class.

        Afterwards ``last_stats`` holds lists with one entry per level: ``simulated`` (nodes),
        ``mean_informed`` (informed template nodes per data event), ``mean_kept`` (nodes used per
        event: after node dropping, and the search stops once one category holds every match,
        so it is a diagnostic rather than a count of dropped nodes), ``scans`` (events answered
        by a TI scan), ``remembered`` (events answered from answers kept by their leading nodes),
        ``relocated`` (hard data moved to a coarse node), ``mean_visited`` (tree
        nodes or TI centres looked at per event) and ``seconds`` (wall time).
        """
        out, stats = _run([self], None, shape, hard=hard, soft=soft, tau=tau,
                          target_proportions=target_proportions, steering=steering, seed=seed,
                          threads=threads, max_conditioning=max_conditioning, rotation=rotation,
                          affinity=affinity, progress=progress, owner="PatternTree.simulate")
        self.last_stats = stats
        return out


def _simulate_zones(trees: list[PatternTree | None], zones: np.ndarray, shape: Any, *, hard: Any = None,
                    soft: Any = None, tau: Any = None, target_proportions: Any = None, steering: float = 0.5,
                    seed: int = 0, threads: int | None = None, max_conditioning: int | None = None,
                    rotation: Any = None, affinity: Any = None, progress: Callable[[int, int], Any] | None = None,
                    owner: str = "simulate_zones") -> np.ndarray:
    """Pattern-tree zones (see `strataloom.simulate_zones`): ``trees[z]`` for zone index ``z``
    (None where the zone map never uses it), ``zones`` the checked (nz, ny, nx) zone indices."""
    present = [t for t in trees if t is not None]
    first = present[0]
    for t in present:
        if t.categories != first.categories or t._tree.levels != first._tree.levels:
            raise v.fail("engines", "pattern trees with the same number of categories and of levels",
                         [(x.categories, x._tree.levels) for x in present], owner)
    stand_in = [t if t is not None else first for t in trees]
    out, _ = _run(stand_in, zones, shape, hard=hard, soft=soft, tau=tau,
                  target_proportions=target_proportions, steering=steering, seed=seed, threads=threads,
                  max_conditioning=max_conditioning, rotation=rotation, affinity=affinity, progress=progress,
                  owner=owner)
    return out


#: Width in degrees of the rotation classes of a rotation map.
GEOMETRY_STEP = 10.0
_AFFINITY_STEP = 0.25  # classes of log2(affinity)


def _run(trees: list[PatternTree], zones: np.ndarray | None, shape: Any, *, hard: Any, soft: Any, tau: Any,
         target_proportions: Any, steering: float, seed: int, threads: int | None, max_conditioning: int | None,
         rotation: Any, affinity: Any, progress: Any, owner: str) -> tuple[np.ndarray, dict]:
    """Validate the simulation arguments once and run the core (zones: (nz, ny, nx) indices into trees)."""
    shp = v.shape3(shape, "shape", owner=owner)
    v.grid_memory(shp, 16, owner=owner)  # codes, output, path and batches: about 16 bytes a cell
    k = trees[0].categories
    hard_arr = None if hard is None else _hard_codes(hard, shp)
    sources = _soft_sources(soft, shp, k)
    taus = _tau_weights(tau, len(sources))
    target: list[float] = []
    if target_proportions is not None:
        counts = np.sum([t.category_counts for t in trees], axis=0)
        target = _target(target_proportions, counts)
    steer = v.real(steering, "steering", low=0.0, high=1.0, owner=owner)
    mc = 0 if max_conditioning is None else v.integer(max_conditioning, "max_conditioning", low=1, owner=owner)
    trees, zones = _geometry_classes(trees, zones, rotation, affinity, shp, owner)
    flat = None if zones is None else np.ascontiguousarray(zones, dtype=np.uint8).ravel()
    out, stats = _core.simulate_trees(
        [t._tree for t in trees], flat, shp, hard_arr, sources, taus, target, steer, v.seed(seed, owner=owner),
        v.threads(threads, owner=owner), mc, trees[0]._min_replicates, 256,
        v.callback(progress, "progress", owner=owner))
    result = np.asarray(out).reshape(shp)
    return (result[0] if len(tuple(shape)) == 2 else result), dict(stats)


def _geometry_classes(trees: list[PatternTree], zones: np.ndarray | None, rotation: Any, affinity: Any,
                      shape: tuple[int, int, int], owner: str) -> tuple[list[PatternTree], np.ndarray | None]:
    """One tree per (zone, rotation class, affinity class) present, and the class of every cell."""
    geo = local_geometry(rotation, affinity, shape, owner)
    if geo is None:
        return trees, zones
    azimuth, dip, aff = geo.azimuth, geo.dip, geo.affinity
    n = shape[0] * shape[1] * shape[2]
    keys = np.empty((n, 6), dtype=np.int64)
    keys[:, 0] = 0 if zones is None else zones.ravel()
    keys[:, 1] = np.broadcast_to(np.rint(azimuth / GEOMETRY_STEP).astype(np.int64) % round(360 / GEOMETRY_STEP), n)
    keys[:, 2] = np.broadcast_to(np.rint(dip / GEOMETRY_STEP).astype(np.int64), n)
    keys[:, 3:] = np.broadcast_to(np.rint(np.log2(aff) / _AFFINITY_STEP).astype(np.int64), (n, 3))
    classes, inverse = np.unique(keys, axis=0, return_inverse=True)
    if len(classes) > 255:
        raise v.fail("rotation", "maps with at most 255 classes of zone, rotation and affinity",
                     f"{len(classes)} classes", owner)
    built = []
    for zone, az, dp, fz, fy, fx in classes.tolist():
        refuse_flat_dip(dp != 0 and trees[zone]._codes.shape[0] == 1, geo, rotation, owner)
        key = (float(az * GEOMETRY_STEP), float(dp * GEOMETRY_STEP),
               tuple(float(2.0 ** (f * _AFFINITY_STEP)) for f in (fz, fy, fx)))
        built.append(trees[zone]._variant(key))
    return built, inverse.reshape(shape)


def turned_image(ti: Any, azimuth: float = 0.0, dip: float = 0.0, affinity: Any = (1.0, 1.0, 1.0)) -> np.ndarray:
    """A categorical training image turned and stretched, by nearest-cell resampling.

    Parameters
    ----------
    ti : (nz, ny, nx) or (ny, nx) array of int
        Codes, negative = masked.
    azimuth : float
        Degrees clockwise from +y toward +x: a TI direction along +y ends up along the azimuth.
    dip : float
        Degrees tipping the azimuth direction toward -z (3-D only).
    affinity : sequence of 3 float
        Stretch factors (z, y, x), applied before the rotation.

    Returns
    -------
    ndarray of int16
        The turned image in a box that holds all of it; cells outside the original are -1.
    """
    from scipy import ndimage

    a = np.asarray(ti)
    flat = a.ndim == 2
    a3 = a[np.newaxis] if flat else a
    f = np.asarray(affinity, dtype=np.float64)
    if flat or a3.shape[0] == 1:
        f = np.array([1.0, f[1], f[2]])
        dip = 0.0
    m = turn_matrix(azimuth, dip, f)
    size = np.array(a3.shape, dtype=np.float64)
    corners = np.array([[z, y, x] for z in (0, size[0]) for y in (0, size[1]) for x in (0, size[2])]) - size / 2
    span = np.abs(corners @ m.T).max(axis=0) * 2
    out_shape = tuple(max(1, int(np.ceil(s - 1e-9))) for s in span)
    if a3.shape[0] == 1:
        out_shape = (1, *out_shape[1:])
    inv = np.linalg.inv(m)
    centre_in = (size - 1) / 2
    centre_out = (np.array(out_shape, dtype=np.float64) - 1) / 2
    offset = centre_in - inv @ centre_out
    out = ndimage.affine_transform(a3.astype(np.int16), inv, offset=offset, output_shape=out_shape, order=0,
                                   mode="constant", cval=-1)
    return out[0] if flat else out


def _hard_codes(hard: Any, shape: tuple[int, int, int]) -> np.ndarray:
    a = np.asarray(hard)
    if a.ndim == 2:
        a = a[np.newaxis]
    if a.shape != shape:
        raise v.fail("hard", f"an array of the grid's shape {shape}", f"shape {np.asarray(hard).shape}",
                     "PatternTree.simulate")
    if not np.issubdtype(a.dtype, np.integer):
        raise v.fail_type("hard", "an integer array of codes (-1 = unknown)", a, "PatternTree.simulate")
    if a.size and a.max() > MAX_CODE:
        raise v.fail("hard", f"codes 0..{MAX_CODE} or -1", int(a.max()), "PatternTree.simulate")
    return np.ascontiguousarray(np.where(a < 0, -1, a).astype(np.int16)).ravel()


def _soft_sources(soft: Any, shape: tuple[int, int, int], k: int) -> list[np.ndarray]:
    if soft is None:
        return []
    items = list(soft) if isinstance(soft, Sequence) and not isinstance(soft, np.ndarray) else [soft]
    out = []
    for i, s in enumerate(items):
        name = "soft" if len(items) == 1 else f"soft[{i}]"
        a = np.asarray(s, dtype=np.float64)
        if a.ndim == 3:
            a = a[:, np.newaxis]
        if a.shape != (k, *shape):
            raise v.fail(name, f"an array of shape (K, nz, ny, nx) = {(k, *shape)}", f"shape {np.asarray(s).shape}",
                         "PatternTree.simulate")
        cells = np.moveaxis(a, 0, -1).reshape(-1, k)
        missing = np.isnan(cells)
        partial = missing.any(axis=1) & ~missing.all(axis=1)
        if partial.any():
            raise v.fail(name, "NaN for all categories of a cell or for none", f"{int(partial.sum())} cells partly NaN",
                         "PatternTree.simulate")
        known = cells[~missing.any(axis=1)]
        if known.size and ((known < 0).any() or (known > 1).any()):
            raise v.fail(name, "probabilities in [0, 1]", f"values in [{known.min():g}, {known.max():g}]",
                         "PatternTree.simulate")
        sums = known.sum(axis=1)
        if known.size and np.abs(sums - 1).max() > 1e-3:
            raise v.fail(name, "probabilities summing to 1 over the categories of each cell",
                         f"sums between {sums.min():g} and {sums.max():g}", "PatternTree.simulate")
        cells = cells.copy()
        ok = ~missing.any(axis=1)
        cells[ok] /= cells[ok].sum(axis=1, keepdims=True)
        out.append(np.ascontiguousarray(cells.ravel()))
    if len(out) > 32:
        raise v.fail("soft", "at most 32 sources", len(out), "PatternTree.simulate")
    return out


def _tau_weights(tau: Any, sources: int) -> list[float]:
    if tau is None:
        return [1.0] * (1 + sources)
    if np.isscalar(tau):
        t = v.real(tau, "tau", low=0.0, owner="PatternTree.simulate")
        return [1.0] + [t] * sources
    vals = [v.real(x, "tau", low=0.0, owner="PatternTree.simulate") for x in tau]
    if len(vals) != 1 + sources:
        raise v.fail("tau", f"{1 + sources} weights (one for the TI, one per soft source)", vals,
                     "PatternTree.simulate")
    return vals


def _target(target: Any, ti_counts: np.ndarray) -> list[float]:
    t = np.asarray(target, dtype=np.float64)
    k = len(ti_counts)
    if t.shape != (k,):
        raise v.fail("target_proportions", f"{k} proportions, one per category", np.asarray(target).tolist(),
                     "PatternTree.simulate")
    if not np.isfinite(t).all() or (t < 0).any() or abs(t.sum() - 1) > 1e-3:
        raise v.fail("target_proportions", "non-negative proportions summing to 1", t.tolist(),
                     "PatternTree.simulate")
    absent = np.flatnonzero((t > 0) & (ti_counts == 0))
    if absent.size:
        raise v.fail("target_proportions", "zero for codes the training image does not contain",
                     f"{t[absent[0]]:g} for code {int(absent[0])}", "PatternTree.simulate")
    return (t / t.sum()).tolist()
