"""Object-based categorical training images: sinuous channels (with levees) and bodies.

Coordinates are physical: cell ``(iz, iy, ix)`` has its centre at ``origin + (i + 0.5) * spacing``,
z pointing up. Azimuths are in degrees clockwise from +y (north) towards +x (east).

How a build works
-----------------
Object groups (`Channels`, `Bodies`) each have a facies code, a target proportion and a rank in the
erosion order (later groups cut earlier ones; within a group a younger object cuts an older one;
levees never cut channel bodies of their own group). Objects are drawn one at a time for the group
furthest below its target (relative deficit); an object is kept only if it brings that group's
proportion closer to its target, so the build ends within about half an object's volume of every
target. Each object is rasterised on the columns it touches only, with numpy.

A grid with ``nz == 1`` is a plan view: objects are their footprints and thickness is not used.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import _validate as v
from .distributions import Distribution

__all__ = ["Bodies", "Channels", "Levee", "ObjectBuild", "build_objects"]

_SECTIONS = ("rounded", "parabolic", "box")
_BODY_KINDS = ("lobe", "lens", "ellipsoid")


@dataclass(frozen=True)
class Levee:
    """Margin facies along both banks of a channel: a wedge thinning away from the bank.

    Parameters
    ----------
    facies : int
        Code of the levee facies.
    width : float or Distribution
        Lateral extent beyond each bank (physical units, > 0).
    thickness : float or Distribution
        Thickness at the bank (> 0); it falls linearly to 0 at ``width`` from the bank. The wedge
        hangs below the channel's top surface.
    """

    facies: int
    width: Any
    thickness: Any

    def __post_init__(self) -> None:
        object.__setattr__(self, "facies", v.integer(self.facies, "facies", low=0, high=126,
                                                     owner="Levee"))
        object.__setattr__(self, "width", Distribution.parse(self.width, "width", owner="Levee",
                                                             positive=True))
        object.__setattr__(self, "thickness", Distribution.parse(self.thickness, "thickness",
                                                                 owner="Levee", positive=True))


@dataclass(frozen=True)
class Channels:
    """A group of sinuous channels crossing the grid.

    The centreline of one channel, in its own frame (``u`` along the azimuth, ``v`` to the right),
    is ``v = amplitude * sin(2 pi u / wavelength + phase)`` with a uniform random phase; the
    channel holds the cells whose horizontal distance to the centreline is at most ``width / 2``
    and whose centre lies between the channel top and the base given by ``section``.

    Parameters
    ----------
    facies : int
        Code of the channel fill.
    proportion : float
        Target share of the grid in this facies, in (0, 1).
    width, thickness : float or Distribution
        Full width and maximum thickness (physical units, > 0).
    azimuth : float or Distribution, default 0
        Mean flow direction in degrees clockwise from +y.
    wavelength : float or Distribution, default 1000
        Meander wavelength along the azimuth (> 0).
    amplitude : float or Distribution, default 0
        Meander amplitude (>= 0); 0 gives straight channels.
    section : {"rounded", "parabolic", "box"}, default "rounded"
        Cross-section: depth ``thickness * sqrt(1 - s**2)``, ``thickness * (1 - s**2)`` or
        ``thickness`` at relative distance ``s = 2 d / width`` from the centreline.
    levee : Levee, optional
        Margin facies along the banks.
    name : str, default "channels"
        Name used in reports and in the erosion order.
    """

    facies: int
    proportion: float
    width: Any
    thickness: Any
    azimuth: Any = 0.0
    wavelength: Any = 1000.0
    amplitude: Any = 0.0
    section: str = "rounded"
    levee: Levee | None = None
    name: str = "channels"

    def __post_init__(self) -> None:
        o = "Channels"
        set_ = object.__setattr__
        set_(self, "facies", v.integer(self.facies, "facies", low=0, high=126, owner=o))
        set_(self, "proportion", v.real(self.proportion, "proportion", low=0, high=1, low_open=True,
                                        high_open=True, owner=o))
        set_(self, "width", Distribution.parse(self.width, "width", owner=o, positive=True))
        set_(self, "thickness", Distribution.parse(self.thickness, "thickness", owner=o,
                                                   positive=True))
        set_(self, "azimuth", Distribution.parse(self.azimuth, "azimuth", owner=o))
        set_(self, "wavelength", Distribution.parse(self.wavelength, "wavelength", owner=o,
                                                    positive=True))
        set_(self, "amplitude", Distribution.parse(self.amplitude, "amplitude", owner=o, low=0.0))
        if self.section not in _SECTIONS:
            raise v.fail("section", f"one of {', '.join(_SECTIONS)}", self.section, o)
        if self.levee is not None and not isinstance(self.levee, Levee):
            raise v.fail_type("levee", "None or a strataloom Levee", self.levee, o)
        if not isinstance(self.name, str) or not self.name:
            raise v.fail_type("name", "a non-empty string", self.name, o)


@dataclass(frozen=True)
class Bodies:
    """A group of lobes, lenses or ellipsoids with elliptical footprints.

    Parameters
    ----------
    kind : {"lobe", "lens", "ellipsoid"}
        ``lobe``: flat base, convex top ``thickness * sqrt(1 - r**2)``; ``lens``: biconvex with
        total thickness ``thickness * (1 - r**2)``; ``ellipsoid``: total thickness
        ``thickness * sqrt(1 - r**2)`` about its mid-plane (``r`` is the footprint's elliptical
        radius, 1 on its rim).
    facies : int
        Code of the body facies.
    proportion : float
        Target share of the grid, in (0, 1).
    length, width : float or Distribution
        Footprint axes along and across the azimuth (> 0).
    thickness : float or Distribution
        Maximum thickness (> 0).
    azimuth : float or Distribution, default 0
        Direction of the long axis, degrees clockwise from +y.
    name : str, optional
        Name used in reports and in the erosion order (default: ``kind + "s"``).
    """

    kind: str
    facies: int
    proportion: float
    length: Any
    width: Any
    thickness: Any
    azimuth: Any = 0.0
    name: str = ""

    def __post_init__(self) -> None:
        o = "Bodies"
        set_ = object.__setattr__
        if self.kind not in _BODY_KINDS:
            raise v.fail("kind", f"one of {', '.join(_BODY_KINDS)}", self.kind, o)
        set_(self, "facies", v.integer(self.facies, "facies", low=0, high=126, owner=o))
        set_(self, "proportion", v.real(self.proportion, "proportion", low=0, high=1, low_open=True,
                                        high_open=True, owner=o))
        for key in ("length", "width", "thickness"):
            set_(self, key, Distribution.parse(getattr(self, key), key, owner=o, positive=True))
        set_(self, "azimuth", Distribution.parse(self.azimuth, "azimuth", owner=o))
        if not isinstance(self.name, str):
            raise v.fail_type("name", "a string", self.name, o)
        if not self.name:
            set_(self, "name", self.kind + "s")


Group = Channels | Bodies


@dataclass
class ObjectBuild:
    """The result of `build_objects`.

    Attributes
    ----------
    facies : (nz, ny, nx) ndarray of int8
        Facies codes.
    targets : dict of int to float
        Target proportion per object facies code.
    proportions : dict of int to float
        Achieved share of every code present (background and levees included).
    counts : dict of str to int
        Objects kept per group name.
    rejected : int
        Objects drawn but not kept (they would have moved a proportion away from its target).
    objects : list of dict
        One record per kept object: group, kind and the drawn parameters.
    """

    facies: np.ndarray
    targets: dict[int, float]
    proportions: dict[int, float]
    counts: dict[str, int]
    rejected: int
    objects: list[dict[str, Any]] = field(default_factory=list)

    def largest_error(self) -> float:
        """Largest absolute difference between a target and its achieved proportion."""
        return max((abs(self.proportions.get(k, 0.0) - t) for k, t in self.targets.items()),
                   default=0.0)


# ---------------------------------------------------------------------------------- geometry
class _Frame:
    """Cell-centre coordinates of the grid, shared by all objects of a build."""

    def __init__(self, shape: tuple[int, int, int], spacing: tuple[float, float, float],
                 origin: tuple[float, float, float]) -> None:
        self.shape = shape
        self.spacing = spacing
        self.origin = origin
        nz, ny, nx = shape
        self.x = origin[2] + (np.arange(nx) + 0.5) * spacing[2]
        self.y = origin[1] + (np.arange(ny) + 0.5) * spacing[1]
        self.flat = nz == 1
        self.lo = np.array(origin, dtype=float)
        self.hi = self.lo + np.array(shape) * np.array(spacing)

    def box(self, cx: float, cy: float, ex: float, ey: float) -> tuple[slice, slice] | None:
        """Index slices (y, x) of the cells whose centres may lie within (cx +- ex, cy +- ey)."""
        dx, dy = self.spacing[2], self.spacing[1]
        ix0 = max(0, math.floor((cx - ex - self.origin[2]) / dx - 0.5))
        ix1 = min(self.shape[2], math.ceil((cx + ex - self.origin[2]) / dx + 0.5))
        iy0 = max(0, math.floor((cy - ey - self.origin[1]) / dy - 0.5))
        iy1 = min(self.shape[1], math.ceil((cy + ey - self.origin[1]) / dy + 0.5))
        if ix0 >= ix1 or iy0 >= iy1:
            return None
        return slice(iy0, iy1), slice(ix0, ix1)

    def cells(self, cols: np.ndarray, zlo: np.ndarray, zhi: np.ndarray) -> np.ndarray:
        """Flat indices of the cells of columns ``cols`` whose centres lie in [zlo, zhi]."""
        if self.flat:
            return cols
        dz, z0, nz = self.spacing[0], self.origin[0], self.shape[0]
        k0 = np.clip(np.ceil((zlo - z0) / dz - 0.5), 0, nz).astype(np.int64)
        k1 = np.clip(np.floor((zhi - z0) / dz - 0.5), -1, nz - 1).astype(np.int64)
        keep = k1 >= k0
        if not keep.any():
            return np.empty(0, dtype=np.int64)
        cols, k0, k1 = cols[keep], k0[keep], k1[keep]
        runs = k1 - k0 + 1
        total = int(runs.sum())
        # run-length expansion: column j contributes layers k0[j] .. k1[j]
        start = np.repeat(np.cumsum(runs) - runs, runs)
        layer = np.repeat(k0, runs) + (np.arange(total) - start)
        return layer * (self.shape[1] * self.shape[2]) + np.repeat(cols, runs)


def _rotate(frame: _Frame, sl: tuple[slice, slice], cx: float, cy: float,
            azimuth_deg: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(u, v, flat column index) of the box's cells: u along the azimuth, v to its right."""
    th = math.radians(azimuth_deg)
    s, c = math.sin(th), math.cos(th)
    ys, xs = sl
    X = frame.x[xs][np.newaxis, :] - cx
    Y = frame.y[ys][:, np.newaxis] - cy
    u = X * s + Y * c
    w = X * c - Y * s
    iy = np.arange(ys.start, ys.stop)[:, np.newaxis]
    ix = np.arange(xs.start, xs.stop)[np.newaxis, :]
    cols = iy * frame.shape[2] + ix
    return u.ravel(), w.ravel(), cols.ravel()


