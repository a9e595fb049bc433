"""Gaussian random fields on the mesh: the linear density, the observed galaxy field with the
local line of sight, the constrained field at the observer (Hoffman–Ribak) and Poisson sampling.

Conventions and regime of validity: :mod:`likelihood.numerics.mesh` and :mod:`likelihood.simulate.mocks`.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np
import scipy.fft as sfft

from ..checks import finite_number
from ..numerics.filters import tophat
from ..errors import ConfigError, ErgofitError
from ..numerics.mesh import check_fourier_field, check_real_field, fourier_array, to_real, unit_vectors
from ..observation.estimator import window_weights


def gaussian_field(mesh, pk, seed, fixed_amplitude=False):
    """Gaussian random field with power spectrum ``pk(k)`` on the mesh, in Fourier space.

    Construction: white noise w(x) ~ N(0, 1) at the n³ nodes, w_k = rfftn(w) (so <|w_k|²> = n³
    and w_k is automatically Hermitian), then δ_k = w_k √(V P(k)/n³). Hence <δ_k δ*_k'> =
    V P(k) δ^K_{kk'} (the discrete form of the design convention), and δ_{k=0} = 0.
    ``fixed_amplitude=True`` sets |δ_k|² = V P(k) exactly and keeps the random phases (Angulo &
    Pontzen 2016, "fixed" fields): not Gaussian, but with no amplitude scatter.

    ``seed``: int, ``numpy.random.SeedSequence`` or ``numpy.random.Generator``.
    Returns the complex rfft-layout array δ_k ((Mpc/h)³ units).
    """
    p = fourier_array(mesh, pk, "pk")
    if np.ndim(p) == 0:
        p = np.full(mesh.fourier_shape, p)
    if np.iscomplexobj(p) or np.any(p < 0):
        raise ErgofitError("pk(k): the power spectrum must be real and non-negative on the mesh")
    rng = np.random.default_rng(seed)
    w = rng.standard_normal((mesh.n,) * 3, dtype=mesh.real_dtype)
    wk = sfft.rfftn(w, workers=-1, overwrite_x=True)
    del w
    if fixed_amplitude:
        amp = np.abs(wk)
        amp[amp == 0] = 1.0
        wk /= amp
        scale = np.sqrt(mesh.volume * p).astype(mesh.real_dtype)
    else:
        scale = np.sqrt(mesh.volume * p / mesh.n ** 3).astype(mesh.real_dtype)
    wk *= scale
    wk[0, 0, 0] = 0.0
    return wk


# ---------------------------------------------------------------------------------------------
# Observed galaxy field with the local line of sight
# ---------------------------------------------------------------------------------------------


def observed_field(mesh, delta_k, A, B=None, F=0.0):
    """Real-space galaxy field Δ_g(x) for Δ_g(k, μ) = [A(k) + i μ B(k) + F μ²] δ(k), local LOS.

    μ = k̂·n̂ with n̂ = x/|x| the unit vector from the observer to the point x, so the operators
    act in configuration space (Fourier convention δ(x) = ∫d³k/(2π)³ δ(k) e^{+ik·x}):

    * F μ² δ  →  Σ_ij n̂_i n̂_j ∂_i∂_j ∇⁻²(F δ): Fourier factor (ik_i)(ik_j)/(−k²) = k_i k_j/k²,
      6 inverse FFTs (radial redshift-space distortion, Kaiser 1987 with a local line of sight);
    * i μ B δ  →  Σ_i n̂_i ∂_i (−∇²)^{-1/2}(B δ): Fourier factor i k_i/k, 3 inverse FFTs;
      e.g. δ = cos(k·x) gives −B (k̂·n̂) sin(k·x);
    * A(k) δ  →  one inverse FFT.

    ``A``, ``B``: functions of k (h/Mpc), numbers, or arrays on the rfft layout; ``F`` a number
    (the growth rate f for the Kaiser term). The node at the observer gets n̂ = 0.
    Valid in linear theory; the kernel itself is the tracer model's (plane-parallel kernel applied
    locally, i.e. wide-angle effects of the LOS are included, those of the kernel are not).
    """
    dk = check_fourier_field(mesh, delta_k)
    a = fourier_array(mesh, A, "A")
    f = finite_number(F, "F (the growth rate f)")
    b = None if B is None else fourier_array(mesh, B, "B")
    if np.iscomplexobj(a) or (b is not None and np.iscomplexobj(b)):
        raise ErgofitError("A(k) and B(k) must be real (the i of the Doppler term is explicit)")
    out = los_power(mesh, dk, 0, a)
    if f != 0.0:
        los_power(mesh, dk, 2, f, out=out)
    if b is not None:
        los_power(mesh, dk, 1, b, out=out)
    return out


def los_power(mesh, delta_k, power, factor=1.0, out=None):
    """Real-space field of (iμ)^power X(k) δ(k) for power 0 and 1, and of μ² X(k) δ(k) for
    power 2, with μ = k̂·n̂ and the local line of sight n̂ = x/|x| (see :func:`observed_field`
    for the operators and their FFT counts). ``factor`` X: a number or a real array on the rfft
    layout (already checked). Added into ``out`` (a real mesh array) when given; returns it.
    """
    rdt = mesh.real_dtype
    inv_h3 = rdt.type(mesh.cell ** -3)
    s = (mesh.n,) * 3

    def irf(arr):
        return sfft.irfftn(arr, s=s, workers=-1, overwrite_x=True) * inv_h3

    x = factor.astype(rdt) if np.ndim(factor) else rdt.type(factor)
    if power == 0:
        t = irf(delta_k * x)
        if out is None:
            return t
        out += t
        return out
    if power not in (1, 2):
        raise ErgofitError(f"los_power: power = {power!r}; expected 0, 1 or 2")
    if out is None:
        out = np.zeros(s, dtype=rdt)
    kv = mesh.kvectors()
    k = mesh.kmag()
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_k = np.where(k > 0, 1.0 / k, 0.0).astype(rdt)
    nhat = unit_vectors(mesh)
    if power == 2:
        fd = delta_k * (x * inv_k * inv_k)
        for i in range(3):
            for j in range(i, 3):
                t = irf(fd * (kv[i] * kv[j]))
                t *= nhat[i] * nhat[j] * rdt.type(1.0 if i == j else 2.0)
                out += t
        return out
    bd = delta_k * (x * inv_k) * 1j
    for i in range(3):
        t = irf(bd * kv[i])
        t *= nhat[i]
        out += t
    return out


# ---------------------------------------------------------------------------------------------
# Hoffman–Ribak constrained field at the observer
# ---------------------------------------------------------------------------------------------

def _planes(mesh, arr):
    """Per-plane (axis 0) views of a Fourier-layout array or a broadcastable scalar."""
    a = np.broadcast_to(np.asarray(arr), mesh.fourier_shape) if np.ndim(arr) else arr
    return (lambda i: a[i]) if np.ndim(arr) else (lambda i: a)


def _constraint_parts(mesh, pk, c_kernel):
    """(P, K, multiplicity weights, σ_c²) on the mesh in the mesh's precision; σ_c² is summed in
    float64 plane by plane (no full-size float64 temporaries)."""
    p = fourier_array(mesh, pk, "pk")
    kc = fourier_array(mesh, c_kernel, "c_kernel")
    if np.iscomplexobj(kc) or np.iscomplexobj(p):
        raise ErgofitError("c_kernel(k) and pk(k) must be real")
    rdt = mesh.real_dtype
    p = np.asarray(p).astype(rdt, copy=False) if np.ndim(p) else rdt.type(p)
    kc = np.asarray(kc).astype(rdt, copy=False) if np.ndim(kc) else rdt.type(kc)
    w = mesh.rfft_weights()[0, 0].astype(float)
    pp, kk = _planes(mesh, p), _planes(mesh, kc)
    sigma2 = 0.0
    for i in range(mesh.n):
        kp = np.broadcast_to(np.asarray(kk(i), float), mesh.fourier_shape[1:])
        sigma2 += float(np.sum(w * kp * kp * np.asarray(pp(i), float)))
    sigma2 /= mesh.volume
    if not sigma2 > 0:
        raise ErgofitError("constraint: σ_c² = V⁻¹ Σ_k K(k)² P(k) is zero on this mesh; the "
                           "constraint kernel has no support between k_f and k_N")
    return p, kc, w, sigma2


def _observer_phase(mesh):
    """e^{-ik·x_o} on the rfft layout, in the mesh's complex precision."""
    node = mesh.observer_node()
    if node is None:
        raise ErgofitError(f"mesh observer = {mesh.observer}: the constraint at the observer needs "
                           f"the observer on a mesh node (multiples of H = {mesh.cell:.6g} Mpc/h "
                           "inside the box)")
    i, j, l = mesh.k_integers()
    cdt = mesh.complex_dtype
    ph = [np.exp(-2j * np.pi * a * c / mesh.n).astype(cdt) for a, c in zip((i, j, l), node)]
    return ph[0] * ph[1] * ph[2]


