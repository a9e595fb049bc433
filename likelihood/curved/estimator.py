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
from dataclasses import dataclass, replace

import numpy as np

from ..errors import ConfigError
from .bessel import bessel_derivatives, bessel_order_max, bessel_x_min, spherical_jn_all
from .lightcone import (INTEGRATED_TERMS, LOCAL_TERMS, LightCone, ResolutionWarning,
                        TracerCoefficients, check_terms, integrated_pieces, local_pieces)
from .observer_terms import ObserverPiece, motion_tail, observer_pieces
from .quadrature import composite_gl

__all__ = ["EstimatorResolution", "Shell", "Templates", "BasisKernel", "multipole_templates",
           "monopole_profiles", "radial_field_templates", "radial_field_multipoles",
           "expected_multipoles", "wigner3j_zero_sq", "resolution_grids", "NodeSpectra",
           "radial_projection", "projection_rows", "bin_average"]

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

    def weight_on(self, r):
        """w(r) on the nodes ``r`` (ConfigError if not finite and >= 0)."""
        return self._eval("weight", self.weight, np.asarray(r, dtype=float))


@dataclass(frozen=True)
class EstimatorResolution:
    """Grid rules (docs/curved_sky.md), all multiplied by the factors here:

    J_max = ⌈k_max r_max + 8 (k_max r_max)^{1/3} + 10⌉ · j_factor  (j_J(kr) < 1e-16 beyond);
    q ∈ [q_IR, q_max], q_max = 3 (k_max + 12/(r_max − r_min)) · q_range (sharp shell edges give
    U(k, q) a 1/(q − k) tail: measured 4.6e-4 of P̂_0 moved by q_range 0.75, the built-in tail
    estimate says 3–7e-4 left); q_IR = 1e-4 h/Mpc (infrared cut-off, matters only for
    ic="none" with potential/f_NL pieces); Gauss–Legendre panels of 8/r_max in q / q_density
    (measured: 8e-7 of P̂_0 from the former 6/r_max); r panels of 10/(k_max + q_max) /
    r_density (GL error constant 2e-6 at 10 rad; measured 1e-12 against 8 rad panels);
    4 Gauss nodes per k bin (k_nodes; 3 nodes move P̂ by 3e-3). Work is skipped where
    j_J(qr), j_L(kr) are below 2e-11 of their maximum (bessel_x_min); q is processed in
    blocks of q_block nodes (memory ∝ q_block · J_max · (n_r + n_los)).
    """
    j_factor: float = 1.0
    q_range: float = 1.0
    q_density: float = 1.0
    r_density: float = 1.0
    k_nodes: int = 4
    q_ir: float = 1e-4
    q_block: int = 64


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
    q2, w2 = composite_gl(q_lo, q_max, 8.0 / (shell.r_max * res.q_density))
    q, wq = np.concatenate([q1, q2]), np.concatenate([w1, w2])
    r, wr = composite_gl(shell.r_min, shell.r_max, 10.0 / ((k_max + q_max) * res.r_density))
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


@dataclass
class _KernelSet:
    """One tracer's kernel pieces: local (radial part, q factor on the full q grid) and
    integrated parts (outer on the window grid, inner on the near and in-shell line of sight)."""
    loc: list
    qf: list
    integ: dict          # name -> list of (IntegratedPart, inner on the window nodes)
    names: list


def _kernel_set(cone, cosmo, r, q, los, tracer, terms, snapshot_r=None, weight=1.0):
    # snapshot: every background and tracer coefficient (also χ in the 1/(χℋ) pieces) at r_eff
    bg = cone.background(r if snapshot_r is None else np.full(r.shape, snapshot_r))
    tc = tracer.at(bg["z"])
    loc = local_pieces(bg, tc, [t for t in terms if t in LOCAL_TERMS])
    loc += observer_pieces(cone, bg, tc, terms)     # single-order pieces (J = 0 or 1)
    integ = integrated_pieces(bg, tc, [t for t in terms if t in INTEGRATED_TERMS])
    if weight != 1.0:
        loc = [replace(p, radial=weight * p.radial) for p in loc]
        integ = {t: [replace(pt, outer=weight * pt.outer) for pt in parts]
                 for t, parts in integ.items()}
    integ = {t: [(pt, pt.inner(bg)) for pt in parts] for t, parts in integ.items()}
    return _KernelSet(loc, [p.qfactor(cosmo, q) for p in loc], integ,
                      [p.name for p in loc] + list(integ))


@dataclass(frozen=True)
class BasisKernel:
    """A named kernel W = Σ_c weight_c × (the pieces ``terms_c`` of ``tracer_c`` summed): the
    unit of a template basis. A model linear in a few amplitudes x_a, W = Σ_a x_a W_a, has the
    estimator expectation Σ_ab x_a x_b T_ab with T_ab the pair templates of the basis kernels
    W_a (e.g. W_{b_e} = W(b_e = 1) − W(b_e = 0) for the doppler, potential and isw pieces,
    which are affine in b_e). ``parts``: ((weight, TracerCoefficients, terms), ...)."""
    name: str
    parts: tuple


@dataclass
class _BasisSet:
    """The kernel sets of a basis (one per part, weights folded in), grouped by basis kernel."""
    names: list
    elements: list       # per basis kernel: list of _KernelSet

    @property
    def all_sets(self):
        return [s for el in self.elements for s in el]


