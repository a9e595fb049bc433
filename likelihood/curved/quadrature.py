"""Composite Gauss–Legendre rules used by the curved-sky engine (plain functions)."""
from __future__ import annotations

import math

import numpy as np

__all__ = ["composite_gl"]

_NODES = 8
_X, _W = np.polynomial.legendre.leggauss(_NODES)


def composite_gl(a, b, panel):
    """Nodes and weights of 8-point Gauss–Legendre on ⌈(b − a)/panel⌉ equal panels of [a, b].

    An 8-point rule integrates polynomials of degree 15 exactly; for an integrand oscillating
    with phase φ per panel the error is ≲ (φ/2)^16/16! (3e-9 at φ = 4 rad): panels are chosen
    by the callers as 4 rad of the fastest oscillation (docs/curved_sky.md, resolution rules).
    """
    a, b, panel = float(a), float(b), float(panel)
    if not b > a:
        raise ValueError("composite_gl: need b > a")
    n = max(1, int(math.ceil((b - a) / panel - 1e-9)))
    edges = np.linspace(a, b, n + 1)
    half = 0.5 * np.diff(edges)[:, None]
    mid = 0.5 * (edges[:-1] + edges[1:])[:, None]
    return (mid + half * _X).ravel(), (half * _W).ravel()
