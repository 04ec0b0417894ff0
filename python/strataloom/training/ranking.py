"""Rank candidate training images by how well their vertical facies sequences match the wells.

Each well is a column of facies codes at the TI's vertical cell size, bottom up like the TI's z
axis (or top down with ``top_down=True``); negative = not logged. Every run of ``length``
consecutive logged cells is a pattern. The wells' pattern frequencies are compared with those of
every column of each candidate TI by the Jensen-Shannon divergence (base 2, 0 for identical
histograms, 1 for disjoint ones; Lin 1991, "Divergence measures based on the Shannon entropy", IEEE
Trans. Inf. Theory 37(1); computed by :func:`strataloom.qc.pattern_divergence`). Patterns seen in
the wells that a TI never contains are listed: a TI that cannot produce a logged sequence
contradicts the data.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import _validate as v
from ..qc import js_divergence, pattern_divergence

__all__ = ["Ranking", "pattern_histogram", "rank_training_images", "well_patterns"]

jensen_shannon = js_divergence  # the project's one JS divergence, under this module's older name


def _windows(seq: np.ndarray, length: int, base: int) -> np.ndarray:
    """Pattern numbers of all windows of ``length`` valid cells along the last axis."""
    if seq.shape[-1] < length:
        return np.empty(0, dtype=np.int64)
    w = np.lib.stride_tricks.sliding_window_view(seq, length, axis=-1).reshape(-1, length)
    w = w[(w >= 0).all(axis=1)].astype(np.int64)
    return w @ (base ** np.arange(length - 1, -1, -1, dtype=np.int64))


def well_patterns(wells: Any, length: int, base: int) -> np.ndarray:
    """Pattern numbers of every window of every well (base-``base`` digits, top cell first)."""
    return np.concatenate([_windows(w, length, base) for w in _wells(wells)] or
                          [np.empty(0, dtype=np.int64)])


def pattern_histogram(ti: Any, length: int, base: int, axis: int = 0,
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Distinct patterns of ``length`` cells along ``axis`` in a TI and their counts."""
    a = np.moveaxis(v.as_volume(ti, "ti", owner="pattern_histogram"), axis, -1)
    codes = _windows(np.ascontiguousarray(a), length, base)
    return np.unique(codes, return_counts=True)


def _wells(wells: Any) -> list[np.ndarray]:
    o = "rank_training_images"
    if isinstance(wells, np.ndarray):
        if wells.ndim == 1:
            wells = [wells]
        elif wells.ndim == 2:
            wells = list(wells)
        else:
            raise v.fail("wells", "a 2-D array (wells, cells) or a list of 1-D sequences",
                         f"an array of shape {wells.shape}", o)
    if not isinstance(wells, Sequence) or isinstance(wells, (str, bytes)) or len(wells) == 0:
        raise v.fail_type("wells", "a non-empty list of 1-D facies sequences", wells, o)
    out = []
    for i, w in enumerate(wells):
        a = np.asarray(w)
        if a.ndim != 1 or (a.size and not np.issubdtype(a.dtype, np.integer)):
            raise v.fail(f"wells[{i}]",
                         "a 1-D sequence of integer facies codes (negative = not logged)",
                         f"an array of shape {a.shape} and dtype {a.dtype}", o)
        out.append(a.astype(np.int64))
    return out


