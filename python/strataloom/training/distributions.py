"""Random quantities for object parameters: a fixed value or a named distribution.

A parameter such as a channel width is given either as a number (every object gets it) or as a
distribution drawn once per object from the builder's numpy Generator, so a build is a pure
function of its seed.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .. import _validate as v

__all__ = ["Distribution"]

_KINDS = {"fixed": 1, "uniform": 2, "triangular": 3, "normal": 2, "lognormal": 2}
_HELP = ("a number, or a table with one of uniform = [low, high], triangular = [low, mode, high], "
         "normal = [mean, sd], lognormal = [mean, sd] (and optionally within = [low, high])")


@dataclass(frozen=True)
class Distribution:
    """A scalar parameter drawn once per object.

    Parameters
    ----------
    kind : {"fixed", "uniform", "triangular", "normal", "lognormal"}
        ``fixed`` takes ``(value,)``; ``uniform`` ``(low, high)``; ``triangular``
        ``(low, mode, high)``; ``normal`` ``(mean, sd)``; ``lognormal`` ``(mean, sd)`` of the
        variable itself (not of its logarithm).
    args : tuple of float
        The parameters of ``kind``.
    within : (float, float), optional
        Truncation bounds: draws outside are redrawn (up to 1000 times, then clipped).
    """

    kind: str
    args: tuple[float, ...]
    within: tuple[float, float] | None = None

    # ------------------------------------------------------------------ construction
    @classmethod
    def parse(cls, value: Any, name: str, *, owner: str | None = None, positive: bool = False,
              low: float | None = None, high: float | None = None) -> Distribution:
        """A Distribution from a number, a Distribution or a mapping like ``{"uniform": [a, b]}``.

        Parameters
        ----------
        value : number, Distribution or mapping
            What the user wrote.
        name : str
            Parameter name used in error messages.
        owner : str, optional
            Owner named in error messages.
        positive : bool
            Every draw must be > 0 (the support is checked, not the draws).
        low, high : float, optional
            Every draw must lie in ``[low, high]`` (the support is checked).
        """
        if isinstance(value, Distribution):
            dist = value
        elif isinstance(value, numbers.Real) and not isinstance(value, bool):
            dist = cls("fixed", (v.real(value, name, owner=owner),))
        elif isinstance(value, Mapping):
            kinds = [k for k in value if k in _KINDS]
            extra = [k for k in value if k not in _KINDS and k != "within"]
            if len(kinds) != 1 or extra:
                raise v.fail(name, _HELP, dict(value), owner)
            kind = kinds[0]
            raw = value[kind]
            raw = [raw] if isinstance(raw, numbers.Real) and not isinstance(raw, bool) else raw
            if (isinstance(raw, (str, bytes)) or not hasattr(raw, "__len__")
                    or len(raw) != _KINDS[kind]):
                raise v.fail(name, f"{kind} = a list of {_KINDS[kind]} numbers", raw, owner)
            args = tuple(v.real(x, name, owner=owner) for x in raw)
            within = value.get("within")
            if within is not None:
                if (isinstance(within, (str, bytes)) or not hasattr(within, "__len__")
                        or len(within) != 2):
                    raise v.fail(name, "within = [low, high]", within, owner)
                within = (v.real(within[0], name, owner=owner),
                          v.real(within[1], name, owner=owner))
                if within[0] >= within[1]:
                    raise v.fail(name, "within = [low, high] with low < high", list(within), owner)
            dist = cls(kind, args, within)
        else:
            raise v.fail_type(name, _HELP, value, owner)
        dist._check(name, owner, positive, low, high)
        return dist

    def _check(self, name: str, owner: str | None, positive: bool, low: float | None,
               high: float | None) -> None:
        a = self.args
        if self.kind == "uniform" and not a[0] < a[1]:
            raise v.fail(name, "uniform = [low, high] with low < high", list(a), owner)
        if self.kind == "triangular" and not (a[0] <= a[1] <= a[2] and a[0] < a[2]):
            raise v.fail(name, "triangular = [low, mode, high] with low <= mode <= high and "
                         "low < high", list(a), owner)
        if self.kind in ("normal", "lognormal") and not a[1] > 0:
            raise v.fail(name, f"{self.kind} = [mean, sd] with sd > 0", list(a), owner)
        if self.kind == "lognormal" and not a[0] > 0:
            raise v.fail(name, "lognormal = [mean, sd] with mean > 0", list(a), owner)
        lo, hi = self.support()
        shown = a[0] if self.kind == "fixed" else self.describe()
        if positive and not lo > 0:
            what = ("a positive number" if self.kind == "fixed" else
                    "a distribution of positive values (add within = [low, high] with low > 0)")
            raise v.fail(name, what, shown, owner)
        if (low is not None and lo < low) or (high is not None and hi > high):
            lo_s = "-inf" if low is None else f"{low:g}"
            hi_s = "inf" if high is None else f"{high:g}"
            rng = f"[{lo_s}, {hi_s}]"
            raise v.fail(name, f"a value or distribution within {rng}", shown, owner)

    # ------------------------------------------------------------------ use
    def support(self) -> tuple[float, float]:
        """The smallest and largest value a draw can take."""
        a = self.args
        if self.kind == "fixed":
            lo, hi = a[0], a[0]
        elif self.kind == "uniform":
            lo, hi = a[0], a[1]
        elif self.kind == "triangular":
            lo, hi = a[0], a[2]
        elif self.kind == "lognormal":
            lo, hi = 0.0 + 1e-300, math.inf
        else:
            lo, hi = -math.inf, math.inf
        if self.within is not None:
            lo, hi = max(lo, self.within[0]), min(hi, self.within[1])
        return lo, hi

    def mean(self) -> float:
        """The mean of the untruncated distribution (used for sizing guesses only)."""
        a = self.args
        return {"fixed": a[0], "uniform": (a[0] + a[-1]) / 2, "triangular": sum(a) / 3,
                "normal": a[0], "lognormal": a[0]}[self.kind]

    def largest(self) -> float:
        """An upper bound of the draws: the support's upper end, or mean + 4 sd if unbounded."""
        hi = self.support()[1]
        return hi if math.isfinite(hi) else self.args[0] + 4.0 * self.args[1]

    def draw(self, rng: np.random.Generator) -> float:
        """One value."""
        for _ in range(1000):
            x = self._raw(rng)
            if self.within is None or self.within[0] <= x <= self.within[1]:
                return x
        lo, hi = self.within  # type: ignore[misc]
        return float(np.clip(x, lo, hi))

    def _raw(self, rng: np.random.Generator) -> float:
        a = self.args
        if self.kind == "fixed":
            return a[0]
        if self.kind == "uniform":
            return float(rng.uniform(a[0], a[1]))
        if self.kind == "triangular":
            return float(rng.triangular(a[0], a[1], a[2])) if a[0] < a[2] else a[0]
        if self.kind == "normal":
            return float(rng.normal(a[0], a[1]))
        s2 = math.log1p((a[1] / a[0]) ** 2)  # lognormal with the given mean and sd
        return float(rng.lognormal(math.log(a[0]) - s2 / 2, math.sqrt(s2)))

    def describe(self) -> str:
        """A short text such as ``uniform(40, 80)``."""
        text = ", ".join(f"{x:g}" for x in self.args)
        text = text if self.kind == "fixed" else f"{self.kind}({text})"
        if self.within is not None:
            text += f" within [{self.within[0]:g}, {self.within[1]:g}]"
        return text
