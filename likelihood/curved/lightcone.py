"""The light cone of the observer: z(r), background and tracer coefficients as functions of
the comoving distance r [Mpc/h], and the kernel pieces W_J^a(q, r) of the number counts.

Conventions (shared/design.md; docs/projection.md; docs/curved_sky.md): observer at the origin,
x = r n̂, n̂ from the observer to the source; δ(x) = ∫ d³q/(2π)³ δ(q) e^{+iq·x}; δ_m the
comoving-gauge matter density; P(q) = cosmo.power(q, 0) the linear matter power today and
D(r) = D(z(r))/D(0); b_e = d ln(a³ n̄)/d ln a; 𝒬 = 5s/2; ℋ = aH/c [h/Mpc]. In linear theory

    a_JM(r) = 4π i^J ∫ d³q/(2π)³ δ_m0(q) Y*_JM(q̂) W_J(q, r),
    C_J(r1, r2) = (2/π) ∫ q² dq P(q) W_J(q, r1) W_J(q, r2),

and the kernel is a sum of pieces (each switchable):

    local (docs/projection.md eq. 5.2 evaluated at each r, iμ → ∂_x, μ² → −∂²_x, x = qr):
      density     D b j_J(qr)
      rsd        −D f j_J''(qr)                                  (Kaiser 1987)
      doppler     D γ1(r)/q j_J'(qr)
      potential   D γ2(r)/q² j_J(qr)                              (incl. the gauge term)
      fnl         D f_NL (b − p) 3 δ_c Ω_m0 (H0/c)² / (D_md q² T(q)) j_J(qr)
    integrated (Bonvin & Durrer 2011; Challinor & Lewis 2011; Di Dio et al. 2013 eq. 2.8), with
    Φ = Ψ = φ̃(r') δ_m0/q², φ̃ = −(3/2) Ω_m0 (H0/c)² (1 + z') D(r'):
      lensing     −(2 − 2𝒬) κ_J = (2 − 2𝒬(r)) J(J+1)/r ∫_0^r dr' (r − r')/r' φ̃ j_J(qr') / q²
      time_delay  (2 − 2𝒬(r))/r · S,  S = ∫_0^r (Φ + Ψ) dr' = 2 ∫_0^r φ̃ j_J(qr') dr' / q²
      isw         C(r) · I,  I = −∫_0^r (Φ' + Ψ') dr' = −2 ∫_0^r ℋ (f − 1) φ̃ j_J(qr') dr' / q²

with C = b_e − 2𝒬 − ℋ'/ℋ² − 2(1 − 𝒬)/(χℋ) the Doppler factor (docs/projection.md eq. 6.2).
The observer terms (observer_motion, J = 1; observer_potential, J = 0) are in
likelihood.curved.observer_terms (docs/observer_terms.md).
"""
from __future__ import annotations

import numbers
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from ..errors import ConfigError, ErgofitError

__all__ = ["HUBBLE_DISTANCE", "DELTA_C", "LOCAL_TERMS", "INTEGRATED_TERMS", "OBSERVER_TERMS",
           "TERMS",
           "LightCone", "TracerCoefficients", "local_pieces", "integrated_pieces",
           "ResolutionWarning"]

HUBBLE_DISTANCE = 299792.458 / 100.0   # c/H0 in Mpc/h (c exact, H0 = 100 h km/s/Mpc)
DELTA_C = 1.686                         # spherical-collapse threshold (Dalal et al. 2008)
LOCAL_TERMS = ("density", "rsd", "doppler", "potential", "fnl")
INTEGRATED_TERMS = ("lensing", "isw", "time_delay")
OBSERVER_TERMS = ("observer_motion", "observer_potential")   # likelihood.curved.observer_terms
TERMS = LOCAL_TERMS + INTEGRATED_TERMS + OBSERVER_TERMS


class ResolutionWarning(UserWarning):
    """A curved-sky configuration asks for more than the chosen grids resolve."""


def check_terms(terms, allowed=TERMS, owner="terms"):
    """Validated tuple of term names (order kept, duplicates refused)."""
    if isinstance(terms, str):
        terms = (terms,)
    try:
        out = tuple(terms)
    except TypeError:
        raise ConfigError(f"{owner} = {terms!r}: expected a list of names from {allowed}") from None
    bad = [t for t in out if t not in allowed]
    if bad or len(set(out)) != len(out):
        raise ConfigError(f"{owner} = {terms!r}: expected distinct names from {allowed}")
    return out


