"""The observation operator: window convolution, integral constraint and k binning, as ONE matrix.

Data vector (ℓ-major): d = [P̂_ℓ0(bin 0..n−1), P̂_ℓ1(bin 0..n−1), ...] = M · t, with the theory
t = [P_ℓ'0(k_theory), P_ℓ'1(k_theory), ...] on the fine log-spaced grid of :func:`theory_k_grid`.
Odd ℓ carry the real Π_ℓ (P_ℓ = i Π_ℓ), see ``likelihood.numerics.hankel``.

Window convolution (Wilson, Peacock, Taylor & de la Torre 2017, MNRAS 464, 3121)
----------------------------------------------------------------------------------
With the end-point line of sight of the Yamamoto estimator and the local plane-parallel
expansion ξ(s, μ) = Σ_ℓ' ξ_ℓ'(s) L_ℓ'(μ) at each line-of-sight point, averaging
<F_ℓ(k) F*(k)>/I₂ over k̂ and using L_ℓ L_ℓ' = Σ_L (2L+1) (ℓ ℓ' L; 0 0 0)² L_L gives

    P̂_ℓ(k) = 4π (−i)^ℓ ∫ s² ds j_ℓ(ks) ξ̂_ℓ(s),
    ξ̂_ℓ(s) = Σ_{ℓ',L} (2ℓ+1) (ℓ ℓ' L; 0 0 0)² ξ_ℓ'(s) Q_L(s),

with Q_L the window multipoles of ``likelihood.observation.window`` (L ≤ 8; terms with L > 8, needed only
when ℓ + ℓ' > 8, are dropped with a warning). The only approximation is the plane-parallel
expansion of the correlation function about the line-of-sight point; wide-angle corrections
(order s/r) are NOT included: they matter at the lowest k (k r ≲ a few) and for odd multipoles.

Global integral constraint (Peacock & Nicholson 1991; Beutler et al. 2014;
de Mattia & Ruhlmann-Kleider 2019)
-----------------------------------
The measured field is F = W (δ − δ̄) with δ̄ = ∫Wδ / ∫W, so
<F₁F₂> = W₁W₂ [ξ₁₂ − c(x₁) − c(x₂) + C], c(x) = ∫W₃ ξ(x − x₃)/N, C = ∫∫W₃W₄ξ₃₄/N², N = ∫W.
The global form replaces c(x) by its window average C (exact for the mean, not position by
position), leaving W₁W₂(ξ₁₂ − C). A constant C in ξ̂ transforms like the window itself:
P̂_ℓ^C(k) = C W²_ℓ(k) with W²_ℓ(k) = 4π (−i)^ℓ ∫ s² Q_ℓ(s) j_ℓ(ks) ds; and C = P̂_0^conv(0) I₂/N²,
I₂/N² = 1/W²_0(0). Hence

    P̂_ℓ^IC(k) = P̂_ℓ^conv(k) − P̂_0^conv(0) W²_ℓ(k) / W²_0(0),   P̂_0^conv(0) = 4π ∫ s² ξ̂_0(s) ds,

which is linear in the theory and is folded into the same matrix. ``ic="radial"`` (mean per
redshift shell) is reserved and not implemented.

Binning: each bin is the mode average ∫ k² P̂ dk / ∫ k² dk over the bin (continuous-shell
approximation of the discrete modes), by Gauss–Legendre on a cubic spline in ln k.
"""
from __future__ import annotations

import hashlib
import os
import warnings
from dataclasses import dataclass
from math import factorial

import numpy as np
from scipy.interpolate import CubicSpline

from ..numerics import hankel
from ..errors import ConfigError, DataError, ErgofitError
from ..io import cache_folder, open_atomic
from .window import N_ELL, WindowMultipoles

__all__ = ["wigner3j_zero_sq", "coupling_coefficients", "KBins", "theory_k_grid",
           "grid_taper", "WindowMatrix"]

_CACHE_VERSION = "2"
_BIAS_BACK = -0.5      # FFTLog bias of ξ̂ → P̂ (suppresses the k^{-3/2} aliasing mode at low k)
_TAPER_DECADES = 1.0   # cosine taper of the theory over the first and last decade of the grid


