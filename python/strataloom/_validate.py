"""Validation helpers for the public API: one message shape for every parameter error."""

from __future__ import annotations

import math
import numbers
import os
from collections.abc import Sequence
from typing import Any

import numpy as np

from .errors import MemoryLimitError, ParameterError, ParameterTypeError


def _owner(owner: str | None) -> str:
    return f" of {owner}" if owner else ""


def fail(name: str, expected: str, got: Any, owner: str | None = None) -> ParameterError:
    """A ParameterError in the project's one message shape."""
    return ParameterError(f"The parameter '{name}'{_owner(owner)} must be {expected}. Got {got!r} instead.")


def fail_type(name: str, expected: str, got: Any, owner: str | None = None) -> ParameterTypeError:
    """A ParameterTypeError in the project's one message shape."""
    shown = type(got).__name__ if not isinstance(got, np.ndarray) else f"an array of dtype {got.dtype}"
    return ParameterTypeError(f"The parameter '{name}'{_owner(owner)} must be {expected}. Got {shown} instead.")


def integer(value: Any, name: str, *, low: int | None = None, high: int | None = None,
            owner: str | None = None) -> int:
    """An int within [low, high] (bools are refused)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise fail_type(name, "an integer", value, owner)
    value = int(value)
    if (low is not None and value < low) or (high is not None and value > high):
        lo = "-inf" if low is None else str(low)
        hi = "inf" if high is None else str(high)
        raise fail(name, f"an integer in [{lo}, {hi}]", value, owner)
    return value


def real(value: Any, name: str, *, low: float | None = None, high: float | None = None,
         low_open: bool = False, high_open: bool = False, owner: str | None = None) -> float:
    """A finite float within the stated interval."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise fail_type(name, "a number", value, owner)
    value = float(value)
    bad = not np.isfinite(value)
    if low is not None:
        bad |= value <= low if low_open else value < low
    if high is not None:
        bad |= value >= high if high_open else value > high
    if bad:
        lo = "-inf" if low is None else f"{low:g}"
        hi = "inf" if high is None else f"{high:g}"
        interval = ("(" if low_open else "[") + f"{lo}, {hi}" + (")" if high_open else "]")
        raise fail(name, f"a finite number in {interval}", value, owner)
    return value


def triple(value: Any, name: str, kind: type, *, owner: str | None = None) -> tuple:
    """Three numbers (z, y, x); a 2-sequence (y, x) is refused here so callers decide about 2-D."""
    if isinstance(value, (str, bytes)) or not isinstance(value, Sequence | np.ndarray):
        raise fail_type(name, "a sequence of 3 numbers (z, y, x)", value, owner)
    items = list(np.asarray(value).ravel()) if isinstance(value, np.ndarray) else list(value)
    if len(items) != 3:
        raise fail(name, "a sequence of 3 numbers (z, y, x)", tuple(items), owner)
    out = []
    for v in items:
        if kind is int:
            if isinstance(v, bool) or not isinstance(v, numbers.Integral):
                raise fail_type(name, "a sequence of 3 integers (z, y, x)", v, owner)
            out.append(int(v))
        else:
            if isinstance(v, bool) or not isinstance(v, numbers.Real):
                raise fail_type(name, "a sequence of 3 numbers (z, y, x)", v, owner)
            out.append(float(v))
    return tuple(out)


def shape3(value: Any, name: str = "shape", *, owner: str | None = None) -> tuple[int, int, int]:
    """A grid shape (nz, ny, nx) of positive integers; (ny, nx) means nz = 1."""
    if isinstance(value, numbers.Integral) or isinstance(value, (str, bytes)):
        raise fail_type(name, "a sequence of 2 or 3 positive integers", value, owner)
    items = tuple(value) if isinstance(value, Sequence | np.ndarray) else None
    if items is None:
        raise fail_type(name, "a sequence of 2 or 3 positive integers", value, owner)
    if len(items) == 2:
        items = (1, *items)
    if len(items) != 3:
        raise fail(name, "a sequence of 2 or 3 positive integers (nz, ny, nx)", tuple(value), owner)
    for v in items:
        if isinstance(v, bool) or not isinstance(v, numbers.Integral):
            raise fail_type(name, "a sequence of 2 or 3 positive integers", v, owner)
        if int(v) < 1:
            raise fail(name, "a sequence of 2 or 3 positive integers (nz, ny, nx)", tuple(value), owner)
    return tuple(int(v) for v in items)  # type: ignore[return-value]


