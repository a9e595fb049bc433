"""Tracer kernel: linear bias, local-f_NL scale-dependent bias, Kaiser RSD and the local
relativistic projection terms, with exact Legendre multipoles.

The observed number-count contrast of a tracer, in linear theory and in the plane-parallel
(fixed line of sight) approximation, is a polynomial of degree two in mu = k_hat . n_hat
(n_hat from the observer to the source):

    Delta_g(k, mu; z) = [ A(k) + i mu B(k) + F mu^2 ] delta_m(k, z),
    A = b1 + Delta_b(k, z) + gamma2(z)/k^2,   B = gamma1(z)/k,   F = f(z),

with delta_m the comoving-gauge matter density contrast and the Fourier convention
delta(x) = int d^3k/(2 pi)^3 delta(k) e^{+i k.x}. The derivation of gamma1 (Doppler) and
gamma2 (potentials + gauge) is written out in docs/projection.md (Yoo, Fitzpatrick & Zaldarriaga
2009; Bonvin & Durrer 2011; Challinor & Lewis 2011; Jeong, Schmidt & Hirata 2012).

Regime of validity (read before trusting a number):
* linear theory throughout (k <~ 0.1 h/Mpc at z ~ 1; less at low z);
* plane-parallel: wide-angle corrections of relative order 1/(k chi) (odd multipoles, Doppler)
  and 1/(k chi)^2 (even multipoles) are NOT included; a :class:`PlaneParallelWarning` is issued
  when k chi(z) < ``PLANE_PARALLEL_KCHI``;
* only the terms that are local at the source: lensing convergence, integrated Sachs-Wolfe,
  Shapiro time delay and the observer terms are line-of-sight integrals or observer-position
  terms, not a multiplicative kernel in Fourier space, and are left out.

Everything is vectorised over k (h/Mpc); spectra are in (Mpc/h)^3.
"""
from __future__ import annotations

import math
import numbers
import warnings
from dataclasses import dataclass

import numpy as np

from .cosmology import HUBBLE_DISTANCE
from ..errors import ErgofitError

__all__ = ["DELTA_C", "PROJECTION_TERMS", "EFFECTS", "DEFAULT_EFFECTS", "PLANE_PARALLEL_KCHI",
           "PlaneParallelWarning", "Tracer", "Kernel", "gamma1", "gamma2", "fnl_alpha",
           "kernel", "pair_multipoles", "multipoles", "cross_multipoles", "effective_fnl",
           "legendre_moment"]

DELTA_C = 1.686
"""Spherical-collapse threshold used in the f_NL scale-dependent bias (Dalal et al. 2008)."""

PROJECTION_TERMS = ("doppler", "gauge", "redshift_potential", "metric_potential")
"""Individually switchable local projection pieces (docs/projection.md, section 6):

* ``doppler``: the radial peculiar velocity at the source through the redshift perturbation
  and the luminosity distance, gamma1 = f calH C with
  C = b_e - 2Q - calH'/calH^2 - 2(1 - Q)/(chi calH).
* ``gauge``: Newtonian-gauge number density minus comoving-gauge bias, f (3 - b_e) calH^2.
* ``redshift_potential``: the gravitational redshift -Psi of the source acting through the same
  factor C, (3/2) Omega_m(z) calH^2 C.
* ``metric_potential``: the metric at the source (volume distortion, Shapiro and ISW pieces
  differentiated along the ray, magnification of the potential), Phi'/calH + (2Q - 2) Phi + Psi,
  i.e. -(3/2) Omega_m(z) calH^2 (f - 2 + 2Q).

The name ``potential`` switches on the last three together (gamma2). The pieces are not
separately observable (each is gauge dependent); only their sum is physical.
"""

_GROUPS = {"potential": ("gauge", "redshift_potential", "metric_potential")}
EFFECTS = ("rsd", "fnl", "doppler", "potential") + PROJECTION_TERMS[1:]
DEFAULT_EFFECTS = ("rsd", "fnl", "doppler", "potential")

PLANE_PARALLEL_KCHI = 10.0
"""Below k chi(z) = 10 the plane-parallel kernel misses wide-angle corrections of order
1/(k chi) (~10% or more); a :class:`PlaneParallelWarning` says so."""


class PlaneParallelWarning(UserWarning):
    """The plane-parallel kernel is used on scales comparable to the distance to the source."""


