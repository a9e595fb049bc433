"""Angular masks for the curved-sky estimator: the exact linear-theory expectation of the
end-point multipole estimator for a window separable into w(r) M(n̂) (docs/curved_mask.md).

For a field statistically isotropic about the observer (<a_LM(r1) a*_L'M'(r2)> =
δ_LL' δ_MM' C_L(r1, r2)), the full-sky formula of likelihood.curved.estimator holds with C_J
replaced by its pseudo-spectrum (docs/curved_mask.md §2)

    P̂_ℓ(k) = (2ℓ+1)(4π/I₂) Σ_J (2J+1) ∫∫ dr1 dr2 r1² r2² w1 w2 g_ℓJ(kr1) i^J j_J(kr2) C̃_J(r1, r2),
    C̃_J = Σ_L M_JL C_L,   M_JL = (2L+1)/(4π) Σ_K (2K+1) W_K (J L K; 0 0 0)²,
    I₂ = ∫ r² w² dr ∫ M² dΩ,

W_K = Σ_m |m_Km|²/(2K+1) the mask's angular power (m_Km = ∫ M Y*_Km dΩ): the pseudo-spectrum
mode-coupling matrix (Hivon et al. 2002, ApJ 567, 2, eq. A31). Only the mask's power enters
(the estimator averages over directions of k). Full sky: W_K = 4π δ_K0, M = identity.

Integral constraints (docs/curved_mask.md §4), C(x) subtracted inside the mask: radial,
C(r n̂) = ∫ M Δ(r n̂') dΩ'/Ω_M; global, C = ∫ w M Δ d³x/∫ w M d³x. With R the radial operator
of the constraint (R = identity for radial, R = 1 vᵀ, v ∝ r² w dr, for global), Ω_M = ∫ M dΩ,
X_JL = ∫ M M_J M_L dΩ (M_L the degree-L part of the mask):

    C̃_J = Σ_L [ M_JL C_L − X_JL/((2J+1) Ω_M) (C_L Rᵀ + R C_L) + W_J (2L+1) W_L/Ω_M² R C_L Rᵀ ].

Shot noise (Poisson, C_L = δ_D(r1 − r2)/(r1² n̄) for every L): without IC exactly
δ_ℓ0 ∫ r² w²/n̄ dr / ∫ r² w² dr; the IC terms as above with Σ_L X_JL = ∫ M² M_J dΩ and
Σ_L (2L+1) W_L = ∫ M² dΩ.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError, DataError
from ..numerics.legendre import legendre_all
from .bessel import bessel_order_max, bessel_x_min, spherical_jn_all
from .estimator import (IC_KINDS, EstimatorResolution, NodeSpectra, Templates, bin_average,
                        radial_projection, resolution_grids)
from .lightcone import ResolutionWarning

__all__ = ["Cap", "HealpixMask", "FULL_SKY", "wigner3j_zero_sq_table", "coupling_matrix",
           "band_limit", "constrained_coupling", "coupled_spectra",
           "masked_templates", "read_healpix_map", "separability", "SeparabilityWarning",
           "masked_multipoles", "masked_radial_field_templates", "MASK_TOLERANCE"]

MASK_TOLERANCE = 1e-4     # default: mask power left beyond the band limit, relative to ∫M²dΩ


def _log_factorials(n):
    from scipy.special import gammaln
    return gammaln(np.arange(n + 1) + 1.0)


def wigner3j_zero_sq_table(l1, l2, l3, log_fact=None):
    """(l1 l2 l3; 0 0 0)² for integer arrays (broadcast), 0 outside the triangle or for odd
    l1 + l2 + l3. Closed form (Edmonds 1957, eq. 3.7.17), with 2g = l1 + l2 + l3:
    [(2g−2l1)!(2g−2l2)!(2g−2l3)!/(2g+1)!] [g!/((g−l1)!(g−l2)!(g−l3)!)]², in logarithms
    (relative error ~1e-12 for l ≲ 2000)."""
    l1, l2, l3 = np.broadcast_arrays(*(np.asarray(x, dtype=np.int64) for x in (l1, l2, l3)))
    s = l1 + l2 + l3
    ok = (s % 2 == 0) & (l3 <= l1 + l2) & (l3 >= np.abs(l1 - l2)) & (np.minimum(l1, l2) >= 0)
    lf = _log_factorials(int(s.max(initial=0)) + 1) if log_fact is None else log_fact
    g = np.where(ok, s // 2, 0)
    a, b, c = (np.where(ok, x, 0) for x in (l1, l2, l3))
    lg = (lf[2 * g - 2 * a] + lf[2 * g - 2 * b] + lf[2 * g - 2 * c] - lf[2 * g + 1]
          + 2.0 * (lf[g] - lf[g - a] - lf[g - b] - lf[g - c]))
    return np.where(ok, np.exp(lg), 0.0)


def coupling_matrix(power, j_max, l_max):
    """M_JL = (2L+1)/(4π) Σ_K (2K+1) W_K (J L K; 0 0 0)² for J ≤ j_max, L ≤ l_max
    (Hivon et al. 2002, eq. A31, for the pseudo-spectrum of a field isotropic about the
    observer), (j_max + 1, l_max + 1). ``power``: W_K, K = 0..K_band (zero beyond)."""
    W = np.asarray(power, dtype=float)
    L = np.arange(l_max + 1)
    lf = _log_factorials(2 * (j_max + l_max) + 2)
    out = np.zeros((j_max + 1, l_max + 1))
    for J in range(j_max + 1):
        t = np.arange(J + 1)[None, :]
        K = np.abs(J - L)[:, None] + 2 * t                     # J + L + K even, |J − L| ≤ K
        ok = (t <= np.minimum(J, L)[:, None]) & (K < W.size)
        Kc = np.where(ok, K, 0)
        w3 = wigner3j_zero_sq_table(J, L[:, None], Kc, lf)
        out[J] = (2 * L + 1) / (4 * np.pi) * np.sum(np.where(ok, (2 * Kc + 1) * W[Kc] * w3, 0.0),
                                                      axis=1)
    return out


def band_limit(power, m2, tolerance):
    """Smallest K with Σ_{K' > K} (2K'+1) W_K' ≤ tolerance · ∫M² dΩ (Parseval:
    Σ_K (2K+1) W_K = ∫ M² dΩ); the last K of ``power`` if the tolerance is not reached."""
    kept = np.cumsum((2 * np.arange(len(power)) + 1) * np.asarray(power))
    tail = m2 - kept
    hit = np.flatnonzero(tail <= tolerance * m2)
    return int(hit[0]) if hit.size else len(power) - 1


@dataclass(frozen=True)
class Cap:
    """Polar cap of sky fraction ``f_sky``: M = 1 for cos θ ≥ c = 1 − 2 f_sky, else 0.

    Azimuthal, so m_K0 are its only coefficients: m_K0 = 2π √((2K+1)/4π) I_K,
    I_K = ∫_c^1 L_K(x) dx = [L_{K−1}(c) − L_{K+1}(c)]/(2K+1) (K ≥ 1; from
    (2K+1) L_K = L'_{K+1} − L'_{K−1}, e.g. Abramowitz & Stegun 1964, 8.5.3), I_0 = 1 − c,
    and W_K = |m_K0|²/(2K+1) = π I_K². Its degree-K part is M_K(x) = (2K+1)/2 I_K L_K(x).
    """
    f_sky: float

    def __post_init__(self):
        try:
            f = float(self.f_sky)
        except (TypeError, ValueError):
            raise ConfigError(f"mask f_sky = {self.f_sky!r}: expected a sky fraction in (0, 1]") \
                from None
        if not (0.0 < f <= 1.0):
            raise ConfigError(f"mask f_sky = {self.f_sky!r}: expected a sky fraction in (0, 1]")

    @property
    def c(self):
        return 1.0 - 2.0 * float(self.f_sky)

    @property
    def area(self):
        """Ω_M = ∫ M dΩ = 4π f_sky."""
        return 4.0 * np.pi * float(self.f_sky)

    m2 = area        # ∫ M² dΩ (binary mask)

    def legendre_integrals(self, k_max):
        """I_K = ∫_c^1 L_K(x) dx, K = 0..k_max."""
        leg = legendre_all(np.array([self.c]), k_max + 1)[:, 0]
        K = np.arange(k_max + 1)
        out = np.empty(k_max + 1)
        out[0] = 1.0 - self.c
        out[1:] = (leg[:-2][: k_max] - leg[2:][: k_max]) / (2 * K[1:] + 1)
        if self.f_sky == 1.0:
            out[1:] = 0.0
        return out

    def power(self, k_max):
        """W_K = π I_K², K = 0..k_max (exact at every K)."""
        return np.pi * self.legendre_integrals(k_max) ** 2

    def power_known(self):
        """The highest K the mask's power is known to (analytic: unbounded)."""
        return None

    def square_power(self, k_max):
        """Σ_m m_Km (M²)*_Km/(2K+1): the cross power of M and M² (= W_K for a binary mask)."""
        return self.power(k_max)

    def triple(self, j_max, l_max):
        """X_JL = ∫ M M_J M_L dΩ = 2π ∫_c^1 M_J M_L dx, (j_max + 1, l_max + 1), exact by
        Gauss–Legendre on [c, 1] (the integrand is a polynomial of degree J + L)."""
        n = (j_max + l_max) // 2 + 2
        t, u = np.polynomial.legendre.leggauss(n)
        x = 0.5 * (1 - self.c) * t + 0.5 * (1 + self.c)
        wx = 0.5 * (1 - self.c) * u
        top = max(j_max, l_max)
        leg = legendre_all(x, top) * ((2 * np.arange(top + 1) + 1) / 2.0
                                         * self.legendre_integrals(top))[:, None]
        return 2.0 * np.pi * (leg[: j_max + 1] * wx) @ leg[: l_max + 1].T

    def describe(self):
        return f"cap f_sky = {float(self.f_sky):g}"


