"""Input checks shared by the engine.

Every public engine function takes scalars or numpy arrays. Invalid input
raises ``ValueError`` whose message names the parameter, the offending value
and the accepted range, so that the command line and the window can show it
to the user unchanged.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["as_array", "check_range", "check_fio2", "check_fraction", "check_positive"]


def _first_bad(values: np.ndarray, bad: np.ndarray) -> float:
    return float(np.asarray(values)[bad].ravel()[0])


def as_array(name: str, value) -> np.ndarray:
    """Return ``value`` as a float array; refuse NaN, infinities and non-numbers."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not np.all(np.isfinite(arr)):
        bad = ~np.isfinite(arr)
        raise ValueError(f"{name} must be a finite number, got {_first_bad(arr, bad)!r}")
    return arr


def check_range(name: str, value, low: float, high: float, unit: str = "",
                low_inclusive: bool = True, high_inclusive: bool = True) -> np.ndarray:
    """Return ``value`` as an array after checking ``low <= value <= high``.

    The message reads, for example, ``PEEP = 35 cmH2O is outside the accepted
    range 0 to 30 cmH2O``.
    """
    if type(value) is float and math.isfinite(value) and low <= value <= high and (low_inclusive or value > low) and (
            high_inclusive or value < high):
        return np.asarray(value)  # a plain finite number inside the range
    if type(value) is np.ndarray and value.dtype == np.float64 and value.size and np.isfinite(low) and np.isfinite(high):
        # Fast path for float arrays (the batched engine checks the same arrays many times): NaN fails both
        # comparisons and infinities fail the finite bounds, so anything not clearly inside falls through
        # to the checks below, which word the message.
        lo_v, hi_v = value.min(), value.max()
        if (lo_v >= low if low_inclusive else lo_v > low) and (hi_v <= high if high_inclusive else hi_v < high):
            return value
    arr = as_array(name, value)
    too_low = arr < low if low_inclusive else arr <= low
    too_high = arr > high if high_inclusive else arr >= high
    bad = too_low | too_high
    if np.any(bad):
        v = _first_bad(arr, bad)
        u = f" {unit}" if unit else ""
        lo = "" if low_inclusive else "above "
        hi = "" if high_inclusive else "below "
        raise ValueError(
            f"{name} = {v:g}{u} is outside the accepted range {lo}{low:g} to {hi}{high:g}{u}"
        )
    return arr


def check_positive(name: str, value, unit: str = "", allow_zero: bool = False) -> np.ndarray:
    """Return ``value`` as an array after checking it is positive (or >= 0)."""
    arr = as_array(name, value)
    bad = arr < 0 if allow_zero else arr <= 0
    if np.any(bad):
        v = _first_bad(arr, bad)
        u = f" {unit}" if unit else ""
        need = "zero or more" if allow_zero else "greater than zero"
        raise ValueError(f"{name} = {v:g}{u} is invalid: it must be {need}")
    return arr


def check_fraction(name: str, value) -> np.ndarray:
    """Return ``value`` as an array after checking ``0 <= value <= 1``."""
    arr = as_array(name, value)
    bad = (arr < 0) | (arr > 1)
    if np.any(bad):
        v = _first_bad(arr, bad)
        hint = ""
        if 1 < v <= 100:
            hint = f"; did you mean {v / 100:.2f}?"
        raise ValueError(f"{name} = {v:g} is outside the accepted range 0 to 1 (a fraction){hint}")
    return arr


def check_fio2(value, name: str = "FiO2") -> np.ndarray:
    """Return FiO2 as an array after checking it is a fraction from 0.21 to 1.0.

    A value between 21 and 100 was almost certainly typed as a percentage; the
    message says so.
    """
    arr = as_array(name, value)
    bad = (arr < 0.21 - 1e-9) | (arr > 1.0 + 1e-9)
    if np.any(bad):
        v = _first_bad(arr, bad)
        if 21 <= v <= 100:
            raise ValueError(
                f"{name} = {v:g} is outside the accepted range 0.21 to 1.0: FiO2 is a fraction "
                f"from 0.21 to 1.0; did you mean {v / 100:.2f}?"
            )
        raise ValueError(f"{name} = {v:g} is outside the accepted range 0.21 to 1.0 (a fraction)")
    return np.clip(arr, 0.21, 1.0)