def constraint_sigma(mesh, pk, c_kernel):
    """σ_c = [V⁻¹ Σ_k K(k)² P(k)]^{1/2}: rms of c(x) = FT⁻¹[K δ] on the mesh.

    The sum runs over the mesh's modes only (k_f ≤ |k|, |k_i| ≤ k_N): these are the infrared and
    ultraviolet cut-offs that a theory prediction for the same mock must use.
    """
    return math.sqrt(_constraint_parts(mesh, pk, c_kernel)[3])


def constraint_mean_field(mesh, pk, c_kernel):
    """m(x) = ξ_δc(x)/σ_c on the mesh nodes, and σ_c.

    ξ_δc(x) = <δ(x_o + x) c(x_o)> = V⁻¹ Σ_k K(k) P(k) e^{ik·x} (K real): the constrained mean of δ
    given c(x_o) = ν σ_c is ν m(x) (Hoffman & Ribak 1991). Returns (m, σ_c); m is laid out on the
    mesh nodes, with the observer at its node.
    """
    p, kc, _, sigma2 = _constraint_parts(mesh, pk, c_kernel)
    sig = math.sqrt(sigma2)
    mk = _observer_phase(mesh)
    mk *= (p * kc / sig)
    return to_real(mesh, mk.astype(mesh.complex_dtype, copy=False)), sig