# ------------------------------------------------------------------------------- validation
def _number(owner, name, value):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ErgofitError(f"{owner} {name} must be a real number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise ErgofitError(f"{owner} {name} must be finite, got {value!r}")
    return value


def _wavenumbers(k):
    try:
        k = np.atleast_1d(np.asarray(k, dtype=float))
    except (TypeError, ValueError):
        raise ErgofitError(f"wavenumber k must be an array of numbers (h/Mpc), got {k!r}") from None
    if k.ndim != 1 or k.size == 0:
        raise ErgofitError(f"wavenumber k must be a non-empty 1-D array (h/Mpc), got shape {k.shape}")
    if not np.all(np.isfinite(k)) or not np.all(k > 0.0):
        bad = k[~(np.isfinite(k) & (k > 0.0))][0]
        raise ErgofitError(f"wavenumber k must be finite and > 0 (h/Mpc), got {bad:.4g}")
    return k


def _redshift(z, positive=False):
    if isinstance(z, float) and (0.0 < z if positive else 0.0 <= z) and z < math.inf:
        return np.asarray(z)                                # one number: no array reductions
    try:
        z = np.asarray(z, dtype=float)
    except (TypeError, ValueError):
        raise ErgofitError(f"redshift z must be a number, got {z!r}") from None
    if not np.all(np.isfinite(z)) or not np.all(z >= 0.0):
        raise ErgofitError(f"redshift z must be finite and >= 0, got {z}")
    if positive and not np.all(z > 0.0):
        raise ErgofitError("redshift z must be > 0 for the projection terms (the 1/(chi calH) "
                           f"term diverges at the observer), got {z}")
    return z


def _scalar_redshift(z, positive=False):
    z = _redshift(z, positive)
    if z.ndim != 0:
        raise ErgofitError(f"redshift z must be a single number here, got an array of shape {z.shape}")
    return float(z)


def _resolve_effects(effects):
    """Set of elementary effect names (groups expanded); a bare string is one name."""
    if effects is None:
        effects = DEFAULT_EFFECTS
    if isinstance(effects, str):
        effects = (effects,)
    try:
        names = list(effects)
    except TypeError:
        raise ErgofitError(f"effects must be a list of names among {EFFECTS}, got {effects!r}") from None
    out = set()
    for name in names:
        if name not in EFFECTS:
            raise ErgofitError(f"unknown effect {name!r}; valid effects are {', '.join(EFFECTS)}")
        out.update(_GROUPS.get(name, (name,)))
    return out


def _resolve_terms(terms):
    if terms is None:
        return set(PROJECTION_TERMS)
    names = _resolve_effects(terms)
    bad = names - set(PROJECTION_TERMS)
    if bad:
        raise ErgofitError(f"projection terms must be among {', '.join(PROJECTION_TERMS)} "
                           f"(or 'potential'), got {sorted(bad)}")
    return names


def _ells(ells):
    if isinstance(ells, numbers.Integral):
        ells = (ells,)
    try:
        out = tuple(ells)
    except TypeError:
        raise ErgofitError(f"ells must be a list of integers >= 0, got {ells!r}") from None
    if not out or any(isinstance(l, bool) or not isinstance(l, numbers.Integral) or l < 0
                      for l in out):
        raise ErgofitError(f"ells must be a non-empty list of integers >= 0, got {ells!r}")
    return tuple(int(l) for l in out)


# ------------------------------------------------------------------------------- tracer
@dataclass(frozen=True)
class Tracer:
    """A galaxy sample.

    Parameters
    ----------
    b1 : linear bias w.r.t. the comoving-gauge (synchronous) matter density.
    fnl : local primordial non-Gaussianity amplitude (matter-era / "CMB" convention, see
        :func:`fnl_alpha`).
    p : response parameter of the scale-dependent bias, Delta_b ∝ (b1 - p); 1 for a
        universal mass function, 1.6 for recent-merger tracers (Slosar et al. 2008).
    nbar : comoving number density in (h/Mpc)^3; Poisson shot noise 1/nbar.
    b_e : evolution bias b_e = d ln(a^3 nbar_phys)/d ln a = -d ln(a^3 nbar_phys)/d ln(1+z),
        with nbar_phys the physical number density at fixed luminosity threshold (a^3 nbar_phys
        is the comoving density: b_e = 0 for a conserved population).
    s : magnification bias, slope of the cumulative counts s = d log10 N(<m)/dm at the
        magnitude limit; Q = 5 s / 2 (Q = 1 makes the 1/(chi calH) terms vanish).
    name : label.
    """

    b1: float = 2.0
    fnl: float = 0.0
    p: float = 1.0
    nbar: float = 1e-3
    b_e: float = 0.0
    s: float = 0.0
    name: str = "g"

    def __post_init__(self):
        for field in ("b1", "fnl", "p", "nbar", "b_e", "s"):
            object.__setattr__(self, field, _number("Tracer", field, getattr(self, field)))
        if self.p <= 0.0:
            raise ErgofitError(f"Tracer p must be > 0 (1 or 1.6 usually), got {self.p}")
        if self.nbar <= 0.0:
            raise ErgofitError(f"Tracer nbar must be > 0 (number density in (h/Mpc)^3), got {self.nbar}")
        if not isinstance(self.name, str) or not self.name:
            raise ErgofitError(f"Tracer name must be a non-empty string, got {self.name!r}")

    @property
    def Q(self) -> float:
        """Magnification slope Q = 5 s / 2."""
        return 2.5 * self.s

    @property
    def shot_noise(self) -> float:
        """Poisson shot noise 1/nbar in (Mpc/h)^3."""
        return 1.0 / self.nbar


@dataclass(frozen=True, eq=False)
class Kernel:
    """Delta_g(k, mu) = [A(k) + i mu B(k) + F mu^2] delta_m(k), on a k grid.

    A = b1 + Delta_b(k) + gamma2/k^2 (dimensionless), B = gamma1/k (dimensionless),
    F = f (growth rate) if RSD is on, else 0. A and B are real 1-D arrays (or scalars,
    broadcast against the power spectrum in :func:`pair_multipoles`).
    """

    A: np.ndarray
    B: np.ndarray
    F: float

    def __post_init__(self):
        for field in ("A", "B"):
            try:
                value = np.asarray(getattr(self, field), dtype=float)
            except (TypeError, ValueError):
                raise ErgofitError(f"Kernel {field} must be a real array, got "
                                   f"{getattr(self, field)!r}") from None
            if value.ndim > 1 or not np.all(np.isfinite(value)):
                raise ErgofitError(f"Kernel {field} must be a finite scalar or 1-D array")
            object.__setattr__(self, field, value)
        object.__setattr__(self, "F", _number("Kernel", "F", self.F))


# ------------------------------------------------------------------------------- physics
def _background(cosmo, z):
    """f, calH [h/Mpc], calH'/calH^2, Omega_m(z), chi [Mpc/h] at z (arrays)."""
    bg = dict(f=cosmo.growth_rate(z), H=cosmo.conformal_hubble(z),
              ratio=cosmo.conformal_hubble_ratio(z), om=cosmo.Omega_m(z),
              chi=cosmo.comoving_distance(z))
    bg = {key: np.asarray(val, dtype=float) for key, val in bg.items()}
    for key, val in bg.items():
        if not np.all(np.isfinite(val)):
            raise ErgofitError(f"cosmology returned a non-finite background quantity {key} at z = {z}")
    return bg


def _doppler_factor(bg, b_e, Q):
    """C = b_e - 2Q - calH'/calH^2 - 2(1 - Q)/(chi calH) (docs/projection.md, eq. 6.2)."""
    return b_e - 2.0 * Q - bg["ratio"] - 2.0 * (1.0 - Q) / (bg["chi"] * bg["H"])


def _as_float(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def gamma1(cosmo, z, b_e=0.0, Q=0.0, terms=None):
    """Doppler coefficient gamma1(z) in h/Mpc; B(k) = gamma1/k (docs/projection.md, eq. 6.3).

        gamma1 = f calH [ b_e - 2Q - calH'/calH^2 - 2(1 - Q)/(chi calH) ]

    (Bonvin & Durrer 2011; Challinor & Lewis 2011; Jeong, Schmidt & Hirata 2012), with
    calH = aH/c, prime = d/d(conformal time), b_e = d ln(a^3 nbar)/d ln a, Q = 5s/2,
    mu = k_hat.n_hat and n_hat from the observer to the source. Plane-parallel, linear theory,
    no velocity bias. Returns 0 if "doppler" is not among ``terms`` (default: all terms).
    Vectorised over z (z > 0).
    """
    names = _resolve_terms(terms)
    z = _redshift(z, positive=True)
    b_e = _number("gamma1", "b_e", b_e)
    Q = _number("gamma1", "Q", Q)
    bg = _background(cosmo, z)
    if "doppler" not in names:
        return _as_float(np.zeros_like(bg["H"]))
    return _as_float(bg["f"] * bg["H"] * _doppler_factor(bg, b_e, Q))


def gamma2(cosmo, z, b_e=0.0, Q=0.0, terms=None):
    """Potential coefficient gamma2(z) in (h/Mpc)^2; A(k) contains gamma2/k^2
    (docs/projection.md, eq. 6.4):

        gamma2 = calH^2 { f (3 - b_e)                                        [gauge]
                 + (3/2) Omega_m(z) C                                        [redshift_potential]
                 - (3/2) Omega_m(z) (f - 2 + 2Q) }                           [metric_potential]
               = calH^2 { f (3 - b_e) + (3/2) Omega_m(z) [ 2 + b_e - f - calH'/calH^2 - 4Q
                                                           - 2(1 - Q)/(chi calH) ] },

    with C as in :func:`gamma1`, the Poisson equation Phi = Psi = -(3/2) Omega_m(z) calH^2
    delta_m/k^2 and Phi' = calH (f - 1) Phi. ``terms`` selects among "gauge",
    "redshift_potential", "metric_potential" (default: all). Vectorised over z (z > 0).
    """
    names = _resolve_terms(terms)
    z = _redshift(z, positive=True)
    b_e = _number("gamma2", "b_e", b_e)
    Q = _number("gamma2", "Q", Q)
    bg = _background(cosmo, z)
    H2, f, om = bg["H"] ** 2, bg["f"], bg["om"]
    out = np.zeros_like(H2)
    if "gauge" in names:
        out = out + f * (3.0 - b_e) * H2
    if "redshift_potential" in names:
        out = out + 1.5 * om * H2 * _doppler_factor(bg, b_e, Q)
    if "metric_potential" in names:
        out = out - 1.5 * om * H2 * (f - 2.0 + 2.0 * Q)
    return _as_float(out)


def _fnl_amplitude(cosmo, z):
    """alpha(k, z) k^2 T(k) = 3 delta_c Omega_m0 (H0/c)^2 / D_md(z), in (h/Mpc)^2."""
    d_md = float(cosmo.growth_factor(z, norm="matter"))
    return 3.0 * DELTA_C * cosmo.Omega_m0 / (HUBBLE_DISTANCE**2 * d_md)


def fnl_alpha(cosmo, k, z):
    """alpha(k, z) = 3 delta_c Omega_m0 (H0/c)^2 / (k^2 T(k) D_md(z)), dimensionless.

    The local-f_NL scale-dependent bias is Delta_b = f_NL (b1 - p) alpha (Dalal, Dore, Huterer
    & Shirokov 2008, eq. 9 with b - 1 -> b - p; Slosar, Hirata, Seljak, Ho & Padmanabhan 2008,
    eq. 6), with delta_c = 1.686, k in h/Mpc, H0/c = 1/2997.92458 h/Mpc and D_md the growth
    factor normalised to a deep in matter domination (the "CMB convention" for local f_NL;
    with D normalised to 1 today the same f_NL would be ~1.3 times larger, the "LSS convention").
    Valid in linear theory for the peak-background-split bias of a universal mass function.
    """
    k = _wavenumbers(k)
    z = _scalar_redshift(z)
    tk = np.asarray(cosmo.transfer(k), dtype=float)
    if not np.all(np.isfinite(tk)) or not np.all(tk > 0.0):
        raise ErgofitError("cosmology returned a non-positive or non-finite transfer function T(k)")
    return _fnl_amplitude(cosmo, z) / (k * k * tk)


def kernel(cosmo, z, k, tracer, effects=DEFAULT_EFFECTS):
    """The tracer kernel Z(k, mu) = A + i mu B + F mu^2 at redshift z on the grid k (h/Mpc).

    ``effects``: any of "rsd" (Kaiser 1987, F = f), "fnl" (Delta_b = f_NL (b1 - p) alpha, see
    :func:`fnl_alpha`), "doppler" (B = gamma1/k), "potential" (gamma2/k^2 in A) or the finer
    names of ``PROJECTION_TERMS``. Linear theory, plane-parallel (issues
    :class:`PlaneParallelWarning` when k chi(z) < PLANE_PARALLEL_KCHI with projection terms on).
    """
    return _kernel(cosmo, z, k, tracer, effects, stacklevel=3)


def _kernel(cosmo, z, k, tracer, effects, stacklevel):
    if not isinstance(tracer, Tracer):
        raise ErgofitError(f"tracer must be a likelihood.theory.tracer.Tracer, got {type(tracer).__name__}")
    names = _resolve_effects(effects)
    k = _wavenumbers(k)
    proj = names & set(PROJECTION_TERMS)
    z = _scalar_redshift(z, positive=bool(proj))
    A = np.full(k.shape, tracer.b1)
    B = np.zeros(k.shape)
    F = float(cosmo.growth_rate(z)) if "rsd" in names else 0.0
    if "fnl" in names and tracer.fnl != 0.0:
        A = A + tracer.fnl * (tracer.b1 - tracer.p) * fnl_alpha(cosmo, k, z)
    if proj:
        chi = float(cosmo.comoving_distance(z))
        kchi = float(k.min()) * chi
        if kchi < PLANE_PARALLEL_KCHI:
            warnings.warn(f"tracer kernel at z = {z:g}: k chi = {kchi:.3g} < {PLANE_PARALLEL_KCHI:g} "
                          f"for k = {k.min():.3g} h/Mpc; the plane-parallel projection terms miss "
                          "wide-angle corrections of order 1/(k chi)", PlaneParallelWarning,
                          stacklevel=stacklevel)
        A = A + gamma2(cosmo, z, tracer.b_e, tracer.Q, terms=proj) / (k * k)
        B = B + gamma1(cosmo, z, tracer.b_e, tracer.Q, terms=proj) / k
    return Kernel(A=A, B=B, F=F)


# ------------------------------------------------------------------------------- multipoles
def legendre_moment(n, ell):
    """(2 ell + 1)/2 int_{-1}^{1} mu^n L_ell(mu) dmu, exactly.

    Non-zero only for n >= ell with n - ell even, where it equals
    (2 ell + 1) n! / ( 2^{(n-ell)/2} ((n-ell)/2)! (n + ell + 1)!! )
    (Rodrigues' formula integrated by parts; e.g. Arfken & Weber, Mathematical Methods for
    Physicists, Legendre expansion of x^n; from memory, checked in the tests against
    numpy.polynomial.legendre.poly2leg). E.g. mu^2 = L0/3 + 2 L2/3, mu^4 = L0/5 + 4 L2/7 + 8 L4/35.
    """
    if n < ell or (n - ell) % 2:
        return 0.0
    j = (n - ell) // 2
    dfact = math.prod(range(n + ell + 1, 0, -2))
    return (2 * ell + 1) * math.factorial(n) / (2**j * math.factorial(j) * dfact)


def pair_multipoles(za, zb, pk, ells=(0, 2, 4)):
    """Legendre multipoles of Z_a(k, mu) Z_b(k, mu)^* P(k), shape (len(ells), len(k)).

    P_ab(k, mu) is defined by <Delta_a(k) Delta_b^*(k')> = (2 pi)^3 delta_D(k - k') P_ab(k, mu).
    With Z = A + i mu B + F mu^2 (A, B, F real), the product is a polynomial in mu,

        Z_a Z_b^* = A_a A_b + i mu (B_a A_b - A_a B_b) + mu^2 (A_a F_b + F_a A_b + B_a B_b)
                    + i mu^3 (B_a F_b - F_a B_b) + mu^4 F_a F_b,

    and P_ell = (2 ell + 1)/2 int L_ell Z_a Z_b^* P dmu is summed exactly with
    :func:`legendre_moment` (no mu quadrature). Even ell: the (real) multipole is returned.
    Odd ell: the multipole is purely imaginary, P_ell = i Pi_ell, and Pi_ell is returned; it
    changes sign when a and b are swapped and vanishes for a = b. Multipoles with ell > 4 are 0.
    """
    ells = _ells(ells)
    for label, z in (("za", za), ("zb", zb)):
        if not isinstance(z, Kernel):
            raise ErgofitError(f"pair_multipoles {label} must be a Kernel, got {type(z).__name__}")
    try:
        pk = np.asarray(pk, dtype=float)
    except (TypeError, ValueError):
        raise ErgofitError("pair_multipoles pk must be a real 1-D array in (Mpc/h)^3") from None
    if pk.ndim != 1 or not np.all(np.isfinite(pk)):
        raise ErgofitError(f"pair_multipoles pk must be a finite 1-D array, got shape {pk.shape}")
    try:
        Aa, Ba, Ab, Bb = np.broadcast_arrays(za.A, za.B, zb.A, zb.B, pk)[:4]
    except ValueError:
        raise ErgofitError(f"pair_multipoles: kernel arrays (shapes {za.A.shape}, {za.B.shape}, "
                           f"{zb.A.shape}, {zb.B.shape}) do not match pk (shape {pk.shape})") from None
    Fa, Fb = za.F, zb.F
    coeffs = (Aa * Ab, Ba * Ab - Aa * Bb, Aa * Fb + Fa * Ab + Ba * Bb, Ba * Fb - Fa * Bb,
              np.full(pk.shape, Fa * Fb))
    out = np.zeros((len(ells), pk.size))
    for i, ell in enumerate(ells):
        for n in range(ell % 2, 5, 2):
            w = legendre_moment(n, ell)
            if w:
                out[i] += w * coeffs[n]
    return out * pk


def symmetric_pair_multipoles(kernels, pairs, pk, ells=(0, 2, 4)):
    """Multipoles of the symmetrised products of kernel pairs, all pairs at once: shape
    (len(pairs), len(ells), len(k)); row (a, b) is ``pair_multipoles(Z_a, Z_a, pk)`` for a = b and
    ``pair_multipoles(Z_a, Z_b, pk) + pair_multipoles(Z_b, Z_a, pk)`` for a != b.

    Z_a Z_b^* + Z_b Z_a^* = 2 [A_a A_b + mu^2 (A_a F_b + F_a A_b + B_a B_b) + mu^4 F_a F_b]: the odd
    powers of mu cancel, so odd multipoles are 0; the even ones use :func:`legendre_moment` as
    :func:`pair_multipoles` does, and equal the pairwise sum to round-off (tests).
    """
    ells = _ells(ells)
    kernels = list(kernels)
    if not all(isinstance(z, Kernel) for z in kernels):
        raise ErgofitError("symmetric_pair_multipoles kernels must be Kernel objects")
    pk = np.asarray(pk, dtype=float)
    if pk.ndim != 1 or not np.all(np.isfinite(pk)):
        raise ErgofitError(f"symmetric_pair_multipoles pk must be a finite 1-D array, got shape {pk.shape}")
    try:
        A = np.array([np.broadcast_to(z.A, pk.shape) for z in kernels])
        B = np.array([np.broadcast_to(z.B, pk.shape) for z in kernels])
    except ValueError:
        raise ErgofitError(f"symmetric_pair_multipoles: kernel arrays do not match pk (shape "
                           f"{pk.shape})") from None
    F = np.array([z.F for z in kernels])[:, None]
    a, b = np.array(pairs, dtype=int).reshape(-1, 2).T
    fac = np.where(a == b, 1.0, 2.0)[:, None]
    coeffs = {0: fac * (A[a] * A[b]), 2: fac * (A[a] * F[b] + F[a] * A[b] + B[a] * B[b]),
              4: np.broadcast_to(fac * (F[a] * F[b]), (a.size, pk.size))}
    out = np.zeros((a.size, len(ells), pk.size))
    for i, ell in enumerate(ells):
        if ell % 2:
            continue
        for n, c in coeffs.items():
            w = legendre_moment(n, ell)
            if w:
                out[:, i] += w * c
    return out * pk


def _linear_power(cosmo, k, z):
    pk = np.asarray(cosmo.power(k, z), dtype=float)
    if pk.shape != k.shape or not np.all(np.isfinite(pk)):
        raise ErgofitError("cosmology returned a non-finite or mis-shaped linear power spectrum")
    return pk


def multipoles(cosmo, z, k, tracer, effects=DEFAULT_EFFECTS, ells=(0, 2, 4), shot_noise=True):
    """Auto-spectrum multipoles P_ell(k) of one tracer at z, shape (len(ells), len(k)),
    in (Mpc/h)^3; linear matter power from ``cosmo.power(k, z)``.

    The monopole gets the Poisson shot noise 1/nbar if ``shot_noise``. Odd multipoles of an
    auto spectrum vanish (Z Z^* is even in mu); they are returned as zeros if asked for.
    Linear theory, plane-parallel, local projection terms only (see the module docstring).
    """
    ells = _ells(ells)
    zk = _kernel(cosmo, z, k, tracer, effects, stacklevel=3)
    k = _wavenumbers(k)
    out = pair_multipoles(zk, zk, _linear_power(cosmo, k, z), ells)
    if shot_noise:
        for i, ell in enumerate(ells):
            if ell == 0:
                out[i] += tracer.shot_noise
    return out


def cross_multipoles(cosmo, z, k, tracer_a, tracer_b, effects=DEFAULT_EFFECTS,
                     ells=(0, 1, 2, 3, 4)):
    """Cross-spectrum multipoles of two tracers at z, shape (len(ells), len(k)), (Mpc/h)^3.

    P_ab(k, mu) from <Delta_a Delta_b^*>; even ell: real multipoles; odd ell: P_ell = i Pi_ell
    and Pi_ell is returned (see :func:`pair_multipoles`). The dipole and octupole come from the
    Doppler term when the two tracers differ in b1, b_e or s (McDonald 2009; Bonvin, Hui &
    Gaztanaga 2014). No shot noise is added: the samples are assumed disjoint.
    """
    ells = _ells(ells)
    za = _kernel(cosmo, z, k, tracer_a, effects, stacklevel=3)
    zb = _kernel(cosmo, z, k, tracer_b, effects, stacklevel=3)
    k = _wavenumbers(k)
    return pair_multipoles(za, zb, _linear_power(cosmo, k, z), ells)


def effective_fnl(cosmo, z, tracer, effects=DEFAULT_EFFECTS):
    """The f_NL whose scale-dependent bias gives the same k^-2 term of the monopole as the
    projection terms, as k -> 0 (T -> 1); tracer.fnl is ignored.

    Expanding |Z|^2 with Z = b1 + f mu^2 + (gamma2 + f_NL (b1 - p) alpha0)/k^2 + i mu gamma1/k,
    alpha0 = 3 delta_c Omega_m0 (H0/c)^2 / D_md(z), the mu-average of the k^-2 part is
        2 (b1 + f/3) (gamma2 + f_NL (b1 - p) alpha0) + gamma1^2 / 3,
    hence
        f_NL^eff = [ 2 (b1 + f/3) gamma2 + gamma1^2/3 ] / [ 2 (b1 + f/3) (b1 - p) alpha0 ].
    f = 0 if "rsd" is not among ``effects``; gamma1, gamma2 use the projection terms in
    ``effects``. The k^-4 terms of the two models differ (gamma2^2 vs (f_NL (b1-p) alpha0)^2), so
    the match is of the leading large-scale term only.
    """
    if not isinstance(tracer, Tracer):
        raise ErgofitError(f"tracer must be a likelihood.theory.tracer.Tracer, got {type(tracer).__name__}")
    names = _resolve_effects(effects)
    proj = names & set(PROJECTION_TERMS)
    z = _scalar_redshift(z, positive=True)
    if tracer.b1 == tracer.p:
        raise ErgofitError(f"effective_fnl: tracer b1 = p = {tracer.b1} has no scale-dependent "
                           "bias response to f_NL; expected b1 != p")
    f = float(cosmo.growth_rate(z)) if "rsd" in names else 0.0
    beff = tracer.b1 + f / 3.0
    if beff == 0.0:
        raise ErgofitError("effective_fnl: b1 + f/3 = 0, the monopole has no k^-2 cross term")
    if not proj:
        return 0.0
    g1 = gamma1(cosmo, z, tracer.b_e, tracer.Q, terms=proj)
    g2 = gamma2(cosmo, z, tracer.b_e, tracer.Q, terms=proj)
    return float((2.0 * beff * g2 + g1 * g1 / 3.0)
                 / (2.0 * beff * (tracer.b1 - tracer.p) * _fnl_amplitude(cosmo, z)))