def as_volume(array: Any, name: str, *, owner: str | None = None) -> np.ndarray:
    """A 2-D (ny, nx) or 3-D (nz, ny, nx) array viewed as 3-D, without copying when possible."""
    try:
        a = np.asarray(array)
    except (ValueError, TypeError) as e:  # ragged nested lists
        raise fail(name, "a 2-D (ny, nx) or 3-D (nz, ny, nx) array", f"an object numpy cannot "
                   f"turn into one array ({e})", owner) from e
    if a.ndim == 2:
        a = a[np.newaxis]
    if a.ndim != 3:
        raise fail(name, "a 2-D (ny, nx) or 3-D (nz, ny, nx) array", f"an array of shape {a.shape}", owner)
    if a.size == 0:
        raise fail(name, "a non-empty array", f"an array of shape {a.shape}", owner)
    return a


def physical_memory() -> int:
    """Bytes of physical memory of this machine (0 when the system does not say)."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, OSError, ValueError):
        return 0


def size_text(b: float) -> str:
    """A byte count for people: ``"512 B"``, ``"38.1 KiB"``, ``"4.4 GiB"``."""
    for unit in ("B", "KiB", "MiB", "GiB"):
        if b < 1024:
            return f"{b:.0f} {unit}" if unit == "B" else f"{b:.1f} {unit}"
        b /= 1024
    return f"{b:.1f} TiB"


def usable_memory() -> int:
    """Bytes this process may still allocate (0 when unknown): the machine's physical memory, or
    less when an address-space limit (``ulimit -v``) leaves less room beyond what the process maps."""
    have = physical_memory()
    try:
        import resource

        limit = resource.getrlimit(resource.RLIMIT_AS)[0]
    except (ImportError, OSError, ValueError):
        return have
    if limit == resource.RLIM_INFINITY or limit <= 0:
        return have
    mapped = 0
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmSize:"):
                    mapped = int(line.split()[1]) * 1024
                    break
    except (OSError, ValueError, IndexError):
        pass
    room = max(int(limit) - mapped, 1)
    return min(have, room) if have else room


def grid_memory(shape: tuple[int, int, int], bytes_per_cell: int, name: str = "shape", *,
                owner: str | None = None) -> int:
    """The bytes a grid of ``shape`` needs at ``bytes_per_cell``; MemoryLimitError when this is more
    than the machine's physical memory (checked before anything is allocated)."""
    cells = math.prod(int(s) for s in shape)
    need = cells * int(bytes_per_cell)
    have = physical_memory()
    if have and need > have:
        raise MemoryLimitError(
            f"The parameter '{name}'{_owner(owner)} gives a grid of {cells:,} cells that needs about "
            f"{need / 2**30:.1f} GiB, more than the {have / 2**30:.1f} GiB of memory of this machine; "
            "simulate a smaller grid or split the model into parts."
        )
    return need


def callback(value: Any, name: str, *, owner: str | None = None) -> Any:
    """None or a callable."""
    if value is not None and not callable(value):
        raise fail_type(name, "None or a callable", value, owner)
    return value


def seed(value: Any, name: str = "seed", *, owner: str | None = None) -> int:
    """A seed in [0, 2**63)."""
    return integer(value, name, low=0, high=2**63 - 1, owner=owner)


def threads(value: Any, name: str = "threads", *, owner: str | None = None) -> int:
    """None (all cores) or a positive thread count; 0 is returned for None."""
    if value is None:
        return 0
    return integer(value, name, low=1, high=1024, owner=owner)