class LightCone:
    """Background along the past light cone, tabulated once: z(r) and every quantity at r.

    ``z_max``: the table covers 0 ≤ z ≤ z_max (r ≤ χ(z_max)). z(r) inverts χ(z) with a cubic
    spline on 4001 redshifts (interpolation error < 1e-10 in z).
    """

    def __init__(self, cosmo, z_max):
        try:
            z_max = float(z_max)
        except (TypeError, ValueError):
            raise ConfigError(f"light cone z_max = {z_max!r}: expected a number") from None
        if not (0.0 < z_max < 1100.0):
            raise ConfigError(f"light cone z_max = {z_max}: expected 0 < z_max < 1100")
        self.cosmo = cosmo
        self.z_max = z_max
        zt = np.linspace(0.0, z_max, 4001)
        chi = np.asarray(cosmo.comoving_distance(zt), dtype=float)
        if not (np.all(np.isfinite(chi)) and np.all(np.diff(chi) > 0)):
            raise ErgofitError("cosmology comoving_distance(z) is not finite and increasing")
        self.r_max = float(chi[-1])
        self._z_of_r = CubicSpline(chi, zt)
        self.Omega_m0 = float(cosmo.Omega_m0)

    def z(self, r):
        """Redshift at comoving distance r [Mpc/h] (0 ≤ r ≤ r_max)."""
        r = np.asarray(r, dtype=float)
        if np.any(r < 0) or np.any(r > self.r_max * (1 + 1e-12)):
            raise ConfigError(f"radial distance outside [0, {self.r_max:.6g}] Mpc/h covered by "
                              f"the light cone (z_max = {self.z_max:g})")
        return np.clip(self._z_of_r(r), 0.0, self.z_max)

    def background(self, r):
        """dict of arrays at r: z, D (today = 1), D_md (matter era), f, H (ℋ, h/Mpc),
        ratio (ℋ'/ℋ²), om (Ω_m(z)), chi (= r), dzdr = (1+z)ℋ, phi (φ̃ = −(3/2) Ω_m0 (H0/c)²
        (1 + z) D, in (h/Mpc)²) and the float Omega_m0."""
        r = np.asarray(r, dtype=float)
        z = self.z(r)
        c = self.cosmo
        bg = dict(z=z, D=np.asarray(c.growth_factor(z, norm="today"), dtype=float),
                  D_md=np.asarray(c.growth_factor(z, norm="matter"), dtype=float),
                  f=np.asarray(c.growth_rate(z), dtype=float),
                  H=np.asarray(c.conformal_hubble(z), dtype=float),
                  ratio=np.asarray(c.conformal_hubble_ratio(z), dtype=float),
                  om=np.asarray(c.Omega_m(z), dtype=float), chi=r)
        bg["dzdr"] = (1.0 + z) * bg["H"]
        bg["phi"] = -1.5 * self.Omega_m0 / HUBBLE_DISTANCE ** 2 * (1.0 + z) * bg["D"]
        bg["Omega_m0"] = self.Omega_m0
        for k, v in bg.items():
            if not np.all(np.isfinite(v)):
                raise ErgofitError(f"cosmology returned a non-finite {k} on the light cone")
        return bg


def _coefficient(name, value, z):
    """A tracer quantity as a constant or a callable of z, evaluated on z (array)."""
    if callable(value):
        try:
            out = np.asarray(value(z), dtype=float)
        except Exception as exc:  # noqa: BLE001 - user callable; report it in one line
            raise ConfigError(f"tracer {name}(z): calling it failed ({exc})") from None
        out = np.broadcast_to(out, np.shape(z)).astype(float)
    elif isinstance(value, numbers.Real) and not isinstance(value, bool):
        out = np.full(np.shape(z), float(value))
    else:
        raise ConfigError(f"tracer {name} = {value!r}: expected a number or a callable of z")
    if not np.all(np.isfinite(out)):
        raise ConfigError(f"tracer {name}(z) is not finite on the radial grid")
    return out


@dataclass(frozen=True)
class TracerCoefficients:
    """Tracer quantities, each a number or a callable of z: linear bias b (comoving gauge),
    evolution bias b_e = d ln(a³ n̄)/d ln a, magnification slope s (𝒬 = 5s/2), f_NL and p."""
    b: object = 1.0
    b_e: object = 0.0
    s: object = 0.0
    fnl: float = 0.0
    p: float = 1.0

    def at(self, z):
        """dict of arrays b, b_e, Q on z (and the floats fnl, p)."""
        for name in ("fnl", "p"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, numbers.Real) or not np.isfinite(v):
                raise ConfigError(f"tracer {name} = {v!r}: expected a finite number")
        return dict(b=_coefficient("b", self.b, z), b_e=_coefficient("b_e", self.b_e, z),
                    Q=2.5 * _coefficient("s", self.s, z), fnl=float(self.fnl), p=float(self.p))


