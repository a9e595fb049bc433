"""The observer term: the value of a field at the observer's position shifts the measured multipoles.

We observe one realisation from one point, the origin. Let c(x) be a Gaussian field linear in the
matter density, c(k) = C(k) δ_m(k, z), and ν = c(0)/σ_c its value at the observer in units of its
rms. Conditioning the Gaussian galaxy field Δ_g on ν (Hoffman & Ribak 1991, ApJ 380, L5) splits it
into a deterministic mean field and a residual:

    <Δ_g(x) | ν> = ν m(x),   m(x) = ξ_gc(x)/σ_c,   ξ_gc(x) = <Δ_g(x) c(0)>,
    Cov[Δ_g(x₁), Δ_g(x₂) | ν] = ξ(x₁, x₂) − ξ_gc(x₁) ξ_gc(x₂)/σ_c².

Any quadratic estimator P̂ (window, data-estimated mean, mode-averaged k bins) therefore has

    <P̂_ℓ(k) | ν> = P̂^std_ℓ(k) + (ν² − 1) E_ℓ[m](k),                                   (1)

with P̂^std the usual (unconditioned) expectation and E_ℓ[m] the estimator applied to the
deterministic field m: the residual covariance removes E[m] once and the mean field adds ν² E[m].
For ν² = 1 the correction vanishes; averaged over ν ~ N(0, 1) it vanishes too.

Constraint fields C(k) (the observer's value is taken TODAY, z = 0)
------------------------------------------------------------------
* ``potential`` (default): Poisson's equation at z = 0 with δ_m(k, 0) = δ_m(k, z) D(0)/D(z),

      C(k) = −(3/2) Ω_m0 (H0/c)² / (k² D(z)/D(0)) · S(kR),       Φ dimensionless (units of c²).

  Linear growth is scale independent, so the time at which the observer's value is taken only
  rescales C by a constant: m = ξ_gc/σ_c and the correction E[m] do not depend on it (nor on the
  sign of C); only the reported σ_c does. In the matter-era notation Φ(k, 0) = −(3/5) T(k) D_md(0) R(k)
  (R: primordial curvature), so σ_Φ² = ∫ dln k (9/25) D_md(0)² T² Δ²_R: for n_s ≈ 1 it grows
  like ln(k_eq/k_IR) in the infrared (see :func:`sigma_c_table` and docs/observer.md).
* ``density``: the matter density today smoothed on a radius R, C(k) = S(kR) D(0)/D(z).

Cut-offs (explicit): the infrared one keeps only k ≥ k_IR (default a₀H₀/c = 1/2997.92458 h/Mpc,
the horizon today); the ultraviolet one is the smoothing filter S of radius R: ``"tophat"``
S(x) = 3(sin x − x cos x)/x³ (default; the usual "sphere of radius R") or ``"gaussian"``
S(x) = exp(−x²/2). The density needs R; the potential converges in the UV without it.

The mean field (radial around the observer)
-------------------------------------------
With the local line of sight n̂ = x̂, μ = k̂·x̂, and Δ_g(k) = [A + iμB + Fμ²] δ_m(k):

    ξ_gc(r) = ∫ d³k/(2π)³ Z(k, k̂·x̂) C P e^{ik·x}
            = ∫ k²dk/(2π²) C P [ (A + F/3) j₀(kr) − B j₁(kr) − (2F/3) j₂(kr) ],          (2)

from (1/2)∫dμ μⁿ e^{ixμ}: n = 0 → j₀, n = 1 → i j₁, n = 2 → j₀/3 − (2/3) j₂ (expansion
e^{ixμ} = Σ (2ℓ+1) iˡ jₗ(x) Lₗ(μ); e.g. Abramowitz & Stegun 10.1.47, from memory). Computed by
FFTLog (:mod:`likelihood.numerics.hankel`) on the caller's log-spaced k grid; the sharp IR cut is applied
with the fraction of each ln k cell above k_IR (second-order accurate in the grid step).

The estimator applied to m
--------------------------
The measured field is F(x) = W(x)[m(x) − m̄_W], m̄_W = ∫W m/∫W, when the mean is estimated from the
data (``ic="global"``: the mean field's own survey mean is subtracted too), else F = W m. With the
end-point line of sight estimator of :func:`likelihood.observation.estimator.measure_multipoles`,
F_ℓ(k) = ∫d³x F e^{−ik·x} Lₗ(k̂·x̂) and P̂ₗ = (2ℓ+1)/I₂ <F_ℓ F₀*>, I₂ = ∫W².

* Spherically symmetric window (sphere, full-sky shell): F is radial, so with
  e^{−ik·x} = Σ (2L+1)(−i)^L j_L L_L and ∫dΩ L_ℓ L_L = 4π δ_ℓL/(2ℓ+1),

      F_ℓ(k) = 4π (−i)^ℓ f_ℓ(k),   f_ℓ(k) = ∫ r² dr F(r) jₗ(kr),
      E_ℓ(k) = (2ℓ+1)/I₂ (4π)² s_ℓ f_ℓ(k) f₀(k),                                          (3)

  independent of k̂; s_ℓ = Re (−i)^ℓ = (−1)^{ℓ/2} for even ℓ, and for odd ℓ the data convention
  Πₗ = Im P̂ₗ gives s_ℓ = Im (−i)^ℓ = (−1)^{(ℓ+1)/2} (:func:`likelihood.numerics.hankel.ell_sign`).
  f_ℓ by Gauss–Legendre in r (panels aligned with the window's edges), bins by Gauss–Legendre in
  k with the mode weight k² (∫k²E dk/∫k²dk, the continuous-shell average of ``KBins``). For the
  templates (cosmological parameters sampled) every step from C P Z_a on the k grid to f_ℓ is a
  fixed linear map, built once per k grid (:class:`_RadialTemplates`): per cosmology only C P,
  σ_c and a few FFTs are new; same numbers as :meth:`ObserverTerm.correction` to round-off.
* Plain volume V (no window, periodic box): W = 1, I₂ = V, no mean subtraction (it only removes
  k = 0); f_ℓ = ∫₀^∞ r² m jₗ dr by FFTLog. Without RSD and Doppler term m is the transform of
  P_gc/σ_c, P_gc = A C P, and (3) reduces to E₀ = P_gc(k)²/(σ_c² V) (the shared design's limit);
  valid when V is much larger than the range of m (otherwise the box's own modes matter).
* Other windows (polar cap): E_ℓ is measured on a mesh by the mock estimator
  (:func:`likelihood.observation.estimator.measure_multipoles` applied to m on the mesh, window mask, same mean
  subtraction), with lattice mode averages: a few per cent from the cell size, and in the first
  bins the lattice's sparse modes differ from the continuous-shell average by up to ~20 %. Every
  new cosmology costs n_basis(n_basis+1)/2 mesh estimates (polarisation; ~3 s each for 190³):
  slow when cosmological parameters are sampled. A warning says so when this path is used.

Regime of validity: linear theory (Gaussian fields); the tracer kernel is the plane-parallel kernel
of :mod:`likelihood.theory.tracer` applied with the local line of sight (its own wide-angle and
non-local projection terms are missing). The observer's own velocity and potential terms of the
number counts (a dipole and a monopole of the counts) are NOT part of this; c is an auxiliary
field we condition on.
"""
from __future__ import annotations