def _basis_set(cone, cosmo, r, q, los, basis, snapshot_r):
    names, elements = [], []
    for bk in basis:
        if not isinstance(bk, BasisKernel) or not bk.parts:
            raise ConfigError(f"basis: expected BasisKernel objects with parts, got {bk!r}")
        names.append(bk.name)
        elements.append([_kernel_set(cone, cosmo, r, q, los, tc, check_terms(terms),
                                     snapshot_r, float(wt)) for wt, tc, terms in bk.parts])
    if len(set(names)) != len(names):
        raise ConfigError(f"basis: kernel names {names} must be distinct")
    return _BasisSet(names, elements)


def _side_kernels(J, side, blk, sl, los, v, ic, combine):
    """_kernels of one side: a tracer's pieces (_KernelSet) or a basis (_BasisSet)."""
    if isinstance(side, _KernelSet):
        return _kernels(J, side, blk, sl, los, v, ic, combine)
    out = [sum(_kernels(J, s, blk, sl, los, v, ic, True)[0] for s in el) for el in side.elements]
    return np.stack([sum(out)] if combine else out)


class _LineOfSight:
    """Cumulative line-of-sight integrals I(q, r_i) = ∫_0^{r_i} β(r') j_J(q r') dr' at every
    window node r_i (composite 8-point Gauss–Legendre panels of equal width on the shell).

    [0, r_min]: composite Gauss–Legendre with panels of 10/q_b (10 rad of the fastest
    oscillation in the q block, q ≤ q_b; GL error constant 2e-6 at 10 rad), rebuilt for every
    q block. On the shell the window nodes themselves are used: the full panels below r_i by
    their Gauss–Legendre weights, the part of r_i's own panel by the exact integral of the
    degree-7 interpolant through the panel's 8 nodes (spectral integration matrix). Error of
    that partial integral for cos(φ t) over a panel spanning φ rad: 1.5e-8 at φ = 2, 1e-5 at
    φ = 4.6, 7e-4 at φ = 8 (measured on [−1, 1]), falling like φ^8 at lower q.
    """

    def __init__(self, r, r_min, r_max, cone):
        self.r_min = float(r_min)
        self.cone = cone
        n_nodes = _X8.size
        self.n_panels = r.size // n_nodes
        half = 0.5 * (r_max - r_min) / self.n_panels   # equal panels (composite_gl)
        self.full = half * _W8                      # (8,) full-panel weights
        self.part = half * _PARTIAL8                 # (8, 8): node i <- node m

    def near_grid(self, q_top):
        """(nodes, weights, background) on [0, r_min] for a q block with q ≤ q_top."""
        if self.r_min <= 0:
            return np.zeros(0), np.zeros(0), None
        nodes, weights = composite_gl(0.0, self.r_min, 10.0 / q_top)
        return nodes, weights, self.cone.background(nodes)

    def cumulative(self, jn, js, near_weights, inner_shell):
        """(nq, n_r) integrals for j_J given on the near nodes ``jn`` (nq, n_near) and the
        window nodes ``js`` (nq, n_r); ``near_weights`` = quadrature weights × β on the near
        nodes, ``inner_shell`` = β on the window nodes."""
        f = (js * inner_shell[None, :]).reshape(js.shape[0], self.n_panels, -1)
        full = f @ self.full                                               # (nq, P)
        before = np.cumsum(full, axis=1) - full
        out = f @ self.part.T + before[:, :, None]
        out = out.reshape(js.shape)
        if near_weights.size:
            out += (jn @ near_weights)[:, None]
        return out


def _partial_matrix(x):
    """A[i, m] = ∫_{−1}^{x_i} ℓ_m(t) dt for the Lagrange basis ℓ_m on the nodes x."""
    leg = np.polynomial.legendre
    coef = np.linalg.inv(leg.legvander(x, x.size - 1))    # column m: Legendre coefficients of ℓ_m
    return np.column_stack([leg.legval(x, leg.legint(coef[:, m], lbnd=-1.0))
                            for m in range(x.size)])


_X8, _W8 = np.polynomial.legendre.leggauss(8)
_PARTIAL8 = _partial_matrix(_X8)