FULL_SKY = Cap(1.0)


class HealpixMask:
    """A mask given as a HEALPix map (values ≥ 0, RING or NESTED ordering), analysed with
    healpy (optional dependency: pip install "ergofit[healpix]"): W_K = healpy.anafast(M),
    the pseudo-spectrum of the map (Górski et al. 2005), known to K = ``lmax`` (default
    3 nside − 1); Ω_M and ∫M² from the pixel sums. The pixelised map is the mask: scales below
    the pixel are those of the map itself. Integral constraints need the triple integrals
    X_JL, computed on the pixels from maps of the mask's degree-L parts."""

    def __init__(self, values, nest=False, lmax=None, source="mask map"):
        try:
            import healpy
        except ImportError:
            raise ConfigError(f"{source}: a HEALPix mask needs healpy (pip install "
                              "\"ergofit[healpix]\")") from None
        self._hp = healpy
        m = np.asarray(values, dtype=float)
        if m.ndim != 1 or not healpy.isnpixok(m.size):
            raise DataError(f"{source}: expected a HEALPix map (12 nside² values), got shape "
                            f"{m.shape}")
        if not np.all(np.isfinite(m)) or np.any(m < 0) or not np.any(m > 0):
            raise DataError(f"{source}: expected finite mask values >= 0, not all zero")
        if nest:
            m = healpy.reorder(m, n2r=True)
        self.source = source
        self.map = m
        self.nside = healpy.npix2nside(m.size)
        self.lmax = 3 * self.nside - 1 if lmax is None else lmax
        if isinstance(self.lmax, bool) or not isinstance(self.lmax, (int, np.integer)) \
                or self.lmax < 1:
            raise ConfigError(f"{source}: lmax = {lmax!r}: expected an integer >= 1")
        pix = 4.0 * np.pi / m.size
        self.area = float(m.sum() * pix)
        self.m2 = float((m * m).sum() * pix)
        self._alm = healpy.map2alm(m, lmax=self.lmax)
        self._w = healpy.alm2cl(self._alm)
        binary = np.array_equal(m * m, m)
        self._w2 = self._w if binary else \
            healpy.alm2cl(self._alm, healpy.map2alm(m * m, lmax=self.lmax))

    @classmethod
    def from_file(cls, path, lmax=None):
        """The mask in a HEALPix FITS file (first column; ordering from its header, as
        healpy.read_map reads it); one-line DataError naming the file if it cannot be read."""
        return cls(read_healpix_map(path), lmax=lmax, source=str(path))

    def mode_fraction(self):
        """f = (∫M² dΩ)²/(4π ∫M⁴ dΩ): the sky fraction of the mode count (= f_sky for a binary
        mask; the weighted-volume rule of Feldman, Kaiser & Peacock 1994 applied to M)."""
        pix = 4.0 * np.pi / self.map.size
        return self.m2 ** 2 / (4.0 * np.pi * float(np.sum(self.map ** 4) * pix))

    def _pad(self, arr, k_max):
        out = np.zeros(k_max + 1)
        n = min(k_max, self.lmax) + 1
        out[:n] = arr[:n]
        return out

    def power(self, k_max):
        """W_K for K = 0..k_max (zero beyond lmax)."""
        return self._pad(self._w, k_max)

    def power_known(self):
        return self.lmax

    def square_power(self, k_max):
        return self._pad(self._w2, k_max)

    def triple(self, j_max, l_max):
        """X_JL = ∫ M M_J M_L dΩ by the pixel sum (M_L from healpy.alm2map of the degree-L
        coefficients); zero beyond lmax. Memory: (min(J_max, lmax) + 65) maps of 12 nside²."""
        hp = self._hp
        ell = hp.Alm.getlm(self.lmax)[0]
        pix = 4.0 * np.pi / self.map.size

        def parts(lo, hi):
            return np.array([hp.alm2map(np.where(ell == L, self._alm, 0.0), self.nside,
                                        lmax=self.lmax) for L in range(lo, hi)])

        nj, nl = min(j_max, self.lmax) + 1, min(l_max, self.lmax) + 1
        left = parts(0, nj) * (self.map * pix)
        out = np.zeros((j_max + 1, l_max + 1))
        for lo in range(0, nl, 64):
            hi = min(lo + 64, nl)
            out[:nj, lo:hi] = left @ parts(lo, hi).T
        return out

    def describe(self):
        return f"HEALPix map {self.source} (nside {self.nside}, f_sky {self.area / 4 / np.pi:.3g})"


