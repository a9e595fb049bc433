"""The angular mask of a random catalogue: the randoms' directions counted on a HEALPix map,
with the randoms' own Poisson (multinomial) noise removed from every statistic the masked
estimator uses (docs/curved_mask.md §11).

Derivation. N randoms drawn independently from the angular density m(n̂) (∫ m dΩ = 1: the
footprint M normalised, m = M/Ω_M) give the map m̂ = Σ_i δ(n̂ − n̂_i)/N. With the projector on
degree K, P_K(n̂, n̂') = (2K+1)/(4π) L_K(n̂·n̂'), P_K(n̂, n̂) = (2K+1)/(4π):

- power: (2K+1) Ŵ_K = Σ_m |m̂_Km|² = N⁻² Σ_ij P_K(n̂_i, n̂_j). The i = j terms give
  N (2K+1)/(4π), the N(N − 1) others have the mean (2K+1) W_K, so
      E[Ŵ_K] = (1 − 1/N) W_K + 1/(4πN),   W_K = (Ŵ_K − 1/(4πN)) / (1 − 1/N),
  a flat (white) noise 1/(4πN) in this normalisation (4π f_sky²/N for a mask ≈ 1 inside a
  footprint of sky fraction f_sky) — common practice for a Poisson-sampled map, exact here.
- ∫ m² dΩ on the pixels (Ω_pix, counts c_p): E[Σ_p c_p²] = N(N − 1) Σ_p p_p² + N, so
  ∫ m² = (Σ_p c_p² − N)/(N(N − 1) Ω_pix).
- triple integrals X_JL = ∫ m m_J m_L dΩ: N³ X̂_JL = Σ_ijk P_J(n̂_i, n̂_j) P_L(n̂_i, n̂_k); the
  distinct triples have the mean N(N−1)(N−2) X_JL, and the coincident ones are
      i = j ≠ k:  a_J (S_L − N a_L),   i = k ≠ j:  a_L (S_J − N a_J),   i = j = k:  N a_J a_L,
      j = k ≠ i:  N(N − 1)(2J+1) M_JL[W]   (its mean; L_J L_L = Σ_K (2K+1)(J L K; 0 0 0)² L_K),
  a_J = (2J+1)/(4π), S_L = N²(2L+1) Ŵ_L, M_JL the coupling matrix of likelihood.curved.mask.

The mask handed to the estimator is M = Ω_eff m, Ω_eff = 1/∫m² (= 4π f_sky for a footprint
of constant completeness): Ω_M = ∫M = Ω_eff, ∫M² = Ω_eff, W_K → Ω_eff² W_K, X → Ω_eff³ X.
The normalisation of M cancels in the estimator. The footprint is taken to have constant
completeness (M² = M in the mean), so the cross power of M and M² is W_K.

The map is the randoms' density at the pixel resolution (nside): scales below the pixel are
those of the pixelisation, as for a HEALPix mask (docs/curved_mask.md §9).
"""
from __future__ import annotations

import numpy as np

from ..errors import ConfigError, DataError
from .mask import HealpixMask, coupling_matrix

__all__ = ["RandomsMask"]