import functools
import math
import numbers
import warnings

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.special import spherical_jn

from ..numerics import filters, hankel
from ..numerics.mesh import Mesh
from ..theory.cosmology import HUBBLE_DISTANCE
from ..errors import ErgofitError
from ..theory.tracer import Kernel
from .estimator import measure_multipoles, window_mask

__all__ = ["FIELDS", "FILTERS", "K_IR_DEFAULT", "ObserverMeshWarning", "smoothing_filter",
           "constraint_kernel", "ir_weight", "sigma_c", "sigma_c_table", "cross_correlation",
           "ObserverTerm"]

FIELDS = ("potential", "density")
FILTERS = ("tophat", "gaussian")
K_IR_DEFAULT = 1.0 / HUBBLE_DISTANCE
"""Default infrared cut-off a₀H₀/c = 1/2997.92458 h/Mpc (the Hubble scale today)."""

class ObserverMeshWarning(UserWarning):
    """The observer correction of a window without spherical symmetry is measured on a mesh."""


_K_UV_SIGMA = 200.0      # upper end of the σ_c quadrature [h/Mpc]
_GL_R = 10               # Gauss–Legendre nodes per radial panel
_GL_K = 5                # minimum Gauss–Legendre nodes per k bin


# ---------------------------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------------------------
def _positive(name, value, allow_none=True):
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value) \
            or value <= 0:
        raise ErgofitError(f"observer {name} = {value!r}: expected a finite number > 0")
    return float(value)


def _check_field(field):
    if field not in FIELDS:
        raise ErgofitError(f"observer field = {field!r}: expected one of {', '.join(FIELDS)}")
    return field


def _check_filter(kind):
    if kind not in FILTERS:
        raise ErgofitError(f"observer filter_kind = {kind!r}: expected one of {', '.join(FILTERS)}")
    return kind


def _check_settings(field, smoothing, filter_kind, k_ir):
    field = _check_field(field)
    smoothing = _positive("smoothing", smoothing)
    filter_kind = _check_filter(filter_kind)
    k_ir = K_IR_DEFAULT if k_ir is None else _positive("k_ir", k_ir)
    if field == "density" and smoothing is None:
        raise ErgofitError("observer field 'density' needs smoothing (radius in Mpc/h, > 0): its "
                           "variance diverges in the ultraviolet without it")
    return field, smoothing, filter_kind, k_ir


def _redshift(z):
    if isinstance(z, bool) or not isinstance(z, numbers.Real) or not math.isfinite(z) or z < 0:
        raise ErgofitError(f"observer: redshift z = {z!r}: expected a finite number >= 0")
    return float(z)


# ---------------------------------------------------------------------------------------------
# constraint kernel and its variance
# ---------------------------------------------------------------------------------------------
def smoothing_filter(x, kind="tophat"):
    """Fourier-space filter S(x), x = kR: "tophat" 3(sin x − x cos x)/x³ (series 1 − x²/10 below
    x = 1e-3) or "gaussian" exp(−x²/2); S(0) = 1 (common practice)."""
    kind = _check_filter(kind)
    return filters.gaussian(x) if kind == "gaussian" else filters.tophat(x)


def constraint_kernel(cosmo, z, k, field="potential", smoothing=None, filter_kind="tophat"):
    """C(k) with c(k) = C(k) δ_m(k, z): the observer's field today in terms of δ_m at z.

    potential: C = −(3/2) Ω_m0 (H0/c)² D(0) / (k² D(z)) S(kR)   (Poisson, Φ in units of c²)
    density:   C = D(0)/D(z) S(kR)
    S = 1 without smoothing. No infrared cut here (see :func:`ir_weight`). k in h/Mpc.
    """
    field = _check_field(field)
    z = _redshift(z)
    k = np.asarray(k, dtype=float)
    growth = float(cosmo.growth_factor(z))          # D(z)/D(0)
    c = np.full(k.shape, 1.0 / growth)
    if field == "potential":
        c = -1.5 * cosmo.Omega_m0 / HUBBLE_DISTANCE ** 2 * c / (k * k)
    if smoothing is not None:
        c = c * smoothing_filter(k * smoothing, filter_kind)
    return c


