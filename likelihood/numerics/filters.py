"""Fourier-space filters of a sphere of radius R, as functions of x = kR.

Two top-hat evaluations are kept on purpose, each with the small-x branch its users were
validated with: :func:`tophat_window` (σ_R quadrature of the cosmology; 4-term series below
x = 0.1) and :func:`tophat` (observer constraint field and mocks; 2-term series below 1e-3).
They agree to ~1e-12 relative where both branches are exact formulas.
"""
from __future__ import annotations

import numpy as np


def tophat_window(x):
    """Fourier transform of a normalised spherical top hat, W(x) = 3 (sin x - x cos x) / x^3.

    Uses the series 1 - x^2/10 + x^4/280 - x^6/15120 for x < 0.1 to avoid cancellation.
    W(0) = 1 (standard top-hat filter, common practice).
    """
    x = np.asarray(x, dtype=float)
    small = x < 0.1
    xs = np.where(small, 1.0, x)
    exact = 3.0 * (np.sin(xs) - xs * np.cos(xs)) / xs**3
    x2 = x * x
    series = 1.0 - x2 / 10.0 + x2 * x2 / 280.0 - x2 * x2 * x2 / 15120.0
    return np.where(small, series, exact)


def tophat(x):
    """Top hat 3(sin x − x cos x)/x³, series 1 − x²/10 for |x| < 1e-3; S(0) = 1 (common practice)."""
    x = np.asarray(x, dtype=float)
    out = np.empty_like(x)
    small = np.abs(x) < 1e-3
    xs = x[small]
    out[small] = 1.0 - xs * xs / 10.0
    xb = x[~small]
    out[~small] = 3.0 * (np.sin(xb) - xb * np.cos(xb)) / xb ** 3
    return out


def gaussian(x):
    """Gaussian filter exp(−x²/2) (common practice)."""
    x = np.asarray(x, dtype=float)
    return np.exp(-0.5 * x * x)