def doppler_factor(bg, tc):
    """C = b_e − 2𝒬 − ℋ'/ℋ² − 2(1 − 𝒬)/(χℋ) (docs/projection.md eq. 6.2)."""
    return tc["b_e"] - 2.0 * tc["Q"] - bg["ratio"] - 2.0 * (1.0 - tc["Q"]) / (bg["chi"] * bg["H"])


def gammas(bg, tc):
    """(γ1 [h/Mpc], γ2 [(h/Mpc)²]) at every r, same formulas as likelihood.tracer.gamma1/2:
    γ1 = f ℋ C,  γ2 = ℋ² { f (3 − b_e) + (3/2) Ω_m(z) [2 + b_e − f − ℋ'/ℋ² − 4𝒬 − 2(1−𝒬)/(χℋ)] }."""
    C = doppler_factor(bg, tc)
    H2 = bg["H"] ** 2
    g1 = bg["f"] * bg["H"] * C
    g2 = H2 * (bg["f"] * (3.0 - tc["b_e"])
               + 1.5 * bg["om"] * (2.0 + tc["b_e"] - bg["f"] - bg["ratio"] - 4.0 * tc["Q"]
                                   - 2.0 * (1.0 - tc["Q"]) / (bg["chi"] * bg["H"])))
    return g1, g2


@dataclass(frozen=True)
class LocalPiece:
    """W_J(q, r) = radial(r) · qfactor(q) · j_J^{(order)}(qr)."""
    name: str
    radial: np.ndarray
    order: int              # 0: j_J, 1: j_J', 2: j_J''
    qpower: int             # qfactor = q^{-qpower} (times 1/T(q) if transfer)
    transfer: bool = False

    def qfactor(self, cosmo, q):
        out = q ** (-float(self.qpower))
        if self.transfer:
            out = out / np.asarray(cosmo.transfer(q), dtype=float)
        return out


def local_pieces(bg, tc, terms):
    """The local pieces in ``terms`` (docstring of the module), on the radial grid of ``bg``."""
    D = bg["D"]
    out = []
    g1 = g2 = None
    if "doppler" in terms or "potential" in terms:
        g1, g2 = gammas(bg, tc)
    for t in terms:
        if t == "density":
            out.append(LocalPiece(t, D * tc["b"], 0, 0))
        elif t == "rsd":
            out.append(LocalPiece(t, -D * bg["f"], 2, 0))
        elif t == "doppler":
            out.append(LocalPiece(t, D * g1, 1, 1))
        elif t == "potential":
            out.append(LocalPiece(t, D * g2, 0, 2))
        elif t == "fnl":
            amp = 3.0 * DELTA_C * bg["Omega_m0"] / HUBBLE_DISTANCE ** 2
            out.append(LocalPiece(t, D * tc["fnl"] * (tc["b"] - tc["p"]) * amp / bg["D_md"],
                                  0, 2, transfer=True))
    return out


@dataclass(frozen=True)
class IntegratedPart:
    """One separable part of an integrated piece:
    W_J(q, r) ⊃ q^{-2} outer(r) [J(J+1) if lensing] ∫_0^r dr' inner(r') j_J(qr')."""
    name: str
    outer: np.ndarray       # on the window grid r
    inner: object           # callable of the background dict on the line-of-sight grid r'
    lensing: bool


def integrated_pieces(bg, tc, terms):
    """Separable parts of the integrated pieces in ``terms``; each piece is a list of parts.

    lensing:    (2−2𝒬) J(J+1) [∫ φ̃/r' j − (1/r) ∫ φ̃ j]      (κ sign: docs/curved_sky.md)
    time_delay: 2 (2−2𝒬)/r ∫ φ̃ j
    isw:        C(r) ∫ (−2 ℋ (f−1) φ̃) j
    """
    out = {}
    r = bg["chi"]
    mag = 2.0 - 2.0 * tc["Q"]
    for t in terms:
        if t == "lensing":
            out[t] = [IntegratedPart(t, mag, lambda b: b["phi"] / b["chi"], True),
                      IntegratedPart(t, -mag / r, lambda b: b["phi"], True)]
        elif t == "time_delay":
            out[t] = [IntegratedPart(t, 2.0 * mag / r, lambda b: b["phi"], False)]
        elif t == "isw":
            out[t] = [IntegratedPart(t, doppler_factor(bg, tc),
                                     lambda b: -2.0 * b["H"] * (b["f"] - 1.0) * b["phi"], False)]
    return out
