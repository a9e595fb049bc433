"""Legendre polynomials on arrays."""
from __future__ import annotations

import numpy as np


def legendre_all(x, lmax):
    """L_0..L_lmax at x by Bonnet's recurrence; shape (lmax+1,) + x.shape."""
    x = np.asarray(x, dtype=float)
    out = np.empty((lmax + 1,) + x.shape)
    out[0] = 1.0
    if lmax >= 1:
        out[1] = x
    for n in range(1, lmax):
        out[n + 1] = ((2 * n + 1) * x * out[n] - n * out[n - 1]) / (n + 1)
    return out
