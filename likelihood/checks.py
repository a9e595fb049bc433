"""Shared validators for values given by users (function arguments, config entries, files).

One message style: ``NAME = VALUE: expected WHAT`` (names given as the user wrote them, e.g. a
config key or an argument), raised as the error class the caller passes (default
:class:`~likelihood.errors.ErgofitError`, a one-line message; exit code 2 from the command line).
"""
from __future__ import annotations

import numpy as np

from .errors import ErgofitError


def finite_number(value, name, error=ErgofitError):
    """``value`` as a finite float."""
    try:
        v = float(value)
    except OverflowError:          # a Python int beyond the float range
        raise error(f"{name} = {value!r}: expected a finite number") from None
    except (TypeError, ValueError):
        raise error(f"{name} = {value!r}: expected a number") from None
    if not np.isfinite(v):
        raise error(f"{name} = {value!r}: expected a finite number")
    return v


def positive_number(value, name, error=ErgofitError, allow_none=False):
    """``value`` as a finite float > 0 (None passes through when ``allow_none``)."""
    if value is None and allow_none:
        return None
    v = finite_number(value, name, error)
    if v <= 0:
        raise error(f"{name} = {value!r}: expected a positive number")
    return v


def increasing_array(values, name, error=ErgofitError, what="values", min_size=2,
                     non_negative=False):
    """``values`` as a 1-d float array of at least ``min_size`` finite, strictly increasing
    entries (and >= 0 when ``non_negative``)."""
    try:
        a = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise error(f"{name} = {values!r}: expected increasing {what}") from None
    if a.ndim != 1 or a.size < min_size or not np.all(np.isfinite(a)) or np.any(np.diff(a) <= 0) \
            or (non_negative and a[0] < 0):
        raise error(f"{name}: expected at least {min_size} finite, "
                    f"{'non-negative, ' if non_negative else ''}strictly increasing {what}")
    return a


def multipole_list(ells, name, error=ErgofitError, max_ell=None):
    """``ells`` as a tuple of distinct non-negative integers (at most ``max_ell``)."""
    try:
        out = tuple(int(l) for l in ells)
    except (TypeError, ValueError):
        raise error(f"{name} = {ells!r}: expected a list of multipole orders like (0, 2, 4)") \
            from None
    if not out or len(set(out)) != len(out) or any(l < 0 or (max_ell is not None and l > max_ell)
                                                   for l in out) \
            or any(float(a) != int(a) for a in ells):
        top = f"between 0 and {max_ell}" if max_ell is not None else ">= 0"
        raise error(f"{name} = {ells!r}: expected distinct integers {top}")
    return out
