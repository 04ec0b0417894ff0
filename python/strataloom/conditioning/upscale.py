"""Upscaling of well samples to the grid cells they fall in.

Categorical logs take, in each cell, the code with the largest total sample length (ties go to the
smaller code and are reported); continuous logs take the length-weighted mean. Samples outside the
grid are counted per well, and cells whose samples disagree are listed as conflicts.
"""

from __future__ import annotations

import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import StudyError
from ..grid import Grid
from .wells import Well

__all__ = ["Conflict", "HardData", "UpscaleReport", "upscale"]


@dataclass(frozen=True)
class Conflict:
    """A cell whose samples of a categorical variable hold more than one code."""

    cell: tuple[int, int, int]
    variable: str
    chosen: int
    fraction: float  # share of the sample length that holds the chosen code
    codes: tuple[int, ...]
    wells: tuple[str, ...]
    tie: bool

    def describe(self) -> str:
        kind = "tie" if self.tie else "mixed"
        return (
            f"cell {self.cell} {self.variable}: codes {list(self.codes)} from "
            f"{', '.join(self.wells)} ({kind}); kept {self.chosen} "
            f"({100 * self.fraction:.0f}% of the length)"
        )


@dataclass
class UpscaleReport:
    """What upscaling did: counts, samples outside the grid, conflicts."""

    samples: int
    inside: int
    outside: dict[str, int]
    cells: int
    conflicts: list[Conflict] = field(default_factory=list)
    per_well: dict[str, dict[str, int]] = field(default_factory=dict)

    @property
    def outside_total(self) -> int:
        return int(sum(self.outside.values()))

    def lines(self, limit: int = 10) -> list[str]:
        """A short human-readable summary."""
        out = [
            f"{self.samples} samples, {self.inside} inside the grid, {self.cells} cells informed"
        ]
        if self.outside_total:
            parts = ", ".join(f"{w}: {n}" for w, n in self.outside.items() if n)
            out.append(f"{self.outside_total} samples outside the grid ({parts})")
        if self.conflicts:
            ties = sum(c.tie for c in self.conflicts)
            out.append(f"{len(self.conflicts)} cells with conflicting samples ({ties} ties)")
            out.extend("  " + c.describe() for c in self.conflicts[:limit])
            if len(self.conflicts) > limit:
                out.append(f"  ... and {len(self.conflicts) - limit} more")
        return out


@dataclass
class HardData:
    """Conditioning data on cells.

    Attributes
    ----------
    shape : (nz, ny, nx)
        The grid's shape.
    cells : (m, 3) ndarray of int64
        Informed cells ``(iz, iy, ix)``, in increasing flat-index order.
    values : dict of str to (m,) ndarray
        Per variable: int64 codes (-1 where that variable has no sample in the cell) or float64
        values (NaN where none).
    wells : (m,) ndarray of str
        The well contributing most length to each cell.
    kinds : dict of str to str
        ``"categorical"`` or ``"continuous"`` per variable.
    report : UpscaleReport
    """

    shape: tuple[int, int, int]
    cells: np.ndarray
    values: dict[str, np.ndarray]
    wells: np.ndarray
    kinds: dict[str, str]
    report: UpscaleReport

    @property
    def flat(self) -> np.ndarray:
        """Flat C-order indices of :attr:`cells`."""
        return np.ravel_multi_index(tuple(self.cells.T), self.shape).astype(np.int64)

    def dense(self, variable: str) -> np.ndarray:
        """A grid-shaped array: the upscaled values, -1 (categorical) or NaN elsewhere."""
        if self.kinds[variable] == "categorical":
            out = np.full(self.shape, -1, dtype=np.int32)
        else:
            out = np.full(self.shape, np.nan, dtype=np.float64)
        out.reshape(-1)[self.flat] = self.values[variable]
        return out

    def save(self, path: str | Path) -> None:
        """Write ``cells`` and ``values_<variable>`` arrays to an ``.npz`` file (store.md)."""
        arrays = {"cells": self.cells.astype(np.int64)}
        for var, vals in self.values.items():
            if self.kinds[var] == "categorical":
                arrays[f"values_{var}"] = vals.astype(np.int16)
            else:
                arrays[f"values_{var}"] = vals.astype(np.float32)
        arrays["wells"] = self.wells.astype(str)
        tmp = Path(str(path) + ".tmp.npz")
        # np.savez stamps each member with the current time; a fixed stamp keeps the file a pure
        # function of the data, so resumed and repeated runs write the same bytes
        with zipfile.ZipFile(tmp, "w", zipfile.ZIP_STORED) as z:
            for name, a in arrays.items():
                info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
                with z.open(info, "w", force_zip64=True) as f:
                    np.lib.format.write_array(f, np.asanyarray(a), allow_pickle=False)
        tmp.replace(path)


