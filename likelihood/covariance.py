"""Analytic Gaussian covariance of the auto and cross multipoles of several tracers.

Derivation (docs/multi_tracer.md). On a set of N Fourier modes of one k bin, k and −k counted
separately, each tracer X has δ_X(k) with δ_X(−k) = δ_X(k)^*, and
<δ_X(k) δ_Y(k')^*> = δ_kk' C_XY(k, μ),  C_XY = P_XY + N_XY  (signal plus white noise),
C_YX = C_XY^*, C_XY(−μ) = C_XY(μ)^*. The multipole estimator (FKP-style, both k and −k summed) is

    P̂_ℓ^XY = (2ℓ+1)/N Σ_k δ_X(k) δ_Y(k)^* L_ℓ(μ_k),

and Wick's theorem for Gaussian fields (the pair <δ_X(k) δ_W(q)> = δ_{k,−q} C_XW(k) brings
L_ℓ'(−μ) = (−1)^ℓ' L_ℓ'(μ)) gives, with the continuum μ average Σ_k → N ½∫dμ,

    Cov[P̂_ℓ^XY, (P̂_ℓ'^ZW)^*] = (2ℓ+1)(2ℓ'+1)/N ½∫dμ L_ℓ L_ℓ' [C_XZ C_WY + (−1)^ℓ' C_XW C_ZY].

The data vector holds the real R_ℓ = c_ℓ P̂_ℓ with c_ℓ = 1 (even ℓ) or −i (odd ℓ: Π_ℓ, P_ℓ = iΠ_ℓ),
so Cov[R_ℓ, R_ℓ'] = c_ℓ c_ℓ'^* × the line above (real by the parity of C). For one tracer and even
ℓ this is 2(2ℓ+1)(2ℓ'+1)/N ½∫dμ L_ℓ L_ℓ' (P + N)² (Grieb et al. 2016, eq. 15); for the monopole of
isotropic spectra Var[P̂_0^AB] = (C_AA C_BB + C_AB²)/N (common practice; e.g. White, Song &
Percival 2009, MNRAS 397, 1348, from memory).

Approximations (stated in the README): the covariance is diagonal in k (no window mode coupling,
the window only sets the effective volume inside N), Gaussian (no trispectrum), and the spectra
are taken at one k per bin.
"""
from __future__ import annotations

import numpy as np

from .errors import ErgofitError

_N_MU = 48          # Gauss–Legendre nodes: exact for polynomials in μ up to degree 95
_PARITY_RTOL = 1e-8


def spectra_list(spectra):
    """[(X, Y, ells)] from ``spectra`` = [((X, Y), ells), ...], validated: distinct pairs,
    distinct non-negative ℓ, even ℓ only for an auto spectrum (X = Y)."""
    out = []
    try:
        items = list(spectra)
    except TypeError:
        raise ErgofitError(f"spectra = {spectra!r}: expected a sequence of ((X, Y), ells)") from None
    if not items:
        raise ErgofitError("spectra: expected at least one ((X, Y), ells) entry")
    seen = set()
    for item in items:
        try:
            (x, y), ells = item
            ells = tuple(int(l) for l in ells)
        except (TypeError, ValueError):
            raise ErgofitError(f"spectra entry {item!r}: expected ((X, Y), ells), "
                               "e.g. (('A', 'B'), (0, 1, 2))") from None
        if not ells or len(set(ells)) != len(ells) or min(ells) < 0:
            raise ErgofitError(f"spectra entry ({x!r}, {y!r}): ells = {ells}: expected distinct "
                               "non-negative multipole orders")
        if x == y and any(l % 2 for l in ells):
            raise ErgofitError(f"spectra entry ({x!r}, {y!r}): odd ℓ requested for an auto "
                               "spectrum (it vanishes identically); use even ℓ")
        if (x, y) in seen:
            raise ErgofitError(f"spectra: pair ({x!r}, {y!r}) is listed twice")
        seen.add((x, y))
        out.append((x, y, ells))
    return out


def _noise_table(noise, tracers):
    """{(X, Y): N_XY} for all ordered pairs of ``tracers`` (symmetric, missing pairs 0)."""
    if noise is None:
        noise = {}
    if not hasattr(noise, "items"):
        raise ErgofitError(f"noise = {noise!r}: expected a dict {{(X, Y): N_XY}}")
    table = {}
    for key, val in noise.items():
        try:
            x, y = key
            v = float(val)
        except (TypeError, ValueError):
            raise ErgofitError(f"noise entry {key!r}: {val!r}: expected (X, Y): number") from None
        if x not in tracers or y not in tracers:
            raise ErgofitError(f"noise entry {key!r}: tracer not among the spectra's tracers "
                               f"{sorted(tracers)}")
        if not np.isfinite(v) or (x == y and v < 0):
            raise ErgofitError(f"noise[{key!r}] = {val!r}: expected a finite number "
                               "(>= 0 for an auto term)")
        if (y, x) in table and table[(y, x)] != v:
            raise ErgofitError(f"noise: ({x!r}, {y!r}) and ({y!r}, {x!r}) differ; white noise "
                               "is symmetric")
        table[(x, y)] = table[(y, x)] = v
    return table