def read_healpix_map(path):
    """The values of a HEALPix FITS map (first column, RING order; healpy.read_map converts a
    NESTED map by its header); one-line errors naming the file (ConfigError naming the
    ``healpix`` extra when healpy is missing, DataError when unreadable)."""
    try:
        import healpy
    except ImportError:
        raise ConfigError(f"{path}: a HEALPix mask needs healpy (pip install "
                          "\"ergofit[healpix]\")") from None
    import os
    if not os.path.isfile(path):
        raise DataError(f"{path}: HEALPix mask file not found")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            values = healpy.read_map(path, field=0, nest=False, dtype=float)
    except Exception as exc:  # noqa: BLE001 - any reader failure becomes one line
        raise DataError(f"{path}: not a readable HEALPix FITS map "
                        f"({type(exc).__name__}: {str(exc).splitlines()[0][:80]})") from None
    return np.asarray(values, dtype=float)


def constrained_coupling(mask, power, j_max, l_max, ic):
    """The angular operators of the masked estimator with an integral constraint (module
    docstring; derivation in docs/curved_mask.md §4): (coup, xp, wp, wj) with
    coup_JL = M_JL (ic "none" or "global") or M_JL − 2 X_JL/((2J+1)Ω_M) + W_J (2L+1)W_L/Ω_M²
    (ic "radial", where R is the identity), xp_JL = X_JL/((2J+1)Ω_M), wp_L = (2L+1)W_L/Ω_M²,
    wj_J = W_J (None for ic "none"). ``power``: W_K for K = 0..K_band (truncated)."""
    power = np.asarray(power, dtype=float)
    coup = coupling_matrix(power, j_max, l_max)
    if ic == "none":
        return coup, None, None, None
    W = np.zeros(max(j_max, l_max) + 1)
    n = min(W.size, power.size)
    W[:n] = power[:n]
    J = np.arange(j_max + 1)
    xp = mask.triple(j_max, l_max) / ((2 * J + 1)[:, None] * mask.area)
    wp = (2 * np.arange(l_max + 1) + 1) * W[:l_max + 1] / mask.area ** 2
    wj = W[:j_max + 1]
    if ic == "radial":
        coup = coup - 2.0 * xp + np.outer(wj, wp)
    return coup, xp, wp, wj