def ir_weight(k, k_ir):
    """Sharp infrared cut on a log-spaced grid: the fraction of each ln k cell
    [ln k_i − Δ/2, ln k_i + Δ/2] above ln k_IR (1 above, 0 below), so that sums over the grid
    integrate ∫_{k_IR} dln k to second order in the step Δ."""
    k = np.asarray(k, dtype=float)
    dln = hankel.log_step(k, "k")
    return np.clip((np.log(k / k_ir)) / dln + 0.5, 0.0, 1.0)


@functools.lru_cache(maxsize=32)
def _sigma_nodes(a, b, width):
    """ln k Gauss–Legendre nodes (8 per panel, panels of at most ``width``) on [a, b] and the
    weights of ∫ dln k, built once per cut-off pair."""
    n_pan = max(8, int(math.ceil((b - a) / width)))
    x, w = np.polynomial.legendre.leggauss(8)
    edges = np.linspace(a, b, n_pan + 1)
    half = 0.5 * np.diff(edges)
    u = (0.5 * (edges[:-1] + edges[1:]))[:, None] + half[:, None] * x
    return np.exp(u.ravel()), (half[:, None] * w).ravel()


def _sigma2(cosmo, z, field, smoothing, filter_kind, k_ir):
    """σ_c² = ∫_{k_IR} dln k k³ C² P/(2π²) by Gauss–Legendre panels in ln k.

    Panel width 0.4 for the potential (smooth integrand, k³C²P ∝ P/k) and 0.05 for the density
    (the filter's oscillations). Measured against panels of 0.02 (planck2018, ω_c = 0.09 with
    h = 0.62, and the no-wiggle transfer; R = none, 2, 10, 100 Mpc/h): potential ≤ 2.6e-11,
    density ≤ 7e-11 relative."""
    k_hi = _K_UV_SIGMA if smoothing is None else min(_K_UV_SIGMA, 300.0 / smoothing)
    if k_hi <= k_ir:
        raise ErgofitError(f"observer k_ir = {k_ir:g} h/Mpc is above the smoothing scale's "
                           f"cut-off {k_hi:.3g} h/Mpc: no modes left for σ_c")
    k, wu = _sigma_nodes(math.log(k_ir), math.log(k_hi), 0.4 if field == "potential" else 0.05)
    c = constraint_kernel(cosmo, z, k, field, smoothing, filter_kind)
    return float(np.sum(wu * k ** 3 * c * c * cosmo.power(k, z)) / (2.0 * np.pi ** 2))


def sigma_c(cosmo, z, field="potential", smoothing=None, filter_kind="tophat", k_ir=None):
    """rms σ_c of the constraint field at the observer (today), with explicit cut-offs.

        σ_c² = ∫ d³k/(2π)³ C(k)² P(k, z) = ∫_{k_IR}^{k_UV} dln k k³ C² P/(2π²)

    k_IR: ``k_ir`` (default a₀H₀/c); k_UV = 200 h/Mpc, or 300/R with smoothing R (the filter makes
    the rest negligible). Potential: dimensionless (units of c²); density: the rms of the smoothed
    density today (equals σ_R(z = 0) for the top-hat as k_IR → 0).
    """
    field, smoothing, filter_kind, k_ir = _check_settings(field, smoothing, filter_kind, k_ir)
    return math.sqrt(_sigma2(cosmo, _redshift(z), field, smoothing, filter_kind, k_ir))


def sigma_c_table(cosmo, z=0.0, k_ir=(1e-4, K_IR_DEFAULT, 1e-3, 3e-3), smoothing=(None, 10.0, 100.0),
                  field="potential", filter_kind="tophat"):
    """σ_c tabulated against the cut-offs: array (len(k_ir), len(smoothing)).

    Shows the infrared sensitivity: for the potential σ_Φ² ≈ (9/25) D_md(0)² A_s ln(k_eq/k_IR) on
    scales k_IR ≪ k_eq (n_s ≈ 1, T ≈ 1), i.e. logarithmic growth as k_IR decreases; smoothing
    barely matters for Φ (its power sits at k ≲ k_eq). For the density the IR cut hardly matters
    and R sets σ_c. ``None`` in ``smoothing`` means no filter (not allowed for the density).
    """
    k_ir = np.atleast_1d(np.asarray(k_ir, dtype=float))
    sm = list(smoothing) if isinstance(smoothing, (list, tuple)) else [smoothing]
    out = np.empty((k_ir.size, len(sm)))
    for i, kk in enumerate(k_ir):
        for j, r in enumerate(sm):
            out[i, j] = sigma_c(cosmo, z, field, r, filter_kind, float(kk))
    return out


# ---------------------------------------------------------------------------------------------
# ξ_gc by FFTLog
# ---------------------------------------------------------------------------------------------
def _kernel_arrays(kernel, k):
    if not isinstance(kernel, Kernel):
        raise ErgofitError(f"observer: kernel must be a likelihood.theory.tracer.Kernel, got "
                           f"{type(kernel).__name__}")
    try:
        A, B = np.broadcast_arrays(np.asarray(kernel.A, float), np.asarray(kernel.B, float), k)[:2]
    except ValueError:
        raise ErgofitError(f"observer: kernel arrays (shapes {np.shape(kernel.A)}, "
                           f"{np.shape(kernel.B)}) do not match the k grid ({k.size} points)") from None
    return A, B, float(kernel.F)


