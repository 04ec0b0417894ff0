"""Wells: point tables (CSV) and LAS 2.0 logs placed in space from collar and survey.

Coordinates follow the grid: ``x`` east, ``y`` north, ``z`` elevation (up positive). Measured
depth (MD) and true vertical depth (TVD) are counted from the collar, downwards, so a sample's
elevation is ``collar_z - tvd``.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import StudyError
from .trajectories import Survey

__all__ = ["Well", "read_las", "read_point_table", "read_survey", "vertical_survey"]


@dataclass
class Well:
    """Samples of one well.

    Attributes
    ----------
    name : str
        Well name (leave-one-well-out scores group by it).
    x, y, z : (n,) ndarray of float64
        Sample positions (east, north, elevation).
    values : dict of str to (n,) ndarray of float64
        One column per variable; NaN where the log has no value.
    length : (n,) ndarray of float64
        Length of hole each sample stands for (1 for point tables), the upscaling weight.
    md : (n,) ndarray of float64 or None
        Measured depths for logs.
    source : str
        The file the samples came from.
    deviated : bool
        Whether a survey with non-zero inclination placed the samples.
    """

    name: str
    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    values: dict[str, np.ndarray]
    length: np.ndarray
    md: np.ndarray | None = None
    source: str = ""
    deviated: bool = False
    collar: tuple[float, float, float] | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def size(self) -> int:
        """Number of samples."""
        return len(self.x)

    def points(self) -> np.ndarray:
        """``(n, 3)`` sample coordinates in grid order ``(z, y, x)``."""
        return np.column_stack([self.z, self.y, self.x])


def _read_csv(path: Path, what: str):
    import pandas as pd

    try:
        return pd.read_csv(path, sep=None, engine="python", comment="#")
    except FileNotFoundError as e:
        raise StudyError(f"The {what} file '{path}' does not exist.") from e
    except Exception as e:  # parser errors, encoding errors, directories
        raise StudyError(f"The {what} file '{path}' cannot be read as a CSV table: {e}") from e


def _find(columns: Sequence[str], wanted: Sequence[str]) -> str | None:
    low = {c.strip().lower(): c for c in columns}
    for w in wanted:
        if w.lower() in low:
            return low[w.lower()]
    return None


def _numeric(frame, column: str, path: Path) -> np.ndarray:
    import pandas as pd

    col = pd.to_numeric(frame[column], errors="coerce")
    bad = col.isna() & frame[column].notna()
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise StudyError(
            f"Column '{column}' of '{path}' must hold numbers; row {row + 2} holds "
            f"{frame[column].iloc[row]!r}."
        )
    return col.to_numpy(dtype=np.float64)


def read_survey(path: str | os.PathLike) -> Survey:
    """A directional survey from a CSV with columns ``md``, ``inclination``, ``azimuth``.

    ``inc`` and ``azi`` are accepted as short column names. Angles in degrees.
    """
    p = Path(path)
    frame = _read_csv(p, "survey")
    cols = {}
    for key, names in {
        "md": ("md", "measured_depth"),
        "inclination": ("inclination", "inc"),
        "azimuth": ("azimuth", "azi"),
    }.items():
        c = _find(list(frame.columns), names)
        if c is None:
            raise StudyError(
                f"The survey file '{p}' needs a column '{key}'; it has "
                f"{', '.join(map(str, frame.columns))}."
            )
        cols[key] = _numeric(frame, c, p)
    try:
        return Survey(cols["md"], cols["inclination"], cols["azimuth"])
    except ValueError as e:
        raise StudyError(f"The survey file '{p}' is not a valid survey: {e}") from e


def vertical_survey() -> Survey:
    """A straight vertical hole."""
    return Survey([0.0], [0.0], [0.0])


def _support(md: np.ndarray) -> np.ndarray:
    """Length of hole each sample stands for: half the distance to each neighbour."""
    if len(md) == 1:
        return np.ones(1)
    edges = np.concatenate(
        [[md[0] - (md[1] - md[0]) / 2], (md[1:] + md[:-1]) / 2, [md[-1] + (md[-1] - md[-2]) / 2]]
    )
    return np.diff(edges)


def read_point_table(
    path: str | os.PathLike,
    variables: Sequence[str],
    *,
    name: str | None = None,
    columns: Mapping[str, str] | None = None,
) -> list[Well]:
    """Wells from a point table: columns ``x``, ``y``, ``z`` and one per variable.

    Parameters
    ----------
    path : path-like
        CSV file (comma, semicolon or tab separated; ``#`` starts a comment).
    variables : sequence of str
        Variables to read; a variable without a column is an error.
    name : str, optional
        Well name when the table has no ``well`` column (default: the file's stem).
    columns : mapping, optional
        Column name per variable or coordinate when they differ (``{"facies": "FAC"}``).

    Returns
    -------
    list of Well
        One per distinct value of a ``well`` column, else one.
    """
    p = Path(path)
    frame = _read_csv(p, "well")
    columns = dict(columns or {})
    found = {}
    for key in ("x", "y", "z", *variables):
        wanted = [columns[key]] if key in columns else [key]
        c = _find(list(frame.columns), wanted)
        if c is None:
            raise StudyError(
                f"The well file '{p}' needs a column '{wanted[0]}' for '{key}'; it has "
                f"{', '.join(map(str, frame.columns))}."
            )
        found[key] = c
    well_col = _find(list(frame.columns), [columns.get("well", "well")])
    data = {k: _numeric(frame, c, p) for k, c in found.items()}
    for k in ("x", "y", "z"):
        if not np.all(np.isfinite(data[k])):
            row = int(np.flatnonzero(~np.isfinite(data[k]))[0])
            raise StudyError(
                f"Column '{found[k]}' of '{p}' has no value in row {row + 2}; "
                "every sample needs coordinates."
            )
    groups = (
        frame[well_col].astype(str).to_numpy()
        if well_col is not None
        else np.full(len(frame), name or p.stem)
    )
    wells = []
    for g in dict.fromkeys(groups):  # first-appearance order
        sel = groups == g
        wells.append(
            Well(
                name=str(g),
                x=data["x"][sel],
                y=data["y"][sel],
                z=data["z"][sel],
                values={k: data[k][sel] for k in variables},
                length=np.ones(int(sel.sum())),
                source=str(p),
            )
        )
    return wells


_X_KEYS = ("XCOORD", "X", "XWELL", "EASTING")
_Y_KEYS = ("YCOORD", "Y", "YWELL", "NORTHING")
_Z_KEYS = ("ELEV", "EKB", "EDF", "EGL", "ZCOORD")


def _header_value(las, keys: Sequence[str]) -> float | None:
    for section in (las.well, las.params):
        names = {item.mnemonic.upper(): item for item in section}
        for k in keys:
            if k in names:
                try:
                    return float(names[k].value)
                except (TypeError, ValueError):
                    continue
    return None


def read_las(
    path: str | os.PathLike,
    curves: Mapping[str, str],
    *,
    name: str | None = None,
    collar: Sequence[float] | None = None,
    survey: Survey | None = None,
) -> Well:
    """A well from a LAS 2.0 file (read with lasio), placed by collar and survey.

    Parameters
    ----------
    path : path-like
        The LAS file. Its index curve is the measured depth from the collar; null values (the
        ``NULL`` entry of the well section) become NaN.
    curves : mapping of str to str
        Curve mnemonic per variable (``{"facies": "FACIES"}``).
    name : str, optional
        Well name; default the LAS ``WELL`` entry, else the file's stem.
    collar : (x, y, z) sequence, optional
        Collar coordinates; default the well or parameter section entries ``XCOORD``/``X``,
        ``YCOORD``/``Y`` and ``ELEV``/``EKB``/``EGL``.
    survey : Survey, optional
        Directional survey; default a vertical hole.
    """
    import lasio

    p = Path(path)
    if not p.is_file():
        raise StudyError(f"The LAS file '{p}' does not exist.")
    try:
        las = lasio.read(str(p), ignore_header_errors=False)
    except Exception as e:
        raise StudyError(f"The LAS file '{p}' cannot be read: {e}") from e
    md = np.asarray(las.index, dtype=np.float64)
    if md.size == 0:
        raise StudyError(f"The LAS file '{p}' holds no samples.")
    if np.any(np.diff(md) < 0):
        md_order = np.argsort(md, kind="stable")
    else:
        md_order = np.arange(md.size)
    md = md[md_order]
    values = {}
    keys = [c.mnemonic for c in las.curves]
    for var, mnem in curves.items():
        match = _find(keys, [mnem])
        if match is None:
            raise StudyError(
                f"The LAS file '{p}' has no curve '{mnem}' for variable '{var}'; it has "
                f"{', '.join(keys)}."
            )
        values[var] = np.asarray(las[match], dtype=np.float64)[md_order]
    if collar is None:
        cx, cy, cz = (
            _header_value(las, _X_KEYS),
            _header_value(las, _Y_KEYS),
            _header_value(las, _Z_KEYS),
        )
        if cx is None or cy is None or cz is None:
            raise StudyError(
                f"The LAS file '{p}' has no collar coordinates (XCOORD, YCOORD, ELEV); "
                "give 'collar = [x, y, z]' for this well in the study."
            )
        collar = (cx, cy, cz)
    cx, cy, cz = (float(c) for c in collar)
    well_name = name
    if well_name is None:
        try:
            well_name = str(las.well["WELL"].value).strip() or p.stem
        except (KeyError, IndexError):
            well_name = p.stem
    sv = survey if survey is not None else vertical_survey()
    pos = sv.positions(md)
    deviated = bool(np.any(np.abs(sv.directions[:, 2] - 1.0) > 1e-12))
    return Well(
        name=well_name,
        x=cx + pos[:, 0],
        y=cy + pos[:, 1],
        z=cz - pos[:, 2],
        values=values,
        length=_support(md),
        md=md,
        source=str(p),
        deviated=deviated,
        collar=(cx, cy, cz),
    )
