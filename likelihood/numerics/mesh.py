"""The periodic mesh and its FFT conventions (shared by the estimator and the mocks).

Conventions (shared design): distances in Mpc/h, k in h/Mpc, P in (Mpc/h)^3,
δ(k) = ∫ d³x δ(x) e^{-ik·x}, δ(x) = ∫ d³k/(2π)³ δ(k) e^{+ik·x}. On a mesh of n³ nodes, side L,
spacing H = L/n and volume V = L³ the discrete versions are

    δ_k = H³ Σ_x δ(x) e^{-ik·x}      (``H³ * rfftn``),   δ(x) = V⁻¹ Σ_k δ_k e^{+ik·x},
    <δ_k δ*_k'> = V P(k) δ^K_{kk'},

with k on the grid 2π/L × integers, |k_i| ≤ k_N = π n / L (Nyquist). Arrays in Fourier space use
the ``rfftn`` half layout (n, n, n//2 + 1).

The observer sits at a mesh node, the centre of the box, unless ``Mesh.observer`` moves it (a far
observer gives the plane-parallel limit). The line of sight is local: n̂ = x/|x| from the observer.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from ..errors import ErgofitError

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


def fourier_array(mesh, value, name):
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


def check_real_field(mesh, field, name):
    arr = np.asarray(field)
    if arr.shape != (mesh.n,) * 3:
        raise ErgofitError(f"{name}: shape {arr.shape}; expected the mesh shape {(mesh.n,) * 3}")
    if not np.all(np.isfinite(arr)):
        raise ErgofitError(f"{name}: contains NaN or inf")
    return arr.astype(mesh.real_dtype, copy=False)


def check_fourier_field(mesh, delta_k, name="delta_k"):
    arr = np.asarray(delta_k)
    if arr.shape != mesh.fourier_shape or not np.iscomplexobj(arr):
        raise ErgofitError(f"{name}: expected a complex array on the rfft layout "
                           f"{mesh.fourier_shape}, got {arr.dtype} {arr.shape}")
    return arr


def to_fourier(mesh, field):
    """δ_k = H³ Σ_x δ(x) e^{-ik·x} on the rfft layout (scipy.fft.rfftn, all cores)."""
    f = check_real_field(mesh, field, "field")
    return sfft.rfftn(f, workers=-1) * mesh.real_dtype.type(mesh.cell ** 3)


def to_real(mesh, delta_k):
    """δ(x) = V⁻¹ Σ_k δ_k e^{+ik·x} on the mesh nodes (inverse of :func:`to_fourier`)."""
    d = check_fourier_field(mesh, delta_k)
    return sfft.irfftn(d, s=(mesh.n,) * 3, workers=-1) * mesh.real_dtype.type(mesh.cell ** -3)


# ---------------------------------------------------------------------------------------------
# Gaussian random field
# ---------------------------------------------------------------------------------------------
def unit_vectors(mesh):
    """x̂, ŷ, ẑ of each node seen from the observer (0 at the observer node)."""
    x, y, z = mesh.positions()
    r = np.sqrt(x * x + y * y + z * z)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = np.where(r > 0, 1.0 / r, 0.0).astype(mesh.real_dtype)
    return x * inv, y * inv, z * inv
