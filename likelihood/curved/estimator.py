"""Expectation of the end-point line-of-sight multipole estimator on the full sky, exact in
linear theory, as templates quadratic in the amplitudes of the kernel pieces.

Estimator (shared/design.md, "The curved sky"; the one likelihood.simulate.measure_multipoles
implements): F_ℓ(k) = ∫ d³x w [Δ − C] L_ℓ(k̂·x̂) e^{−ik·x}, P̂_ℓ = (2ℓ+1)/I₂ ∫dΩ_k/4π F_ℓ F_0*,
I₂ = ∫ w² d³x = 4π ∫ r² w² dr. With L_ℓ(μ) e^{−ixμ} = Σ_J (2J+1) L_J(μ) g_ℓJ(x),
g_ℓJ(x) = Σ_L (−i)^L (2L+1) (ℓ L J; 0 0 0)² j_L(x) (Rayleigh expansion and the Legendre
product rule), the addition theorem and <a_JM a*_J'M'> = δδ C_J give (derivation in
docs/curved_sky.md):

    P̂_ℓ(k) = (2ℓ+1)(4π/I₂) Σ_J (2J+1) ∫∫ dr1 dr2 r1² r2² w1 w2 g_ℓJ(kr1) i^J j_J(kr2) C_J(r1, r2)
           = (2ℓ+1)(4π/I₂) Σ_J (2J+1) Σ_L c_ℓJL (2/π) ∫ q² dq P(q) U^A_LJ(k, q) U^B_JJ(k, q),
    U_LJ(k, q) = ∫ dr r² w(r) j_L(kr) W_J(q, r),   c_ℓJL = (−i)^L i^J (2L+1)(ℓ L J; 0 0 0)².

Tracer A carries the Legendre weight (first point), B the plain transform. Even ℓ are real;
odd ℓ are imaginary and the Π_ℓ of P_ℓ = iΠ_ℓ is returned (repo convention).
Integral constraints, exact on the full sky: "none"; "global" (C = ∫wΔ/∫w: only a_00
changes, a'_00(r) = a_00(r) − Σ v_r' a_00(r'), v ∝ r² w dr); "radial" (each distance's angular
mean removed: the J = 0 term is dropped). Shot noise (Poisson, C_J = δ_D(r1 − r2)/(r1² n̄)
for every J) gets the same treatment; without IC its sum over J is exactly
δ_ℓ0 ∫ w²/n̄ d³x / I₂ (Σ_J (2J+1) g_ℓJ i^J j_J = δ_ℓ0), so only the J = 0 term is computed
with the IC. k bins: mode average ∫k² P̂ dk/∫k² dk by Gauss–Legendre in each bin.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError
from .bessel import bessel_derivatives, spherical_jn_all
from .lightcone import (INTEGRATED_TERMS, LOCAL_TERMS, LightCone, ResolutionWarning,
                        TracerCoefficients, check_terms, integrated_pieces, local_pieces)
from .quadrature import composite_gl

__all__ = ["EstimatorResolution", "Shell", "Templates", "multipole_templates",
           "expected_multipoles", "wigner3j_zero_sq", "resolution_grids"]

IC_KINDS = ("none", "global", "radial")


def wigner3j_zero_sq(l1, l2, l3):
    """(l1 l2 l3; 0 0 0)² in closed form (Edmonds 1957, eq. 3.7.17), exact integers."""
    J = l1 + l2 + l3
    if J % 2 or l3 > l1 + l2 or l3 < abs(l1 - l2) or min(l1, l2, l3) < 0:
        return 0.0
    g = J // 2
    f = math.factorial
    num = f(J - 2 * l1) * f(J - 2 * l2) * f(J - 2 * l3) * f(g) ** 2
    den = f(J + 1) * (f(g - l1) * f(g - l2) * f(g - l3)) ** 2
    return num / den


@dataclass(frozen=True)
class Shell:
    """Full-sky radial selection r_min ≤ r ≤ r_max [Mpc/h] with weight w(r) (number or callable
    of r; default 1, as the mocks' mask) and mean density n̄(r) [(h/Mpc)³] for the shot noise."""
    r_min: float
    r_max: float
    weight: object = 1.0
    nbar: object = None

    def __post_init__(self):
        if not (0.0 <= float(self.r_min) < float(self.r_max)) or not np.isfinite(self.r_max):
            raise ConfigError(f"shell r_min = {self.r_min}, r_max = {self.r_max}: expected "
                              "0 <= r_min < r_max (Mpc/h)")

    def _eval(self, name, value, r):
        out = np.asarray(value(r) if callable(value) else np.full(r.shape, float(value)),
                         dtype=float)
        if out.shape != r.shape or not np.all(np.isfinite(out)) or np.any(out < 0):
            raise ConfigError(f"shell {name}(r): expected finite values >= 0 on the shell")
        return out


@dataclass(frozen=True)
class EstimatorResolution:
    """Grid rules (docs/curved_sky.md), all multiplied by the factors here:

    J_max = ⌈k_max r_max + 8 (k_max r_max)^{1/3} + 10⌉ · j_factor  (j_J(kr) < 1e-16 beyond);
    q ∈ [q_IR, q_max], q_max = 3 (k_max + 12/(r_max − r_min)) · q_range (sharp shell edges give
    U(k, q) a 1/(q − k) tail: measured 2-3e-4 of P̂_0 left at this q_max, 1e-4 at 4/3 of it); q_IR = 1e-4 h/Mpc
    (infrared cut-off, matters only for ic="none" with potential/f_NL pieces); Gauss–Legendre
    panels of 6/r_max in q (6 rad of the q r oscillation) / q_density;
    r panels of 6/(k_max + q_max) / r_density; 4 Gauss nodes per k bin (k_nodes).
    """
    j_factor: float = 1.0
    q_range: float = 1.0
    q_density: float = 1.0
    r_density: float = 1.0
    k_nodes: int = 4
    q_ir: float = 1e-4


def resolution_grids(shell, edges, res):
    """(J_max, (q, ωq), (r, ωr), (k, ωk)) from the rules of :class:`EstimatorResolution`."""
    k_max = float(edges[-1])
    x = k_max * shell.r_max
    j_max = int(math.ceil((x + 8.0 * x ** (1 / 3) + 10.0) * res.j_factor))
    q_max = 3.0 * (k_max + 12.0 / (shell.r_max - shell.r_min)) * res.q_range
    q_lo = min(6.0 / shell.r_max, 0.5 * q_max)
    t, u = np.polynomial.legendre.leggauss(16)
    lq = np.log(res.q_ir) + (np.log(q_lo) - np.log(res.q_ir)) * 0.5 * (t + 1)
    q1, w1 = np.exp(lq), np.exp(lq) * 0.5 * (np.log(q_lo) - np.log(res.q_ir)) * u
    q2, w2 = composite_gl(q_lo, q_max, 6.0 / (shell.r_max * res.q_density))
    q, wq = np.concatenate([q1, q2]), np.concatenate([w1, w2])
    r, wr = composite_gl(shell.r_min, shell.r_max, 6.0 / ((k_max + q_max) * res.r_density))
    tk, uk = np.polynomial.legendre.leggauss(int(res.k_nodes))
    a, b = np.asarray(edges[:-1])[:, None], np.asarray(edges[1:])[:, None]
    k = 0.5 * (a + b) + 0.5 * (b - a) * tk
    wk = 0.5 * (b - a) * uk * k ** 2 / ((b ** 3 - a ** 3) / 3.0)
    return j_max, (q, wq), (r, wr), (k.ravel(), wk)


@dataclass
class Templates:
    """Bin-averaged multipole templates: ``pairs[(a, b)]`` (n_ell, n_bins) is the part of P̂
    bilinear in the amplitudes of piece a of tracer A and piece b of tracer B (auto spectra:
    a ≤ b, the two orderings summed); ``noise`` the shot-noise template. Odd ℓ hold Π_ℓ."""
    ells: tuple
    edges: np.ndarray
    pairs: dict
    noise: np.ndarray | None
    auto: bool
    meta: dict

    def combine(self, amp_a, amp_b=None, noise=1.0):
        """Σ_ab amp_a[a] amp_b[b] T_ab (+ noise · T_noise); missing amplitudes are 1."""
        amp_b = amp_a if amp_b is None else amp_b
        out = sum(amp_a.get(a, 1.0) * amp_b.get(b, 1.0) * t for (a, b), t in self.pairs.items())
        if self.noise is not None:
            out = out + noise * self.noise
        return out


def _pieces(cone, r, tracer, terms):
    bg = cone.background(r)
    tc = tracer.at(bg["z"])
    loc = local_pieces(bg, tc, [t for t in terms if t in LOCAL_TERMS])
    integ = integrated_pieces(bg, tc, [t for t in terms if t in INTEGRATED_TERMS])
    return loc, integ


def multipole_templates(cosmo, shell, edges, tracer_a, terms_a=("density", "rsd"),
                        tracer_b=None, terms_b=None, ells=(0, 2, 4), ic="none",
                        resolution=EstimatorResolution(), combine_pieces=False):
    """Templates of the expected estimator (module docstring) for every pair of pieces.

    ``tracer_a``/``tracer_b``: :class:`TracerCoefficients` (b, b_e, s numbers or callables of
    z); ``tracer_b`` None: auto spectrum of A. ``terms``: pieces from
    likelihood.curved.TERMS. ``combine_pieces=True`` sums each tracer's pieces into one kernel
    first (the direct computation; pairs then has the single key ("total", "total")).
    ``edges``: k bin edges [h/Mpc]. Returns :class:`Templates` (units (Mpc/h)³).
    """
    if ic not in IC_KINDS:
        raise ConfigError(f"ic = {ic!r}: expected one of {IC_KINDS}")
    ells = tuple(int(l) for l in ells)
    if not ells or min(ells) < 0 or max(ells) > 4:
        raise ConfigError(f"ells = {ells}: expected multipoles between 0 and 4")
    edges = np.asarray(edges, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or edges[0] <= 0 or np.any(np.diff(edges) <= 0):
        raise ConfigError("edges: expected increasing positive k bin edges in h/Mpc")
    auto = tracer_b is None
    terms_a = check_terms(terms_a)
    terms_b = terms_a if terms_b is None else check_terms(terms_b)
    tracer_b = tracer_a if auto else tracer_b
    j_max, (q, wq), (r, wr), (k, wk) = resolution_grids(shell, edges, resolution)
    z_edge = _z_at(cosmo, shell.r_max)
    cone = LightCone(cosmo, z_edge * 1.01 + 0.01)
    w = shell._eval("weight", shell.weight, r)
    base = wr * r ** 2 * w
    i2 = 4.0 * np.pi * np.sum(wr * r ** 2 * w ** 2)
    v = base / base.sum()
    pq = np.asarray(cosmo.power(q, 0.0), dtype=float)
    meas = (2.0 / np.pi) * wq * q * q * pq

    def kernel_set(tracer, terms):
        loc, integ = _pieces(cone, r, tracer, terms)
        names = [p.name for p in loc] + list(integ)
        qf = [p.qfactor(cosmo, q) for p in loc]
        return loc, qf, integ, names

    sets = [kernel_set(tracer_a, terms_a)]
    sets.append(sets[0] if auto else kernel_set(tracer_b, terms_b))
    need_int = any(s[2] for s in sets)
    jq = spherical_jn_all(j_max + 1, q[:, None] * r[None, :])
    jk = spherical_jn_all(j_max + 5, k[:, None] * r[None, :])
    if need_int:
        los = _los_grid(r, shell.r_min, float(q[-1]))
        bg_los = cone.background(los[0])
        jl = spherical_jn_all(j_max, q[:, None] * los[0][None, :])

    def kernels(J, kset):
        loc, qf, integ, names = kset
        x = q[:, None] * r[None, :]
        j = jq[J]
        d1, d2 = bessel_derivatives(J, jq[1] if J == 0 else jq[J - 1], j, x)
        kinds = (j, d1, d2)
        out = [qfac[:, None] * p.radial[None, :] * kinds[p.order] for p, qfac in zip(loc, qf)]
        for t, parts in integ.items():
            acc = np.zeros((q.size, r.size))
            for part in parts:
                f = jl[J] * (los[1] * part.inner(bg_los))[None, :]
                cum = np.cumsum(f, axis=1)[:, los[2]]
                fac = J * (J + 1.0) if part.lensing else 1.0
                acc += fac * part.outer[None, :] * cum
            out.append(acc / (q * q)[:, None])
        if combine_pieces:
            out = [sum(out)]
        if J == 0 and ic == "global":
            out = [W - (W @ v)[:, None] for W in out]
        return out

    names_a = ["total"] if combine_pieces else sets[0][3]
    names_b = ["total"] if combine_pieces else sets[1][3]
    acc = np.zeros((len(names_a), len(names_b), len(ells), k.size), dtype=complex)
    for J in range(0, j_max + 1):
        if J == 0 and ic == "radial":
            continue
        Ls = sorted({L for l in ells for L in range(abs(J - l), J + l + 1) if (L + J + l) % 2 == 0})
        WA = kernels(J, sets[0])
        WB = WA if auto else kernels(J, sets[1])
        left = np.concatenate([jk[L] * base[None, :] for L in Ls])          # (nL nk, nr)
        UA = np.einsum("xr,aqr->axq", left, np.stack(WA), optimize=True)
        UA = UA.reshape(len(WA), len(Ls), k.size, q.size)
        VB = np.einsum("kr,bqr->bkq", jk[J] * base[None, :], np.stack(WB), optimize=True)
        prod = np.einsum("alkq,bkq->ablk", UA * meas, VB, optimize=True)     # (a, b, L, k)
        for i, l in enumerate(ells):
            coef = np.array([(-1j) ** L * 1j ** J * (2 * L + 1) * wigner3j_zero_sq(l, L, J)
                             for L in Ls])
            acc[:, :, i] += (2 * l + 1) * (4 * np.pi / i2) * (2 * J + 1) * np.einsum(
                "l,ablk->abk", coef, prod)
    vals = np.empty(acc.shape)
    for i, l in enumerate(ells):
        vals[:, :, i] = (acc[:, :, i] if l % 2 == 0 else acc[:, :, i] / 1j).real
    binned = _bin(vals, wk, edges.size - 1)                                 # (a, b, ell, nb)
    pairs = {}
    if auto:
        for ia, a in enumerate(names_a):
            for ib in range(ia, len(names_b)):
                t = binned[ia, ib] + (binned[ib, ia] if ib != ia else 0.0)
                pairs[a, names_b[ib]] = t
    else:
        for ia, a in enumerate(names_a):
            for ib, b in enumerate(names_b):
                pairs[a, b] = binned[ia, ib]
    noise = None
    if auto and shell.nbar is not None:
        noise = _noise(shell, r, wr, w, base, v, i2, k, wk, edges, ells, ic, jk)
    return Templates(ells, edges, pairs, noise, auto,
                     dict(j_max=j_max, n_q=q.size, n_r=r.size, n_k=k.size, q_max=float(q[-1]),
                          ic=ic))


def _z_at(cosmo, r):
    """Redshift of comoving distance r by bisection on cosmo.comoving_distance."""
    lo, hi = 0.0, 1.0
    while float(cosmo.comoving_distance(hi)) < r:
        hi *= 2.0
        if hi > 2000:
            raise ConfigError(f"shell r_max = {r} Mpc/h lies beyond the cosmology's horizon")
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if float(cosmo.comoving_distance(mid)) < r else (lo, mid)
    return hi


def _los_grid(r, r_min, q_max):
    """Line-of-sight nodes for ∫_0^{r_i} at every window node r_i: composite Gauss–Legendre on
    [0, r_min] (panels of 6/q_max) then 2-point Gauss between consecutive window nodes; returns
    (nodes, weights, index of the last node below each r_i)."""
    nodes, weights = [], []
    if r_min > 0:
        n0, w0 = composite_gl(0.0, r_min, 6.0 / q_max)
        nodes.append(n0)
        weights.append(w0)
    t = np.array([-1.0, 1.0]) / np.sqrt(3.0)
    edges = np.concatenate([[r_min], r])
    a, b = edges[:-1, None], edges[1:, None]
    nodes.append((0.5 * (a + b) + 0.5 * (b - a) * t).ravel())
    weights.append(np.repeat(0.5 * (b - a).ravel(), 2))
    nodes, weights = np.concatenate(nodes), np.concatenate(weights)
    ok = nodes > 0
    weights = np.where(ok, weights, 0.0)
    nodes = np.where(ok, nodes, 1e-6)
    last = np.searchsorted(nodes, r, side="right") - 1
    return nodes, weights, last


def _bin(vals, wk, nb):
    v = vals.reshape(vals.shape[:-1] + (nb, -1))
    return np.einsum("...bn,bn->...b", v, wk)


def _noise(shell, r, wr, w, base, v, i2, k, wk, edges, ells, ic, jk):
    """Shot-noise template: δ_ℓ0 ∫w²/n̄ d³x/I₂ plus the IC change of the J = 0 term."""
    nbar = shell._eval("nbar", shell.nbar, r)
    if np.any(nbar <= 0):
        raise ConfigError("shell nbar(r): expected > 0 on the shell")
    out = np.zeros((len(ells), k.size))
    full = 4.0 * np.pi * np.sum(wr * r ** 2 * w ** 2 / nbar) / i2
    # J = 0 term, C_0(r_i, r_j) = δ_ij/(ω_i r_i² n̄_i) on the quadrature
    N = np.diag(1.0 / (wr * r ** 2 * nbar))
    if ic == "global":
        P = np.eye(r.size) - np.outer(np.ones(r.size), v)
        N_ic = P @ N @ P.T
    for i, l in enumerate(ells):
        if l == 0:
            out[i] += full
        if ic == "none":
            continue
        # J = 0: g_ℓ0 = (−i)^ℓ j_ℓ; term (2ℓ+1)(4π/I₂) Σ_ij base_i base_j g_ℓ0(k r_i) j_0(k r_j) C_ij
        g = (-1j) ** l * jk[l] * base[None, :]
        h = jk[0] * base[None, :]
        t_none = np.einsum("kr,rs,ks->k", g, N, h)
        t_ic = 0.0 if ic == "radial" else np.einsum("kr,rs,ks->k", g, N_ic, h)
        d = (2 * l + 1) * (4 * np.pi / i2) * (t_ic - t_none)
        out[i] += (d if l % 2 == 0 else d / 1j).real
    return _bin(out, wk, edges.size - 1)


def expected_multipoles(cosmo, shell, edges, tracer_a, terms_a=("density", "rsd"),
                        tracer_b=None, terms_b=None, ells=(0, 2, 4), ic="none",
                        resolution=EstimatorResolution()):
    """Direct computation (each tracer's pieces summed into one kernel first): (n_ell, n_bins)
    signal, plus the shot noise if ``shell.nbar`` is given (auto spectra)."""
    t = multipole_templates(cosmo, shell, edges, tracer_a, terms_a, tracer_b, terms_b, ells, ic,
                            resolution, combine_pieces=True)
    return t.combine({}, {})