def _xi_pieces(k, cp, A, B, F):
    """ξ_gc on the ℓ = 0 FFTLog grid from C P w_IR (``cp``) and the kernel, eq. (2)."""
    s0, x0 = hankel.xi_from_pk(k, (A + F / 3.0) * cp, 0)
    xi = x0
    for ell, g in ((1, B * cp), (2, (2.0 * F / 3.0) * cp)):
        if not np.any(g):
            continue
        s, x = hankel.xi_from_pk(k, g, ell)
        # xi_from_pk includes the sign (−1)^{⌈ℓ/2⌉}: −∫ g j₁ and −∫ g j₂, as eq. (2) needs.
        xi = xi + CubicSpline(np.log(s), x, extrapolate=True)(np.log(s0))
    return s0, xi


def _check_k_grid(k, k_ir):
    """The log-spaced k grid of ξ_gc as an array; it must start below k_IR."""
    k = np.asarray(k, dtype=float)
    hankel.log_step(k, "k")
    if k_ir < k[0]:
        raise ErgofitError(f"observer k_ir = {k_ir:.4g} h/Mpc is below the first point of the k "
                           f"grid ({k[0]:.4g} h/Mpc): extend the grid or raise k_ir")
    return k


def cross_correlation(cosmo, z, k, kernel, field="potential", smoothing=None, filter_kind="tophat",
                      k_ir=None):
    """ξ_gc(r) = <Δ_g(x) c(0)>, |x| = r, eq. (2) of the module docstring, by FFTLog.

    ``k``: log-spaced grid [h/Mpc] on which the kernel's A, B are given (e.g.
    :func:`likelihood.observation.matrix.theory_k_grid`); it must start below k_IR. Returns (r, ξ_gc) on
    the FFTLog output grid (r = e^offset/k reversed, Mpc/h).
    """
    field, smoothing, filter_kind, k_ir = _check_settings(field, smoothing, filter_kind, k_ir)
    z = _redshift(z)
    k = _check_k_grid(k, k_ir)
    A, B, F = _kernel_arrays(kernel, k)
    cp = constraint_kernel(cosmo, z, k, field, smoothing, filter_kind) * cosmo.power(k, z) \
        * ir_weight(k, k_ir)
    return _xi_pieces(k, cp, A, B, F)


# ---------------------------------------------------------------------------------------------
# estimators applied to the deterministic field
# ---------------------------------------------------------------------------------------------
def _gl_panels(a, b, width, n):
    """Gauss–Legendre nodes and weights on [a, b] split into panels of at most ``width``."""
    n_pan = max(1, int(math.ceil((b - a) / width)))
    x, w = np.polynomial.legendre.leggauss(n)
    e = np.linspace(a, b, n_pan + 1)
    half = 0.5 * np.diff(e)
    return ((0.5 * (e[:-1] + e[1:]))[:, None] + half[:, None] * x).ravel(), \
        (half[:, None] * w).ravel()


def _bin_nodes(edges, r_osc):
    """k nodes and the (n_bins, n_nodes) matrix of mode-average weights k²/∫k²dk per bin.

    E(k) oscillates with period ~π/r_osc (the window's edge), so each bin gets
    5 + 5 Δk r_osc/π Gauss–Legendre nodes. Measured against twice as many nodes (12 + 16 Δk
    r_osc/π) for shells 1937–3144, 300–3144 and 100–200 Mpc/h and spheres of 500 and 800 Mpc/h,
    bins of 0.003–0.03 h/Mpc up to k = 0.2: the binned correction moves by ≤ 3e-15 relative
    (it did by ≤ 3e-15 with the earlier 6 + 8 Δk r_osc/π as well)."""
    ks, ws, rows = [], [], []
    for i, (lo, hi) in enumerate(zip(edges[:-1], edges[1:])):
        n = _GL_K + int(math.ceil(5.0 * (hi - lo) * r_osc / math.pi))
        x, w = np.polynomial.legendre.leggauss(n)
        kk = 0.5 * (lo + hi) + 0.5 * (hi - lo) * x
        ww = 0.5 * (hi - lo) * w * kk * kk / ((hi ** 3 - lo ** 3) / 3.0)
        ks.append(kk)
        ws.append(ww)
        rows.append(np.full(n, i))
    k = np.concatenate(ks)
    avg = np.zeros((edges.size - 1, k.size))
    avg[np.concatenate(rows), np.arange(k.size)] = np.concatenate(ws)
    return k, avg


class _Radial:
    """Eq. (3) for a spherically symmetric window: f_ℓ by radial quadrature."""

    def __init__(self, window, bins, ells, ic):
        self.ells, self.ic = ells, ic
        k_top = float(bins.edges[-1])
        r_min, r_max = float(window.r_min), float(window.r_max)
        self.r, wr = _gl_panels(r_min, r_max, min(30.0, 3.0 / k_top), _GL_R)
        W = np.asarray(window.radial(self.r), dtype=float)
        self.wr = wr * self.r ** 2 * W                         # ∫ r² W (.) dr
        self.i2 = 4.0 * np.pi * float(np.sum(wr * self.r ** 2 * W * W))
        self.k, self.avg = _bin_nodes(bins.edges, r_max)
        kr = self.k[:, None] * self.r[None, :]
        self.J = {l: spherical_jn(l, kr) * self.wr for l in set(ells) | {0}}

    def transforms(self, r, m, k=None):
        """f_ℓ of the radial field m given on the grid r (FFTLog output), at the bin nodes or at
        the wavenumbers ``k``."""
        mr = CubicSpline(np.log(r), m, extrapolate=False)(np.log(self.r))
        mr = np.where(self.r < r[0], m[0], mr)                 # r → 0: m is flat there
        if self.ic == "global":
            mr = mr - np.sum(self.wr * mr) / np.sum(self.wr)
        if k is None:
            return {l: J @ mr for l, J in self.J.items()}
        kr = np.asarray(k, dtype=float)[:, None] * self.r[None, :]
        return {l: (spherical_jn(l, kr) * self.wr) @ mr for l in self.J}


