"""Spherical Hankel transforms between power-spectrum and correlation-function multipoles.

Conventions (shared design; Fourier convention δ(k) = ∫ d³x δ(x) e^{-ik·x})::

    ξ_ℓ(s) = i^ℓ   ∫ k² dk/(2π²) P_ℓ(k) j_ℓ(ks)
    P_ℓ(k) = 4π (−i)^ℓ ∫ s² ds ξ_ℓ(s) j_ℓ(ks)

Odd ℓ (cross spectra): the theory passes the real number Π_ℓ with P_ℓ = i Π_ℓ. Then
ξ_ℓ = i^{ℓ+1} ∫ k² dk/(2π²) Π_ℓ j_ℓ is real, and Π_ℓ = (−i)^{ℓ+1} 4π ∫ s² ds ξ_ℓ j_ℓ. So every
array handled here is real: the sign of the transform is

    forward  (P → ξ):  (−1)^{ℓ/2}      for even ℓ,   (−1)^{(ℓ+1)/2} for odd ℓ (input Π_ℓ)
    backward (ξ → P):  (−1)^{ℓ/2}      for even ℓ,   (−1)^{(ℓ+1)/2} for odd ℓ (output Π_ℓ)

Method: FFTLog (Hamilton 2000, MNRAS 312, 257) through :func:`scipy.fft.fht`, which computes
A(y) = ∫ a(x) J_μ(xy) y dx on log-spaced grids. With j_ℓ(x) = sqrt(π/(2x)) J_{ℓ+1/2}(x)::

    ξ_ℓ(s) = phase (2π)^{-3/2} s^{-3/2} fht[k^{3/2} P_ℓ](s),       μ = ℓ + 1/2
    P_ℓ(k) = phase (2π)^{+3/2} k^{-3/2} fht[s^{3/2} ξ_ℓ](k)

The discrete transform treats its input as periodic in ln k: the grid must extend far enough on
both sides that k^{3/2} P(k) is small at the ends (see ``likelihood.observation.matrix.theory_k_grid``).
With the same ``offset``, :func:`pk_from_xi` is the exact discrete inverse of :func:`xi_from_pk`
and lands back on the original k grid.
"""
from __future__ import annotations

import numpy as np
from scipy import fft as _fft

from ..errors import ErgofitError

__all__ = ["log_step", "fftlog_offset", "ell_sign", "xi_from_pk", "pk_from_xi",
           "conjugate_grid", "FFTLogPlan"]

_TWO_PI_32 = (2.0 * np.pi) ** 1.5


