"""The terms of the linear number counts evaluated at the observer: its velocity (a pure J = 1
term, v_o·n̂) and its potential (a pure J = 0 term, with the perturbed time of observation).
Derivation and sources: docs/observer_terms.md.

Conventions as likelihood.curved.lightcone (n̂ from the observer to the source, v = dx/dη,
δ(x) = ∫d³q/(2π)³ δ(q) e^{+iq·x}, Φ = Ψ = φ̃ δ_m0/q², b_e = d ln(a³n̄)/d ln a, 𝒬 = 5s/2;
quantities with subscript 0 at the observer, today). Adding to the redshift perturbation of
docs/projection.md eq. (2.1) the observer's part

    δz_o = Ψ_o − v_o·n̂ + ℋ_0 δη_o,   δη_o = −∫_0^{η_0} a Ψ(0, η) dη = −T_o Ψ_o,
    T_o = ∫_0^{η_0} D(η) dη = ∫ D(a)/ℋ(a) d ln a     (Ψ ∝ D/a; a_0 = D_0 = 1),

(observer's redshift and the coordinate time of observation at fixed proper time; Bonvin &
Durrer 2011, Challinor & Lewis 2011, Biern & Yoo 2017 — from memory), to the radial position
δr ⊃ δη_o, and the aberration of the observed directions (dΩ_source/dΩ_obs = 1 + 2 v_o·n̂,
which also enters the luminosity distance, δ ln D_L ⊃ v_o·n̂ + δη_o/χ), the counts gain

    Δ_obs = C δz_o + (2 − 2𝒬)(v_o·n̂ + δη_o/χ),
    C = b_e − 2𝒬 − ℋ'/ℋ² − 2(1 − 𝒬)/(χℋ)                     (docs/projection.md eq. 6.2),

so that, with v_o = i q̂ f_0 ℋ_0 δ_m0/q and i q̂·n̂ → (2J+1) i^J j_J'(0) L_J, j_1'(0) = 1/3:

    observer_motion      W_1(q, r) = [2 − b_e + ℋ'/ℋ² + 2(1 − 𝒬)/(χℋ)] f_0 ℋ_0 / (3q)
    observer_potential   W_0(q, r) = φ̃_0 [C (1 − ℋ_0 T_o) − (2 − 2𝒬) T_o/χ] / q²

(only J = 1, resp. J = 0). The velocity coefficient is the Ellis & Baldwin (1984)-type
kinematic dipole of redshift-binned, flux-limited counts. With both terms on, the q → 0 parts
of the kernel cancel (W_0 q² → 0 and W_1 q → 0: the equivalence principle; tests).

The observer's velocity with respect to the CMB (from memory: Planck 2018 results I, 2020):
369.82 ± 0.11 km/s towards galactic (l, b) = (264.02°, 48.25°).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError
from .lightcone import OBSERVER_TERMS, doppler_factor

__all__ = ["OBSERVER_TERMS", "CMB_DIPOLE_SPEED", "CMB_DIPOLE_SPEED_ERROR", "CMB_DIPOLE_GALACTIC",
           "SPEED_OF_LIGHT", "ObserverPiece", "observer_time", "observer_pieces",
           "kinematic_dipole", "velocity_dispersion", "motion_tail", "observer_q_grid",
           "motion_profiles", "dipole_field_templates", "motion_templates", "MotionConditioning"]

SPEED_OF_LIGHT = 299792.458                 # km/s (exact)
#: the Sun's speed with respect to the CMB [km/s], its error, and its direction (galactic
#: l, b in degrees): Planck 2018 results I (2020), written from memory
CMB_DIPOLE_SPEED = 369.82
CMB_DIPOLE_SPEED_ERROR = 0.11
CMB_DIPOLE_GALACTIC = (264.02, 48.25)


@dataclass(frozen=True)
class ObserverPiece:
    """W_J(q, r) = radial(r) q^{-qpower} at the single order ``order``, zero at every other J."""
    name: str
    radial: np.ndarray
    order: int
    qpower: int

    def qfactor(self, cosmo, q):
        return q ** (-float(self.qpower))


def observer_time(cosmo, a_min=1e-4, nodes=96):
    """T_o = ∫_0^{η_0} D(η)/D_0 dη = ∫ D(a)/ℋ(a) d ln a [Mpc/h] (Gauss–Legendre in ln a from
    ``a_min``; the matter-era remainder below it, ∝ a_min^{3/2}, is 1e-6 of T_o): the coordinate
    time of observation moves by δη_o = −T_o Ψ_o (observer's proper time fixed, Ψ ∝ D/a).
    Einstein–de Sitter: ℋ_0 T_o = 2/3."""
    t, u = np.polynomial.legendre.leggauss(int(nodes))
    lo = np.log(float(a_min))
    lna = lo * 0.5 * (1.0 - t)
    z = np.exp(-lna) - 1.0
    d = np.asarray(cosmo.growth_factor(z, norm="today"), dtype=float)
    h = np.asarray(cosmo.conformal_hubble(z), dtype=float)
    out = float(np.sum(0.5 * (-lo) * u * d / h))
    if not np.isfinite(out) or out <= 0:
        raise ConfigError("observer time: the cosmology's growth or Hubble rate is not finite")
    return out


def kinematic_dipole(bg, tc):
    """The coefficient of v_o·n̂ in the counts, 2 − 2𝒬 − C = 2 − b_e + ℋ'/ℋ² + 2(1 − 𝒬)/(χℋ)
    (module docstring), at every r of ``bg``."""
    return 2.0 - 2.0 * tc["Q"] - doppler_factor(bg, tc)


def observer_pieces(cone, bg, tc, terms):
    """The observer pieces in ``terms`` on the radial grid of ``bg`` (module docstring)."""
    terms = [t for t in terms if t in OBSERVER_TERMS]
    if not terms:
        return []
    bg0 = cone.background(np.zeros(1))
    h0, f0, phi0 = float(bg0["H"][0]), float(bg0["f"][0]), float(bg0["phi"][0])
    out = []
    for t in terms:
        if t == "observer_motion":
            out.append(ObserverPiece(t, kinematic_dipole(bg, tc) * f0 * h0 / 3.0, 1, 1))
        else:
            t_o = observer_time(cone.cosmo)
            c = doppler_factor(bg, tc)
            radial = phi0 * (c * (1.0 - h0 * t_o) - (2.0 - 2.0 * tc["Q"]) * t_o / bg["chi"])
            out.append(ObserverPiece(t, radial, 0, 2))
    return out


def motion_tail(cosmo, q, wq):
    """(2/π) [∫ P dq − Σ ωq P(q)]: what the caller's q quadrature (q, ωq) misses of the J = 1
    spectrum ρ(r1) ρ(r2) (2/π) ∫ P dq of observer_motion pieces W_1 = ρ(r)/q (ρ the piece's
    radial factor, f_0ℋ_0/3 included). That kernel does not decay with q (no j_J(qr)), so its
    own variance needs the whole ∫P dq, while the engine's q grid stops where the source
    kernels have decayed (q_max ≈ 0.1 h/Mpc, where 10–40 % of ∫P dq lies beyond; its 16-node
    infrared segment is also good to 3e-4 only). The engine adds this as a rank-one J = 1
    spectrum, so the motion's own variance is that of :func:`observer_q_grid` (5e-7 of scipy
    quad), exact since every other piece is negligible beyond q_max by the q_max rule."""
    q, wq = np.asarray(q, dtype=float), np.asarray(wq, dtype=float)
    qf, wf = observer_q_grid(1000.0, float(q[0]) * 0.5)
    full = np.sum(wf * np.asarray(cosmo.power(qf, 0.0), dtype=float))
    return float((2.0 / np.pi) * (full - np.sum(wq * np.asarray(cosmo.power(q, 0.0), dtype=float))))


def _log_gl(a, b, n=32):
    """n-point Gauss–Legendre in ln q on [a, b]: (q, ωq)."""
    t, u = np.polynomial.legendre.leggauss(n)
    span = np.log(b) - np.log(a)
    x = np.exp(np.log(a) + span * 0.5 * (t + 1.0))
    return x, x * 0.5 * span * u


def velocity_dispersion(cosmo, q, wq):
    """(σ_∥, σ_3D): the rms of one component (e.g. the line of sight) and of the modulus of the
    linear matter velocity at the observer today, in units of c, on the caller's q quadrature:

        σ_∥² = (f_0 ℋ_0)² ∫ P(q) dq / (6π²),   σ_3D² = 3 σ_∥²

    (v(q) = i q̂ f ℋ δ_m/q, eq. 1.1 of docs/projection.md; ⟨v_i v_j⟩ = δ_ij σ_∥²)."""
    q, wq = np.asarray(q, dtype=float), np.asarray(wq, dtype=float)
    f0 = float(cosmo.growth_rate(0.0))
    h0 = float(cosmo.conformal_hubble(0.0))
    s2 = (f0 * h0) ** 2 * float(np.sum(wq * np.asarray(cosmo.power(q, 0.0), dtype=float))) \
        / (6.0 * np.pi ** 2)
    return float(np.sqrt(s2)), float(np.sqrt(3.0 * s2))


def observer_q_grid(r_max, q_ir, q_top=20.0):
    """(q, ωq) for correlations with a field at the observer: 32 Gauss–Legendre nodes in ln q
    from q_ir to max(6/r_max, 2 q_ir), panels of 4/r_max (8 nodes) up to 0.5 h/Mpc (the
    oscillation of j_J(q r) on the shell), then 32 nodes in ln q up to ``q_top`` (None: stop at
    0.5, as the constrained potential of model/curved.py). The whole ∫P dq of the velocity
    variance is needed (the kinematic dipole is given exactly by v_o); measured for the Planck 2018
    preset: σ_3D = 544.20 km/s, 544.25 with q_top = 200 (linear theory; the part above
    ~1 h/Mpc is not linear anyway: docs/observer_terms.md)."""
    from .quadrature import composite_gl
    q_lo = max(6.0 / float(r_max), 2.0 * float(q_ir))
    q1, w1 = _log_gl(float(q_ir), q_lo)
    q2, w2 = composite_gl(q_lo, 0.5, 4.0 / float(r_max))
    if q_top is None:
        return np.concatenate([q1, q2]), np.concatenate([w1, w2])
    q3, w3 = _log_gl(0.5, float(q_top))
    return np.concatenate([q1, q2, q3]), np.concatenate([w1, w2, w3])


def motion_profiles(cosmo, shell, edges, tracer, terms=None, resolution=None):
    """The dipole of the counts expected given the observer's velocity, per unit of it:
    (r, names, h (n_names, n_r), σ_3D), with

        ⟨a_1m(r) | v_o⟩ = Σ_a x_a h_a(r) V_m/σ_V,   h_a = X_a/σ_V,
        X_a(r) = ⟨a_1m(r) V*_m⟩ = (2/π) ∫ q² dq P W_1^a(q, r) f_0ℋ_0/(3q),
        σ_V² = ⟨|V_m|²⟩ = (2/π) ∫ q² dq P (f_0ℋ_0/(3q))² = (4π/9) σ_3D²,

    V_m = ∫dΩ Y*_1m (v_o·n̂) the harmonic coefficients of the observer's motion (Hoffman &
    Ribak 1991 regression; only J = 1 correlates with a vector at the origin). W_1^a includes
    observer_motion (the kinematic dipole, X = its coefficient × σ_V²) and every source piece
    correlated with v_o. ``tracer``: TracerCoefficients with ``terms``, or a list of
    BasisKernel (the curved forward model's basis); q on :func:`observer_q_grid`, r on the window
    nodes of ``resolution``."""
    from .estimator import EstimatorResolution, monopole_profiles
    resolution = resolution or EstimatorResolution(k_nodes=16)
    q, wq = observer_q_grid(shell.r_max, resolution.q_ir)
    _, s3 = velocity_dispersion(cosmo, q, wq)
    fh = float(cosmo.growth_rate(0.0)) * float(cosmo.conformal_hubble(0.0))
    pq = np.asarray(cosmo.power(q, 0.0), dtype=float)
    sig_v = np.sqrt((2.0 / np.pi) * np.sum(wq * pq) * (fh / 3.0) ** 2)
    meas = (2.0 / np.pi) * wq * q * q * pq * fh / (3.0 * q) / sig_v
    r, names, h = monopole_profiles(cosmo, shell, edges, q, meas, tracer, terms, resolution,
                                    None, order=1)
    return r, names, h, s3


def dipole_field_templates(shell, edges, names, profiles, ells=(0, 2, 4), resolution=None):
    """The full-sky estimator applied to dipole fields about the observer: pair templates
    {(a, b): (n_ell, n_bins)} (a ≤ b, both orderings in T_ab) of the expected P̂_ℓ of the field
    with the rank-one J = 1 spectrum C_1(r1, r2) = Σ_ab x_a x_b h_a(r1) h_b(r2), ``profiles``
    h_a (n_a, n_r) on the window nodes of ``resolution``. A deterministic field
    m(r n̂) = g(r) (û·n̂), |û| = 1, has a_1M = (4π/3) g Y*_1M(û) and (1/3) Σ_M a_1M a*_1M =
    (4π/9) g(r1) g(r2): the same expectation for h = g √(4π)/3. With the estimator of
    likelihood.curved.estimator (module docstring there):
    P̂_ℓ = (2ℓ+1)(4π/I₂) · 3 Σ_ij G_ℓ1(k r_i) base_i C_1(r_i, r_j) base_j j_1(k r_j)."""
    from .bessel import spherical_jn_all
    from .estimator import EstimatorResolution, bin_average, radial_projection, resolution_grids
    resolution = resolution or EstimatorResolution(k_nodes=16)
    edges = np.asarray(edges, dtype=float)
    _, _, (r, wr), (k, wk) = resolution_grids(shell, edges, resolution)
    profiles = np.atleast_2d(np.asarray(profiles, dtype=float))
    if profiles.shape != (len(names), r.size):
        raise ConfigError(f"dipole profiles: expected shape ({len(names)}, {r.size}) on the "
                          f"window nodes, got {profiles.shape}")
    w = shell.weight_on(r)
    base = wr * r ** 2 * w
    i2 = 4.0 * np.pi * np.sum(wr * r ** 2 * w ** 2)
    jk = spherical_jn_all(max(ells) + 2, k[:, None] * r[None, :])
    fac = np.array([(2 * l + 1) * 4.0 * np.pi / i2 for l in ells])[:, None]
    out = {}
    for a, na in enumerate(names):
        for b in range(a, len(names)):
            c = np.outer(profiles[a], profiles[b])
            if b != a:
                c = c + c.T
            out[na, names[b]] = bin_average(fac * radial_projection(1, ells, c, jk, base), wk,
                                            edges.size - 1)
    return out


def motion_templates(cosmo, shell, edges, tracer, terms=None, ells=(0, 2, 4),
                     resolution=None):
    """Pair templates of the conditioning on the observer's velocity, full sky:

        ⟨P̂_ℓ | v_o⟩ = ⟨P̂_ℓ⟩ + (ν_v² − 1) Σ_{a≤b} x_a x_b D_ab,   ν_v = |v_o|/σ_3D,

    D_ab = :func:`dipole_field_templates` of the profiles h_a of :func:`motion_profiles`: the
    mean dipole field (∝ ν_v²) minus the covariance it removes (the ν_v = 1 value;
    docs/observer_terms.md, section 4). No integral constraint changes it (they act on J = 0
    on the full sky); on a masked sky it would depend on the direction of v_o relative to the
    mask (not modelled). Returns ({(a, b): (n_ell, n_bins)}, σ_3D [units of c])."""
    from .estimator import EstimatorResolution
    resolution = resolution or EstimatorResolution(k_nodes=16)
    _, names, h, s3 = motion_profiles(cosmo, shell, edges, tracer, terms, resolution)
    return dipole_field_templates(shell, edges, names, h, ells, resolution), s3


@dataclass(frozen=True)
class MotionConditioning:
    """The counts conditioned on the observer's measured speed |v_o| [km/s] (default: the CMB
    dipole, CMB_DIPOLE_SPEED): ν_v = |v_o|/σ_3D with σ_3D the linear-theory rms at the cosmology
    (:func:`velocity_dispersion`), and the templates (ν_v² − 1) D_ab of :func:`motion_templates`
    to add to the averaged model (full sky). The Sun's velocity includes non-linear motions
    (its orbit in the Galaxy, the Local Group's infall) that linear theory does not correlate
    with the distant field; the kinematic dipole itself is exact (docs/observer_terms.md)."""
    speed: float = CMB_DIPOLE_SPEED

    def __post_init__(self):
        v = self.speed
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v) or v < 0:
            raise ConfigError(f"observer speed = {v!r}: expected a number >= 0 in km/s")

    def templates(self, cosmo, shell, edges, tracer, terms=None, ells=(0, 2, 4),
                  resolution=None):
        """({(a, b): (ν_v² − 1) D_ab}, ν_v)."""
        pairs, s3 = motion_templates(cosmo, shell, edges, tracer, terms, ells, resolution)
        nu = self.speed / SPEED_OF_LIGHT / s3
        return {k: (nu * nu - 1.0) * v for k, v in pairs.items()}, nu
