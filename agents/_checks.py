"""Input checks shared by every layer: each failure is a one-line ValueError naming the field."""

from __future__ import annotations

import numpy as np


def as_float_array(name: str, value, *, allow_nan: bool = False) -> np.ndarray:
    """Return ``value`` as a float array, refusing NaN and infinities unless asked."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number or an array of numbers, got {value!r}") from None
    if not allow_nan and not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite (no NaN or infinity)")
    return arr


def check_positive(name: str, value) -> np.ndarray:
    """Finite and strictly positive."""
    arr = as_float_array(name, value)
    if np.any(arr <= 0):
        raise ValueError(f"{name} must be > 0, got {_worst(arr, arr <= 0)}")
    return arr


def check_nonnegative(name: str, value, *, allow_inf: bool = False) -> np.ndarray:
    """Non-negative (and finite unless ``allow_inf``)."""
    arr = as_float_array(name, value, allow_nan=allow_inf)
    if np.any(np.isnan(arr)):
        raise ValueError(f"{name} must not be NaN")
    if not allow_inf and np.any(np.isinf(arr)):
        raise ValueError(f"{name} must be finite")
    if np.any(arr < 0):
        raise ValueError(f"{name} must be >= 0, got {_worst(arr, arr < 0)}")
    return arr


def check_unit_interval(name: str, value) -> np.ndarray:
    """In the half-open interval (0, 1]."""
    arr = as_float_array(name, value)
    bad = (arr <= 0) | (arr > 1)
    if np.any(bad):
        raise ValueError(f"{name} must be in (0, 1], got {_worst(arr, bad)}")
    return arr


def _worst(arr: np.ndarray, bad: np.ndarray):
    flat = np.atleast_1d(arr)[np.atleast_1d(bad)]
    return flat[0] if flat.size else arr