def upscale(
    grid: Grid,
    wells: Sequence[Well],
    variables: Mapping[str, str],
    *,
    categories: Mapping[str, Sequence[int]] | None = None,
) -> HardData:
    """Upscale well samples to grid cells.

    Parameters
    ----------
    grid : Grid
    wells : sequence of Well
    variables : mapping of str to str
        Variable name to kind (``"categorical"`` or ``"continuous"``); every well must carry them.
    categories : mapping of str to sequence of int, optional
        Allowed codes of categorical variables; other codes are an error naming the well.

    Returns
    -------
    HardData
    """
    categories = dict(categories or {})
    if not wells:
        empty = np.zeros((0, 3), dtype=np.int64)
        vals = {
            v: (np.zeros(0, np.int64) if k == "categorical" else np.zeros(0))
            for v, k in variables.items()
        }
        return HardData(
            grid.shape,
            empty,
            vals,
            np.zeros(0, dtype=str),
            dict(variables),
            UpscaleReport(0, 0, {}, 0),
        )
    pts = np.concatenate([w.points() for w in wells])
    weights = np.concatenate([w.length for w in wells])
    owner = np.concatenate([np.full(w.size, i) for i, w in enumerate(wells)])
    names = [w.name for w in wells]
    cells = grid.locate(pts)
    inside = cells[:, 0] >= 0
    flat_all = np.full(len(pts), -1, dtype=np.int64)
    flat_all[inside] = np.ravel_multi_index(tuple(cells[inside].T), grid.shape)
    outside: dict[str, int] = {}
    for i, w in enumerate(wells):
        outside[w.name] = outside.get(w.name, 0) + int(np.sum(~inside[owner == i]))

    data = {}
    for var in variables:
        parts = []
        for w in wells:
            if var not in w.values:
                raise StudyError(
                    f"Well '{w.name}' ({w.source}) has no values for variable '{var}'."
                )
            parts.append(np.asarray(w.values[var], dtype=np.float64))
        data[var] = np.concatenate(parts)

    # a cell is informed when any variable has a value there
    has_any = np.zeros(len(pts), dtype=bool)
    for var in variables:
        has_any |= np.isfinite(data[var])
    keep = inside & has_any
    informed = np.unique(flat_all[keep])
    m = len(informed)
    slot = np.full(len(pts), -1, dtype=np.int64)
    slot[keep] = np.searchsorted(informed, flat_all[keep])

    # the well with most length in each cell
    well_w = np.zeros((m, len(wells)))
    np.add.at(well_w, (slot[keep], owner[keep]), weights[keep])
    cell_well = np.asarray(names, dtype=object)[np.argmax(well_w, axis=1)] if m else np.zeros(0)

    conflicts: list[Conflict] = []
    values: dict[str, np.ndarray] = {}
    cell_rows = (
        np.stack(np.unravel_index(informed, grid.shape), axis=1).astype(np.int64)
        if m
        else np.zeros((0, 3), dtype=np.int64)
    )
    for var, kind in variables.items():
        x = data[var]
        ok = keep & np.isfinite(x)
        if kind == "categorical":
            codes = x[ok]
            if np.any(codes != np.round(codes)):
                bad = int(np.flatnonzero(codes != np.round(codes))[0])
                w = names[owner[ok][bad]]
                raise StudyError(
                    f"Well '{w}' has a non-integer code {codes[bad]!r} for categorical "
                    f"variable '{var}'."
                )
            codes = codes.astype(np.int64)
            allowed = categories.get(var)
            if allowed is not None:
                unknown = ~np.isin(codes, np.asarray(list(allowed)))
                if np.any(unknown):
                    bad = int(np.flatnonzero(unknown)[0])
                    w = names[owner[ok][bad]]
                    raise StudyError(
                        f"Well '{w}' has code {codes[bad]} for '{var}', which is not in "
                        f"the facies table (codes {sorted(allowed)})."
                    )
            out = np.full(m, -1, dtype=np.int64)
            if codes.size:
                uc, code_idx = np.unique(codes, return_inverse=True)
                tally = np.zeros((m, len(uc)))
                np.add.at(tally, (slot[ok], code_idx), weights[ok])
                best = np.argmax(tally, axis=1)  # first maximum = smaller code on ties
                present = tally.sum(axis=1) > 0
                out[present] = uc[best[present]]
                n_codes = (tally > 0).sum(axis=1)
                # samples grouped by cell, to name the wells of each conflicting cell
                ok_idx = np.flatnonzero(ok)
                order = ok_idx[np.argsort(slot[ok_idx], kind="stable")]
                sorted_slots = slot[order]
                for j in np.flatnonzero(n_codes > 1):
                    row = tally[j]
                    top = row.max()
                    lo, hi = np.searchsorted(sorted_slots, [j, j + 1])
                    in_cell = order[lo:hi]
                    conflicts.append(
                        Conflict(
                            cell=tuple(int(c) for c in cell_rows[j]),
                            variable=var,
                            chosen=int(uc[best[j]]),
                            fraction=float(top / row.sum()),
                            codes=tuple(int(c) for c in uc[row > 0]),
                            wells=tuple(dict.fromkeys(names[o] for o in owner[in_cell])),
                            tie=bool(np.sum(row == top) > 1),
                        )
                    )
            values[var] = out
        else:
            s = np.bincount(slot[ok], weights=weights[ok] * x[ok], minlength=m)
            wsum = np.bincount(slot[ok], weights=weights[ok], minlength=m)
            with np.errstate(invalid="ignore", divide="ignore"):
                values[var] = np.where(wsum > 0, s / np.where(wsum > 0, wsum, 1), np.nan)

    per_well = {}
    for i, w in enumerate(wells):
        sel = owner == i
        per_well.setdefault(w.name, {"samples": 0, "inside": 0})
        per_well[w.name]["samples"] += int(sel.sum())
        per_well[w.name]["inside"] += int((sel & inside).sum())
    report = UpscaleReport(
        samples=len(pts),
        inside=int(inside.sum()),
        outside=outside,
        cells=m,
        conflicts=conflicts,
        per_well=per_well,
    )
    return HardData(
        grid.shape, cell_rows, values, np.asarray(cell_well, dtype=str), dict(variables), report
    )
