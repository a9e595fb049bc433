"""Spherical Bessel functions j_n(x) of every order n = 0..n_max at once, vectorised.

scipy.special.spherical_jn costs ~1 µs per value; the curved-sky engine needs 1e7–1e8 values
(every order J up to ~k r_max on q × r grids), so all orders are computed together by the
three-term recurrence j_{n+1} = (2n+1)/x j_n − j_{n−1} (e.g. Abramowitz & Stegun 1964, 10.1.19):

* upward from j_0 = sin x/x, j_1 = sin x/x² − cos x/x, where it is stable (n ≤ x);
* downward (Miller's algorithm) for n > x, started at n_s = x + 30 + 8 x^{1/3} (beyond which
  |j_n(x)| < 1e-16), from an arbitrary small seed, and normalised against the upward
  values at the two orders just below x (least squares over the pair, so a zero of one order
  does not spoil it).

Accuracy: |error| < 1e-12 max(|j_n|, 1e-300) relative to scipy.special.spherical_jn for
1e-2 ≤ x ≤ 1e3, n ≤ 400 (tests/curved/test_bessel.py). Arguments below 1e-2 use the leading two
terms of the power series, j_n ≈ x^n/(2n+1)!! [1 − x²/(2(2n+3))] (relative error < x⁴/40 ≤ 3e-10).
Derivatives: j_n' = j_{n−1} − (n+1) j_n/x (n ≥ 1), j_0' = −j_1, and j_n'' from the Bessel
equation, j_n'' = −2 j_n'/x − (1 − n(n+1)/x²) j_n.
"""
from __future__ import annotations

import numpy as np

__all__ = ["spherical_jn_all", "bessel_derivatives", "bessel_x_min", "bessel_order_max"]

_X_SMALL = 1e-3
_SEED = 1e-150


def _series(nmax, x):
    """Leading two terms of the power series, for small x (> 0)."""
    n = np.arange(nmax + 1)[:, None]
    # log of x^n / (2n+1)!!
    log_dfact = np.concatenate([[0.0], np.cumsum(np.log(2.0 * np.arange(1, nmax + 1) + 1.0))])
    lead = np.exp(n * np.log(x)[None, :] - log_dfact[:, None])
    return lead * (1.0 - x[None, :] ** 2 / (2.0 * (2.0 * n + 3.0)))


def spherical_jn_all(nmax, x):
    """j_n(x) for n = 0..nmax, shape (nmax + 1,) + x.shape; x > 0 (any shape)."""
    nmax = int(nmax)
    x = np.asarray(x, dtype=float)
    shape = x.shape
    xf = x.ravel()
    if xf.size and not (np.all(np.isfinite(xf)) and xf.min() > 0.0):
        raise ValueError("spherical_jn_all: x must be finite and > 0")
    small = xf < _X_SMALL
    if not np.any(small):                    # no boolean scatter of the (nmax+1, n) table
        return _recurrence(nmax, xf).reshape((nmax + 1,) + shape)
    out = np.empty((nmax + 1, xf.size))
    out[:, small] = _series(nmax, xf[small])
    big = ~small
    if np.any(big):
        out[:, big] = _recurrence(nmax, xf[big])
    return out.reshape((nmax + 1,) + shape)


def _recurrence(nmax, x):
    m = x.size
    up = np.empty((nmax + 1, m))
    s, c = np.sin(x), np.cos(x)
    up[0] = s / x
    if nmax >= 1:
        up[1] = (up[0] - c) / x
    inv = 1.0 / x
    with np.errstate(over="ignore", invalid="ignore"):
        for n in range(1, nmax):
            up[n + 1] = (2 * n + 1) * inv * up[n] - up[n - 1]
    n0 = np.floor(x).astype(np.int64)                  # upward is reliable for n <= n0
    need = n0 < nmax                                   # points needing the downward branch
    if not np.any(need):
        return up
    xd = x[need]
    n0d = n0[need]
    idx = np.flatnonzero(need)
    n_start = np.ceil(xd + 30.0 + 8.0 * np.cbrt(xd)).astype(np.int64)
    n_top = int(n_start.max())
    a = np.zeros(xd.size)    # j_{n+1} (unnormalised)
    b = np.zeros(xd.size)    # j_{n+2}
    down = np.zeros((nmax + 1, xd.size))
    invd = 1.0 / xd
    for n in range(n_top, -1, -1):
        val = (2 * n + 3) * invd * a - b
        val = np.where(n_start == n, _SEED, val)
        b, a = a, val
        if n <= nmax:
            down[n] = val
    # normalise on the orders m1 = max(n0 - 1, 0), m2 = m1 + 1 (both reliable upward values)
    m1 = np.maximum(n0d - 1, 0)
    m2 = m1 + 1
    m2c = np.minimum(m2, nmax)
    cols = np.arange(xd.size)
    u1, u2 = up[m1, idx], up[m2c, idx]
    d1, d2 = down[m1, cols], down[m2c, cols]
    if nmax == 0:
        u2 = d2 = np.zeros_like(u1)
    norm = (u1 * d1 + u2 * d2) / (d1 * d1 + d2 * d2)
    orders = np.arange(nmax + 1)[:, None]
    down *= norm[None, :]
    above = orders > n0d[None, :]
    if idx.size == m:                        # every point: blend in place (no gather/scatter)
        np.copyto(up, down, where=above)
    else:
        sub = up[:, idx]
        np.copyto(sub, down, where=above)
        up[:, idx] = sub
    return up


def bessel_derivatives(n, jm1, j, x):
    """(j_n', j_n'') from j_{n-1} (ignored for n = 0, pass j_1 there with sign handled),
    j_n and x > 0.

    n = 0: j_0' = −j_1 (pass j_1 as ``jm1``). n ≥ 1: j_n' = j_{n−1} − (n+1) j_n / x.
    j_n'' = −2 j_n'/x − (1 − n(n+1)/x²) j_n (Bessel's equation).
    """
    x = np.asarray(x, dtype=float)
    if n == 0:
        d1 = -jm1
    else:
        d1 = jm1 - (n + 1) * j / x
    d2 = -2.0 * d1 / x - (1.0 - n * (n + 1) / (x * x)) * j
    return d1, d2


# Transition-region rule (Airy/Debye asymptotics, e.g. DLMF 10.20 / Abramowitz & Stegun 9.3.23:
# J_ν(ν − τν^{1/3}) ≈ (2/ν)^{1/3} Ai(2^{1/3}τ)): below x = ν − 8 ν^{1/3}, ν = n + 1/2,
# |j_n(x)| < 2e-11 of its maximum over x (measured against scipy for n = 10–240).
_TAU = 8.0


def bessel_x_min(n):
    """Argument below which j_n(x) is negligible (< 2e-11 of max_x |j_n|); 0 for small n."""
    nu = n + 0.5
    return max(0.0, nu - _TAU * nu ** (1.0 / 3.0))


def bessel_order_max(x):
    """Largest order n with bessel_x_min(n) <= x (every higher order is negligible at x)."""
    n = int(x + _TAU * (x + 1.0) ** (1.0 / 3.0) + 2)
    while n > 0 and bessel_x_min(n) > x:
        n -= 1
    return n
