"""Search templates: ordered (dz, dy, dx) offsets around a centre node.

Order rule of the factory templates (deterministic): offsets are sorted by the anisotropic
distance ``sqrt((dz/rz)**2 + (dy/ry)**2 + (dx/rx)**2)``, nearest first; ties go to the smaller plain
squared distance ``dz**2 + dy**2 + dx**2``, then to the lexicographically smaller ``(dz, dy, dx)``.
"""

from __future__ import annotations

import numbers
from typing import Any

import numpy as np

from . import _core
from . import _validate as v

__all__ = ["MAX_TEMPLATE_NODES", "Template"]

#: Largest number of nodes a template may hold (the same limit as the core's).
MAX_TEMPLATE_NODES = 20000


class Template:
    """An ordered set of offsets ``(dz, dy, dx)``, the centre excluded.

    Parameters
    ----------
    offsets : (n, 3) or (n, 2) array of int
        Offsets in the order engines should use them (nearest first is usual). Pairs are
        ``(dy, dx)`` with ``dz = 0``. No duplicates, no centre.

    See Also
    --------
    Template.box, Template.ellipsoid : factory templates in the documented order.
    """

    def __init__(self, offsets: Any) -> None:
        a = np.asarray(offsets)
        if a.ndim != 2 or a.shape[1] not in (2, 3) or a.shape[0] == 0:
            raise v.fail("offsets", "an (n, 3) array of (dz, dy, dx) offsets, n >= 1",
                         f"an array of shape {a.shape}", "Template")
        if not (np.issubdtype(a.dtype, np.integer) or a.dtype == object):
            raise v.fail_type("offsets", "an integer array", a, "Template")
        if a.dtype == object and not all(
                isinstance(x, numbers.Integral) and not isinstance(x, bool) for x in a.ravel()):
            raise v.fail_type("offsets", "an integer array", a, "Template")
        a = a.astype(np.int64)
        if a.shape[1] == 2:
            a = np.column_stack([np.zeros(len(a), dtype=np.int64), a])
        if len(a) > MAX_TEMPLATE_NODES:
            raise v.fail(
                "offsets", f"at most {MAX_TEMPLATE_NODES} offsets", f"{len(a)} offsets", "Template"
            )
        self._offsets = _core.template_check(np.ascontiguousarray(a))
        self._offsets.flags.writeable = False

    @classmethod
    def box(cls, radius: Any) -> Template:
        """Every offset with ``|dz| <= rz, |dy| <= ry, |dx| <= rx`` but the centre.

        Parameters
        ----------
        radius : int or sequence of 3 int
            Half-widths ``(rz, ry, rx)`` in cells; a single int is used on all three axes, and a
            pair ``(ry, rx)`` gives a 2-D template (``rz = 0``).

        Returns
        -------
        Template
            ``(2 rz + 1)(2 ry + 1)(2 rx + 1) - 1`` offsets, nearest first.
        """
        r = _radius_triple(radius, int, "Template.box")
        for x in r:
            v.integer(x, "radius", low=0, high=10000, owner="Template.box")
        return cls._wrap(_core.template_box(r))

    @classmethod
    def ellipsoid(cls, radius: Any, max_nodes: int | None = None) -> Template:
        """Offsets inside an ellipsoid, nearest first, keeping the ``max_nodes`` nearest.

        Parameters
        ----------
        radius : float or sequence of 3 float
            Semi-axes ``(rz, ry, rx)`` in cells; a pair ``(ry, rx)`` gives a 2-D template. An
            offset belongs when ``(dz/rz)**2 + (dy/ry)**2 + (dx/rx)**2 <= 1``.
        max_nodes : int, optional
            Keep only the first ``max_nodes`` offsets in the order rule.
        """
        r = _radius_triple(radius, float, "Template.ellipsoid")
        for x in r:
            v.real(x, "radius", low=0, high=4096, owner="Template.ellipsoid")
        n = 0 if max_nodes is None else v.integer(
            max_nodes, "max_nodes", low=1, high=MAX_TEMPLATE_NODES, owner="Template.ellipsoid"
        )
        return cls._wrap(_core.template_ellipsoid(r, n))

    @classmethod
    def _wrap(cls, offsets: np.ndarray) -> Template:
        t = cls.__new__(cls)
        t._offsets = offsets
        t._offsets.flags.writeable = False
        return t

    @property
    def offsets(self) -> np.ndarray:
        """``(n, 3)`` int64 array of ``(dz, dy, dx)``, read-only."""
        return self._offsets

    def __len__(self) -> int:
        return len(self._offsets)

    def __repr__(self) -> str:
        return f"Template({len(self)} nodes, reach={self.reach})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Template) and np.array_equal(self._offsets, other._offsets)

    def __hash__(self) -> int:
        return hash(self._offsets.tobytes())

    @property
    def reach(self) -> tuple[int, int, int]:
        """Largest ``|offset|`` along each axis."""
        return tuple(int(x) for x in np.abs(self._offsets).max(axis=0))  # type: ignore[return-value]

    def at_level(self, level: int) -> Template:
        """The same offsets times ``2**level`` (the template of multiple-grid level ``level``)."""
        lv = v.integer(level, "level", low=0, high=20, owner="Template.at_level")
        scaled = self._offsets * (1 << lv)
        if np.abs(scaled).max() > 2**24:
            raise v.fail(
                "level", "small enough that the scaled template stays within 2**24 cells", lv,
                "Template.at_level",
            )
        return Template._wrap(np.ascontiguousarray(scaled))


def _radius_triple(radius: Any, kind: type, owner: str) -> tuple:
    """``(rz, ry, rx)`` from one number (all axes), a pair ``(ry, rx)`` (``rz = 0``) or a triple."""
    scalar = numbers.Integral if kind is int else numbers.Real
    if isinstance(radius, scalar) and not isinstance(radius, bool):
        return (kind(radius),) * 3
    items = list(radius) if isinstance(radius, (list, tuple, np.ndarray)) else None
    if items is None:
        raise v.fail_type("radius", "a number or a sequence of 2 or 3 numbers", radius, owner)
    if len(items) == 2:
        items = [0, *items]
    return v.triple(items, "radius", kind, owner=owner)