class _RadialTemplates:
    """The templates of a spherically symmetric window as fixed linear maps (built once per k grid).

    Everything between the kernel pieces on the k grid and f_ℓ at the bin nodes is linear and
    independent of the cosmology: the three FFTLogs of eq. (2) (ℓ = 0, 1, 2; coefficients once,
    :class:`likelihood.numerics.hankel.FFTLogPlan`), the cubic splines that put the ℓ = 1, 2
    outputs on the ℓ = 0 grid and that grid on the radial nodes (flat below its first point), the
    survey-mean subtraction and the radial quadrature of f_ℓ. The composition is stored as one
    matrix per (ℓ, piece), restricted to the FFTLog outputs it uses: the splines' weights decay
    by 2 − √3 per knot, and columns below 1e-20 of the largest entry are dropped. Same numbers
    as :meth:`ObserverTerm.correction` (the direct path) to round-off (tests).
    """

    def __init__(self, est, k, k_ir):
        self.k = np.array(k, dtype=float)
        self.w_ir = ir_weight(self.k, k_ir)
        self.plans = [hankel.FFTLogPlan(self.k, p) for p in (0, 1, 2)]
        n = self.k.size
        s0 = self.plans[0].s
        log_s0, log_r = np.log(s0), np.log(est.r)
        lo, hi = np.searchsorted(log_s0, [log_r.min(), log_r.max()])
        near = slice(0 if est.r.min() < s0[0] else max(lo - _SPLINE_REACH, 0),
                     min(hi + _SPLINE_REACH, n))
        to_nodes = np.zeros((est.r.size, n))
        to_nodes[:, near] = _spline_columns(log_s0, near, log_r, extrapolate=False)
        below = est.r < s0[0]
        to_nodes[below] = 0.0
        to_nodes[below, 0] = 1.0                               # as in _Radial.transforms
        if not np.all(np.isfinite(to_nodes)):
            raise ErgofitError("observer: the radial nodes lie beyond the FFTLog grid; extend the "
                               "k grid to smaller k")
        if est.ic == "global":
            to_nodes = to_nodes - np.outer(np.ones(est.r.size), est.wr @ to_nodes) / np.sum(est.wr)
        self.ells = sorted(est.J)
        self.maps = []                     # per piece: (columns, stacked matrix (n_cols, n_ℓ n_nodes))
        for p, plan in enumerate(self.plans):
            cols = _support(to_nodes)
            m = to_nodes[:, cols]
            if p:
                near = slice(max(cols.start - _SPLINE_REACH, 0), min(cols.stop + _SPLINE_REACH, n))
                shifted = np.zeros((est.r.size, n))
                shifted[:, near] = m @ _spline_columns(np.log(plan.s), near, log_s0[cols],
                                                        extrapolate=True)
                cols = _support(shifted)
                m = shifted[:, cols]
            self.maps.append((cols, np.ascontiguousarray(
                np.concatenate([est.J[l] @ m for l in self.ells]).T)))

    def transforms(self, cp, kernels, sigma):
        """f_ℓ (dict ℓ → (n_kernels, n_nodes)) of m_a = ξ_gc[Z_a]/σ_c for every kernel, with
        ``cp`` = C P w_IR on the k grid. Kernel rows whose piece vanishes skip its FFTLog."""
        arrays = [_kernel_arrays(kern, self.k) for kern in kernels]
        A = np.array([a for a, _, _ in arrays])
        B = np.array([b for _, b, _ in arrays])
        F = np.array([f for _, _, f in arrays])[:, None]
        pieces = ((A + F / 3.0) * cp, B * cp, (2.0 * F / 3.0) * cp)   # eq. (2)
        out = np.zeros((len(arrays), self.maps[0][1].shape[1]))
        for g, plan, (cols, mat) in zip(pieces, self.plans, self.maps):
            rows = np.flatnonzero(np.any(g, axis=1))
            if rows.size:
                out[rows] += np.ascontiguousarray(plan(g[rows])[:, cols]) @ mat
        out /= sigma
        n = out.shape[1] // len(self.ells)
        return {l: out[:, i * n:(i + 1) * n] for i, l in enumerate(self.ells)}


#: knots beyond which a cubic spline's response to one data point is below 1e-30 (it decays by
#: 2 − √3 ≈ 0.27 per knot): the spline matrices are built only for the columns within this reach
_SPLINE_REACH = 60


def _spline_columns(x, cols, x_out, extrapolate):
    """Columns ``cols`` of the matrix of the not-a-knot cubic spline through (x, y) evaluated at
    ``x_out`` (y ↦ spline values; scipy's CubicSpline applied to unit vectors)."""
    return CubicSpline(x, np.eye(x.size)[:, cols], extrapolate=extrapolate)(x_out)