class RandomsMask:
    """Angular mask from the directions of a random catalogue (module docstring), with the
    interface of :class:`likelihood.curved.mask.HealpixMask` (power, area, m2, triple,
    square_power, power_known, describe, mode_fraction). healpy is needed (the optional extra
    ``healpix``).

    ``positions``: (N, 3) Cartesian positions [Mpc/h] about the observer (only directions are
    used); ``nside``: the HEALPix resolution of the count map; ``lmax`` the highest K of the
    power (default 3 nside − 1)."""

    def __init__(self, positions, nside=64, lmax=None, source="randoms"):
        try:
            import healpy
        except ImportError:
            raise ConfigError(f"{source}: an angular mask from randoms needs healpy (pip "
                              "install \"ergofit[healpix]\")") from None
        x = np.asarray(positions, dtype=float)
        if x.ndim != 2 or x.shape[1] != 3 or not np.all(np.isfinite(x)):
            raise DataError(f"{source}: expected finite (N, 3) random positions")
        if isinstance(nside, bool) or not healpy.isnsideok(nside, nest=True):
            raise ConfigError(f"{source}: nside = {nside!r}: expected a power of 2 (e.g. 64)")
        r = np.sqrt(np.sum(x * x, axis=1))
        if np.any(r <= 0):
            raise DataError(f"{source}: a random sits at the observer (r = 0)")
        n = x.shape[0]
        if n < 1000:
            raise DataError(f"{source}: only {n} randoms; the angular mask needs >= 1000")
        self.n, self.nside, self.source = n, int(nside), source
        npix = healpy.nside2npix(self.nside)
        pix = healpy.vec2pix(self.nside, x[:, 0] / r, x[:, 1] / r, x[:, 2] / r)
        counts = np.bincount(pix, minlength=npix).astype(float)
        omega_pix = 4.0 * np.pi / npix
        self.map = counts                                  # what defines the mask (cache key)
        self._raw = HealpixMask(counts / (n * omega_pix), lmax=lmax, source=source)
        self.lmax = self._raw.lmax
        m2 = (np.sum(counts ** 2) - n) / (n * (n - 1.0) * omega_pix)
        if not m2 > 0:
            raise DataError(f"{source}: no two randoms share a pixel at nside {nside}; use a "
                            "smaller nside or more randoms")
        self.omega = 1.0 / m2                              # Ω_eff
        self.area = self.m2 = self.omega
        self.noise = 1.0 / (4.0 * np.pi * n)               # white power of the raw map (m units)

    def raw_power(self, k_max):
        """Ŵ_K of the count map before the noise is removed, in the units of :meth:`power`."""
        return self.omega ** 2 * self._raw.power(k_max)

    def power(self, k_max):
        """W_K, K = 0..k_max, the randoms' noise removed (zero beyond lmax)."""
        known = np.arange(k_max + 1) <= self.lmax
        clean = (self._raw.power(k_max) - self.noise) / (1.0 - 1.0 / self.n)
        return self.omega ** 2 * np.where(known, clean, 0.0)

    square_power = power          # constant completeness: M² = M in the mean

    def power_known(self):
        return self.lmax

    def mode_fraction(self):
        """(∫M²)²/(4π ∫M⁴): f_sky for a footprint of constant completeness (∫M⁴ = ∫M²)."""
        return self.omega / (4.0 * np.pi)

    def triple(self, j_max, l_max):
        """X_JL = ∫ M M_J M_L dΩ with the coincident triples of the randoms removed (module
        docstring), (j_max + 1, l_max + 1); zero beyond lmax."""
        n = float(self.n)
        top = max(j_max, l_max)
        w_raw = self._raw.power(top)
        a = (2 * np.arange(top + 1) + 1) / (4.0 * np.pi)
        s = (2 * np.arange(top + 1) + 1) * w_raw            # S_L / N²
        aj, al = a[:j_max + 1, None], a[None, :l_max + 1]
        sj, sl = s[:j_max + 1, None], s[None, :l_max + 1]
        m_jl = coupling_matrix(self.power(j_max + l_max) / self.omega ** 2, j_max, l_max)
        x_hat = self._raw.triple(j_max, l_max)
        # N³ X̂ minus the coincident triples, over N(N−1)(N−2), everything divided by N³
        x = (x_hat - (aj * (sl - al / n) + al * (sj - aj / n)) / n
             - (1.0 - 1.0 / n) * (2 * np.arange(j_max + 1)[:, None] + 1) * m_jl / n
             - aj * al / n ** 2) / ((1.0 - 1.0 / n) * (1.0 - 2.0 / n))
        known = min(self.lmax, j_max) + 1, min(self.lmax, l_max) + 1
        out = np.zeros((j_max + 1, l_max + 1))
        out[:known[0], :known[1]] = x[:known[0], :known[1]]
        return self.omega ** 3 * out

    def describe(self):
        return (f"mask from {self.n} randoms {self.source} (nside {self.nside}, f_sky "
                f"{self.mode_fraction():.3g}, noise 1/(4πN) removed)")

    def fingerprint(self):
        """What defines the mask in a cache key."""
        import hashlib
        return ["randoms", hashlib.sha256(self.map.tobytes()).hexdigest(), self.nside,
                int(self.lmax)]
