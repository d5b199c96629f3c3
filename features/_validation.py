"""One exception type for bad parameters, raised early with what was expected."""

from __future__ import annotations

import numpy as np

__all__ = ["ParameterError", "check_positive", "check_increasing"]


class ParameterError(ValueError):
    """A parameter or an input array does not have the expected value, shape or unit."""


def check_positive(name: str, value: float) -> float:
    """Return ``value`` as float, or raise :class:`ParameterError` if it is not finite and > 0."""
    value = float(value)
    if not np.isfinite(value) or value <= 0:
        raise ParameterError(f"{name} must be a finite number > 0, got {value!r}")
    return value


def check_increasing(name: str, values: np.ndarray) -> np.ndarray:
    """Return ``values`` as a 1-D float array, or raise unless strictly increasing and finite."""
    values = np.asarray(values, dtype=float)
    if values.ndim != 1 or values.size == 0:
        raise ParameterError(f"{name} must be a non-empty 1-D sequence")
    if not np.all(np.isfinite(values)):
        raise ParameterError(f"{name} must hold finite numbers only")
    if values.size > 1 and np.any(np.diff(values) <= 0):
        bad = int(np.argmax(np.diff(values) <= 0)) + 1
        raise ParameterError(
            f"{name} must increase strictly; value {bad + 1} ({values[bad]:g}) "
            f"does not exceed the one before it ({values[bad - 1]:g})"
        )
    return values
