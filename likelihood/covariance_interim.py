"""INTERIM stand-in for ``likelihood.covariance.multi_tracer_covariance`` (written on another
branch, issue 13 part A). Same interface; the model code imports that module when it exists and
falls back to this one. Delete this file once ``likelihood/covariance.py`` is merged.

Gaussian covariance of auto and cross multipoles of several tracers, diagonal in k. For estimators
P̂^XY_ℓ(k) = (2ℓ+1)/N_k Σ_modes δ_X δ_Y^* L_ℓ(μ) (modes k and −k counted separately, δ(−k) = δ(k)^*),
Isserlis' theorem gives

    Cov[P̂^XY_ℓ, P̂^ZW_ℓ'] = (2ℓ+1)(2ℓ'+1)/N_k · ½∫dμ L_ℓ(μ) [ P_XW P_ZY L_ℓ'(μ) + P_XZ P_WY L_ℓ'(−μ) ],

P_AB = <δ_A δ_B^*> including the noise N_AB; for X = Y = Z = W it is the single-tracer form of
:func:`likelihood.data.gaussian_covariance` (Feldman, Kaiser & Peacock 1994; Grieb et al. 2016,
eq. 15). Odd ℓ are stored as Π_ℓ = P_ℓ/i, so each odd index divides by i. The μ integral uses
24-point Gauss–Legendre (exact for the polynomial kernels of the plane-parallel model).
"""
from __future__ import annotations

import numpy as np

MU, WMU = np.polynomial.legendre.leggauss(24)


def multi_tracer_covariance(n_modes, spectra, pkmu, noise):
    """See the module docstring and ``likelihood.covariance.multi_tracer_covariance``."""
    n_modes = np.asarray(n_modes, float)
    nk = n_modes.size
    cache = {}

    def p(a, b):
        if (a, b) not in cache:
            cache[a, b] = np.asarray(pkmu(a, b, MU), complex) + noise.get((a, b), noise.get((b, a), 0.0))
        return cache[a, b]

    leg = {l: np.polynomial.legendre.Legendre.basis(l)(MU) for l in range(9)}
    blocks = [(pair, l) for pair, ells in spectra for l in ells]
    n = len(blocks)
    cov = np.zeros((n * nk, n * nk))
    for i, ((x, y), l) in enumerate(blocks):
        for j, ((z, w), lp) in enumerate(blocks):
            integ = p(x, w) * p(z, y) * leg[lp] + p(x, z) * p(w, y) * leg[lp] * (-1) ** lp
            val = 0.5 * np.sum(WMU * leg[l] * integ, axis=1) * (2 * l + 1) * (2 * lp + 1) / n_modes
            val = val / (1j ** (l % 2) * 1j ** (lp % 2))
            cov[i * nk:(i + 1) * nk, j * nk:(j + 1) * nk] = np.diag(val.real)
    return cov