def grid_taper(k, decades=_TAPER_DECADES):
    """Smooth taper applied to the theory before the transforms: 1 inside, → 0 at both ends.

    T = ¼ [1 − cos(π x_lo)] [1 − cos(π x_hi)], x_lo = clip(log10(k/k_min)/decades, 0, 1),
    x_hi = clip(log10(k_max/k)/decades, 0, 1). It makes k^{3/2} P periodic-friendly for the
    FFTLog even for steep infrared spectra (f_NL, potential terms ∝ k^{-3}). The removed
    infrared modes (k < 10 k_min) enter P̂ only as a constant in ξ, i.e. a term ∝ W²_ℓ(k) that
    the global integral constraint cancels exactly; without IC they are the infrared cut-off.
    """
    k = np.asarray(k, dtype=float)
    lo = np.clip(np.log10(k / k[0]) / decades, 0.0, 1.0)
    hi = np.clip(np.log10(k[-1] / k) / decades, 0.0, 1.0)
    return 0.25 * (1.0 - np.cos(np.pi * lo)) * (1.0 - np.cos(np.pi * hi))


def wigner3j_zero_sq(l1, l2, l3):
    """(l1 l2 l3; 0 0 0)² from the closed form (e.g. Edmonds 1957, eq. 3.7.17).

    Zero unless J = l1 + l2 + l3 is even and the triangle condition holds; then with g = J/2
    (l1 l2 l3; 000) = (−1)^g sqrt[(J−2l1)!(J−2l2)!(J−2l3)!/(J+1)!] g!/((g−l1)!(g−l2)!(g−l3)!).
    """
    l1, l2, l3 = int(l1), int(l2), int(l3)
    J = l1 + l2 + l3
    if J % 2 or l3 > l1 + l2 or l3 < abs(l1 - l2) or min(l1, l2, l3) < 0:
        return 0.0
    g = J // 2
    num = factorial(J - 2 * l1) * factorial(J - 2 * l2) * factorial(J - 2 * l3)
    pre = factorial(g) / (factorial(g - l1) * factorial(g - l2) * factorial(g - l3))
    return float(num) / factorial(J + 1) * pre * pre


def coupling_coefficients(ell, ell_p, lmax=N_ELL - 1):
    """Array c_L = (2ℓ+1)(ℓ ℓ' L; 0 0 0)², L = 0..lmax: ξ̂_ℓ = Σ_ℓ' ξ_ℓ' Σ_L c_L Q_L."""
    return np.array([(2 * ell + 1) * wigner3j_zero_sq(ell, ell_p, L) for L in range(lmax + 1)])