def _centreline_distance(u: np.ndarray, w: np.ndarray, amp: float, wavelength: float,
                         phase: float) -> np.ndarray:
    """Distance from points (u, w) to the curve w = amp sin(k u + phase) (Gauss-Newton, 4 steps)."""
    if amp == 0.0:
        return np.abs(w)
    k = 2.0 * math.pi / wavelength
    s = u.copy()
    for _ in range(4):
        arg = k * s + phase
        cs = amp * np.sin(arg)
        d1 = amp * k * np.cos(arg)
        # minimise (s - u)^2 + (c(s) - w)^2; the Gauss-Newton curvature 1 + c'^2 is always > 0
        s -= ((s - u) + (cs - w) * d1) / (1.0 + d1 * d1)
    return np.hypot(s - u, amp * np.sin(k * s + phase) - w)


class _Builder:
    def __init__(self, frame: _Frame, groups: Sequence[Group], background: int,
                 rng: np.random.Generator) -> None:
        self.frame = frame
        self.rng = rng
        n = int(np.prod(frame.shape))
        self.codes = np.full(n, background, dtype=np.int8)
        self.rank = np.full(n, -1, dtype=np.int16)
        self.count = np.zeros(128, dtype=np.int64)
        self.count[background] = n
        self.n = n
        self.groups = groups

    # -- one object: (body cells, levee cells, record) --------------------------------------
    def channel(self, g: Channels) -> tuple[np.ndarray, np.ndarray | None, dict[str, Any]]:
        f, rng = self.frame, self.rng
        az = g.azimuth.draw(rng)
        width = g.width.draw(rng)
        thick = g.thickness.draw(rng)
        lam = g.wavelength.draw(rng)
        amp = g.amplitude.draw(rng)
        phase = float(rng.uniform(0.0, 2.0 * math.pi))
        lw = g.levee.width.draw(rng) if g.levee else 0.0
        lt = g.levee.thickness.draw(rng) if g.levee else 0.0
        reach = amp + width / 2 + lw
        th = math.radians(az)
        ex, ey = math.cos(th), -math.sin(th)  # the lateral (v) direction in (x, y)
        mid = (f.lo + f.hi) / 2
        half = (f.hi - f.lo) / 2
        spread = abs(half[2] * ex) + abs(half[1] * ey) + reach
        off = float(rng.uniform(-spread, spread))
        cx, cy = mid[2] + off * ex, mid[1] + off * ey
        top = float(rng.uniform(f.lo[0], f.hi[0] + thick))
        record = {"group": g.name, "kind": "channel", "x": cx, "y": cy, "top": top, "azimuth": az,
                  "width": width, "thickness": thick, "wavelength": lam, "amplitude": amp,
                  "phase": phase, "levee_width": lw, "levee_thickness": lt}
        sl = (slice(0, f.shape[1]), slice(0, f.shape[2]))
        u, w, cols = _rotate(f, sl, cx, cy, az)
        near = np.abs(w) <= reach + max(f.spacing[1], f.spacing[2])
        u, w, cols = u[near], w[near], cols[near]
        d = _centreline_distance(u, w, amp, lam, phase)
        inside = d <= width / 2
        srel = np.minimum(d[inside] * (2.0 / width), 1.0)
        depth = {"rounded": np.sqrt(1.0 - srel * srel), "parabolic": 1.0 - srel * srel,
                 "box": np.ones_like(srel)}[g.section] * thick
        body = f.cells(cols[inside], top - depth, np.full_like(depth, top))
        levee = None
        if g.levee is not None:
            band = (d > width / 2) & (d <= width / 2 + lw)
            h = lt * (1.0 - (d[band] - width / 2) / lw)
            levee = f.cells(cols[band], top - h, np.full_like(h, top))
        return body, levee, record

    def body(self, g: Bodies) -> tuple[np.ndarray, None, dict[str, Any]]:
        f, rng = self.frame, self.rng
        az = g.azimuth.draw(rng)
        a = g.length.draw(rng) / 2
        b = g.width.draw(rng) / 2
        t = g.thickness.draw(rng)
        th = math.radians(az)
        s, c = math.sin(th), math.cos(th)
        hx = math.sqrt((a * s) ** 2 + (b * c) ** 2)
        hy = math.sqrt((a * c) ** 2 + (b * s) ** 2)
        cx = float(rng.uniform(f.lo[2] - hx, f.hi[2] + hx))
        cy = float(rng.uniform(f.lo[1] - hy, f.hi[1] + hy))
        if g.kind == "lobe":
            zref = float(rng.uniform(f.lo[0] - t, f.hi[0]))  # base
        else:
            zref = float(rng.uniform(f.lo[0] - t / 2, f.hi[0] + t / 2))  # mid-plane
        record = {"group": g.name, "kind": g.kind, "x": cx, "y": cy, "z": zref, "azimuth": az,
                  "length": 2 * a, "width": 2 * b, "thickness": t}
        sl = f.box(cx, cy, hx, hy)
        if sl is None:
            return np.empty(0, dtype=np.int64), None, record
        u, w, cols = _rotate(f, sl, cx, cy, az)
        r2 = (u / a) ** 2 + (w / b) ** 2
        inside = r2 <= 1.0
        r2, cols = r2[inside], cols[inside]
        if g.kind == "lobe":
            zlo, zhi = np.full_like(r2, zref), zref + t * np.sqrt(1.0 - r2)
        else:
            h = (t / 2) * (np.sqrt(1.0 - r2) if g.kind == "ellipsoid" else 1.0 - r2)
            zlo, zhi = zref - h, zref + h
        return f.cells(cols, zlo, zhi), None, record

    # -- writing ----------------------------------------------------------------------------
    def writable(self, cells: np.ndarray, rank: int) -> np.ndarray:
        return cells[self.rank[cells] <= rank]

    def write(self, cells: np.ndarray, code: int, rank: int) -> None:
        if cells.size == 0:
            return
        old = np.bincount(self.codes[cells].astype(np.int64), minlength=128)
        self.count -= old
        self.count[code] += cells.size
        self.codes[cells] = code
        self.rank[cells] = rank