def coupled_spectra(c_l, operators, v, ic):
    """C̃_J(r_i, r_j), J = 0..J_max (J_max + 1, n_r, n_r), from C_L(r_i, r_j) (L_max + 1, n_r,
    n_r) and the operators of :func:`constrained_coupling` (module docstring):
    "none", "radial": Σ_L coup_JL C_L; "global" (R = 1vᵀ, ``v`` the normalised radial weights
    r² w dr of the survey mean): Σ_L [M_JL C_L − xp_JL (C_L v 1ᵀ + 1 vᵀ C_L)] + W_J (Σ_L wp_L
    vᵀ C_L v) 1 1ᵀ."""
    coup, xp, wp, wj = operators
    n_l, nr = c_l.shape[0], c_l.shape[-1]
    cj = (coup @ c_l.reshape(n_l, -1)).reshape(-1, nr, nr)
    if ic == "global":
        cv, vc = c_l @ v, np.einsum("r,Lrs->Ls", v, c_l)
        u, u2 = xp @ cv, xp @ vc
        a3 = wp @ (vc @ v)
        cj -= u[:, :, None] + u2[:, None, :] - (wj * a3)[:, None, None]
    return cj


def _pair_groups(pairs, size_per_pair, budget):
    n = max(1, int(budget // max(size_per_pair, 1)))
    return [pairs[i:i + n] for i in range(0, len(pairs), n)]


def masked_templates(cosmo, shell, mask, edges, tracer_a, terms_a=("density", "rsd"),
                     tracer_b=None, terms_b=None, ells=(0, 2, 4), ic="none",
                     resolution=EstimatorResolution(), tolerance=MASK_TOLERANCE,
                     combine_pieces=False, snapshot_z=None, memory=1.5e9):
    """Templates of the expected estimator for the window w(r) M(n̂) (module docstring):
    ``shell`` gives w(r) and n̄(r) (likelihood.curved.estimator.Shell), ``mask`` M(n̂)
    (:class:`Cap`, :class:`HealpixMask`, FULL_SKY). Other arguments and the result
    (:class:`~likelihood.curved.estimator.Templates`, units (Mpc/h)³, Π_ℓ for odd ℓ) as
    likelihood.curved.estimator.multipole_templates, which this equals for FULL_SKY.

    Band limit: the mask's power is kept to K_band, the first K with the power beyond it
    ≤ ``tolerance`` ∫M²dΩ (or J_max + L_top, beyond which no K couples); orders L ≤ L_top =
    min(J_max + K_band, the highest order resolved by the q grid). ``memory``: bytes for the
    C_L(r1, r2) of the pairs processed together (each group of pairs recomputes the kernels;
    the peak adds one pair's C̃_J, 8 (J_max + 1) n_r² bytes). ``meta`` adds k_band, l_top and
    mask_tail (power beyond K_band / ∫M²). The q grid (q_max) is the full-sky rule: the mask's
    edges couple the orders L up to q_max r_max into J ≤ J_max; the q_range doubling test
    covers them (docs/curved_mask.md §9: the mask adds a quarter to the full-sky q tail).

    Cost (bench/curved_sky.py --mask): ∝ L_top n_r² n_q per pair of pieces plus the coupling
    (J_max+1)(L_top+1) n_r² per pair; 7 s for the direct path of the demo shell at f_sky = 0.25,
    50 s for 15 pair templates (one BLAS thread, a loaded 2-core machine).
    """
    if ic not in IC_KINDS:
        raise ConfigError(f"ic = {ic!r}: expected one of {IC_KINDS}")
    ells = tuple(int(l) for l in ells)
    if not ells or min(ells) < 0 or max(ells) > 4:
        raise ConfigError(f"ells = {ells}: expected multipoles between 0 and 4")
    if not all(hasattr(mask, a) for a in ("power", "area", "m2", "triple", "square_power")):
        raise ConfigError(f"mask = {mask!r}: expected a Cap, a HealpixMask or FULL_SKY")
    if not (isinstance(tolerance, (int, float)) and 0.0 < tolerance < 1.0):
        raise ConfigError(f"mask tolerance = {tolerance!r}: expected a number in (0, 1)")
    ns = NodeSpectra(cosmo, shell, edges, tracer_a, terms_a, tracer_b, terms_b, resolution,
                     combine_pieces, snapshot_z)
    j_max, nr = ns.j_max, ns.r.size
    x = float(ns.k[-1]) * shell.r_max
    if bessel_x_min(j_max + 1) <= x:
        warnings.warn(f"masked curved-sky estimator: J_max = {j_max} does not resolve k_max "
                      f"r_max = {x:.4g} (needs J_max >= {bessel_order_max(x)}); raise j_factor",
                      ResolutionWarning, stacklevel=2)
    k_cap = j_max + ns.l_limit
    W = mask.power(k_cap)
    k_band = band_limit(W, mask.m2, tolerance)
    mask_tail = float((mask.m2 - np.sum((2 * np.arange(k_band + 1) + 1) * W[:k_band + 1]))
                      / mask.m2)
    known = mask.power_known()
    if known is not None and known < k_cap and mask_tail > tolerance:
        warnings.warn(f"masked curved-sky estimator: {mask.describe()} is known to K = {known} "
                      f"and leaves {mask_tail:.2g} of its power beyond (> {tolerance:g}); the "
                      f"estimator couples orders up to K = {k_cap}: raise lmax",
                      ResolutionWarning, stacklevel=2)
    l_top = min(ns.l_limit, j_max + k_band)
    W = np.where(np.arange(W.size) <= k_band, W, 0.0)
    operators = constrained_coupling(mask, W, j_max, l_top, ic)
    v = ns.base / ns.base.sum()
    i2 = float(np.sum(ns.wr * ns.r ** 2 * ns.weight ** 2)) * mask.m2
    na, nb = len(ns.names_a), len(ns.names_b)
    pairs = ([(a, b) for a in range(na) for b in range(a, nb)] if ns.auto else
             [(a, b) for a in range(na) for b in range(nb)])
    per_pair = 8.0 * nr * nr * (l_top + 1)
    acc = {}
    lfac = np.array([(2 * l + 1) * 4 * np.pi / i2 for l in ells])[:, None]
    for group in _pair_groups(pairs, per_pair, memory):
        spectra = ns.spectra(l_top, group)
        for p in group:
            c = spectra.pop(p)
            cj = coupled_spectra(c, operators, v, ic)
            del c
            both = ns.auto and p[0] != p[1]
            out = 0.0
            for j in range(j_max + 1):
                stack = np.stack([cj[j], cj[j].T]) if both else cj[j][None]
                out = out + ns.project(j, ells, stack).sum(axis=0)
            acc[p] = lfac * out
    binned = {p: ns.bin(vals) for p, vals in acc.items()}
    names = {(ns.names_a[a], ns.names_b[b]): binned[a, b] for a, b in pairs}
    noise = None
    if shell.nbar is not None:       # a cross spectrum: the objects the two populations share
        noise = _noise(ns, mask, ells, ic, i2, v, lfac, W, j_max)
    meta = dict(j_max=j_max, n_q=ns.q.size, n_r=nr, n_k=ns.k.size, q_max=float(ns.q[-1]),
                ic=ic, snapshot_z=snapshot_z, k_band=k_band, l_top=l_top,
                mask_tail=mask_tail, mask=mask.describe())
    return Templates(ells, ns.edges, names, noise, ns.auto, meta)


def _noise(ns, mask, ells, ic, i2, v, lfac, W, j_max):
    """Shot-noise template: δ_ℓ0 ∫r²w²/n̄ dr/∫r²w² dr plus the IC terms (module docstring)."""
    r, wr, w = ns.r, ns.wr, ns.weight
    nbar = ns.nbar()
    out = np.zeros((len(ells), ns.k.size))
    if 0 in ells:
        out[ells.index(0)] += np.sum(wr * r ** 2 * w ** 2 / nbar) / np.sum(wr * r ** 2 * w ** 2)
    if ic == "none":
        return ns.bin(out)
    J = np.arange(j_max + 1)
    yp = mask.square_power(j_max) / mask.area            # Σ_L X_JL / ((2J+1) Ω_M)
    ws = W[:j_max + 1] * mask.m2 / mask.area ** 2
    nd = 1.0 / (wr * r ** 2 * nbar)                        # C_L(r_i, r_j) = δ_ij nd_i
    N = np.diag(nd)
    for j in J:
        if ic == "radial":
            cj = (ws[j] - 2.0 * yp[j]) * N
        else:
            nv = nd * v
            cj = (-yp[j] * (nv[:, None] + nv[None, :])
                  + ws[j] * np.sum(v * nv) * np.ones_like(N))
        out += lfac * ns.project(int(j), ells, cj)
    return ns.bin(out)


def masked_multipoles(cosmo, shell, mask, edges, tracer_a, terms_a=("density", "rsd"),
                      tracer_b=None, terms_b=None, ells=(0, 2, 4), ic="none",
                      resolution=EstimatorResolution(), tolerance=MASK_TOLERANCE,
                      snapshot_z=None):
    """Direct computation (each tracer's pieces summed into one kernel first): (n_ell, n_bins)
    signal plus the shot noise if ``shell.nbar`` is given (a cross spectrum: that of its shared
    objects, see likelihood.curved.estimator.multipole_templates). See :func:`masked_templates`."""
    t = masked_templates(cosmo, shell, mask, edges, tracer_a, terms_a, tracer_b, terms_b, ells,
                         ic, resolution, tolerance, combine_pieces=True, snapshot_z=snapshot_z)
    return t.combine({}, {})


def masked_radial_field_templates(shell, mask, edges, names, profiles, ells=(0, 2, 4), ic="none",
                                  resolution=EstimatorResolution(k_nodes=16), names_b=None,
                                  profiles_b=None):
    """Pair templates of the masked estimator applied to m = Σ_a x_a m_a, deterministic fields
    isotropic about the observer (the constrained-field mean field), as
    likelihood.curved.estimator.radial_field_templates, which this equals for FULL_SKY (tests);
    ``names_b``, ``profiles_b``: the fields of tracer B of a cross spectrum (every pair a, b).

    Exact and cheap: such a field has only a_00(r) = √(4π) m(r), i.e. C_L = δ_L0 C_0 with
    C_0^{ab}(r1, r2) = 4π m_a(r1) m_b(r2), so C̃_J = M_J0 C_0 = W_J C_0/(4π) plus the integral
    constraint terms (module docstring with L_max = 0; (J 0 K; 0 0 0)² = δ_JK/(2J+1)); only
    K = J ≤ J_max of the mask's power enters (no band limit). ``profiles`` (n_a, n_r) on the
    window nodes of ``resolution`` (those of monopole_profiles)."""
    edges = np.asarray(edges, dtype=float)
    j_max, _, (r, wr), (k, wk) = resolution_grids(shell, edges, resolution)
    w = shell.weight_on(r)
    base = wr * r ** 2 * w
    v = base / base.sum()
    i2 = float(np.sum(wr * r ** 2 * w ** 2)) * mask.m2
    operators = constrained_coupling(mask, mask.power(j_max), j_max, 0, ic)
    jk = spherical_jn_all(j_max + 5, k[:, None] * r[None, :])
    lfac = np.array([(2 * l + 1) * 4 * np.pi / i2 for l in ells])[:, None]
    m = np.atleast_2d(np.asarray(profiles, dtype=float))
    cross = names_b is not None
    m_b = np.atleast_2d(np.asarray(profiles_b, dtype=float)) if cross else m
    pairs = ([(a, b) for a in range(len(names)) for b in range(len(names_b))] if cross else
             [(a, b) for a in range(len(names)) for b in range(a, len(names))])
    out = {}
    for a, b in pairs:
        c0 = 4.0 * np.pi * np.outer(m[a], m_b[b])
        if not cross and b != a:
            c0 = c0 + c0.T
        cj = coupled_spectra(c0[None], operators, v, ic)
        t = sum(radial_projection(j, ells, cj[j], jk, base) for j in range(j_max + 1))
        out[names[a], (names_b if cross else names)[b]] = bin_average(lfac * t, wk,
                                                                      edges.size - 1)
    return out


class SeparabilityWarning(UserWarning):
    """The randoms' density is measurably not a product w(r) M(n̂) (distance × direction)."""


def separability(positions, n_theta=8, n_phi=16, n_r=16, alpha=1e-3, source="randoms"):
    """How far a random catalogue is from separable in distance × direction, the assumption of
    the masked curved-sky expectation (window w(r) M(n̂)).

    The randoms are counted in equal-area sky patches (n_theta bands in cos θ × n_phi sectors in
    φ about the observer at the origin; patches holding fewer than 5 n_r randoms are left out)
    and n_r distance bins with equal numbers of randoms. Separability means the table of counts
    n_pb is the product of its margins, E_pb = n_p· n_·b / N: Pearson's χ² test of independence
    (Pearson 1900; dof = (P − 1)(B − 1)), and the size of the departure is the root mean square
    contingency φ = √(max(χ² − dof, 0)/N) (Pearson 1904), the count-weighted rms of
    n_pb/E_pb − 1 with its Poisson expectation removed: a density p_p p_b (1 + ε s_p t_b) with
    zero-mean s, t of unit variance has φ = ε.

    ``positions``: (N, 3) Cartesian positions [Mpc/h] about the observer. Returns a dict
    (chi2, dof, p_value, rms_departure, n_patches, n_bins). A SeparabilityWarning naming
    ``source`` when p_value < ``alpha``.
    """
    from scipy.stats import chi2 as chi2_dist
    x = np.asarray(positions, dtype=float)
    if x.ndim != 2 or x.shape[1] != 3 or x.shape[0] < 100 or not np.all(np.isfinite(x)):
        raise DataError(f"{source}: expected finite (N, 3) positions with N >= 100")
    r = np.sqrt(np.sum(x * x, axis=1))
    if np.any(r <= 0):
        raise DataError(f"{source}: a random sits at the observer (r = 0)")
    mu = np.clip(x[:, 2] / r, -1.0, 1.0)
    phi = np.mod(np.arctan2(x[:, 1], x[:, 0]), 2 * np.pi)
    band = np.minimum(((mu + 1.0) / 2.0 * n_theta).astype(int), n_theta - 1)
    sector = np.minimum((phi / (2 * np.pi) * n_phi).astype(int), n_phi - 1)
    patch = band * n_phi + sector
    edges = np.quantile(r, np.linspace(0.0, 1.0, n_r + 1))
    rbin = np.clip(np.searchsorted(edges, r, side="right") - 1, 0, n_r - 1)
    table = np.zeros((n_theta * n_phi, n_r))
    np.add.at(table, (patch, rbin), 1.0)
    table = table[table.sum(axis=1) >= 5 * n_r]
    table = table[:, table.sum(axis=0) > 0]
    n_p, n_b = table.shape
    if n_p < 2 or n_b < 2:
        raise DataError(f"{source}: too few randoms for a separability test ({x.shape[0]})")
    total = table.sum()
    expect = np.outer(table.sum(axis=1), table.sum(axis=0)) / total
    chi2 = float(np.sum((table - expect) ** 2 / expect))
    dof = (n_p - 1) * (n_b - 1)
    out = dict(chi2=chi2, dof=dof, p_value=float(chi2_dist.sf(chi2, dof)),
               rms_departure=float(np.sqrt(max(chi2 - dof, 0.0) / total)),
               n_patches=n_p, n_bins=n_b)
    if out["p_value"] < alpha:
        warnings.warn(f"{source}: not separable in distance x direction (rms departure "
                      f"{out['rms_departure']:.3g} over {n_p} sky patches x {n_b} distance bins, "
                      f"chi2/dof = {chi2 / dof:.3g}); the masked curved-sky expectation assumes "
                      "w(r) M(n)", SeparabilityWarning, stacklevel=2)
    return out