def _total_power(pkmu, tracers, noise, mu, n_k):
    """C_XY(k_i, μ_j) = P_XY + N_XY for every ordered pair, from pkmu on X <= Y (tracer order)."""
    C = {}
    for i, x in enumerate(tracers):
        for y in tracers[i:]:
            try:
                p = np.asarray(pkmu(x, y, mu), dtype=complex)
            except ErgofitError:
                raise
            except Exception as exc:   # noqa: BLE001 - user callable: one line naming the pair
                raise ErgofitError(f"pkmu({x!r}, {y!r}, mu) failed: {exc}") from None
            if p.shape != (n_k, mu.size):
                raise ErgofitError(f"pkmu({x!r}, {y!r}, mu) has shape {p.shape}; expected "
                                   f"(n_k, n_mu) = ({n_k}, {mu.size})")
            if not np.all(np.isfinite(p)):
                raise ErgofitError(f"pkmu({x!r}, {y!r}, mu) contains NaN or infinite values")
            scale = max(float(np.max(np.abs(p))), 1e-300)
            # nodes are symmetric: mu[::-1] = -mu, so P(-μ) = P(μ)^* reads p[:, ::-1] = conj(p)
            if np.max(np.abs(p[:, ::-1] - np.conj(p))) > _PARITY_RTOL * scale:
                raise ErgofitError(f"pkmu({x!r}, {y!r}, mu): P_XY(-mu) != conj(P_XY(mu)); a "
                                   "power spectrum <δ_X δ_Y*> of real fields must satisfy it")
            if x == y and np.max(np.abs(p.imag)) > _PARITY_RTOL * scale:
                raise ErgofitError(f"pkmu({x!r}, {x!r}, mu): an auto spectrum must be real")
            c = p + noise.get((x, y), 0.0)
            C[(x, y)] = c
            C[(y, x)] = np.conj(c)
    return C


def multi_tracer_covariance(n_modes, spectra, pkmu, noise):
    """Gaussian covariance of the auto and cross multipoles of several tracers, diagonal in k.

    n_modes: (n_k,) number of modes per bin (k and -k counted separately, as in
    data.gaussian_covariance);
    spectra: sequence of (pair, ells), pair = (X, Y) tracer names, e.g.
    [(("A","A"), (0, 2)), (("A","B"), (0, 1, 2, 3)), (("B","B"), (0, 2))];
    pkmu: callable (X, Y, mu) -> complex array (n_k, n_mu): P_XY(k_i, mu) = <δ_X δ_Y^*>, the
    signal cross power (no noise) at the bin's k, with P_YX = conj(P_XY) and
    P_XY(-mu) = conj(P_XY(mu));
    noise: dict {(X, Y): N_XY} of white noise power: {(A, A): 1/n̄_A, ...}; missing pairs are 0
    (a shared-noise cross term (A, B) may be given).
    Returns the covariance of the data vector ordered spectrum by spectrum, then ℓ-major (all bins
    of the first ℓ, then the next), real (odd ℓ as Π_ℓ).

    Cov[R_ℓ^XY, R_ℓ'^ZW] = c_ℓ c_ℓ'^* (2ℓ+1)(2ℓ'+1)/N ½∫dμ L_ℓ L_ℓ' [C_XZ C_WY + (−1)^ℓ' C_XW C_ZY]
    with C = P + N, c_ℓ = 1 for even ℓ and −i for odd ℓ (module docstring, docs/multi_tracer.md;
    one-tracer even-ℓ limit: Grieb et al. 2016, eq. 15). The μ integral uses 48 Gauss–Legendre
    nodes (exact for spectra polynomial in μ up to degree 47 − ℓ_max).
    """
    nm = np.asarray(n_modes, dtype=float)
    if nm.ndim != 1 or nm.size == 0 or not np.all(np.isfinite(nm)) or np.any(nm <= 0):
        raise ErgofitError(f"n_modes: expected a 1-d array of positive mode counts (got shape "
                           f"{nm.shape})")
    if not callable(pkmu):
        raise ErgofitError(f"pkmu = {pkmu!r}: expected a callable (X, Y, mu) -> (n_k, n_mu) array")
    specs = spectra_list(spectra)
    tracers = []
    for x, y, _ in specs:
        tracers += [t for t in (x, y) if t not in tracers]
    N = _noise_table(noise, tracers)
    mu, wq = np.polynomial.legendre.leggauss(_N_MU)
    n_k = nm.size
    C = _total_power(pkmu, tracers, N, mu, n_k)
    l_max = max(max(e) for _, _, e in specs)
    leg = np.array([np.polynomial.legendre.Legendre.basis(l)(mu) for l in range(l_max + 1)])
    offsets = np.cumsum([0] + [len(e) * n_k for _, _, e in specs])
    cov = np.zeros((offsets[-1], offsets[-1]))
    for s, (x, y, ea) in enumerate(specs):
        for t, (z, w, eb) in enumerate(specs[:s + 1]):
            t1 = C[(x, z)] * C[(w, y)]          # (n_k, n_mu)
            t2 = C[(x, w)] * C[(z, y)]
            for a, la in enumerate(ea):
                for b, lb in enumerate(eb):
                    integrand = t1 + (-1) ** lb * t2
                    integ = 0.5 * (integrand * (wq * leg[la] * leg[lb])).sum(axis=1)
                    phase = (-1j) ** (la % 2) * (1j) ** (lb % 2)
                    block = ((2 * la + 1) * (2 * lb + 1) * phase * integ / nm).real
                    r0 = offsets[s] + a * n_k
                    c0 = offsets[t] + b * n_k
                    idx = np.arange(n_k)
                    cov[r0 + idx, c0 + idx] = block
                    cov[c0 + idx, r0 + idx] = block
    return cov