def _decode(p: int, length: int, base: int) -> tuple[int, ...]:
    return tuple(int(p // base ** (length - 1 - j) % base) for j in range(length))


@dataclass
class Ranking:
    """The result of `rank_training_images`.

    Attributes
    ----------
    names : list of str
        Candidate names, best first.
    divergence : dict of str to float
        Jensen-Shannon divergence between the wells' and each TI's pattern frequencies.
    missing : dict of str to list of (tuple of int, int)
        Per TI, the well patterns (codes, top cell first) it never contains, with how often the
        wells show them, most frequent first.
    missing_share : dict of str to float
        Share of the wells' windows whose pattern the TI never contains.
    length : int
        Pattern length in cells.
    windows : int
        Number of well windows compared.
    """

    names: list[str]
    divergence: dict[str, float]
    missing: dict[str, list[tuple[tuple[int, ...], int]]] = field(default_factory=dict)
    missing_share: dict[str, float] = field(default_factory=dict)
    length: int = 0
    windows: int = 0

    @property
    def best(self) -> str:
        """Name of the best-fitting candidate."""
        return self.names[0]

    def table(self, show_missing: int = 5) -> str:
        """A plain-text report, best first."""
        lines = [f"{'rank':>4}  {'training image':<24} {'divergence':>10} {'unseen windows':>14}"]
        for r, n in enumerate(self.names, 1):
            lines.append(f"{r:>4}  {n:<24} {self.divergence[n]:>10.4f} "
                         f"{self.missing_share[n]:>14.3f}")
        for n in self.names:
            miss = self.missing[n]
            if miss:
                shown = ", ".join(f"{'-'.join(map(str, p))} (x{c})" for p, c in miss[:show_missing])
                more = f" and {len(miss) - show_missing} more" if len(miss) > show_missing else ""
                lines.append(f"  {n} never contains: {shown}{more}")
        lines.append(f"({self.windows} well windows of {self.length} cells; Jensen-Shannon "
                     "divergence, 0 = same frequencies, 1 = nothing in common)")
        return "\n".join(lines)


def rank_training_images(wells: Any, candidates: Mapping[str, Any] | Sequence[Any], *,
                         length: int = 4, axis: Any = 0, top_down: bool = False) -> Ranking:
    """Rank candidate TIs by the distance between well and TI vertical pattern frequencies.

    Parameters
    ----------
    wells : list of 1-D int arrays, or (n_wells, n_cells) int array
        Facies codes along each well at the TI's cell size, in the direction of increasing index
        along ``axis``; negative = not logged (windows across it are skipped).
    candidates : mapping of name to array, or sequence of arrays
        Training images, (nz, ny, nx) int arrays with the same codes as the wells.
    length : int, default 4
        Pattern length in cells (>= 1); 1 compares proportions only.
    axis : int or {"z", "y", "x"}, default 0
        The axis the wells run along (0 = z).
    top_down : bool, default False
        The wells are listed from the top down (depth order), so they are reversed to match the
        TI's z axis, which points up.

    Returns
    -------
    Ranking
        Candidates sorted by increasing divergence (ties: fewer unseen windows, then name).
    """
    o = "rank_training_images"
    n = v.integer(length, "length", low=1, high=32, owner=o)
    ax = {"z": 0, "y": 1, "x": 2}.get(axis, axis)
    ax = v.integer(ax, "axis", low=0, high=2, owner=o)
    ws = _wells(wells)
    if not isinstance(top_down, bool):
        raise v.fail_type("top_down", "a bool", top_down, o)
    if top_down:
        ws = [w[::-1] for w in ws]
    if isinstance(candidates, Mapping):
        items = list(candidates.items())
    elif isinstance(candidates, Sequence) and not isinstance(candidates, (str, bytes)):
        items = [(f"ti{i}", c) for i, c in enumerate(candidates)]
    else:
        raise v.fail_type("candidates", "a mapping of name to array or a sequence of arrays",
                          candidates, o)
    if not items:
        raise v.fail("candidates", "at least one training image", candidates, o)
    tis = []
    for name, ti in items:
        a = v.as_volume(ti, f"candidates[{name!r}]", owner=o)
        if not np.issubdtype(a.dtype, np.integer):
            raise v.fail_type(f"candidates[{name!r}]", "an integer array of facies codes", a, o)
        if a.shape[ax] < n:
            raise v.fail("length", f"at most the TI's {a.shape[ax]} cells along axis {ax}", n, o)
        tis.append((str(name), a))
    base = int(max(max((int(w.max()) for w in ws if w.size), default=0),
                   max(int(a.max()) for _, a in tis))) + 1
    if base ** n >= 2**62:
        raise v.fail("length", f"small enough that {base} codes ** length fits in 62 bits", n, o)
    wp, wc = np.unique(well_patterns(ws, n, base), return_counts=True)
    if wp.size == 0:
        raise v.fail("wells", f"at least one run of {n} logged cells", "none", o)
    divergence, missing, share = {}, {}, {}
    for name, a in tis:
        tp, tc = pattern_histogram(a, n, base, ax)
        divergence[name] = pattern_divergence((wp, wc), (tp, tc))
        unseen = ~np.isin(wp, tp)
        order = np.argsort(-wc[unseen], kind="stable")
        missing[name] = [(_decode(int(x), n, base), int(c))
                         for x, c in zip(wp[unseen][order], wc[unseen][order], strict=True)]
        share[name] = float(wc[unseen].sum() / wc.sum())
    names = sorted(divergence, key=lambda k: (divergence[k], share[k], k))
    return Ranking(names, divergence, missing, share, n, int(wc.sum()))