def _support(m, rel=1e-20):
    """Slice of the columns of ``m`` with an entry above ``rel`` times its largest entry."""
    used = np.flatnonzero(np.max(np.abs(m), axis=0) > rel * np.max(np.abs(m)))
    return slice(int(used[0]), int(used[-1]) + 1) if used.size else slice(0, 1)


class _Plain:
    """Eq. (3) with W = 1 in a plain volume V: f_ℓ = ∫₀^∞ r² m jₗ dr by FFTLog."""

    def __init__(self, volume, bins, ells):
        self.ells, self.i2 = ells, float(volume)
        self.k, self.avg = _bin_nodes(bins.edges, 0.0)

    def transforms(self, r, m, k=None):
        out = {}
        off = hankel.fftlog_offset(hankel.log_step(r, "r"), 0)
        k = self.k if k is None else np.asarray(k, dtype=float)
        for l in set(self.ells) | {0}:
            kk, p = hankel.pk_from_xi(r, m, l, offset=off)
            f = hankel.ell_sign(l) * p / (4.0 * np.pi)
            out[l] = CubicSpline(np.log(kk), f)(np.log(k))
        return out


def _unbinned(est, fa, fb):
    """(len(ells), n_k) E_ℓ[m_a, m_b](k) = (2ℓ+1)/I₂ (4π)² s_ℓ f_ℓ^a f₀^b, eq. (3)."""
    return np.array([(2 * l + 1) / est.i2 * (4.0 * np.pi) ** 2 * hankel.ell_sign(l) * fa[l] * fb[0]
                     for l in est.ells])


def _pair_rows(est, f, pairs):
    """Template rows for ``pairs`` from f_ℓ arrays (n_kernels, n_nodes): E[m_a, m_a] for a = b,
    E[m_a, m_b] + E[m_b, m_a] otherwise (eq. 3 binned), all pairs at once."""
    a, b = np.array(pairs, dtype=int).reshape(-1, 2).T
    out = []
    for l in est.ells:
        pre = (2 * l + 1) / est.i2 * (4.0 * np.pi) ** 2 * hankel.ell_sign(l)
        e = pre * (f[l][:, None, :] * f[0][None, :, :]) @ est.avg.T    # (n, n, n_bins)
        out.append(np.where((a == b)[:, None], e[a, b], e[a, b] + e[b, a]))
    return np.concatenate(out, axis=1)


def _bilinear(est, fa, fb):
    """Flat binned vector of E_ℓ[m_a, m_b], mode-averaged over each bin."""
    return (_unbinned(est, fa, fb) @ est.avg.T).ravel()


class _MeshPath:
    """E_ℓ[m] measured on a mesh with the mock estimator (windows without spherical symmetry)."""

    def __init__(self, window, bins, ells, ic, mesh_n=None, padding=1.5):
        self.ells, self.ic = ells, ic
        r_max = float(window.r_max)
        k_top = float(bins.edges[-1])
        box = 2.0 * padding * r_max
        if mesh_n is None:
            n = int(math.ceil(1.25 * k_top * box / math.pi))
            mesh_n = max(32, n + n % 2)
            if mesh_n > 384:
                raise ErgofitError(f"observer term for a non-spherical window: the mesh needs n = "
                                   f"{mesh_n} (> 384) for k_max = {k_top:.3g} h/Mpc and r_max = "
                                   f"{r_max:g} Mpc/h; lower the data k_max or give mesh_n")
        n = int(mesh_n)
        box = max(box, 2.0 * r_max + 4.0 * box / n)
        self.mesh = Mesh(n, box)
        self.mask = window_mask(self.mesh, window)
        self.radius = self.mesh.radius()
        self.edges = bins.edges

    def quadratic(self, r, m):
        # the observer's own cell (r = 0) takes m at half a cell: m is flat there, while the
        # FFTLog grid's first points (r ~ 1/k_max) carry edge ringing
        rr = np.maximum(self.radius, max(r[0], 0.5 * self.mesh.cell))
        field = np.interp(np.log(rr), np.log(r), m)
        dv = measure_multipoles(self.mesh, field, self.mask, self.edges, self.ells,
                                subtract_mean=self.ic == "global")
        return dv.values.ravel()


