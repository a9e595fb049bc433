"""Gaussian mock surveys on a periodic mesh and the FFT multipole estimator (local line of sight).

The strongest check of the likelihood model is to simulate the observation and measure it the way
a survey is measured; the same machinery gives mock covariances.

Conventions (shared design): distances in Mpc/h, k in h/Mpc, P in (Mpc/h)^3,
δ(k) = ∫ d³x δ(x) e^{-ik·x}, δ(x) = ∫ d³k/(2π)³ δ(k) e^{+ik·x}. On a mesh of n³ nodes, side L,
spacing H = L/n and volume V = L³ the discrete versions are

    δ_k = H³ Σ_x δ(x) e^{-ik·x}      (``H³ * rfftn``),   δ(x) = V⁻¹ Σ_k δ_k e^{+ik·x},
    <δ_k δ*_k'> = V P(k) δ^K_{kk'},

with k on the grid 2π/L × integers, |k_i| ≤ k_N = π n / L (Nyquist). Arrays in Fourier space use
the ``rfftn`` half layout (n, n, n//2 + 1).

The observer sits at a mesh node, the centre of the box, unless ``Mesh.observer`` moves it (a far
observer gives the plane-parallel limit). The line of sight is local: n̂ = x/|x| from the observer.

Regime of validity
------------------
* Linear theory: the density is a Gaussian random field with the linear P(k) (no non-linear
  evolution, no mode coupling); the galaxy field is the linear kernel of the tracer applied with
  the local line of sight. Use for the large scales this tool is about, not for k ≳ 0.1 h/Mpc.
* The box is periodic: the mock has no power below the fundamental k_f = 2π/L and points
  separated by more than L/2 see periodic images. Use a box at least twice the survey diameter
  (a warning says so) when comparing with a theory that assumes an infinite volume.
* One redshift: the whole mock is a snapshot at the effective z (growth, bias, f and the
  projection coefficients γ1, γ2 do not evolve across the survey; no light cone).
* Poisson sampling is done per mesh cell (1 + Δ clipped at 0): mock galaxies are cell-resolved.
"""
from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass
from typing import Callable, Mapping

import numpy as np
import scipy.fft as sfft

from ..data import DataVector, MockCovariance, check_covariance, save_covariance
from ..errors import ConfigError, ErgofitError

__all__ = [
    "Mesh", "gaussian_field", "to_real", "to_fourier", "observed_field", "constraint_sigma",
    "constraint_mean_field", "constrain_at_origin", "ObserverConstraint", "window_mask",
    "poisson_sample", "measure_multipoles", "simulate_mocks", "validate", "simulate_from_settings",
    "harmonic_terms",
]

_MAX_ELL = 10