def _g_coefficients(J, ells):
    """Real coefficients of L_ℓ(μ) e^{−ixμ} → order J: {ℓ: {L: c}} with
    G_ℓJ(x) = Σ_L c j_L(x) = i^J g_ℓJ(x) for even ℓ and i^J g_ℓJ(x)/i for odd ℓ,
    c = (−1)^{(J − L − (ℓ mod 2))/2} (2L+1) (ℓ L J; 0 0 0)² (module docstring)."""
    out = {}
    for l in ells:
        out[l] = {L: (-1.0) ** ((J - L - (l % 2)) // 2) * (2 * L + 1) * wigner3j_zero_sq(l, L, J)
                  for L in range(abs(J - l), J + l + 1) if (L + J + l) % 2 == 0}
    return out


def _kernels(J, kset, blk, sl, los, v, ic, combine):
    """Stacked kernels W_J^a(q, r) (n_pieces, nq, nr) of one tracer on the q slice ``sl``."""
    qb, r, jq, jn, near = blk
    x = qb[:, None] * r[None, :]
    j = jq[J]
    d1, d2 = bessel_derivatives(J, jq[1] if J == 0 else jq[J - 1], j, x)
    kinds = (j, d1, d2)
    out = [qfac[sl][:, None] * p.radial[None, :] * _radial_part(p, J, kinds)
           for p, qfac in zip(kset.loc, kset.qf)]
    for t, parts in kset.integ.items():
        accum = 0.0
        for part, inner_s in parts:
            fac = J * (J + 1.0) if part.lensing else 1.0
            if fac == 0.0:
                continue
            cum = los.cumulative(None if jn is None else jn[J], j, near[id(part)], inner_s)
            accum = accum + fac * part.outer[None, :] * cum
        out.append(np.broadcast_to(accum / (qb * qb)[:, None], j.shape))
    if combine:
        out = [sum(out)]
    if J == 0:
        out = [ic_monopole(W, v, ic) for W in out]
    return np.stack(out)


def _radial_part(piece, J, kinds):
    """j_J, j_J' or j_J'' of a local piece; for an observer piece (order fixed: J = 0 or 1,
    likelihood.curved.observer_terms) 1 at its own order and 0 at every other."""
    if isinstance(piece, ObserverPiece):
        return np.full(kinds[0].shape, 1.0 if J == piece.order else 0.0)
    return kinds[piece.order]


def _motion_radials(side, combine):
    """Per kernel name of one side (a _KernelSet or a _BasisSet), the radial factor c(r) of its
    observer_motion piece(s) (None where there is none), summed as the kernels are."""
    def one(kset):
        c = [p.radial for p in kset.loc if isinstance(p, ObserverPiece) and p.order == 1]
        return sum(c) if c else None
    if isinstance(side, _KernelSet):
        per = [one(side) if p.name == "observer_motion" else None for p in side.loc] \
            + [None] * len(side.integ)
    else:
        per = []
        for el in side.elements:
            got = [v for v in map(one, el) if v is not None]
            per.append(sum(got) if got else None)
    if combine:
        got = [v for v in per if v is not None]
        per = [sum(got) if got else None]
    return per


def _motion_tail_spectra(cosmo, q, wq, sets, auto, combine):
    """({(ia, ib): ρ_a(r1) ρ_b(r2) × motion_tail}, the same with the last q panel's share)
    for the observer_motion parts of the two sides (likelihood.curved.observer_terms.
    motion_tail), J = 1 only; ({}, {}) if there are none. The second is what the q-tail probe
    of _check_resolution saw of this part, now integrated exactly."""
    ka = _motion_radials(sets[0], combine)
    kb = ka if auto else _motion_radials(sets[1], combine)
    pairs = [(ia, ib) for ia, a in enumerate(ka) for ib, b in enumerate(kb)
             if a is not None and b is not None]
    if not pairs:
        return {}, {}
    tail = motion_tail(cosmo, q, wq)
    last = float((2.0 / np.pi) * np.sum((wq * np.asarray(cosmo.power(q, 0.0), dtype=float))[-8:]))
    outer = {(ia, ib): np.outer(ka[ia], kb[ib]) for ia, ib in pairs}
    return ({p: tail * o for p, o in outer.items()}, {p: last * o for p, o in outer.items()})


def ic_monopole(profile, v, ic):
    """The integral constraint acting on the angular monopole a_00(r) (… , n_r) of the field on
    the full sky (the only harmonic an IC changes there): "none" leaves it; "global" removes
    the survey mean Σ_r v_r a_00(r) (v ∝ r² w dr, normalised); "radial" removes each
    distance's angular mean, i.e. a_00(r) itself (exactly zero left)."""
    if ic == "global":
        return profile - (profile @ v)[..., None]
    if ic == "radial":
        return np.zeros_like(profile)
    return profile


@dataclass
class _Sides:
    """The kernel sets of the two tracers of a spectrum (the same object twice for an auto
    spectrum), every _KernelSet among them, the line of sight of the integrated pieces."""
    sets: list
    all_sets: list
    los: object
    need_int: bool
    snapshot_z: object


def _kernel_sides(cosmo, shell, r, q, tracer_a, terms_a, tracer_b, terms_b, snapshot_z):
    """Validated kernel sets of tracers A and B on the window nodes ``r`` and the q grid
    (TracerCoefficients with terms, or sequences of BasisKernel; see multipole_templates)."""
    auto = tracer_b is None
    basis_mode = not isinstance(tracer_a, TracerCoefficients)
    if basis_mode:
        tracer_a = tuple(tracer_a)
        tracer_b = None if auto else tuple(tracer_b)
        terms_a = tuple(t for bk in tracer_a + (tracer_b or ()) if isinstance(bk, BasisKernel)
                        for _, _, terms in bk.parts for t in check_terms(terms))
        terms_b = terms_a
    else:
        terms_a = check_terms(terms_a)
        terms_b = terms_a if terms_b is None else check_terms(terms_b)
    tracer_b = tracer_a if auto else tracer_b
    cone = LightCone(cosmo, _z_at(cosmo, shell.r_max) * 1.01 + 0.01)
    need_int = any(t in INTEGRATED_TERMS for t in terms_a + terms_b)
    snap_r = None
    if snapshot_z is not None:
        try:
            snapshot_z = float(snapshot_z)
        except (TypeError, ValueError):
            raise ConfigError(f"snapshot_z = {snapshot_z!r}: expected a redshift") from None
        if not 0.0 < snapshot_z < 0.99 * cone.z_max:
            raise ConfigError(f"snapshot_z = {snapshot_z}: expected 0 < z < {0.99 * cone.z_max:.3g}")
        nonlocal_ = [t for t in terms_a + terms_b if t not in LOCAL_TERMS]
        if nonlocal_:
            raise ConfigError("snapshot_z: the snapshot mode has local terms only; drop "
                              f"{nonlocal_}")
        snap_r = float(cosmo.comoving_distance(snapshot_z))
    los = _LineOfSight(r, shell.r_min, shell.r_max, cone) if need_int else None

    def side(tracer, terms):
        if basis_mode:
            return _basis_set(cone, cosmo, r, q, los, tracer, snap_r)
        return _kernel_set(cone, cosmo, r, q, los, tracer, terms, snap_r)
    sets = [side(tracer_a, terms_a)]
    sets.append(sets[0] if auto else side(tracer_b, terms_b))
    all_sets = [st for one in sets for st in (one.all_sets if basis_mode else [one])]
    return _Sides(sets, all_sets, los, need_int, snapshot_z)


def _near_integrals(los, all_sets, qb, n_top):
    """(j_J on the near line-of-sight nodes, {id(part): weights × β there}) for a q block."""
    nodes, weights, bgn = los.near_grid(float(qb[-1]))
    jn = spherical_jn_all(n_top, qb[:, None] * nodes[None, :]) if nodes.size else None
    near = {}
    for kset in all_sets:
        for parts in kset.integ.values():
            for part, _ in parts:
                near[id(part)] = weights * part.inner(bgn) if nodes.size else weights
    return jn, near


def multipole_templates(cosmo, shell, edges, tracer_a, terms_a=("density", "rsd"),
                        tracer_b=None, terms_b=None, ells=(0, 2, 4), ic="none",
                        resolution=EstimatorResolution(), combine_pieces=False,
                        snapshot_z=None):
    """Templates of the expected estimator (module docstring) for every pair of pieces.

    ``snapshot_z``: snapshot mode (design.md, "The curved sky"): b, b_e, s, D, f, ℋ, ℋ'/ℋ²,
    Ω_m(z) and the χ of the 1/(χℋ) pieces all taken at the effective redshift instead of at
    each distance, local terms only: the assumptions of the plane-parallel model and of
    snapshot mocks (the geometry, i.e. the end-point line of sight, stays exact).

    ``tracer_a``/``tracer_b``: :class:`TracerCoefficients` (b, b_e, s numbers or callables of
    z), or a sequence of :class:`BasisKernel` (then ``terms`` are ignored and the pairs are
    keyed by the basis names: the templates of a model linear in the basis amplitudes);
    ``tracer_b`` None: auto spectrum of A. ``shell.nbar``: the shot-noise template (an auto
    spectrum's n̄; for a cross spectrum of overlapping populations n̄_A n̄_B/n̄_AB, n̄_AB the
    density of the shared objects, whose Poisson noise is δ_D n̄_AB/(n̄_A n̄_B); None: no
    noise, e.g. disjoint populations). ``terms``: pieces from
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
    j_max, (q, wq), (r, wr), (k, wk) = resolution_grids(shell, edges, resolution)
    w = shell._eval("weight", shell.weight, r)
    base = wr * r ** 2 * w
    i2 = 4.0 * np.pi * np.sum(wr * r ** 2 * w ** 2)
    v = base / base.sum()
    pq = np.asarray(cosmo.power(q, 0.0), dtype=float)
    meas = (2.0 / np.pi) * wq * q * q * pq
    sides = _kernel_sides(cosmo, shell, r, q, tracer_a, terms_a, tracer_b, terms_b, snapshot_z)
    sets, all_sets, los, need_int = sides.sets, sides.all_sets, sides.los, sides.need_int
    snapshot_z = sides.snapshot_z
    jk = spherical_jn_all(j_max + 5, k[:, None] * r[None, :])
    names_a = ["total"] if combine_pieces else sets[0].names
    names_b = ["total"] if combine_pieces else sets[1].names
    acc = np.zeros((len(names_a), len(names_b), len(ells), k.size))
    coefs = {}
    probe = {name: np.zeros((len(ells), k.size)) for name in ("tail", "ir", "ir1")}
    k_lo = {J: int(np.searchsorted(k * shell.r_max, bessel_x_min(max(J - 4, 0)))) for J in
            range(j_max + 1)}
    for q0 in range(0, q.size, resolution.q_block):
        qb = q[q0:q0 + resolution.q_block]
        # orders J with j_J(q r) not negligible anywhere in this block (bessel_x_min rule)
        n_top = min(j_max, bessel_order_max(float(qb[-1]) * shell.r_max))
        jq = spherical_jn_all(n_top + 1, qb[:, None] * r[None, :])
        jn, near = _near_integrals(los, all_sets, qb, n_top) if need_int else (None, {})
        for J in range(0, n_top + 1):
            if J == 0 and ic == "radial":
                continue            # ic_monopole(…, "radial") = 0: nothing to add
            qa = int(np.searchsorted(qb * shell.r_max, bessel_x_min(max(J - 1, 0))))
            ka = k_lo[J]
            if qa >= qb.size or ka >= k.size:
                continue
            sl = slice(q0 + qa, q0 + qb.size)
            blk = (qb[qa:], r, jq[:, qa:], None if jn is None else jn[:, qa:], near)
            WA = _side_kernels(J, sets[0], blk, sl, los, v, ic, combine_pieces)
            WB = WA if auto else _side_kernels(J, sets[1], blk, sl, los, v, ic, combine_pieces)
            if J not in coefs:
                coefs[J] = _g_coefficients(J, ells)
            nk_a = k.size - ka
            right = jk[J][ka:] * base[None, :]                                   # (nk, nr)
            VB = (right @ WB.reshape(-1, r.size).T).reshape(nk_a, len(WB), -1)   # (k, b, q)
            rows = [l for l in ells if not (auto and l == 0)]
            if rows:
                left = np.concatenate([sum(c * jk[L][ka:] for L, c in coefs[J][l].items())
                                       * base[None, :] for l in rows])
                UA = (left @ WA.reshape(-1, r.size).T).reshape(len(rows), nk_a, len(WA), -1)
            mq = meas[sl]
            # probes: the last q panel (tail beyond q_max) and the first q node (infrared)
            qidx = np.arange(sl.start, sl.stop)
            probes = [(name, np.where(sel(qidx), mq, 0.0)) for name, sel in
                      (("tail", lambda i: i >= q.size - 8), ("ir", lambda i: i == 0),
                       ("ir1", lambda i: i == 1))
                      if np.any(sel(qidx))]
            for i, l in enumerate(ells):
                if auto and l == 0:
                    ua = VB
                else:
                    ua = UA[rows.index(l)]                                       # (k, a, q)
                fac = (2 * l + 1) * (4 * np.pi / i2) * (2 * J + 1)
                prod = np.matmul(ua * mq, VB.transpose(0, 2, 1))                  # (k, a, b)
                acc[:, :, i, ka:] += fac * prod.transpose(1, 2, 0)
                for name, mp in probes:
                    probe[name][i, ka:] += fac * np.einsum("kaq,q,kbq->k", ua, mp, VB)
    tails, lasts = _motion_tail_spectra(cosmo, q, wq, sets, auto, combine_pieces)
    fac = np.array([(2 * l + 1) * 4 * np.pi / i2 for l in ells])[:, None]
    for key, c1 in tails.items():
        acc[key] += fac * radial_projection(1, ells, c1, jk, base)
        probe["tail"] -= fac * radial_projection(1, ells, lasts[key], jk, base)
    checks = _check_resolution(shell, k, q, wq, j_max, ells, ic, acc, probe, resolution.q_ir,
                               wk, edges.size - 1)
    vals = acc
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
    if shell.nbar is not None:       # a cross spectrum: the objects the two populations share
        noise = _noise(shell, r, wr, w, base, v, i2, k, wk, edges, ells, ic, jk)
    return Templates(ells, edges, pairs, noise, auto,
                     dict(j_max=j_max, n_q=q.size, n_r=r.size, n_k=k.size, q_max=float(q[-1]),
                          ic=ic, snapshot_z=snapshot_z, **checks))


TAIL_TOLERANCE = 1e-3     # relative to max |P̂_0|: the accuracy the grid rules are set for


def _check_resolution(shell, k, q, wq, j_max, ells, ic, acc, probe, q_ir, wk, nb):
    """Issue a ResolutionWarning where the configuration exceeds what the grids resolve.

    * J_max: every order up to j_J(k r) non-negligible must be summed (bessel_x_min rule),
      i.e. bessel_x_min(J_max + 1) > k_max r_max.
    * q tail: the integrand per unit q over the last q panel, extrapolated as q^{-2.4}
      (P(q) q^{-1} times the 1/(q − k)² edge tail of U(k, q)), estimates the part beyond q_max:
      tail ≈ density(q_max) · q_max/1.4 (measured 2–4e-4 of max |P̂_0| at the default rule).
    * infrared: the change of P̂ when the cut-off q_IR is lowered tenfold, from the integrand
      per unit ln q at the first two q nodes extrapolated as a power law q^α below them:
      d₀ (q_IR/q₀)^α (1 − 10^{−α})/α (d₀ ln 10 for α → 0), on the bin averages. Sizeable only for ic = "none" with
      the potential or f_NL pieces (unless the observer terms, which cancel it, are on). The
      power law matters: taking the integrand as flat in ln q at one k node overestimated the
      demo shell's sensitivity (global IC, f_NL = 10, all terms) as 8e-3 of P̂_0 where lowering
      q_IR to 1e-5 h/Mpc moves the first quadrupole bin by 1.38e-4 of P̂_0 (this rule: 1.37e-4).
    """
    x = float(k[-1]) * shell.r_max
    if bessel_x_min(j_max + 1) <= x:
        warnings.warn(f"curved-sky estimator: J_max = {j_max} does not resolve k_max r_max = "
                      f"{x:.4g} (needs J_max >= {bessel_order_max(x)}); raise j_factor",
                      ResolutionWarning, stacklevel=3)
    i0 = ells.index(0) if 0 in ells else None
    if i0 is None:
        return {}
    total = np.einsum("abk->k", acc[:, :, i0])
    scale = np.abs(total).max()
    if scale == 0.0:
        return {}
    width = float(q[-1] - q[-9]) if q.size > 8 else float(q[-1])
    tail = np.abs(probe["tail"]).max(axis=1).max() / width * float(q[-1]) / 1.4 / scale
    if tail > TAIL_TOLERANCE:
        warnings.warn(f"curved-sky estimator: the q integrand at q_max = {q[-1]:.3g} h/Mpc "
                      f"leaves an estimated {tail:.2g} of P̂_0 beyond it (> {TAIL_TOLERANCE:g}): "
                      "raise q_range", ResolutionWarning, stacklevel=3)
    # per unit ln q, bin-averaged (ℓ, bin): the k nodes of a bin oscillate against each other
    d0 = np.abs(_bin(probe["ir"], wk, nb)) * float(q[0]) / float(wq[0])
    d1 = np.abs(_bin(probe["ir1"], wk, nb)) * float(q[1]) / float(wq[1])
    with np.errstate(divide="ignore", invalid="ignore"):
        alpha = np.nan_to_num(np.log(d1 / d0) / np.log(float(q[1] / q[0])), nan=0.0,
                              posinf=0.0, neginf=0.0)
        small = np.abs(alpha) < 1e-6
        per = np.where(small, np.log(10.0), (1.0 - 10.0 ** (-alpha)) / np.where(small, 1.0, alpha))
    ir = float(np.max(d0 * (q_ir / float(q[0])) ** alpha * per)) / scale
    if ir > TAIL_TOLERANCE:
        warnings.warn(f"curved-sky estimator: with ic = {ic!r} the result depends on the infrared "
                      f"cut-off q_IR = {q[0]:.2g} h/Mpc ({ir:.2g} of P̂_0 per factor 10; the "
                      "observer terms observer_motion and observer_potential cancel it)"
                      + ("" if ic == "radial" else ": the radial integral constraint removes it"),
                      ResolutionWarning, stacklevel=3)
    return dict(q_tail=float(tail), ir_per_decade=float(ir))


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


def bin_average(vals, wk, nb):
    """Bin averages (…, n_k) → (…, nb) with the k nodes' mode weights ``wk``."""
    return _bin(vals, wk, nb)


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


def _radial_transforms(shell, edges, profiles, ells, ic, resolution):
    """(bin weights, (2ℓ+1)(4π)²/I₂ × phase per ℓ, f_ℓ(k) per ℓ ∪ {0}) of profiles (n_a, n_r)
    on the window nodes of ``resolution``: f_ℓ = ∫ r² w m_IC j_ℓ(kr) dr (see
    radial_field_multipoles)."""
    if ic not in IC_KINDS:
        raise ConfigError(f"ic = {ic!r}: expected one of {IC_KINDS}")
    edges = np.asarray(edges, dtype=float)
    _, _, (r, wr), (k, wk) = resolution_grids(shell, edges, resolution)
    w = shell._eval("weight", shell.weight, r)
    base = wr * r ** 2 * w
    i2 = 4.0 * np.pi * np.sum(wr * r ** 2 * w ** 2)
    m = ic_monopole(np.atleast_2d(profiles), base / base.sum(), ic)
    jk = spherical_jn_all(max(ells), k[:, None] * r[None, :])
    f = {l: (base * m) @ jk[l].T for l in set(ells) | {0}}                    # (n_a, n_k)
    fac = {}
    for l in ells:
        phase = (-1j) ** l if l % 2 == 0 else (-1j) ** l / 1j
        fac[l] = (2 * l + 1) * (4 * np.pi) ** 2 / i2 * phase.real
    return wk, fac, f


def radial_field_multipoles(shell, edges, r_tab, m_tab, ells=(0, 2, 4), ic="none",
                            resolution=EstimatorResolution(k_nodes=16)):
    """The estimator applied to a deterministic field isotropic about the observer, m(r)
    (e.g. the constrained-field mean field ξ_gc(r)/σ_c of likelihood.observer), bin-averaged:

        F_ℓ(k) = 4π (−i)^ℓ ∫ r² w m_IC(r) j_ℓ(kr) dr,   P̂_ℓ = (2ℓ+1)/I₂ F_ℓ F_0*,

    (∫dΩ L_ℓ(k̂·x̂) e^{−ik·x} = 4π(−i)^ℓ j_ℓ(kr)), m_IC = ic_monopole(m): the field is pure J = 0,
    so the radial IC removes it exactly and the global one leaves m − ⟨m⟩_w. Odd ℓ: Π_ℓ.
    ``r_tab``, ``m_tab``: the profile tabulated on increasing r > 0 (cubic in ln r).
    16 k nodes per bin by default: F_ℓ F_0 of a smooth profile oscillates in k on the scale
    1/r_max (4 nodes miss it by up to 100 % in the bins where it changes sign).
    """
    from scipy.interpolate import CubicSpline
    edges = np.asarray(edges, dtype=float)
    _, _, (r, _), _ = resolution_grids(shell, edges, resolution)
    r_tab, m_tab = np.asarray(r_tab, dtype=float), np.asarray(m_tab, dtype=float)
    if r_tab.ndim != 1 or r_tab.shape != m_tab.shape or r_tab[0] > r[0] or r_tab[-1] < r[-1]:
        raise ConfigError("radial field: r_tab, m_tab must be 1-D of equal length and cover "
                          f"the shell [{shell.r_min}, {shell.r_max}] Mpc/h")
    m = CubicSpline(np.log(r_tab), m_tab)(np.log(r))
    wk, fac, f = _radial_transforms(shell, edges, m, ells, ic, resolution)
    out = np.array([fac[l] * f[l][0] * f[0][0] for l in ells])
    return _bin(out, wk, edges.size - 1)


def radial_field_templates(shell, edges, names, profiles, ells=(0, 2, 4), ic="none",
                           resolution=EstimatorResolution(k_nodes=16), names_b=None,
                           profiles_b=None):
    """Pair templates of the estimator applied to m = Σ_a x_a m_a, fields isotropic about the
    observer given as ``profiles`` (n_a, n_r) on the window nodes of ``resolution`` (those of
    :func:`monopole_profiles`): {(a, b): (n_ell, n_bins)} for a ≤ b in the order of ``names``,
    with E[m] = Σ_{a≤b} x_a x_b T_ab (T_ab holds both orderings F_ℓ[a] F_0[b] + F_ℓ[b] F_0[a]).
    A cross spectrum (``names_b``, ``profiles_b``: the fields of tracer B, which carries F_0):
    every pair, T_ab = F_ℓ[a] F_0^B[b]."""
    wk, fac, f = _radial_transforms(shell, edges, profiles, ells, ic, resolution)
    out = {}
    if names_b is not None:
        _, _, f_b = _radial_transforms(shell, edges, profiles_b, (0,), ic, resolution)
        for a, na in enumerate(names):
            for b, nb in enumerate(names_b):
                t = np.array([fac[l] * f[l][a] * f_b[0][b] for l in ells])
                out[na, nb] = _bin(t, wk, edges.size - 1)
        return out
    for a, na in enumerate(names):
        for b in range(a, len(names)):
            t = np.array([fac[l] * (f[l][a] * f[0][b] + (f[l][b] * f[0][a] if b != a else 0.0))
                          for l in ells])
            out[na, names[b]] = _bin(t, wk, edges.size - 1)
    return out


def monopole_profiles(cosmo, shell, edges, q, measure, tracer, terms=("density", "rsd"),
                      resolution=EstimatorResolution(k_nodes=16), snapshot_z=None, order=0):
    """Σ_i measure_i W_0(q_i, r): the angular monopole of the kernel (every piece on the light
    cone, integrated ones included; no integral constraint) weighted on a caller's q grid, on
    the window nodes r of ``resolution``. With measure = dq q² P(q) C(q)/(2π²) (C: a constraint
    field at the observer, c(q) = C δ_m0(q)) this is the cross-correlation ξ_gc(r) of the
    number counts with the field at the observer: only J = 0 survives the average over
    directions (Rayleigh expansion). ``tracer``: TracerCoefficients (with ``terms``) or a
    sequence of BasisKernel. Returns (r, names, profiles (n_names, n_r)).
    ``order`` = 1 gives Σ_i measure_i W_1(q_i, r) instead: the profile of the J = 1 part, which
    alone correlates with a vector at the observer (its velocity;
    likelihood.curved.observer_terms)."""
    q = np.asarray(q, dtype=float)
    measure = np.asarray(measure, dtype=float)
    if q.ndim != 1 or q.shape != measure.shape or q.size == 0 or q.min() <= 0:
        raise ConfigError("monopole_profiles: q and measure must be 1-D of equal length, q > 0")
    _, _, (r, wr), _ = resolution_grids(shell, np.asarray(edges, dtype=float), resolution)
    sides = _kernel_sides(cosmo, shell, r, q, tracer, terms, None, None, snapshot_z)
    side = sides.sets[0]
    names = side.names if not isinstance(side, _KernelSet) else list(side.names)
    out = np.zeros((len(names), r.size))
    for q0 in range(0, q.size, resolution.q_block):
        qb = q[q0:q0 + resolution.q_block]
        jq = spherical_jn_all(order + 1, qb[:, None] * r[None, :])
        jn, near = (_near_integrals(sides.los, sides.all_sets, qb, order) if sides.need_int
                    else (None, {}))
        sl = slice(q0, q0 + qb.size)
        W = _side_kernels(order, side, (qb, r, jq, jn, near), sl, sides.los, None, "none", False)
        out += np.einsum("q,aqr->ar", measure[sl], W)
    return r, names, out


def expected_multipoles(cosmo, shell, edges, tracer_a, terms_a=("density", "rsd"),
                        tracer_b=None, terms_b=None, ells=(0, 2, 4), ic="none",
                        resolution=EstimatorResolution(), snapshot_z=None):
    """Direct computation (each tracer's pieces summed into one kernel first): (n_ell, n_bins)
    signal, plus the shot noise if ``shell.nbar`` is given (see multipole_templates)."""
    t = multipole_templates(cosmo, shell, edges, tracer_a, terms_a, tracer_b, terms_b, ells, ic,
                            resolution, combine_pieces=True, snapshot_z=snapshot_z)
    return t.combine({}, {})


def radial_projection(J, ells, c_j, jk, base):
    """(2J+1) Σ_ij G_ℓJ(k r_i) base_i c_J(r_i, r_j) base_j j_J(k r_j), (…, n_ell, n_k), for
    ``jk`` = j_L(k r_i) (L ≤ J + 4, n_k, n_r) and the radial measure ``base`` (see
    :meth:`NodeSpectra.project`)."""
    rows = projection_rows(J, ells, jk, base)
    z = c_j @ (jk[J] * base[None, :]).T                                  # (..., r, k)
    out = [np.einsum("kr,...rk->...k", rows[l], z) for l in ells]
    return (2 * J + 1) * np.stack(out, axis=-2)


def projection_rows(J, ells, jk, base):
    """{ℓ: (n_k, n_r)} rows G_ℓJ(k r_i) base_i of the order-J radial projection, G_ℓJ the real
    form of g_ℓJ (module docstring): F_ℓ(k) = 4π Σ_JM Y_JM(k̂) (−i)^J i^{ℓ mod 2} Σ_i row_i
    a_JM(r_i). ``jk`` = j_L(k r_i) for L ≤ J + max(ells) (n_k, n_r); G_0J = j_J."""
    coefs = _g_coefficients(J, ells)
    return {l: sum(c * jk[L] for L, c in coefs[l].items()) * base[None, :] for l in ells}


class NodeSpectra:
    """The angular spectra of a tracer pair on the estimator's radial nodes, for estimators
    that need C_L(r1, r2) itself rather than the full-sky sum (the angular mask of
    likelihood.curved.mask):

        C_L^{ab}(r_i, r_j) = (2/π) ∫ q² dq P(q) W_L^a(q, r_i) W_L^b(q, r_j)

    (docs/curved_sky.md §1; Heavens & Taylor 1995), W_L^a the kernel of piece a of tracer A
    (tracer B for b), on the grids of :func:`resolution_grids` (the same J_max, q, r and k nodes
    as :func:`multipole_templates`). Arguments as :func:`multipole_templates`: tracers given as
    TracerCoefficients with terms, or as sequences of :class:`BasisKernel` (the pieces are then
    the basis kernels, named by their names: the templates of the curved forward model).

    Attributes: ``j_max``, ``q``/``wq``, ``r``/``wr``, ``k``/``wk`` (grids), ``weight`` w(r_i),
    ``base`` = ωr r² w (the radial measure of the estimator), ``names_a``/``names_b`` (pieces,
    or ["total"] with ``combine_pieces``), ``auto``, ``l_limit`` (the highest order whose
    kernel is not negligible on the q grid, bessel_order_max(q_max r_max)).
    """

    def __init__(self, cosmo, shell, edges, tracer_a, terms_a=("density", "rsd"), tracer_b=None,
                 terms_b=None, resolution=EstimatorResolution(), combine_pieces=False,
                 snapshot_z=None):
        edges = np.asarray(edges, dtype=float)
        if edges.ndim != 1 or edges.size < 2 or edges[0] <= 0 or np.any(np.diff(edges) <= 0):
            raise ConfigError("edges: expected increasing positive k bin edges in h/Mpc")
        self.auto = tracer_b is None
        self.shell, self.edges, self.resolution = shell, edges, resolution
        self.j_max, (self.q, self.wq), (self.r, self.wr), (self.k, self.wk) = \
            resolution_grids(shell, edges, resolution)
        r, q = self.r, self.q
        self.weight = shell._eval("weight", shell.weight, r)
        self.base = self.wr * r ** 2 * self.weight
        self.cosmo = cosmo
        self.meas = (2.0 / np.pi) * self.wq * q * q * np.asarray(cosmo.power(q, 0.0), dtype=float)
        sides = _kernel_sides(cosmo, shell, r, q, tracer_a, terms_a, tracer_b, terms_b,
                              snapshot_z)
        self.sets, self.all_sets, self.los = sides.sets, sides.all_sets, sides.los
        self.need_int = sides.need_int
        self.combine = bool(combine_pieces)
        self.names_a = ["total"] if self.combine else self.sets[0].names
        self.names_b = ["total"] if self.combine else self.sets[1].names
        self.l_limit = bessel_order_max(float(q[-1]) * shell.r_max)

    def nbar(self):
        """n̄(r_i) of the shell on the radial nodes [(h/Mpc)³] (ConfigError if not given or not
        > 0), for the shot noise."""
        if self.shell.nbar is None:
            raise ConfigError("shell nbar: needed for the shot noise")
        nbar = self.shell._eval("nbar", self.shell.nbar, self.r)
        if np.any(nbar <= 0):
            raise ConfigError("shell nbar(r): expected > 0 on the shell")
        return nbar

    def spectra(self, l_top, pairs):
        """{(ia, ib): array (l_top + 1, n_r, n_r)} of C_L^{ab}(r_i, r_j), L = 0..l_top, for
        the index pairs ``pairs`` into names_a × names_b. Memory: 8 (l_top + 1) n_r² bytes
        per pair; q is processed in blocks as in :func:`multipole_templates`."""
        r, q, nr = self.r, self.q, self.r.size
        rmax = self.shell.r_max
        ia_set = sorted({a for a, _ in pairs})
        out = {p: np.zeros((l_top + 1, nr, nr)) for p in pairs}
        blk_size = self.resolution.q_block
        for q0 in range(0, q.size, blk_size):
            qb = q[q0:q0 + blk_size]
            n_top = min(l_top, bessel_order_max(float(qb[-1]) * rmax))
            jq = spherical_jn_all(n_top + 1, qb[:, None] * r[None, :])
            jn, near = (_near_integrals(self.los, self.all_sets, qb, n_top) if self.need_int
                        else (None, {}))
            for L in range(n_top + 1):
                qa = int(np.searchsorted(qb * rmax, bessel_x_min(max(L - 1, 0))))
                if qa >= qb.size:
                    continue
                sl = slice(q0 + qa, q0 + qb.size)
                blk = (qb[qa:], r, jq[:, qa:], None if jn is None else jn[:, qa:], near)
                WA = _side_kernels(L, self.sets[0], blk, sl, self.los, None, "none",
                                   self.combine)
                WB = WA if self.auto else _side_kernels(L, self.sets[1], blk, sl, self.los, None,
                                                        "none", self.combine)
                left = {a: (WA[a] * self.meas[sl][:, None]).T for a in ia_set}   # (r, q)
                for a, b in pairs:
                    out[a, b][L] += left[a] @ WB[b]
        if l_top >= 1:
            tails, _ = _motion_tail_spectra(self.cosmo, q, self.wq, self.sets, self.auto,
                                            self.combine)
            for p in pairs:
                if p in tails:
                    out[p][1] += tails[p]
        return out

    def project(self, J, ells, c_j):
        """The radial double integral of the estimator for order J (module docstring):
        (2J+1) Σ_ij G_ℓJ(k r_i) base_i c_J(r_i, r_j) base_j j_J(k r_j) for each ℓ in ``ells``
        on the k nodes, (n_ell, n_k) (real; Π_ℓ for odd ℓ). The caller multiplies by
        (2ℓ+1)·4π/I₂. ``c_j``: (n_r, n_r) or a stack (..., n_r, n_r)."""
        if not hasattr(self, "_jk"):
            self._jk = spherical_jn_all(self.j_max + 5, self.k[:, None] * self.r[None, :])
        return radial_projection(J, ells, c_j, self._jk, self.base)

    def bin(self, vals):
        """Bin averages (…, n_k) → (…, n_bins) with the Gauss nodes' mode weights."""
        return _bin(vals, self.wk, self.edges.size - 1)