def build_objects(shape: Any, groups: Sequence[Group], *, spacing: Any = (1.0, 1.0, 1.0),
                  origin: Any = (0.0, 0.0, 0.0), background: int = 0, seed: int = 0,
                  erosion_order: Sequence[str] | None = None, tolerance: float = 0.002,
                  max_objects: int = 20000, patience: int = 100) -> ObjectBuild:
    """Build a categorical training image from object groups until target proportions are met.

    Parameters
    ----------
    shape : sequence of int
        ``(nz, ny, nx)``, or ``(ny, nx)`` for a plan view.
    groups : sequence of Channels or Bodies
        Object groups; body facies codes must differ between groups and from ``background``.
    spacing, origin : sequence of 3 float
        Cell sizes ``(dz, dy, dx)`` and lower corner ``(z0, y0, x0)``, as for `strataloom.Grid`.
    background : int, default 0
        Code of the cells no object takes.
    seed : int, default 0
        Seed of the numpy Generator; the same seed gives the same image.
    erosion_order : sequence of str, optional
        Group names from oldest (eroded) to youngest (eroding); default: the order of ``groups``.
    tolerance : float, default 0.002
        A group needs no more objects once its proportion is within this of its target.
    max_objects : int, default 20000
        Limit on objects drawn (kept or not).
    patience : int, default 100
        A group stops after this many objects in a row that could not be kept.

    Returns
    -------
    ObjectBuild
        Codes as an int8 ``(nz, ny, nx)`` array, targets and achieved proportions.
    """
    o = "build_objects"
    shp = v.shape3(shape, "shape", owner=o)
    spc = v.triple(spacing, "spacing", float, owner=o)
    if min(spc) <= 0:
        raise v.fail("spacing", "3 positive cell sizes (dz, dy, dx)", spacing, o)
    org = v.triple(origin, "origin", float, owner=o)
    bg = v.integer(background, "background", low=0, high=126, owner=o)
    rng = np.random.default_rng(v.seed(seed, owner=o))
    tol = v.real(tolerance, "tolerance", low=0, high=0.5, owner=o)
    max_obj = v.integer(max_objects, "max_objects", low=1, high=10**7, owner=o)
    pat = v.integer(patience, "patience", low=1, high=10**6, owner=o)
    groups = list(groups)
    for i, g in enumerate(groups):
        if not isinstance(g, Channels | Bodies):
            raise v.fail_type(f"groups[{i}]", "a Channels or Bodies group", g, o)
    _check_codes(groups, bg)
    names = [g.name for g in groups]
    if len(set(names)) != len(names):
        raise v.fail("groups", "groups with distinct names", names, o)
    if erosion_order is None:
        order = names
    else:
        order = list(erosion_order)
        if sorted(order) != sorted(names):
            raise v.fail("erosion_order", f"every group name once ({', '.join(names)})", order, o)
    total = sum(g.proportion for g in groups)
    if total >= 1.0:
        raise v.fail("proportion", "targets summing to less than 1 (the background takes the rest)",
                     round(total, 6), o)
    ranks = {name: 2 * i for i, name in enumerate(order)}  # levee rank 2r, body rank 2r + 1

    b = _Builder(_Frame(shp, spc, org), groups, bg, rng)
    n = b.n
    fails = [0] * len(groups)
    counts = {g.name: 0 for g in groups}
    records: list[dict[str, Any]] = []
    rejected = drawn = 0
    targets = np.array([g.proportion for g in groups])
    codes = np.array([g.facies for g in groups])
    while drawn < max_obj:
        deficit = targets - b.count[codes] / n
        active = [i for i in range(len(groups)) if deficit[i] > tol and fails[i] < pat]
        if not active:
            break
        i = max(active, key=lambda j: deficit[j] / targets[j])
        g = groups[i]
        drawn += 1
        body, levee, record = b.channel(g) if isinstance(g, Channels) else b.body(g)
        r = ranks[g.name]
        body = b.writable(body, r + 1)
        gain = int(np.count_nonzero(b.codes[body] != g.facies)) / n
        if gain == 0.0 or gain - deficit[i] > deficit[i]:
            fails[i] += 1
            rejected += 1
            continue
        before = b.count[codes].copy()
        b.write(body, g.facies, r + 1)
        if levee is not None:
            b.write(b.writable(levee, r), g.levee.facies, r)  # type: ignore[union-attr]
        fails[i] = 0
        counts[g.name] += 1
        records.append(record)
        for j in np.flatnonzero(b.count[codes] < before):  # eroded groups may try again
            fails[j] = 0
    facies = b.codes.reshape(shp)
    present = np.flatnonzero(b.count)
    return ObjectBuild(
        facies=facies,
        targets={int(g.facies): float(g.proportion) for g in groups},
        proportions={int(k): float(b.count[k] / n) for k in present},
        counts=counts, rejected=rejected, objects=records)


def _check_codes(groups: Sequence[Group], background: int) -> None:
    body: dict[int, str] = {}
    for g in groups:
        if g.facies in body:
            raise v.fail("facies", f"a code not used by group '{body[g.facies]}'", g.facies,
                         f"group '{g.name}'")
        body[g.facies] = g.name
    if background in body:
        raise v.fail("background", f"a code not used by group '{body[background]}'", background,
                     "build_objects")
    for g in groups:
        if isinstance(g, Channels) and g.levee is not None:
            lf = g.levee.facies
            if lf in body or lf == background:
                raise v.fail("levee.facies", "a code other than the background and the "
                             "object facies", lf, f"group '{g.name}'")
