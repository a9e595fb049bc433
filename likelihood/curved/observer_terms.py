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
           "kinematic_dipole", "velocity_dispersion"]

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