# ----------------------------------------------------------------------------------------------
@dataclass
class KBins:
    """k bins [h/Mpc]: edges (n+1,), mode-weighted k_eff (n,), number of modes n_modes (n,).

    n_modes counts Fourier modes with k and −k separately: V 4π ∫k² dk/(2π)³ = V (k₂³−k₁³)/(6π²),
    so the Gaussian error of a monopole is P sqrt(2/n_modes) (None without a volume).
    """
    edges: np.ndarray
    k_eff: np.ndarray
    n_modes: np.ndarray | None = None

    @classmethod
    def from_edges(cls, edges, volume=None):
        """Bins from their edges; k_eff = ∫k³dk/∫k²dk = (3/4)(k₂⁴−k₁⁴)/(k₂³−k₁³)."""
        e = np.asarray(edges, dtype=float)
        if e.ndim != 1 or e.size < 2 or not np.all(np.isfinite(e)) or e[0] <= 0 \
                or np.any(np.diff(e) <= 0):
            raise DataError(f"k bin edges {np.array2string(e, threshold=6)}: expected >= 2 "
                            "increasing positive values in h/Mpc")
        a, b = e[:-1], e[1:]
        k_eff = 0.75 * (b ** 4 - a ** 4) / (b ** 3 - a ** 3)
        n_modes = None
        if volume is not None:
            v = float(volume)
            if not (v > 0 and np.isfinite(v)):
                raise DataError(f"volume = {volume!r}: expected a positive volume in (Mpc/h)^3")
            n_modes = v * (b ** 3 - a ** 3) / (6.0 * np.pi ** 2)
        return cls(e, k_eff, n_modes)

    @property
    def n(self):
        """Number of bins."""
        return self.edges.size - 1

    def averaging_matrix(self, k_fine):
        """(n_bins, n_fine) matrix A with A @ p = mode averages of p sampled on ``k_fine``.

        p is interpolated by a cubic spline in ln k; each bin is integrated exactly in the
        spline pieces with 6-point Gauss–Legendre in u = ln k (weight e^{3u}).
        """
        k = np.asarray(k_fine, dtype=float)
        if k.ndim != 1 or k.size < 4 or np.any(np.diff(k) <= 0) or k[0] <= 0:
            raise DataError("k_fine: expected an increasing positive grid of >= 4 points")
        if self.edges[0] < k[0] * (1 - 1e-12) or self.edges[-1] > k[-1] * (1 + 1e-12):
            raise DataError(f"k bins [{self.edges[0]:.4g}, {self.edges[-1]:.4g}] h/Mpc extend "
                            f"beyond the theory grid [{k[0]:.4g}, {k[-1]:.4g}]; widen the grid")
        u = np.log(k)
        x, w = np.polynomial.legendre.leggauss(6)
        nodes, weights, rows = [], [], []
        for i, (a, b) in enumerate(zip(np.log(self.edges[:-1]), np.log(self.edges[1:]))):
            brk = np.concatenate([[a], u[(u > a) & (u < b)], [b]])
            lo, hi = brk[:-1, None], brk[1:, None]
            un = 0.5 * (lo + hi) + 0.5 * (hi - lo) * x
            wn = 0.5 * (hi - lo) * w * np.exp(3 * un)
            norm = (np.exp(3 * b) - np.exp(3 * a)) / 3.0
            nodes.append(un.ravel())
            weights.append(wn.ravel() / norm)
            rows.append(np.full(un.size, i))
        nodes, weights, rows = map(np.concatenate, (nodes, weights, rows))
        basis = CubicSpline(u, np.eye(k.size))(np.clip(nodes, u[0], u[-1]))  # (n_nodes, n)
        A = np.zeros((self.n, k.size))
        np.add.at(A, rows, weights[:, None] * basis)
        return A

    def average(self, k_fine, p_fine):
        """Mode-averaged values of p (..., n_fine) sampled on k_fine: shape (..., n_bins)."""
        p = np.asarray(p_fine, dtype=float)
        if p.shape[-1] != np.size(k_fine):
            raise DataError(f"average: p has {p.shape[-1]} points, k_fine has {np.size(k_fine)}")
        return p @ self.averaging_matrix(k_fine).T


def theory_k_grid(k_min=1e-6, k_max=1e3, n=1316):
    """Fine log-spaced k grid [h/Mpc] on which the theory multipoles are evaluated.

    The defaults (≈ 146 points per decade over 9 decades) give FFTLog transforms whose
    window-convolved, binned result changes by < 1e-3 (relative) when the density or the range of
    the grid is halved or doubled, for windows of R ~ 500–3000 Mpc/h and data k in ~1e-3–0.3 h/Mpc
    (tests/observation/test_window_matrix.py). The wide upper range matters for red spectra: with f_NL ≠ 0 or
    the potential term the theory rises as k^(n_s−3..4) at small k, and a grid ending at
    k = 10 h/Mpc aliases that large-s correlation back onto small s (1–3 % errors in P̂_0 at
    f_NL = 100; checked against direct quadrature in tests/observation/test_window_matrix.py).
    """
    try:
        k_min, k_max, n = float(k_min), float(k_max), int(n)
    except (TypeError, ValueError):
        raise ConfigError("theory_k_grid: k_min, k_max must be numbers and n an integer") from None
    if not (0 < k_min < k_max) or n < 64:
        raise ConfigError(f"theory_k_grid: need 0 < k_min < k_max and n >= 64 "
                          f"(got k_min={k_min}, k_max={k_max}, n={n})")
    return np.geomspace(k_min, k_max, n)


# ----------------------------------------------------------------------------------------------
def _as_multipoles(window):
    if window is None or isinstance(window, WindowMultipoles):
        return window
    if hasattr(window, "multipoles"):
        return window.multipoles()
    raise ConfigError(f"window = {window!r}: expected WindowMultipoles, an analytic geometry "
                      "(SphereWindow, ShellWindow, CapShellWindow) or None")