# ---------------------------------------------------------------------------------------------
# Mesh geometry
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Mesh:
    """A periodic cubic mesh of ``n``³ nodes and side ``box`` (Mpc/h).

    ``observer``: position of the observer relative to the centre node of the box (Mpc/h);
    default (0, 0, 0), i.e. the observer sits on the node ``n//2`` of each axis. Put it far away
    (e.g. (0, 0, -1e6)) for the plane-parallel (distant-observer) limit.
    ``dtype``: ``"float64"`` (default) or ``"float32"`` (half the memory, faster FFTs; relative
    precision ~1e-6, enough for mocks but not for tests at 1e-10).
    """

    n: int
    box: float
    observer: tuple = (0.0, 0.0, 0.0)
    dtype: str = "float64"

    def __post_init__(self):
        if isinstance(self.n, bool) or not isinstance(self.n, (int, np.integer)) or self.n < 4 \
                or self.n % 2:
            raise ErgofitError(f"mesh n = {self.n!r}: expected an even integer >= 4")
        try:
            box = float(self.box)
        except (TypeError, ValueError):
            raise ErgofitError(f"mesh box = {self.box!r}: expected a positive length in Mpc/h") \
                from None
        if not (np.isfinite(box) and box > 0):
            raise ErgofitError(f"mesh box = {self.box!r}: expected a positive length in Mpc/h")
        try:
            obs = tuple(float(v) for v in self.observer)
        except (TypeError, ValueError):
            obs = ()
        if len(obs) != 3 or not all(np.isfinite(obs)):
            raise ErgofitError(f"mesh observer = {self.observer!r}: expected three finite "
                               "coordinates in Mpc/h")
        if self.dtype not in ("float32", "float64"):
            raise ErgofitError(f"mesh dtype = {self.dtype!r}: expected 'float32' or 'float64'")
        object.__setattr__(self, "n", int(self.n))
        object.__setattr__(self, "box", box)
        object.__setattr__(self, "observer", obs)

    # -- scalars -------------------------------------------------------------------------------
    @property
    def cell(self):
        """Mesh spacing H = L/n (Mpc/h)."""
        return self.box / self.n

    @property
    def volume(self):
        """Box volume V = L³ ((Mpc/h)³)."""
        return self.box ** 3

    @property
    def k_fundamental(self):
        """Fundamental wavenumber k_f = 2π/L (h/Mpc)."""
        return 2.0 * np.pi / self.box

    @property
    def k_nyquist(self):
        """Nyquist wavenumber k_N = π n/L (h/Mpc)."""
        return np.pi * self.n / self.box

    @property
    def real_dtype(self):
        return np.dtype(self.dtype)

    @property
    def complex_dtype(self):
        return np.dtype(np.complex64 if self.dtype == "float32" else np.complex128)

    @property
    def fourier_shape(self):
        return (self.n, self.n, self.n // 2 + 1)

    # -- configuration space -------------------------------------------------------------------
    def axes(self):
        """Node coordinates relative to the observer along x, y, z: three 1-D arrays (Mpc/h).

        Node j of an axis sits at (j − n/2) H − observer_i.
        """
        base = (np.arange(self.n) - self.n // 2) * self.cell
        return tuple((base - o).astype(self.real_dtype) for o in self.observer)

    def positions(self):
        """Broadcastable x, y, z arrays of shapes (n,1,1), (1,n,1), (1,1,n)."""
        x, y, z = self.axes()
        return x[:, None, None], y[None, :, None], z[None, None, :]

    def radius(self):
        """Distance |x| of every node from the observer, shape (n, n, n)."""
        x, y, z = self.positions()
        return np.sqrt(x * x + y * y + z * z)

    def observer_node(self):
        """Index (i, j, l) of the node at the observer, or None if the observer is off the mesh."""
        idx = []
        for o in self.observer:
            t = self.n // 2 + o / self.cell
            j = int(round(t))
            if abs(t - j) > 1e-9 * max(1.0, abs(t)) or not 0 <= j < self.n:
                return None
            idx.append(j)
        return tuple(idx)

    # -- Fourier space ---------------------------------------------------------------------------
    def k_integers(self):
        """Integer wavevector components (i, j, l) of the rfft layout, broadcastable."""
        i = np.fft.fftfreq(self.n, 1.0 / self.n).astype(np.int64)
        l = np.arange(self.n // 2 + 1, dtype=np.int64)
        return i[:, None, None], i[None, :, None], l[None, None, :]

    def kvectors(self):
        """Broadcastable k_x, k_y, k_z (h/Mpc) on the rfft layout."""
        kf = self.k_fundamental
        return tuple((kf * a).astype(self.real_dtype) for a in self.k_integers())

    def k_squared_index(self):
        """q = i² + j² + l² on the rfft layout (int64), so that |k| = k_f √q exactly."""
        i, j, l = self.k_integers()
        return i * i + j * j + l * l

    def kmag(self):
        """|k| on the rfft layout (h/Mpc)."""
        return (self.k_fundamental * np.sqrt(self.k_squared_index())).astype(self.real_dtype)

    def rfft_weights(self):
        """Multiplicity of each rfft mode in the full grid: 1 on the l = 0 and l = n/2 planes, else 2."""
        w = np.full(self.n // 2 + 1, 2.0, dtype=self.real_dtype)
        w[0] = 1.0
        w[-1] = 1.0
        return w[None, None, :]

    def on_grid(self, func, name="function"):
        """Evaluate ``func(k)`` (vectorised, k in h/Mpc) on the rfft layout; the k = 0 entry is 0.

        ``func`` is called once on the distinct |k| = k_f √q of the mesh (q integer), so the values
        are exact and the cost is O(n²).
        """
        q = self.k_squared_index()
        qmax = int(q.max())
        kq = self.k_fundamental * np.sqrt(np.arange(1, qmax + 1, dtype=float))
        try:
            vals = np.asarray(func(kq))
        except ErgofitError:
            raise
        except Exception as exc:  # a user callable failed: name it
            raise ErgofitError(f"{name}(k) failed on the mesh wavenumbers "
                               f"[{kq[0]:.4g}, {kq[-1]:.4g}] h/Mpc: {exc}") from None
        if vals.shape == ():
            vals = np.full(kq.shape, vals)
        if vals.shape != kq.shape:
            raise ErgofitError(f"{name}(k) returned shape {vals.shape} for {kq.size} wavenumbers; "
                               "expected one value per k")
        bad = ~np.isfinite(vals)
        if bad.any():
            raise ErgofitError(f"{name}(k) is not finite at k = {kq[bad][0]:.4g} h/Mpc")
        table = np.concatenate([[0.0], vals]) if not np.iscomplexobj(vals) else \
            np.concatenate([[0.0 + 0j], vals])
        return table[q]


def _fourier_array(mesh, value, name):
    """Callable → evaluated on the grid; scalar → scalar; array → must match the rfft layout."""
    if callable(value):
        return mesh.on_grid(value, name)
    arr = np.asarray(value)
    if arr.ndim == 0:
        if not np.isfinite(arr):
            raise ErgofitError(f"{name} = {value!r}: expected a finite number or a function of k")
        return float(arr)
    if arr.shape != mesh.fourier_shape:
        raise ErgofitError(f"{name}: array of shape {arr.shape}; expected a function of k, a "
                           f"number, or an array on the rfft layout {mesh.fourier_shape}")
    if not np.all(np.isfinite(arr)):
        raise ErgofitError(f"{name}: array contains NaN or inf")
    return arr


def _check_real_field(mesh, field, name):
    arr = np.asarray(field)
    if arr.shape != (mesh.n,) * 3:
        raise ErgofitError(f"{name}: shape {arr.shape}; expected the mesh shape {(mesh.n,) * 3}")
    if not np.all(np.isfinite(arr)):
        raise ErgofitError(f"{name}: contains NaN or inf")
    return arr.astype(mesh.real_dtype, copy=False)


def _check_fourier_field(mesh, delta_k, name="delta_k"):
    arr = np.asarray(delta_k)
    if arr.shape != mesh.fourier_shape or not np.iscomplexobj(arr):
        raise ErgofitError(f"{name}: expected a complex array on the rfft layout "
                           f"{mesh.fourier_shape}, got {arr.dtype} {arr.shape}")
    return arr


def to_fourier(mesh, field):
    """δ_k = H³ Σ_x δ(x) e^{-ik·x} on the rfft layout (scipy.fft.rfftn, all cores)."""
    f = _check_real_field(mesh, field, "field")
    return sfft.rfftn(f, workers=-1) * mesh.real_dtype.type(mesh.cell ** 3)


def to_real(mesh, delta_k):
    """δ(x) = V⁻¹ Σ_k δ_k e^{+ik·x} on the mesh nodes (inverse of :func:`to_fourier`)."""
    d = _check_fourier_field(mesh, delta_k)
    return sfft.irfftn(d, s=(mesh.n,) * 3, workers=-1) * mesh.real_dtype.type(mesh.cell ** -3)


# ---------------------------------------------------------------------------------------------
# Gaussian random field
# ---------------------------------------------------------------------------------------------

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
    p = _fourier_array(mesh, pk, "pk")
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

def _unit_vectors(mesh):
    """x̂, ŷ, ẑ of each node seen from the observer (0 at the observer node)."""
    x, y, z = mesh.positions()
    r = np.sqrt(x * x + y * y + z * z)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = np.where(r > 0, 1.0 / r, 0.0).astype(mesh.real_dtype)
    return x * inv, y * inv, z * inv


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
    dk = _check_fourier_field(mesh, delta_k)
    rdt = mesh.real_dtype
    a = _fourier_array(mesh, A, "A")
    try:
        f = float(F)
    except (TypeError, ValueError):
        raise ErgofitError(f"F = {F!r}: expected a number (the growth rate f)") from None
    if not np.isfinite(f):
        raise ErgofitError(f"F = {F!r}: expected a finite number")
    b = None if B is None else _fourier_array(mesh, B, "B")
    if np.iscomplexobj(a) or (b is not None and np.iscomplexobj(b)):
        raise ErgofitError("A(k) and B(k) must be real (the i of the Doppler term is explicit)")
    inv_h3 = rdt.type(mesh.cell ** -3)
    s = (mesh.n,) * 3

    def irf(arr):
        return sfft.irfftn(arr, s=s, workers=-1, overwrite_x=True) * inv_h3

    out = irf(dk * (a.astype(rdt) if np.ndim(a) else rdt.type(a)))
    if f == 0.0 and b is None:
        return out
    kv = mesh.kvectors()
    k = mesh.kmag()
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_k = np.where(k > 0, 1.0 / k, 0.0).astype(rdt)
    nhat = _unit_vectors(mesh)
    if f != 0.0:
        fd = dk * (rdt.type(f) * inv_k * inv_k)
        for i in range(3):
            for j in range(i, 3):
                t = irf(fd * (kv[i] * kv[j]))
                t *= nhat[i] * nhat[j] * rdt.type(1.0 if i == j else 2.0)
                out += t
        del fd
    if b is not None:
        bd = dk * ((b.astype(rdt) if np.ndim(b) else rdt.type(b)) * inv_k) * 1j
        for i in range(3):
            t = irf(bd * kv[i])
            t *= nhat[i]
            out += t
    return out


# ---------------------------------------------------------------------------------------------
# Hoffman–Ribak constrained field at the observer
# ---------------------------------------------------------------------------------------------

def _constraint_parts(mesh, pk, c_kernel):
    p = _fourier_array(mesh, pk, "pk")
    kc = _fourier_array(mesh, c_kernel, "c_kernel")
    if np.iscomplexobj(kc) or np.iscomplexobj(p):
        raise ErgofitError("c_kernel(k) and pk(k) must be real")
    p = np.broadcast_to(np.asarray(p, float), mesh.fourier_shape)
    kc = np.broadcast_to(np.asarray(kc, float), mesh.fourier_shape)
    w = mesh.rfft_weights().astype(float)
    sigma2 = float(np.sum(w * kc * kc * p)) / mesh.volume
    if not sigma2 > 0:
        raise ErgofitError("constraint: σ_c² = V⁻¹ Σ_k K(k)² P(k) is zero on this mesh; the "
                           "constraint kernel has no support between k_f and k_N")
    return p, kc, w, sigma2


def _observer_phase(mesh):
    node = mesh.observer_node()
    if node is None:
        raise ErgofitError(f"mesh observer = {mesh.observer}: the constraint at the observer needs "
                           f"the observer on a mesh node (multiples of H = {mesh.cell:.6g} Mpc/h "
                           "inside the box)")
    i, j, l = mesh.k_integers()
    ph = [np.exp(-2j * np.pi * a * c / mesh.n) for a, c in zip((i, j, l), node)]
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
    mk = (p * kc / sig) * _observer_phase(mesh)
    return to_real(mesh, mk.astype(mesh.complex_dtype)), sig


def constrain_at_origin(mesh, delta_k, c_kernel, c_value, pk):
    """Impose c(x_o) = ``c_value`` on a Gaussian field, c(k) = K(k) δ(k) (Hoffman & Ribak 1991).

    With ξ_δc(x) = V⁻¹ Σ_k P K e^{ik·x} and σ_c² = V⁻¹ Σ_k P K² (mesh modes, K = ``c_kernel``
    real) the constrained realisation is

        δ'(x) = δ(x) + ξ_δc(x − x_o) [c_value − c(x_o)] / σ_c²,
        δ'_k  = δ_k + P(k) K(k) e^{-ik·x_o} [c_value − c(x_o)] / σ_c².

    If δ is drawn from the unconstrained ensemble, δ' is a draw from the ensemble conditioned on
    c(x_o) = c_value: mean ξ_δc c_value/σ_c², covariance ξ(x1−x2) − ξ_δc(x1) ξ_δc(x2)/σ_c².
    c(x_o) is evaluated as the mesh field at the observer node (exactly what ``to_real`` gives).
    The result depends on K only through its shape: rescaling K rescales c_value and σ_c alike.

    ``pk``: the power spectrum the field was drawn with. Returns (δ'_k, σ_c, c(x_o) before).
    """
    dk = _check_fourier_field(mesh, delta_k)
    try:
        cv = float(c_value)
    except (TypeError, ValueError):
        raise ErgofitError(f"c_value = {c_value!r}: expected a number") from None
    if not np.isfinite(cv):
        raise ErgofitError(f"c_value = {c_value!r}: expected a finite number")
    p, kc, w, sigma2 = _constraint_parts(mesh, pk, c_kernel)
    phase = _observer_phase(mesh)
    # c(x_o) = V⁻¹ Σ_full K δ_k e^{ik·x_o}; on the half layout, Re with multiplicity weights.
    c_obs = float(np.sum(w * np.real(kc * dk * np.conj(phase)))) / mesh.volume
    corr = (p * kc * phase) * ((cv - c_obs) / sigma2)
    return (dk + corr).astype(dk.dtype, copy=False), math.sqrt(sigma2), c_obs


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
                   _finite(nu, "nu_true"), "potential")

    @classmethod
    def density(cls, nu, radius, k_ir=None):
        """Density in a top-hat sphere of ``radius`` (Mpc/h): K = 3 (sin x − x cos x)/x³, x = kR."""
        r = _optional_positive(radius, "smoothing")
        if r is None:
            raise ConfigError("observer smoothing: expected a positive radius in Mpc/h")
        kir = _optional_positive(k_ir, "k_ir")
        return cls(lambda k: _ir_cut(k, kir) * _tophat(np.asarray(k, float) * r),
                   _finite(nu, "nu_true"), f"density(R={r:g})")


def _optional_positive(value, name):
    if value is None:
        return None
    v = _finite(value, name)
    if v <= 0:
        raise ConfigError(f"observer {name} = {value!r}: expected a positive number")
    return v


def _tophat(x):
    x = np.asarray(x, float)
    out = np.ones_like(x)
    big = x > 1e-3
    xb = x[big]
    out[big] = 3.0 * (np.sin(xb) - xb * np.cos(xb)) / xb ** 3
    xs = x[~big]
    out[~big] = 1.0 - xs ** 2 / 10.0
    return out


def _finite(value, name):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {value!r}: expected a number") from None
    if not np.isfinite(v):
        raise ConfigError(f"{name} = {value!r}: expected a finite number")
    return v


# ---------------------------------------------------------------------------------------------
# Window on the mesh and Poisson sampling
# ---------------------------------------------------------------------------------------------

def window_mask(mesh, window, subsample=1):
    """Selection W(x) ∈ [0, 1] on the mesh nodes from a geometry with ``contains(x, y, z)``.

    ``subsample`` s > 1 averages ``contains`` over s³ points per cell (fraction of the cell inside).
    Coordinates are relative to the observer. Raises ErgofitError if the window is empty on the
    mesh or reaches the faces of the box (the box must contain the window).
    """
    if not hasattr(window, "contains"):
        raise ErgofitError(f"window = {window!r}: expected a geometry with contains(x, y, z) or a "
                           "mask array on the mesh")
    s = int(subsample)
    if s < 1:
        raise ErgofitError(f"subsample = {subsample!r}: expected an integer >= 1")
    x, y, z = mesh.axes()
    x, y, z = (a.astype(float) for a in (x, y, z))
    offs = ((np.arange(s) + 0.5) / s - 0.5) * mesh.cell if s > 1 else np.zeros(1)
    out = np.zeros((mesh.n,) * 3, dtype=mesh.real_dtype)
    slab = max(1, 2 ** 22 // (mesh.n * mesh.n))
    for i0 in range(0, mesh.n, slab):
        xs = x[i0:i0 + slab]
        acc = np.zeros((xs.size, mesh.n, mesh.n))
        for dx in offs:
            for dy in offs:
                for dz in offs:
                    X, Y, Z = np.broadcast_arrays((xs + dx)[:, None, None],
                                                  (y + dy)[None, :, None], (z + dz)[None, None, :])
                    acc += np.asarray(window.contains(X, Y, Z), dtype=float)
        out[i0:i0 + slab] = acc / len(offs) ** 3
    return _check_window_fits(mesh, out, "window")


def _check_window_fits(mesh, w, name):
    if not np.any(w > 0):
        raise ErgofitError(f"{name}: no mesh node lies inside the window (box L = {mesh.box:g} "
                           f"Mpc/h, n = {mesh.n})")
    # The planes of index 0 sit at ±L/2 from the centre node (periodic): a window with weight
    # there wraps around the box.
    faces = [w[0], w[:, 0], w[:, :, 0]]
    if any(np.any(f > 0) for f in faces):
        r = mesh.radius()
        rmax = float(r[w > 0].max())
        raise ErgofitError(f"{name}: the window reaches the boundary of the periodic box (box L = {mesh.box:g} "
                           f"Mpc/h, window extends to r = {rmax:.4g} Mpc/h from the observer); "
                           f"the box must contain the window: use L > {2 * rmax + 2 * mesh.cell:.4g}"
                           " Mpc/h")
    return w


def _weights(mesh, window_mask_or_window, name="window_mask"):
    """None (W = 1 everywhere, periodic box), a geometry, or an array on the mesh."""
    if window_mask_or_window is None:
        return None
    if hasattr(window_mask_or_window, "contains"):
        return window_mask(mesh, window_mask_or_window)
    w = _check_real_field(mesh, window_mask_or_window, name)
    if np.any(w < 0):
        raise ErgofitError(f"{name}: weights must be non-negative")
    return _check_window_fits(mesh, w, name)


def _extent_warning(mesh, w):
    if w is None:
        return
    r = mesh.radius()
    rmax = float(r[w > 0].max())
    if mesh.box < 4.0 * rmax:
        warnings.warn(f"box L = {mesh.box:g} Mpc/h is less than twice the survey diameter "
                      f"({2 * rmax:.4g} Mpc/h): periodic images correlate distant survey points and "
                      "the mocks miss modes below k_f; compare with theory only for k >> "
                      f"{mesh.k_fundamental:.3g} h/Mpc", stacklevel=3)


def poisson_sample(mesh, density_field, nbar, window=None, seed=None):
    """Poisson galaxy counts per cell: N(x) ~ Poisson(n̄ H³ W(x) [1 + Δ(x)]₊).

    ``density_field`` Δ (real, on the mesh), ``nbar`` n̄ in (h/Mpc)³, ``window`` a geometry, a
    weight array W ∈ [0, 1] or None (W = 1). Δ < −1 is clipped to −1 (a warning gives the
    fraction of cells clipped when above 0.1 %: then the mock's power is biased).
    Returns the counts as a float array on the mesh (pass it to :func:`measure_multipoles`
    together with ``nbar``).
    """
    d = _check_real_field(mesh, density_field, "density_field")
    w = _weights(mesh, window, "window")
    counts, frac = _poisson(mesh, d, nbar, w, seed)
    _clip_warning(frac, stacklevel=3)
    return counts


def _clip_warning(frac, stacklevel):
    if frac > 1e-3:
        warnings.warn(f"poisson_sample: 1 + Δ < 0 in {100 * frac:.2f}% of the cells inside the "
                      "window, clipped to 0: the mock power is biased (Gaussian field too strong "
                      "for this cell size); use a coarser mesh (k_N just above k_max) or remove "
                      "the modes above k_max (k_cut)", stacklevel=stacklevel)


def _poisson(mesh, d, nbar, w, seed):
    """Counts and the fraction of in-window cells where 1 + Δ < 0 was clipped."""
    nb = _finite(nbar, "nbar")
    if nb <= 0:
        raise ErgofitError(f"nbar = {nbar!r}: expected a positive number density in (h/Mpc)^3")
    lam = 1.0 + d.astype(float)
    neg = lam < 0
    frac = float(neg[w > 0].mean()) if w is not None else float(neg.mean())
    lam[neg] = 0.0
    lam *= nb * mesh.cell ** 3
    if w is not None:
        lam *= w
    rng = np.random.default_rng(seed)
    return rng.poisson(lam).astype(mesh.real_dtype), frac


# ---------------------------------------------------------------------------------------------
# The FFT multipole estimator
# ---------------------------------------------------------------------------------------------

def harmonic_terms(ell, ux, uy, uz):
    """Real Cartesian harmonics G_t of degree ℓ with L_ℓ(û·v̂) = Σ_t c_t G_t(û) G_t(v̂).

    Addition theorem of Legendre polynomials (DLMF 14.18.1, quoted from memory):
    L_ℓ(û·v̂) = P_ℓ(u_z)P_ℓ(v_z) + 2 Σ_{m=1..ℓ} (ℓ−m)!/(ℓ+m)! P_ℓ^m(u_z) P_ℓ^m(v_z) cos m(φ_u−φ_v),
    and P_ℓ^m(cos θ) e^{imφ} = P_ℓ^{(m)}(cos θ) (sin θ e^{iφ})^m = P_ℓ^{(m)}(u_z)(u_x + i u_y)^m
    (P^{(m)}: m-th derivative; the Condon–Shortley sign cancels in the products). Yields
    (c_t, G_t(u)) for the 2ℓ+1 terms: G = P_ℓ^{(m)}(u_z) Re/Im (u_x + i u_y)^m.
    """
    leg = np.polynomial.Legendre.basis(ell)
    cr = np.ones_like(ux)
    ci = np.zeros_like(ux)
    for m in range(ell + 1):
        if m:
            cr, ci = cr * ux - ci * uy, ci * ux + cr * uy
        poly = leg.deriv(m).convert(kind=np.polynomial.Polynomial).coef
        qz = np.full_like(uz, poly[-1])
        for c in poly[-2::-1]:
            qz = qz * uz + uz.dtype.type(c)
        if m == 0:
            yield 1.0, qz * cr
        else:
            coef = 2.0 * math.factorial(ell - m) / math.factorial(ell + m)
            yield coef, qz * cr
            yield coef, qz * ci


def _check_ells(ells):
    try:
        out = tuple(int(l) for l in ells)
    except (TypeError, ValueError):
        raise ErgofitError(f"ells = {ells!r}: expected a list of multipole orders like (0, 2, 4)") \
            from None
    if not out or len(set(out)) != len(out) or any(l < 0 or l > _MAX_ELL for l in out) \
            or any(float(a) != int(a) for a in ells):
        raise ErgofitError(f"ells = {ells!r}: expected distinct integers between 0 and {_MAX_ELL}")
    return out


def _check_edges(mesh, edges):
    try:
        e = np.asarray(edges, dtype=float)
    except (TypeError, ValueError):
        raise ErgofitError(f"edges = {edges!r}: expected increasing k bin edges in h/Mpc") from None
    if e.ndim != 1 or e.size < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0) \
            or e[0] < 0:
        raise ErgofitError("edges: expected at least two finite, non-negative, strictly increasing "
                           "k bin edges in h/Mpc")
    if e[-1] > mesh.k_nyquist * (1 + 1e-12):
        n_need = int(math.ceil(e[-1] * mesh.box / np.pi))
        n_need += n_need % 2
        raise ErgofitError(f"edges: k_max = {e[-1]:.4g} h/Mpc exceeds the mesh Nyquist wavenumber "
                           f"k_N = π n/L = {mesh.k_nyquist:.4g} h/Mpc (n = {mesh.n}, L = "
                           f"{mesh.box:g} Mpc/h); use n >= {n_need} or a lower k_max")
    return e


def _mode_selection(mesh, e):
    """Flat rfft indices of the modes inside [e0, e_last], their bin, |k|, k̂, multiplicity."""
    q = mesh.k_squared_index()
    kf = mesh.k_fundamental
    qlo, qhi = (e[0] / kf) ** 2, (e[-1] / kf) ** 2
    mask = (q > 0) & (q >= qlo * (1 - 1e-12)) & (q <= qhi * (1 + 1e-12))
    flat = np.flatnonzero(mask)
    qs = q.ravel()[flat]
    kmag = kf * np.sqrt(qs.astype(float))
    b = np.searchsorted(e, kmag, side="right") - 1
    b = np.clip(b, 0, e.size - 2)
    i, j, l = np.unravel_index(flat, mesh.fourier_shape)
    ivals = np.fft.fftfreq(mesh.n, 1.0 / mesh.n)
    comp = (ivals[i], ivals[j], l.astype(float))
    khat = tuple((c / np.sqrt(qs)) for c in comp)
    mult = np.where((l == 0) | (l == mesh.n // 2), 1.0, 2.0)
    return flat, b, kmag, khat, mult


def _fft_at(mesh, arr, flat):
    return sfft.rfftn(arr, workers=-1).ravel()[flat].astype(np.complex128) * mesh.cell ** 3


def _multipole_transforms(mesh, F, ells, flat, khat):
    """F_ℓ(k) = H³ Σ_x F(x) e^{-ik·x} L_ℓ(k̂·x̂) at the selected modes, for ℓ in ``ells`` and 0."""
    out = {0: _fft_at(mesh, F, flat)}
    higher = sorted(l for l in ells if l > 0)
    if not higher:
        return out
    ux, uy, uz = _unit_vectors(mesh)
    node = mesh.observer_node()
    Fz = F
    if node is not None:  # x̂ is undefined at the observer: the cell average of L_ℓ (ℓ>0) is 0
        Fz = F.copy()
        Fz[node] = 0.0
    ux, uy, uz = np.broadcast_arrays(ux, uy, uz)
    for ell in higher:
        acc = np.zeros(flat.size, np.complex128)
        kterms = list(harmonic_terms(ell, *khat))
        for (c, gk), (_, gx) in zip(kterms, harmonic_terms(ell, ux, uy, uz)):
            acc += c * gk * _fft_at(mesh, Fz * gx, flat)
        out[ell] = acc
    return out


def _binned(values, b, mult, nb):
    num = np.bincount(b, weights=mult * values, minlength=nb)
    return num


def measure_multipoles(mesh, field, window_mask=None, edges=None, ells=(0, 2, 4), nbar=None,
                       subtract_mean=True, cross=None, nbar_cross=None):
    """FFT multipole estimator with the local (end-point) line of sight.

    Yamamoto-type estimator computed with FFTs (Bianchi et al. 2015; Scoccimarro 2015; spherical
    harmonic decomposition as in Hand et al. 2017):

        F(x) = W(x) [Δ(x) − Δ̄],   Δ̄ = Σ W Δ / Σ W    (mean estimated from the data),
        F_ℓ(k) = ∫ d³x F(x) e^{-ik·x} L_ℓ(k̂·x̂),      x̂ from the observer,
        P̂_ℓ(k) = (2ℓ+1)/I₂ < F_ℓ(k) F_0*(k) >_bin − δ_ℓ0 S,     I₂ = ∫ d³x W²,

    i.e. for a pair (x₁, x₂) the line of sight is x̂₁, the point of the un-conjugated factor, and
    the pair enters as e^{-ik·(x₁−x₂)}: the convention of ``likelihood.window`` (Q_ℓ(s) with
    s = x₁ − x₂ and the line of sight x̂₁). Even ℓ do not depend on this choice; odd ℓ change
    sign with it.

    so Q_0(0) = 1 with I₂ = ∫W² (the window module's normalisation). With W = 1 the monopole is
    the periodic-box estimator |δ_k|²/V. Because Δ̄ comes from the data, the integral constraint
    arises as in a real survey (set ``subtract_mean=False`` to use the true mean 0 instead).

    ``field``: the overdensity Δ on the mesh, or, if ``nbar`` is given, the galaxy counts per cell
    from :func:`poisson_sample`; then Δ + 1 = N/(n̄ H³ W) and F = N/(n̄H³) − α W with
    α = Σ N/(n̄ H³ Σ W), and the shot noise S = Σ N /(n̄² I₂) (→ 1/n̄; subtracted from ℓ = 0 only;
    Feldman, Kaiser & Peacock 1994).
    ``window_mask``: None (W = 1, periodic box), a geometry with ``contains``, or weights on the mesh.
    ``cross``: a second field B (same conventions, its own ``nbar_cross``) for the cross spectrum
    of A = ``field`` and B, P_AB(k, μ) = <Δ_A(k) Δ_B*(k)> (the ``likelihood.tracer`` convention):
    F_ℓ from A (line of sight at A's points), F_0 from B; no shot noise is subtracted
    (independent samples).

    Odd ℓ: the bin average of F_ℓ F_0* is imaginary (k and −k pair up); the data vector stores
    Π_ℓ = Im P̂_ℓ, with P_ℓ = i Π_ℓ (``likelihood.data`` convention). For a single tracer with the
    local line of sight the odd multipoles are wide-angle effects (order 1/(kχ)).
    Bins: [k_lo, k_hi) (the last one closed), averaged over the mesh modes; ``k_eff`` = mean |k| of
    the modes; ``n_modes`` counts k and −k separately (``likelihood.data`` convention), so the
    Gaussian error of P_0 is P √(2/n_modes).
    Returns a :class:`likelihood.data.DataVector`.
    """
    if edges is None:
        raise ErgofitError("edges: expected k bin edges in h/Mpc")
    ells = _check_ells(ells)
    e = _check_edges(mesh, edges)
    w = _weights(mesh, window_mask)
    F, shot, i2 = _estimator_field(mesh, field, w, nbar, subtract_mean, "field")
    if cross is not None:
        G, _, _ = _estimator_field(mesh, cross, w, nbar_cross, subtract_mean, "cross")
        shot = 0.0
    else:
        G = F
    flat, b, kmag, khat, mult = _mode_selection(mesh, e)
    nbins = e.size - 1
    counts = np.bincount(b, weights=mult, minlength=nbins)
    if np.any(counts == 0):
        i = int(np.flatnonzero(counts == 0)[0])
        raise ErgofitError(f"edges: bin [{e[i]:.4g}, {e[i + 1]:.4g}) h/Mpc contains no Fourier mode "
                           f"of the mesh (k_f = {mesh.k_fundamental:.4g} h/Mpc); widen the bins")
    k_eff = np.bincount(b, weights=mult * kmag, minlength=nbins) / counts
    Fl = _multipole_transforms(mesh, F, ells, flat, khat)
    F0 = Fl[0] if G is F else _fft_at(mesh, G, flat)
    vals = []
    for ell in ells:
        prod = Fl[ell] * np.conj(F0)
        part = prod.imag if ell % 2 else prod.real
        p = (2 * ell + 1) / i2 * np.bincount(b, weights=mult * part, minlength=nbins) / counts
        if ell == 0:
            p = p - shot
        vals.append(p)
    meta = {"estimator": "FFT local line of sight (end point)", "mesh_n": str(mesh.n),
            "box": f"{mesh.box:.8g}", "I2": f"{i2:.10e}", "shot_noise": f"{shot:.10e}",
            "subtract_mean": str(bool(subtract_mean))}
    return DataVector(ells, e, k_eff, counts, np.array(vals), meta=meta, source="measure_multipoles")


def _estimator_field(mesh, field, w, nbar, subtract_mean, name):
    d = _check_real_field(mesh, field, name)
    rdt = mesh.real_dtype
    h3 = mesh.cell ** 3
    wsum = float(np.sum(w, dtype=float)) if w is not None else float(mesh.n ** 3)
    i2 = h3 * (float(np.sum(w.astype(float) ** 2)) if w is not None else mesh.n ** 3)
    if nbar is None:
        if w is None:
            mean = float(np.mean(d, dtype=float)) if subtract_mean else 0.0
            return (d - rdt.type(mean)), 0.0, i2
        mean = float(np.sum(w * d, dtype=float)) / wsum if subtract_mean else 0.0
        return w * (d - rdt.type(mean)), 0.0, i2
    nb = _finite(nbar, "nbar")
    if nb <= 0:
        raise ErgofitError(f"nbar = {nbar!r}: expected a positive number density in (h/Mpc)^3")
    if np.any(d < 0):
        raise ErgofitError(f"{name}: with nbar given the field must be galaxy counts (>= 0)")
    ntot = float(np.sum(d, dtype=float))
    if ntot <= 0:
        raise ErgofitError(f"{name}: no galaxies in the counts mesh")
    alpha = ntot / (nb * h3 * wsum) if subtract_mean else 1.0
    ww = w if w is not None else rdt.type(1.0)
    F = d * rdt.type(1.0 / (nb * h3)) - ww * rdt.type(alpha)
    shot = ntot / (nb * nb * i2)
    return F.astype(rdt, copy=False), shot, i2


# ---------------------------------------------------------------------------------------------
# Mocks, covariance, validation
# ---------------------------------------------------------------------------------------------

def simulate_mocks(mesh, pk, A, B, F, window, edges, ells=(0, 2, 4), n_mocks=10, seed=0,
                   nbar=None, constraint=None, subtract_mean=True, k_cut=None, progress=None):
    """Draw ``n_mocks`` Gaussian mocks, observe them and measure their multipoles.

    Per mock i (random streams spawned from ``seed``, so mock i depends only on (seed, i)):
    δ_k ~ :func:`gaussian_field` (pk); if ``constraint`` (an :class:`ObserverConstraint`) is
    given, c(x_o) = ν σ_c is imposed by :func:`constrain_at_origin`; Δ_g = :func:`observed_field`
    (A, B, F); optional :func:`poisson_sample` (nbar); :func:`measure_multipoles` with the window.
    Linear-theory Gaussian mocks: see the module notes for the regime of validity.
    ``k_cut`` (h/Mpc, optional): the mock density has no power above k_cut (P = 0 there). Use it
    with Poisson sampling, where the full linear power up to the Nyquist frequency can drive
    1 + Δ < 0 in many cells; keep k_cut well above the last bin (the window mixes modes over a
    few k_f, so the measured bins near k_cut then lack the leakage from k > k_cut).
    Returns (list of DataVector, MockCovariance); the covariance is the unbiased sample covariance
    of the flat (ℓ-major) vectors.
    """
    ells = _check_ells(ells)
    e = _check_edges(mesh, edges)
    n = int(n_mocks)
    if n < 1 or n != n_mocks:
        raise ErgofitError(f"n_mocks = {n_mocks!r}: expected a positive integer")
    if constraint is not None and not isinstance(constraint, ObserverConstraint):
        raise ErgofitError(f"constraint = {constraint!r}: expected an ObserverConstraint or None")
    w = _weights(mesh, window, "window")
    _extent_warning(mesh, w)
    p = _fourier_array(mesh, pk, "pk")
    if k_cut is not None:
        kc = _finite(k_cut, "k_cut")
        if kc <= e[-1]:
            raise ErgofitError(f"k_cut = {k_cut!r}: must exceed the last bin edge k_max = "
                               f"{e[-1]:.4g} h/Mpc")
        p = np.where(mesh.kmag() <= kc, p, 0.0)
    a = _fourier_array(mesh, A, "A")
    bk = None if B is None else _fourier_array(mesh, B, "B")
    c_value = None
    if constraint is not None:
        sig = constraint_sigma(mesh, p, constraint.kernel)
        kern = _fourier_array(mesh, constraint.kernel, "constraint kernel")
        c_value = constraint.nu * sig
    mocks = []
    max_clip = 0.0
    for i, child in enumerate(np.random.SeedSequence(seed).spawn(n)):
        s_field, s_poisson = child.spawn(2)
        dk = gaussian_field(mesh, p, s_field)
        if constraint is not None:
            dk, _, _ = constrain_at_origin(mesh, dk, kern, c_value, p)
        gal = observed_field(mesh, dk, a, bk, F)
        del dk
        if nbar is not None:
            gal, frac = _poisson(mesh, gal, nbar, w, s_poisson)
            max_clip = max(max_clip, frac)
        dv = measure_multipoles(mesh, gal, w, e, ells, nbar=nbar, subtract_mean=subtract_mean)
        dv.meta.update({"mock": str(i), "seed": str(seed)})
        if constraint is not None:
            dv.meta.update({"constraint": constraint.name, "nu_obs": f"{constraint.nu:.8g}"})
        mocks.append(dv)
        if progress is not None:
            progress(i + 1, n)
    _clip_warning(max_clip, stacklevel=3)  # once for the set (largest fraction over the mocks)
    x = np.array([m.flat for m in mocks])
    cov = np.cov(x, rowvar=False, ddof=1) if n > 1 else np.zeros((x.shape[1],) * 2)
    return mocks, MockCovariance(np.atleast_2d(cov), n)


def validate(mocks, model, covariance=None, plot=None):
    """Compare the mean of mock data vectors with a model: χ² per multipole and in total.

    χ² = (x̄ − m)ᵀ (C/N)⁻¹ (x̄ − m) with x̄ the mean of the N mocks. If ``covariance`` (of one
    mock) is given, χ² follows a χ² law with p dof (p-value from scipy.stats.chi2). If not, C is
    the sample covariance of the same mocks and T² = χ² follows Hotelling's law:
    T² (N − p)/(p (N − 1)) ~ F(p, N − p) (Hotelling 1931), used for the p-value.
    ``model``: a DataVector or an array of shape (n_ell, n_bins) of the *expected measurement*
    (window-convolved, bin-averaged), supplied by the caller. ``plot``: optional path of a PNG
    with the residuals (x̄ − m)/σ_mean per ℓ against k.
    Returns a dict: {"ells", "chi2": {ℓ: ...}, "dof": {ℓ: ...}, "p_value": {ℓ: ...},
    "chi2_total", "dof_total", "p_value_total", "n_mocks", "plot"}.
    """
    from scipy import stats

    mocks = list(mocks)
    if len(mocks) < 2:
        raise ErgofitError(f"validate: {len(mocks)} mock(s); need at least 2")
    first = mocks[0]
    for m in mocks[1:]:
        if m.ells != first.ells or m.values.shape != first.values.shape \
                or not np.allclose(m.edges, first.edges):
            raise ErgofitError(f"validate: mock {m.source} has multipoles or k bins different from "
                               f"{first.source}")
    mv = np.asarray(model.values if hasattr(model, "values") else model, dtype=float)
    if mv.shape != first.values.shape:
        raise ErgofitError(f"validate: model has shape {mv.shape}; expected "
                           f"{first.values.shape} (multipoles {list(first.ells)} × bins)")
    x = np.array([m.flat for m in mocks])
    nm, p = x.shape
    mean = x.mean(axis=0)
    resid = mean - mv.ravel()
    if covariance is None:
        cov = np.cov(x, rowvar=False, ddof=1)
        if nm <= p:
            raise ErgofitError(f"validate: {nm} mocks for {p} data points; the sample covariance "
                               "needs more mocks than data points (or pass covariance=)")
    else:
        cov = np.asarray(getattr(covariance, "covariance", covariance), dtype=float)
        check_covariance(cov, n=p, source="validate covariance")
    nb = first.n_bins

    def stat(sl):
        c = cov[sl, sl] / nm
        r = resid[sl]
        chi2 = float(r @ np.linalg.solve(c, r))
        d = r.size
        if covariance is None:
            pv = float(stats.f.sf(chi2 * (nm - d) / (d * (nm - 1)), d, nm - d))
        else:
            pv = float(stats.chi2.sf(chi2, d))
        return chi2, d, pv

    out = {"ells": first.ells, "chi2": {}, "dof": {}, "p_value": {}, "n_mocks": nm}
    for a, ell in enumerate(first.ells):
        c2, d, pv = stat(slice(a * nb, (a + 1) * nb))
        out["chi2"][ell], out["dof"][ell], out["p_value"][ell] = c2, d, pv
    c2, d, pv = stat(slice(0, p))
    out.update(chi2_total=c2, dof_total=d, p_value_total=pv, plot=None)
    if plot is not None:
        out["plot"] = _residual_plot(first, mean, mv, np.sqrt(np.diag(cov) / nm), out, plot)
    return out


def _residual_plot(first, mean, model, err, res, path):
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    nb = first.n_bins
    fig, axes = plt.subplots(len(first.ells), 1, sharex=True,
                             figsize=(6.0, 1.9 * len(first.ells) + 0.6), squeeze=False)
    for a, ell in enumerate(first.ells):
        ax = axes[a, 0]
        sl = slice(a * nb, (a + 1) * nb)
        ax.axhspan(-1, 1, color="0.9")
        ax.axhline(0, color="0.4", lw=0.8)
        ax.plot(first.k_eff, (mean[sl] - model[a]) / err[sl], "o", ms=3.5)
        ax.set_ylabel(rf"$\Delta P_{ell}/\sigma$")
        ax.text(0.99, 0.92, rf"$\ell={ell}$: $\chi^2$ = {res['chi2'][ell]:.1f} / {res['dof'][ell]}",
                transform=ax.transAxes, ha="right", va="top", fontsize=8)
    axes[-1, 0].set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
    axes[0, 0].set_title(f"(mean of {res['n_mocks']} mocks − model) / error of the mean",
                         fontsize=9)
    fig.tight_layout()
    path = os.fspath(path)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _observer_from_settings(observer):
    """None, an ObserverConstraint, or the config's ``observer`` mapping."""
    if observer is None or isinstance(observer, ObserverConstraint):
        return observer
    if not isinstance(observer, Mapping):
        raise ConfigError(f"observer = {observer!r}: expected a mapping with keys 'field' "
                          "('potential' or 'density'), 'nu_true' and, for 'density', 'smoothing'")
    allowed = {"field", "nu_true", "nu_obs", "smoothing", "k_ir"}
    extra = set(observer) - allowed
    if extra:
        raise ConfigError(f"observer: unknown key(s) {sorted(extra)}; expected {sorted(allowed)}")
    kind = observer.get("field", "potential")
    nu = observer.get("nu_true", observer.get("nu_obs"))
    if nu is None:
        raise ConfigError("observer: missing key 'nu_true' (value of the constraint field at the "
                          "observer in units of its rms)")
    k_ir = observer.get("k_ir")
    if kind == "potential":
        return ObserverConstraint.potential(nu, k_ir=k_ir)
    if kind == "density":
        if observer.get("smoothing") is None:
            raise ConfigError("observer: field 'density' needs 'smoothing' (radius in Mpc/h, > 0)")
        return ObserverConstraint.density(nu, observer["smoothing"], k_ir=k_ir)
    raise ConfigError(f"observer field = {kind!r}: expected 'potential' or 'density'")


def simulate_from_settings(cosmo, z, tracer, effects, mesh, window, edges, ells, n_mocks, seed,
                           nbar=None, observer=None, out_dir=None, k_cut=None, progress=None):
    """Mocks of a configured survey: one data-vector file per mock plus ``covariance.txt``.

    ``cosmo`` (``likelihood.cosmology.Cosmology``) gives P(k, z); ``likelihood.tracer.kernel(cosmo,
    z, k, tracer, effects)`` gives the observed-field kernel (A, B, F) evaluated once on the mesh's
    |k|; ``window`` a geometry or mask; ``observer`` None, an :class:`ObserverConstraint`, or a
    mapping like the config's ``observer`` section {"field": "potential"|"density", "nu_true": ν,
    "smoothing": R, "k_ir": k}; ``k_cut``: see :func:`simulate_mocks`; ``progress(i, n)``: an
    optional callback after each mock.
    Files in ``out_dir`` (created): ``mock_0000.txt``, ... (the documented data-vector text format
    of ``likelihood.data``) and ``covariance.txt`` (``likelihood.data`` covariance format: header
    ``# ergofit covariance``, ``# ells:``, ``# n_bins:``, then the matrix in the ℓ-major order).
    Returns (list of DataVector, MockCovariance).
    """
    from ..theory.tracer import kernel as tracer_kernel

    try:
        zf = float(z)
    except (TypeError, ValueError):
        raise ConfigError(f"z = {z!r}: expected a redshift") from None
    if not (np.isfinite(zf) and zf >= 0):
        raise ConfigError(f"z = {z!r}: expected a finite redshift >= 0")
    constraint = _observer_from_settings(observer)
    ells = _check_ells(ells)
    e = _check_edges(mesh, edges)
    pk = mesh.on_grid(lambda k: cosmo.power(k, zf), "cosmology power")
    q = mesh.k_squared_index()
    kq = mesh.k_fundamental * np.sqrt(np.arange(1, int(q.max()) + 1, dtype=float))
    ker = tracer_kernel(cosmo, zf, kq, tracer, effects)
    tab_a = np.concatenate([[0.0], np.broadcast_to(np.asarray(ker.A, float), kq.shape)])
    tab_b = np.concatenate([[0.0], np.broadcast_to(np.asarray(ker.B, float), kq.shape)])
    if not (np.all(np.isfinite(tab_a)) and np.all(np.isfinite(tab_b))):
        raise ErgofitError("tracer kernel: A(k) or B(k) is not finite on the mesh wavenumbers")
    a, b = tab_a[q], tab_b[q]
    fval = float(np.asarray(ker.F))
    if out_dir is not None:
        out_dir = os.fspath(out_dir)
        try:
            os.makedirs(out_dir, exist_ok=True)
        except OSError as exc:
            raise ErgofitError(f"out_dir = {out_dir}: cannot create the folder ({exc})") from None
    mocks, cov = simulate_mocks(mesh, pk, a, b if np.any(b) else None, fval, window, e, ells,
                                n_mocks, seed, nbar=nbar, constraint=constraint,
                                k_cut=k_cut, progress=progress)
    for m in mocks:
        m.meta["z"] = f"{zf:.6g}"
    if out_dir is not None:
        for i, m in enumerate(mocks):
            m.save(os.path.join(out_dir, f"mock_{i:04d}.txt"))
        save_covariance(os.path.join(out_dir, "covariance.txt"), cov.covariance, ells, e.size - 1)
    return mocks, cov