@dataclass(frozen=True)
class ConstraintTemplate:
    """The pieces of the Hoffman–Ribak correction that do not depend on the realisation, made
    once per mock set: g = K e^{-ik·x_o}, t = P g (mesh precision) and σ_c²."""
    g: np.ndarray
    t: np.ndarray
    weights: np.ndarray
    sigma2: float

    @classmethod
    def make(cls, mesh, c_kernel, pk):
        p, kc, w, sigma2 = _constraint_parts(mesh, pk, c_kernel)
        g = _observer_phase(mesh)
        g *= kc
        t = g * p
        return cls(g, t.astype(mesh.complex_dtype, copy=False), w, sigma2)

    def value(self, mesh, dk):
        """c(x_o) = V⁻¹ Σ_full K δ_k e^{ik·x_o} (half layout: Re with multiplicity weights),
        summed in float64 plane by plane."""
        tot = 0.0
        for i in range(mesh.n):
            tot += float(np.sum(self.weights * np.real(dk[i] * np.conj(self.g[i])), dtype=float))
        return tot / mesh.volume

    def apply(self, mesh, dk, c_value):
        """Impose c(x_o) = c_value on δ_k in place; returns c(x_o) before."""
        c_obs = self.value(mesh, dk)
        amp = (c_value - c_obs) / self.sigma2
        for i in range(mesh.n):
            dk[i] += self.t[i] * dk.real.dtype.type(amp)
        return c_obs