def log_step(x, name="k"):
    """Return the uniform logarithmic step of the increasing grid ``x``.

    Raises ErgofitError naming ``name`` if ``x`` is not positive, increasing and log-spaced to
    a relative tolerance of 1e-6 (an FFTLog requirement).
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1 or x.size < 8:
        raise ErgofitError(f"{name} grid: expected a 1-D log-spaced array of at least 8 points, "
                           f"got shape {x.shape}")
    if not np.all(np.isfinite(x)) or np.any(x <= 0):
        raise ErgofitError(f"{name} grid: values must be finite and > 0")
    d = np.diff(np.log(x))
    dln = (np.log(x[-1]) - np.log(x[0])) / (x.size - 1)
    if dln <= 0 or np.max(np.abs(d - dln)) > 1e-6 * max(dln, 1e-300) + 1e-12:
        raise ErgofitError(f"{name} grid: must be increasing and log-spaced "
                           "(use numpy.geomspace or likelihood.observation.matrix.theory_k_grid)")
    return dln


def fftlog_offset(dln, ell):
    """Low-ringing FFTLog offset ln(k_c s_c) closest to 0 for order μ = ℓ + 1/2 (Hamilton 2000)."""
    return float(_fft.fhtoffset(dln, ell + 0.5, initial=0.0, bias=0.0))


def ell_sign(ell):
    """Real sign of the transform for multipole ℓ (see module docstring): (−1)^{⌈ℓ/2⌉}."""
    ell = int(ell)
    return -1.0 if ((ell + 1) // 2) % 2 else 1.0


def conjugate_grid(x, offset):
    """Output grid of an FFTLog from the log-spaced grid ``x`` with ``offset`` = ln(x_c y_c).

    y_j = exp(offset) / x_{n-1-j}: the output is log-spaced with the same step.
    """
    x = np.asarray(x, dtype=float)
    return np.exp(offset) / x[::-1]


def _check_ell(ell):
    if int(ell) != ell or ell < 0:
        raise ErgofitError(f"ell = {ell!r}: expected a non-negative integer multipole")
    return int(ell)


def _signed_fht(x, y, ell, offset, bias, names):
    """Shared body of both directions: y(x) on a log grid → (x', sign_ℓ x'^(-3/2) FHT[y x^(3/2)])
    on the conjugate grid x' = e^offset / x (reversed); the 2π^(3/2) factor is the caller's."""
    ell = _check_ell(ell)
    x = np.asarray(x, dtype=float)
    dln = log_step(x, names[1])
    y = np.asarray(y, dtype=float)
    if y.shape[-1] != x.size:
        raise ErgofitError(f"{names[0]}: {names[2]} has {y.shape[-1]} points along its last axis, "
                           f"{names[1]} has {x.size}")
    if offset is None:
        offset = fftlog_offset(dln, ell)
    xo = conjugate_grid(x, offset)
    a = _fft.fht(y * x ** 1.5, dln, ell + 0.5, offset=offset, bias=bias)
    return xo, ell_sign(ell) * a * xo ** -1.5


def xi_from_pk(k, pk, ell, offset=None, bias=0.0):
    """Correlation multipole ξ_ℓ(s) from the power multipole P_ℓ(k) (odd ℓ: input Π_ℓ).

    Parameters
    ----------
    k : (n,) log-spaced wavenumbers [h/Mpc]
    pk : (..., n) power multipoles [(Mpc/h)^3], transformed along the last axis
    ell : multipole order
    offset : ln(k_c s_c) of the grids; default the low-ringing offset for μ = ℓ + 1/2

    Returns
    -------
    s : (n,) log-spaced separations [Mpc/h], s_j = exp(offset) / k_{n-1-j}
    xi : (..., n) real ξ_ℓ(s) (dimensionless)
    """
    s, a = _signed_fht(k, pk, ell, offset, bias, ("xi_from_pk", "k", "pk"))
    return s, a / _TWO_PI_32


def pk_from_xi(s, xi, ell, offset=None, bias=0.0):
    """Power multipole P_ℓ(k) from the correlation multipole ξ_ℓ(s) (odd ℓ: output Π_ℓ).

    Exact discrete inverse of :func:`xi_from_pk` for the same ``offset``.

    Parameters
    ----------
    s : (n,) log-spaced separations [Mpc/h]
    xi : (..., n) correlation multipoles, transformed along the last axis
    ell : multipole order
    offset : ln(k_c s_c); default the low-ringing offset for μ = ℓ + 1/2

    Returns
    -------
    k : (n,) log-spaced wavenumbers [h/Mpc], k_j = exp(offset) / s_{n-1-j}
    pk : (..., n) real P_ℓ(k) (Π_ℓ for odd ℓ) [(Mpc/h)^3]
    """
    k, a = _signed_fht(s, xi, ell, offset, bias, ("pk_from_xi", "s", "xi"))
    return k, a * _TWO_PI_32


class FFTLogPlan:
    """:func:`xi_from_pk` on a fixed k grid with its FFTLog coefficients computed once.

    FFTLog is A = flip(irfft(rfft(a) u)) with u_m = (k_c s_c)^{-iy_m} U_μ(iy_m),
    U_μ(x) = 2^x Γ((μ+1+x)/2)/Γ((μ+1−x)/2), y_m = 2πm/(n Δ) (Hamilton 2000, eqs. 163–166,
    unbiased). Since rfft of the unit impulse is 1, u = rfft(flip(fht(e₀))): the coefficients of
    scipy.fft.fht itself, taken once, so a call is one rfft/irfft pair (the same numbers as
    :func:`xi_from_pk` to round-off; tests). ``plan(pk)`` transforms along the last axis and
    returns ξ_ℓ on ``plan.s``.
    """

    def __init__(self, k, ell, offset=None):
        ell = _check_ell(ell)
        k = np.asarray(k, dtype=float)
        dln = log_step(k, "k")
        if offset is None:
            offset = fftlog_offset(dln, ell)
        self.k, self.ell, self.offset = k, ell, float(offset)
        self.s = conjugate_grid(k, offset)
        impulse = np.zeros(k.size)
        impulse[0] = 1.0
        self._u = _fft.rfft(_fft.fht(impulse, dln, ell + 0.5, offset=offset)[::-1])
        self._pre = k ** 1.5
        self._post = ell_sign(ell) * self.s ** -1.5 / _TWO_PI_32

    def __call__(self, pk):
        a = _fft.rfft(np.asarray(pk, dtype=float) * self._pre, axis=-1)
        return _fft.irfft(a * self._u, self.k.size, axis=-1)[..., ::-1] * self._post
