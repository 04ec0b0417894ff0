"""Exceptions raised by Strata Loom.

Every error about an input names the parameter and says what would be accepted. The classes are
shared with the compiled core, so a check made in C++ arrives as the same Python type as one made
here.
"""

from __future__ import annotations

from ._core import MemoryLimitError, ParameterError, ParameterTypeError

__all__ = ["MemoryLimitError", "ParameterError", "ParameterTypeError", "StudyError"]


class StudyError(ValueError):
    """A study file or its data cannot be used as written."""