def constrain_at_origin(mesh, delta_k, c_kernel, c_value, pk, template=None, inplace=False):
    """Impose c(x_o) = ``c_value`` on a Gaussian field, c(k) = K(k) δ(k) (Hoffman & Ribak 1991).

    With ξ_δc(x) = V⁻¹ Σ_k P K e^{ik·x} and σ_c² = V⁻¹ Σ_k P K² (mesh modes, K = ``c_kernel``
    real) the constrained realisation is

        δ'(x) = δ(x) + ξ_δc(x − x_o) [c_value − c(x_o)] / σ_c²,
        δ'_k  = δ_k + P(k) K(k) e^{-ik·x_o} [c_value − c(x_o)] / σ_c².

    If δ is drawn from the unconstrained ensemble, δ' is a draw from the ensemble conditioned on
    c(x_o) = c_value: mean ξ_δc c_value/σ_c², covariance ξ(x1−x2) − ξ_δc(x1) ξ_δc(x2)/σ_c².
    c(x_o) is evaluated as the mesh field at the observer node (exactly what ``to_real`` gives).
    The result depends on K only through its shape: rescaling K rescales c_value and σ_c alike.

    ``pk``: the power spectrum the field was drawn with. ``template``: a
    :class:`ConstraintTemplate` made once for a set of mocks (saves its set-up per mock);
    ``inplace``: overwrite ``delta_k`` (saves one field of memory). Returns (δ'_k, σ_c, c(x_o)
    before).
    """
    dk = check_fourier_field(mesh, delta_k)
    cv = finite_number(c_value, "c_value")
    tpl = template if template is not None else ConstraintTemplate.make(mesh, c_kernel, pk)
    out = dk if inplace else dk.copy()
    c_obs = tpl.apply(mesh, out, cv)
    return out, math.sqrt(tpl.sigma2), c_obs


def _ir_cut(k, k_ir):
    return 1.0 if k_ir is None else (np.asarray(k, float) >= k_ir).astype(float)


@dataclass(frozen=True)
class ObserverConstraint:
    """Value of a constraint field at the observer: c(x_o) = ν σ_c with c(k) = K(k) δ(k).

    Build with :meth:`potential` (default field of the design) or :meth:`density`. ``k_ir``
    (optional, h/Mpc) removes the modes k < k_ir from c (an explicit infrared cut-off on top of
    the mesh's fundamental mode).
    """

    kernel: Callable
    nu: float
    name: str = "potential"

    @classmethod
    def potential(cls, nu, k_ir=None):
        """Gravitational potential: Poisson's equation Φ(k) = −(3/2) Ω_m0 H0² (1+z) δ(k)/k².

        Only the shape K ∝ −1/k² matters for ν (see :func:`constrain_at_origin`); the minus sign
        makes ν > 0 a positive potential, i.e. an underdense neighbourhood.
        """
        kir = _optional_positive(k_ir, "k_ir")
        return cls(lambda k: -_ir_cut(k, kir) / np.asarray(k, float) ** 2,
                   finite_number(nu, "nu_true", ConfigError), "potential")

    @classmethod
    def density(cls, nu, radius, k_ir=None):
        """Density in a top-hat sphere of ``radius`` (Mpc/h): K = 3 (sin x − x cos x)/x³, x = kR."""
        r = _optional_positive(radius, "smoothing")
        if r is None:
            raise ConfigError("observer smoothing: expected a positive radius in Mpc/h")
        kir = _optional_positive(k_ir, "k_ir")
        return cls(lambda k: _ir_cut(k, kir) * tophat(np.asarray(k, float) * r),
                   finite_number(nu, "nu_true", ConfigError), f"density(R={r:g})")


def _optional_positive(value, name):
    if value is None:
        return None
    v = finite_number(value, name, ConfigError)
    if v <= 0:
        raise ConfigError(f"observer {name} = {value!r}: expected a positive number")
    return v


# ---------------------------------------------------------------------------------------------
# Window on the mesh and Poisson sampling
# ---------------------------------------------------------------------------------------------