def _ells(name, ells):
    try:
        out = tuple(int(l) for l in np.atleast_1d(ells))
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {ells!r}: expected a list of multipoles such as [0, 2, 4]") \
            from None
    if not out or any(l < 0 for l in out) or len(set(out)) != len(out):
        raise ConfigError(f"{name} = {ells!r}: expected distinct non-negative multipoles")
    return out


class WindowMatrix:
    """Linear observation operator from theory multipoles to the binned data vector.

    Parameters
    ----------
    k_theory : (n_k,) log-spaced theory grid [h/Mpc] (:func:`theory_k_grid`; any increasing
        grid when window is None)
    ells_theory : theory multipoles ℓ' (rows of ``p_theory``)
    bins : KBins of the data (same bins for every ℓ)
    ells_out : data multipoles ℓ
    window : WindowMultipoles, an analytic geometry, or None (pure mode-averaged binning)
    ic : "none" or "global" (integral constraint; "radial" is reserved)
    cache_dir : folder of the on-disk cache (default $XDG_CACHE_HOME/ergofit or ~/.cache/ergofit);
        ``cache=False`` disables it

    Attributes
    ----------
    matrix : (len(ells_out) n_bins, len(ells_theory) n_k)
    k_support : (k_lo, k_hi) data k range [h/Mpc] the grids and the window table support
    """

    def __init__(self, k_theory, ells_theory, bins, ells_out, window=None, ic="none",
                 cache_dir=None, cache=True):
        self.k_theory = np.asarray(k_theory, dtype=float)
        self.ells_theory = _ells("ells_theory", ells_theory)
        self.ells_out = _ells("ells_out", ells_out)
        if not isinstance(bins, KBins):
            raise ConfigError("bins: expected a KBins (KBins.from_edges(edges))")
        self.bins = bins
        if ic not in ("none", "global", "radial"):
            raise ConfigError(f"ic = {ic!r}: expected 'none' or 'global'")
        if ic == "radial":
            raise ConfigError("ic = 'radial' (mean per redshift shell) is not available yet; "
                              "use 'global' or 'none'")
        self.ic = ic
        self.window = _as_multipoles(window)
        if self.window is None:
            if ic != "none":
                raise ConfigError(f"ic = {ic!r} needs a window (the mean is estimated inside it);"
                                  " give window=... or use ic='none'")
            missing = [l for l in self.ells_out if l not in self.ells_theory]
            if missing:
                raise ConfigError(f"ells_out {missing} not in ells_theory {self.ells_theory}: "
                                  "without a window the operator only bins each multipole")
            k = self.k_theory
            if k.ndim != 1 or k.size < 4 or np.any(np.diff(k) <= 0) or k[0] <= 0:
                raise ConfigError("k_theory: expected an increasing positive grid")
            self.k_support = (float(k[0]), float(k[-1]))
        else:
            self._dln = hankel.log_step(self.k_theory, "k_theory")
            k = self.k_theory
            lo, hi = 100.0 * k[0], k[-1] / 20.0
            if self.window.truncated:
                lo = max(lo, 10.0 / self.window.s_max)
            self.k_support = (float(lo), float(hi))
            r_scale = 0.5 * self.window.s_max
            if bins.edges[0] * r_scale < 10.0:
                warnings.warn(f"window convolution is plane-parallel about the end point: at "
                              f"k = {bins.edges[0]:.3g} h/Mpc, k r ~ {bins.edges[0] * r_scale:.2g}"
                              " < 10 for the window size, so wide-angle corrections of order "
                              "1/(k r) (not included) can matter there; raise data.k_min to "
                              f"{10.0 / r_scale:.2g} h/Mpc to stay where the convolution holds, "
                              "or keep it and read the README's regime of validity",
                              stacklevel=2)
            if max(self.ells_out) + max(self.ells_theory) > N_ELL - 1:
                warnings.warn(f"window convolution: terms with window multipoles L > {N_ELL - 1} "
                              f"(needed for ℓ + ℓ' > {N_ELL - 1}) are neglected", stacklevel=2)
        e = bins.edges
        if e[0] < self.k_support[0] * (1 - 1e-9) or e[-1] > self.k_support[1] * (1 + 1e-9):
            raise DataError(f"data k range [{e[0]:.4g}, {e[-1]:.4g}] h/Mpc is outside the range "
                            f"[{self.k_support[0]:.4g}, {self.k_support[1]:.4g}] supported by the "
                            "theory grid and window: widen theory_k_grid (k_min/k_max), tabulate "
                            "the window to larger s, or cut the data")
        self._setup()
        self._cache_dir, self._cache = cache_dir, cache
        self._matrix = None

    @property
    def matrix(self):
        """(len(ells_out) n_bins, len(ells_theory) n_k) operator; built (or read from the disk
        cache) on first use."""
        if self._matrix is None:
            self._matrix = self._cached_matrix(self._cache_dir, self._cache)
        return self._matrix

    # -- internal pieces shared by the matrix and the direct evaluation -------------------------
    def _setup(self):
        self._avg = self.bins.averaging_matrix(self.k_theory)
        if self.window is None:
            return
        k, dln = self.k_theory, self._dln
        self._taper = grid_taper(k)
        self._off, self._s, self._C, self._W2 = {}, {}, {}, {}
        for l in self.ells_out:
            off = hankel.fftlog_offset(dln, l)
            s = hankel.conjugate_grid(k, off)
            Q = self.window.evaluate(s)                                           # (9, n)
            self._off[l], self._s[l] = off, s
            for lp in self.ells_theory:
                c = coupling_coefficients(l, lp)
                self._C[l, lp] = c @ Q
            if self.ic == "global":
                self._W2[l] = hankel.pk_from_xi(s, Q[l], l, offset=off, bias=_BIAS_BACK)[1]
        if self.ic == "global":
            if 0 in self._s:
                s0 = self._s[0]
            else:
                s0 = hankel.conjugate_grid(k, hankel.fftlog_offset(dln, 0))
                self._off[0], self._s[0] = hankel.fftlog_offset(dln, 0), s0
                for lp in self.ells_theory:
                    self._C[0, lp] = coupling_coefficients(0, lp) @ self.window.evaluate(s0)
            q0 = self.window(s0, 0)
            self._w2_zero = 4.0 * np.pi * dln * np.sum(s0 ** 3 * q0)                # W²_0(0)

    def _xi_hat(self, p, l):
        """ξ̂_ℓ on the ℓ grid from theory p (..., n_in, n_k)."""
        xi = 0.0
        for i, lp in enumerate(self.ells_theory):
            xi = xi + self._C[l, lp] * hankel.xi_from_pk(
                self.k_theory, p[..., i, :] * self._taper, lp, offset=self._off[l])[1]
        return xi

    def convolve_unbinned(self, p_theory):
        """Window-convolved (and IC-corrected) multipoles on k_theory: shape (..., n_out, n_k).

        The same operator as :attr:`matrix` before binning, evaluated directly.
        """
        p = self._check_theory(p_theory)
        if self.window is None:
            return np.stack([p[..., self.ells_theory.index(l), :] for l in self.ells_out], -2)
        out = []
        p0 = None
        if self.ic == "global":
            s0 = self._s[0]
            p0 = 4.0 * np.pi * self._dln * np.sum(s0 ** 3 * self._xi_hat(p, 0), axis=-1)
        for l in self.ells_out:
            ph = hankel.pk_from_xi(self._s[l], self._xi_hat(p, l), l, offset=self._off[l],
                                   bias=_BIAS_BACK)[1]
            if p0 is not None:
                ph = ph - p0[..., None] * self._W2[l] / self._w2_zero
            out.append(ph)
        return np.stack(out, axis=-2)

    def convolve_direct(self, p_theory):
        """Binned data vector from p_theory (..., n_in, n_k) by direct evaluation (no matrix)."""
        ph = self.convolve_unbinned(p_theory)
        binned = ph @ self._avg.T                                            # (..., n_out, n_b)
        return binned.reshape(binned.shape[:-2] + (-1,))

    def _build(self):
        n_k, n_b = self.k_theory.size, self.bins.n
        n_in, n_out = len(self.ells_theory), len(self.ells_out)
        M = np.zeros((n_out * n_b, n_in * n_k))
        if self.window is None:
            for o, l in enumerate(self.ells_out):
                i = self.ells_theory.index(l)
                M[o * n_b:(o + 1) * n_b, i * n_k:(i + 1) * n_k] = self._avg
            return M
        eye = np.eye(n_k)
        fwd = {}
        for l in set(self.ells_out) | ({0} if self.ic == "global" else set()):
            for lp in self.ells_theory:  # forward transforms, columns = basis vectors
                fwd[l, lp] = hankel.xi_from_pk(self.k_theory, eye, lp,
                                               offset=self._off[l])[1].T * self._taper
        if self.ic == "global":
            s0 = self._s[0]
            ic_row = {lp: (4.0 * np.pi * self._dln * s0 ** 3 * self._C[0, lp]) @ fwd[0, lp]
                      for lp in self.ells_theory}
        for o, l in enumerate(self.ells_out):
            inv = hankel.pk_from_xi(self._s[l], eye, l, offset=self._off[l],
                                    bias=_BIAS_BACK)[1].T                          # (n_k, n_s)
            B = self._avg @ inv                                                    # (n_b, n_s)
            if self.ic == "global":
                w2b = self._avg @ self._W2[l] / self._w2_zero
            for i, lp in enumerate(self.ells_theory):
                blk = (B * self._C[l, lp]) @ fwd[l, lp]
                if self.ic == "global":
                    blk -= np.outer(w2b, ic_row[lp])
                M[o * n_b:(o + 1) * n_b, i * n_k:(i + 1) * n_k] = blk
        return M

    def white_noise_response(self):
        """Data vector of a unit white-noise monopole (P(k) = 1, e.g. shot noise per 1/n̄).

        Convolving a constant with the window normalised by I₂ returns the constant in ℓ = 0 and
        zero in ℓ > 0 (end-point line of sight, ∫|W̃|² d³k/(2π)³ = I₂); the global integral
        constraint then subtracts P̂_0(0) W²_ℓ(k)/W²_0(0) = W²_ℓ(k)/W²_0(0)
        (Peacock & Nicholson 1991; see the module docstring).
        """
        n_b = self.bins.n
        out = np.zeros(len(self.ells_out) * n_b)
        for o, l in enumerate(self.ells_out):
            if l == 0:
                out[o * n_b:(o + 1) * n_b] = 1.0
            if self.window is not None and self.ic == "global":
                out[o * n_b:(o + 1) * n_b] -= self._avg @ self._W2[l] / self._w2_zero
        return out

    # -- cache ----------------------------------------------------------------------------------
    def cache_key(self):
        """sha256 of everything the matrix depends on."""
        h = hashlib.sha256()
        h.update(_CACHE_VERSION.encode())
        h.update(self.k_theory.tobytes())
        h.update(repr((self.ells_theory, self.ells_out, self.ic)).encode())
        h.update(self.bins.edges.tobytes())
        h.update(b"none" if self.window is None else self.window.fingerprint())
        return h.hexdigest()

    def _cached_matrix(self, cache_dir, cache):
        shape = (len(self.ells_out) * self.bins.n, len(self.ells_theory) * self.k_theory.size)
        if not cache:
            return self._build()
        cache_dir = cache_folder(cache_dir)
        key = self.cache_key()
        path = os.path.join(os.fspath(cache_dir), f"window-matrix-{key[:24]}.npz")
        if os.path.isfile(path):
            try:
                with np.load(path) as f:
                    if str(f["key"]) == key and f["matrix"].shape == shape:
                        return np.array(f["matrix"])
            except (OSError, ValueError, KeyError, EOFError):
                pass  # unreadable cache entry: rebuild and overwrite
        M = self._build()
        try:
            os.makedirs(cache_dir, exist_ok=True)
            open_atomic(path, lambda fh: np.savez(fh, matrix=M, key=np.array(key)), binary=True)
        except OSError as exc:
            warnings.warn(f"window matrix cache {cache_dir}: not writable ({exc}); "
                          "continuing without cache", stacklevel=3)
        self.cache_path = path
        return M

    # -- application ----------------------------------------------------------------------------
    def _check_theory(self, p_theory):
        p = np.asarray(p_theory, dtype=float)
        want = (len(self.ells_theory), self.k_theory.size)
        if p.ndim < 2 or p.shape[-2:] != want:
            raise ErgofitError(f"p_theory shape {p.shape}: expected (..., {want[0]}, {want[1]}) "
                               f"for ells_theory {list(self.ells_theory)} on k_theory")
        return p

    def __call__(self, p_theory):
        """Data vector M · t for p_theory (..., n_in, n_k): shape (..., n_out n_bins)."""
        p = self._check_theory(p_theory)
        return p.reshape(p.shape[:-2] + (-1,)) @ self.matrix.T