# ---------------------------------------------------------------------------------------------
# the public class
# ---------------------------------------------------------------------------------------------
class ObserverTerm:
    """Observer-value correction of the measured multipoles, eq. (1): (ν² − 1) E_ℓ[m](k).

    Parameters
    ----------
    field : "potential" (default) or "density" (needs ``smoothing``)
    smoothing : filter radius R [Mpc/h] (ultraviolet cut-off), or None
    k_ir : infrared cut-off [h/Mpc]; default a₀H₀/c = 1/2997.92458
    window : a geometry (SphereWindow, ShellWindow, CapShellWindow) or None (plain volume)
    volume : the plain volume V [(Mpc/h)³] when ``window`` is None
    bins : :class:`likelihood.observation.matrix.KBins` of the data (needed by correction/templates)
    ells : data multipoles (odd ℓ: Π_ℓ = Im P̂_ℓ, the data convention)
    ic : "global" (mean estimated from the data inside the window) or "none"
    k_min_data : smallest data k [h/Mpc]; k_ir must lie below it
    filter_kind : "tophat" (default) or "gaussian"
    method : "auto" (radial quadrature for spherically symmetric windows, mesh otherwise),
        "radial" or "mesh"
    mesh_n, mesh_padding : mesh size and box = padding × 2 r_max for the mesh path

    All results are linear theory (see the module docstring for the regime of validity).
    """

    def __init__(self, field="potential", smoothing=None, k_ir=None, window=None, volume=None,
                 bins=None, ells=(0, 2, 4), ic="global", k_min_data=None, filter_kind="tophat",
                 method="auto", mesh_n=None, mesh_padding=1.5):
        from .matrix import KBins
        self.field, self.smoothing, self.filter_kind, self.k_ir = _check_settings(
            field, smoothing, filter_kind, k_ir)
        if k_min_data is not None:
            kmd = _positive("k_min_data", k_min_data)
            if self.k_ir >= kmd:
                raise ErgofitError(f"observer k_ir = {self.k_ir:.4g} h/Mpc: IR cut-off above the "
                                   f"data's k_min = {kmd:.4g} h/Mpc; expected k_ir < k_min")
        try:
            self.ells = tuple(int(l) for l in ells)
        except (TypeError, ValueError):
            raise ErgofitError(f"observer ells = {ells!r}: expected a list of multipoles like "
                               "[0, 2, 4]") from None
        if not self.ells or any(l < 0 or l > 8 for l in self.ells) \
                or len(set(self.ells)) != len(self.ells):
            raise ErgofitError(f"observer ells = {ells!r}: expected distinct multipoles in 0..8")
        if ic not in ("none", "global"):
            raise ErgofitError(f"observer ic = {ic!r}: expected 'none' or 'global'")
        if bins is not None and not isinstance(bins, KBins):
            raise ErgofitError(f"observer bins = {bins!r}: expected a likelihood.observation.matrix.KBins")
        if method not in ("auto", "radial", "mesh"):
            raise ErgofitError(f"observer method = {method!r}: expected 'auto', 'radial' or 'mesh'")
        self.ic, self.bins, self.window = ic, bins, window
        if window is None:
            if ic == "global":
                raise ErgofitError("observer ic = 'global' needs a window (the mean is estimated "
                                   "inside it); use ic='none' for a plain volume")
            self.volume = _positive("volume", volume, allow_none=False)
            self.method = "plain"
        else:
            if not (hasattr(window, "radial") and hasattr(window, "contains")
                    and hasattr(window, "r_max")):
                raise ErgofitError(f"observer window = {window!r}: expected an analytic geometry "
                                   "(SphereWindow, ShellWindow, CapShellWindow); a window from "
                                   "randoms is not supported by the observer term")
            self.volume = float(window.volume)
            spherical = bool(getattr(window, "is_spherical", False))
            if method == "radial" and not spherical:
                raise ErgofitError(f"observer method 'radial' needs a spherically symmetric "
                                   f"window, got {window!r}; use 'mesh' or 'auto'")
            self.method = "mesh" if method == "mesh" or not spherical else "radial"
        self._mesh_opts = (mesh_n, float(mesh_padding))
        self._est = None
        self._plan = None
        self._sigma_cache = {}

    # -- pieces ---------------------------------------------------------------------------------
    def _estimator(self):
        if self.bins is None:
            raise ErgofitError("observer: bins (likelihood.observation.matrix.KBins) are needed for the "
                               "binned correction; pass bins=")
        if self._est is None:
            if self.method == "plain":
                self._est = _Plain(self.volume, self.bins, self.ells)
            elif self.method == "radial":
                self._est = _Radial(self.window, self.bins, self.ells, self.ic)
            else:
                self._est = _MeshPath(self.window, self.bins, self.ells, self.ic, *self._mesh_opts)
                warnings.warn(f"observer term for {self.window!r}: no spherical symmetry, E_l[m] is "
                              f"measured on a {self._est.mesh.n}^3 mesh (lattice mode averages, "
                              "accuracy a few per cent; n(n+1)/2 mesh estimates per cosmology "
                              "for n basis kernels)", ObserverMeshWarning, stacklevel=3)
        return self._est

    def describe(self):
        """One line: field, cut-offs, estimator path."""
        sm = "none" if self.smoothing is None else f"{self.filter_kind} R = {self.smoothing:g} Mpc/h"
        return (f"observer field {self.field}, value taken today; k_IR = {self.k_ir:.4g} h/Mpc, "
                f"smoothing {sm}; estimator path: {self.method}")

    def sigma_c(self, cosmo, z):
        """σ_c of the constraint field (see :func:`sigma_c`), cached per (cosmology, z)."""
        key = (cosmo, float(z))
        if key not in self._sigma_cache:
            self._sigma_cache = {key: math.sqrt(_sigma2(cosmo, _redshift(z), self.field,
                                                        self.smoothing, self.filter_kind,
                                                        self.k_ir))}
        return self._sigma_cache[key]

    def mean_field(self, cosmo, z, k, kernel):
        """(r, m): m(r) = ξ_gc(r)/σ_c on the FFTLog grid r [Mpc/h]; kernel arrays on the grid k."""
        r, xi = cross_correlation(cosmo, z, k, kernel, self.field, self.smoothing,
                                  self.filter_kind, self.k_ir)
        return r, xi / self.sigma_c(cosmo, z)

    def _radial_plan(self, k):
        """The fixed linear maps of :class:`_RadialTemplates` for the k grid (built once)."""
        k = np.asarray(k, dtype=float)
        if self._plan is None or not np.array_equal(self._plan.k, k):
            self._plan = _RadialTemplates(self._estimator(), _check_k_grid(k, self.k_ir), self.k_ir)
        return self._plan

    def _constraint_power(self, cosmo, z, k):
        """C P w_IR on the plan's k grid (the cosmology-dependent input of eq. 2)."""
        plan = self._radial_plan(k)
        return constraint_kernel(cosmo, _redshift(z), plan.k, self.field, self.smoothing,
                                 self.filter_kind) * cosmo.power(plan.k, z) * plan.w_ir

    def _basis_fields(self, cosmo, z, k, kernels):
        return [self.mean_field(cosmo, z, k, kern) for kern in kernels]

    def correction(self, cosmo, z, k, kernel):
        """E_ℓ[m] binned, flat ℓ-major vector (len(ells) n_bins); multiply by (ν² − 1)."""
        est = self._estimator()
        r, m = self.mean_field(cosmo, z, k, kernel)
        if self.method == "mesh":
            return est.quadratic(r, m)
        f = est.transforms(r, m)
        return _bilinear(est, f, f)

    def unbinned(self, cosmo, z, k, kernel, k_out):
        """E_ℓ[m](k_out) before binning, shape (len(ells), len(k_out)): eq. (3) at the given
        wavenumbers (radial and plain-volume paths only; the mesh path exists only binned)."""
        est = self._estimator()
        if self.method == "mesh":
            raise ErgofitError(f"observer: unbinned values need a spherically symmetric window or "
                               f"a plain volume; {self.window!r} is measured on a mesh, use "
                               "correction()")
        k_out = np.atleast_1d(np.asarray(k_out, dtype=float))
        if k_out.ndim != 1 or not np.all(np.isfinite(k_out)) or np.any(k_out <= 0):
            raise ErgofitError("observer k_out: expected a 1-D array of wavenumbers > 0 (h/Mpc)")
        f = est.transforms(*self.mean_field(cosmo, z, k, kernel), k=k_out)
        return _unbinned(est, f, f)

    def templates(self, cosmo, z, k, kernels, pairs):
        """Rows of the bilinear form: (a, a) → E[m_a, m_a]; (a, b), a < b → E[m_a, m_b] + E[m_b, m_a].

        For m = Σ_a x_a m_a, Σ_rows x_a x_b row = correction(Σ_a x_a kernels[a]).
        """
        est = self._estimator()
        kernels = list(kernels)
        pairs = [tuple(int(i) for i in p) for p in pairs]
        for p in pairs:
            if len(p) != 2 or not (0 <= p[0] <= p[1] < len(kernels)):
                raise ErgofitError(f"observer templates: pair {p} must be (a, b) with "
                                   f"0 <= a <= b < {len(kernels)}")
        if self.method == "radial":
            f = self._radial_plan(k).transforms(self._constraint_power(cosmo, z, k), kernels,
                                                self.sigma_c(cosmo, z))
            return _pair_rows(est, f, pairs)
        fields = self._basis_fields(cosmo, z, k, kernels)
        rows = []
        if self.method == "mesh":
            diag = {}
            for a, b in pairs:
                for i in (a, b):
                    if i not in diag:
                        diag[i] = est.quadratic(*fields[i])
                if a == b:
                    rows.append(diag[a])
                else:
                    r = fields[a][0]
                    both = est.quadratic(r, fields[a][1] + fields[b][1])
                    rows.append(both - diag[a] - diag[b])
            return np.array(rows)
        f = [est.transforms(r, m) for r, m in fields]
        for a, b in pairs:
            row = _bilinear(est, f[a], f[b])
            if a != b:
                row = row + _bilinear(est, f[b], f[a])
            rows.append(row)
        return np.array(rows)

    # -- cross spectra of two tracers -------------------------------------------------------------
    def _cross_estimator(self):
        est = self._estimator()
        if self.method == "mesh":
            raise ErgofitError(f"observer term of a cross spectrum: needs a spherically symmetric "
                               f"window or a plain volume; {self.window!r} is measured on a mesh "
                               "(auto spectra only)")
        return est

    def cross_correction(self, cosmo, z, k, kernel_a, kernel_b):
        """E_ℓ[m_a, m_b] binned (flat ℓ-major) for the cross spectrum of tracers a and b: the
        estimator P̂_ℓ = (2ℓ+1)/I₂ <F_ℓ^a F_0^b*> (F_ℓ from a, F_0 from b) applied to the two mean
        fields, eq. (3) with f_ℓ^a f_0^b; odd ℓ as Π_ℓ. Multiply by (ν² − 1)."""
        est = self._cross_estimator()
        return _bilinear(est, est.transforms(*self.mean_field(cosmo, z, k, kernel_a)),
                         est.transforms(*self.mean_field(cosmo, z, k, kernel_b)))

    def cross_templates(self, cosmo, z, k, kernels_a, kernels_b):
        """Rows E[m_a,i, m_b,j] for every (i, j), i-major: for m_a = Σ x_i m_a,i and
        m_b = Σ y_j m_b,j, Σ x_i y_j row_ij = cross_correction(Σ x_i kernels_a[i], Σ y_j kernels_b[j])."""
        est = self._cross_estimator()
        fa = [est.transforms(r, m) for r, m in self._basis_fields(cosmo, z, k, kernels_a)]
        fb = [est.transforms(r, m) for r, m in self._basis_fields(cosmo, z, k, kernels_b)]
        return np.array([_bilinear(est, f, g) for f in fa for g in fb])

    # -- diagnostics ------------------------------------------------------------------------------
    def fundamental_mode(self):
        """(k_F [h/Mpc], description): 2π/(2 r_max) for a window (its diameter), 2π/V^{1/3} for a
        plain volume."""
        if self.window is None:
            return 2.0 * np.pi / self.volume ** (1.0 / 3.0), "2π/V^(1/3)"
        return np.pi / float(self.window.r_max), "2π/(2 r_max)"