def poisson_sample(mesh, density_field, nbar, window=None, seed=None):
    """Poisson galaxy counts per cell: N(x) ~ Poisson(n̄ H³ W(x) [1 + Δ(x)]₊).

    ``density_field`` Δ (real, on the mesh), ``nbar`` n̄ in (h/Mpc)³, ``window`` a geometry, a
    weight array W ∈ [0, 1] or None (W = 1). Δ < −1 is clipped to −1 (a warning gives the
    fraction of cells clipped when above 0.1 %: then the mock's power is biased).
    Returns the counts as a float array on the mesh (pass it to :func:`measure_multipoles`
    together with ``nbar``).
    """
    d = check_real_field(mesh, density_field, "density_field")
    w = window_weights(mesh, window, "window")
    counts, frac = poisson_counts(mesh, d, nbar, w, seed)
    clip_warning(frac, stacklevel=3)
    return counts


def clip_warning(frac, stacklevel, gain=None):
    if frac > 1e-3:
        fix = ("the mock power is biased (Gaussian field too strong for this cell size); use a "
               "coarser mesh (k_N just above k_max) or remove the modes above k_max (k_cut)")
        if gain is not None:
            fix = (f"the field was scaled by up to {gain:.4g} before clipping so that the clipped "
                   "field keeps the Gaussian field's large-scale power to first order (Price 1958); "
                   "the one-point distribution is no longer Gaussian")
        warnings.warn(f"poisson_sample: 1 + Δ < 0 in {100 * frac:.2f}% of the cells inside the "
                      f"window, clipped to 0: {fix}", stacklevel=stacklevel)


def clip_gain(sigma):
    """Gain a that keeps the linear response of the clipped field g(Δ) = max(aΔ, −1) at one.

    For a Gaussian field Δ (variance σ² per cell) and a local function g, the correlation of
    g(Δ) is Σ_n <g⁽ⁿ⁾>² ξⁿ/n! (Price 1958, IRE Trans. Inf. Theory 4, 69; Mehler's expansion), so
    on large scales (ξ ≪ 1) P_g = <g'>² P. Clipping alone (a = 1) gives <g'> = P(Δ > −1) < 1
    and lowers the power by about twice the clipped fraction; with <g'> = a Φ(1/(aσ)) = 1 the
    first-order term is P again and the remainder is second order in ξ.
    """
    from scipy.optimize import brentq
    from scipy.special import ndtr

    if not sigma > 0 or 1.0 / sigma > 8.0:   # Φ(8) = 1 − 6e-16: nothing to clip
        return 1.0
    return float(brentq(lambda a: a * ndtr(1.0 / (a * sigma)) - 1.0, 1.0, 3.0, xtol=1e-12))


def poisson_counts(mesh, d, nbar, w, seed, gaussian_gain=False):
    """Counts and the fraction of in-window cells where 1 + Δ < 0 was clipped.

    ``gaussian_gain``: for a Gaussian Δ, scale it by :func:`clip_gain` (σ measured in the window
    cells) before clipping; returns (counts, clipped fraction, gain)."""
    nb = finite_number(nbar, "nbar", ConfigError)
    if nb <= 0:
        raise ErgofitError(f"nbar = {nbar!r}: expected a positive number density in (h/Mpc)^3")
    lam = d.astype(float)
    inside = lam[w > 0] if w is not None else lam
    gain = clip_gain(float(np.sqrt(np.mean(inside ** 2)))) if gaussian_gain else 1.0
    if gain != 1.0:
        lam *= gain
    lam += 1.0
    neg = lam < 0
    frac = float(neg[w > 0].mean()) if w is not None else float(neg.mean())
    lam[neg] = 0.0
    lam *= nb * mesh.cell ** 3
    if w is not None:
        lam *= w
    rng = np.random.default_rng(seed)
    counts = rng.poisson(lam).astype(mesh.real_dtype)
    return (counts, frac, gain) if gaussian_gain else (counts, frac)


# ---------------------------------------------------------------------------------------------
# The FFT multipole estimator
# ---------------------------------------------------------------------------------------------

