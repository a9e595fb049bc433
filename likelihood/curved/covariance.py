"""Gaussian covariance of the end-point multipole estimator on the full sky, exact in linear
theory (derivation: docs/curved_covariance.md).

Harmonic form of the estimator (likelihood.curved.estimator): with the addition theorem,
F_ℓ(k) = 4π Σ_JM Y_JM(k̂) (−i)^J i^{ℓ mod 2} A^ℓ_JM(k), A^ℓ_JM(k) = Σ_i G_ℓJ(k r_i) b_i a_JM(r_i)
(b_i = ω_i r_i² w(r_i) the radial measure, G_ℓJ real, G_0J = j_J), so by the orthonormality of
the Y_JM over directions of k the reported multipole (P_ℓ for even ℓ, Π_ℓ = P_ℓ/i for odd ℓ) of
tracers X (Legendre side) and Y is

    R^XY_ℓ(k) = c_ℓ Σ_J S_J,   S_J = Σ_M A^{ℓ,X}_JM(k) A^{0,Y}_JM(k)*,   c_ℓ = (2ℓ+1) 4π/I₂.

The a_JM(r) are Gaussian with <a^X_JM(r1) a^Y*_J'M'(r2)> = δ_JJ' δ_MM' C^XY_J(r1, r2) (real,
C^XY(r1, r2) = C^YX(r2, r1)) and, the fields being real, a_J,−M = (−1)^M a*_JM, so
<a^X_JM a^Z_J'M'> = δ_JJ' δ_M,−M' (−1)^M C^XZ_J. Wick's (Isserlis') theorem then gives, the
M sums giving 2J + 1 in both pairings,

    Cov[R^XY_ℓ(k), R^ZW_ℓ'(k')] = c_ℓ c_ℓ' Σ_J (2J+1) [ M^XZ_ℓℓ'(k, k') M^YW_00(k, k')
                                                     + M^XW_ℓ0(k, k') M^YZ_0ℓ'(k, k') ],
    M^XZ_ℓℓ'(k, k') = Σ_ij G_ℓJ(k r_i) b_i C^XZ_J(r_i, r_j) b_j G_ℓ'J(k' r_j),

with C_J including the Poisson shot noise δ_XZ δ_D(r1 − r2)/(r1² n̄_X) (on the radial
quadrature δ_ij/(ω_i r_i² n̄_i)) and, for overlapping populations X ≠ Z sharing n̄_XZ objects
per volume, N_XZ δ_D(r1 − r2)/r1² with N_XZ = n̄_XZ/(n̄_X n̄_Z) (the Poisson noise of the shared
objects, common practice in the Gaussian multi-tracer covariance, e.g. the plane-parallel form
of likelihood.covariance), C_J from :class:`~likelihood.curved.estimator.NodeSpectra` =
(2/π)∫q²dq P W_J W_J (Heavens & Taylor 1995; Yoo & Desjacques 2013). Integral constraints act
on a_00(r) only on the full sky: C_0 → P C_0 Pᵀ with P = 1 − 1vᵀ (global, v ∝ b) or C_0 → 0
(radial). k bins: the covariance of the bin averages Σ_n ω_bn R(k_bn) is the double sum over
the Gauss nodes of both bins (spectra on different bins: each on its own nodes). Unlike the
expectation (smooth in k: 4 nodes per bin), the covariance of two k nodes oscillates like
cos((k − k') r) over the shell, so the nodes per bin follow :func:`covariance_resolution`
(Δk r_max/2 + 4). Full sky only: an angular mask couples M ≠ M' and is refused.

Not included: the non-Gaussian (trispectrum) and Poisson-non-Gaussian parts; the observer's
constrained field (the covariance is that of the field averaged over ν).
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from ..errors import ConfigError
from .bessel import spherical_jn_all
from .estimator import (IC_KINDS, BasisKernel, EstimatorResolution, NodeSpectra,
                        projection_rows, resolution_grids)

__all__ = ["harmonic_covariance", "spectrum_list", "covariance_resolution"]

#: at most this many Gauss nodes per k bin (the rule asks for more only when Δk r_max > 120)
MAX_K_NODES = 64


def covariance_resolution(shell, edges, resolution=EstimatorResolution()):
    """The estimator resolution with the Gauss nodes per k bin the covariance needs:
    max(k_nodes, ⌈Δk r_max/2⌉ + 4), Δk the widest bin. The node-pair covariance oscillates
    like cos((k − k') r), r ≤ r_max, so a bin of width Δk spans Δk r_max/(2π) periods; an
    n-point Gauss rule is exact to degree 2n − 1 (measured: docs/curved_covariance.md)."""
    width = float(np.max(np.diff(np.asarray(edges, dtype=float))))
    n = max(int(resolution.k_nodes), int(math.ceil(0.5 * width * shell.r_max)) + 4)
    return replace(resolution, k_nodes=min(n, MAX_K_NODES))


def spectrum_list(spectra, names):
    """[(X, Y, ells)] from ``spectra`` = [((X, Y), ells), ...]: X, Y among ``names``, distinct
    pairs, ℓ in 0..4, even ℓ only for an auto spectrum (ConfigError otherwise)."""
    out = []
    for item in spectra:
        try:
            (x, y), ells = item
            ells = tuple(int(l) for l in ells)
        except (TypeError, ValueError):
            raise ConfigError(f"spectra entry {item!r}: expected ((X, Y), ells)") from None
        if x not in names or y not in names:
            raise ConfigError(f"spectra entry ({x!r}, {y!r}): tracer not among {list(names)}")
        if not ells or len(set(ells)) != len(ells) or min(ells) < 0 or max(ells) > 4:
            raise ConfigError(f"spectra entry ({x!r}, {y!r}): ells = {ells}: expected distinct "
                              "multipoles between 0 and 4")
        if x == y and any(l % 2 for l in ells):
            raise ConfigError(f"spectra entry ({x!r}, {x!r}): odd ℓ of an auto spectrum "
                              "vanish identically; use even ℓ")
        if any((x, y) == (a, b) for a, b, _ in out):
            raise ConfigError(f"spectra: pair ({x!r}, {y!r}) is listed twice")
        out.append((x, y, ells))
    if not out:
        raise ConfigError("spectra: expected at least one ((X, Y), ells) entry")
    return out


def _noise_diag(nbar, name, ns):
    """1/(ω_i r_i² n̄(r_i)) on the radial nodes, or None without shot noise."""
    if nbar is None or nbar.get(name) is None:
        return None
    val = nbar[name]
    n = np.asarray(val(ns.r) if callable(val) else np.full(ns.r.shape, float(val)), dtype=float)
    if n.shape != ns.r.shape or not np.all(np.isfinite(n)) or np.any(n <= 0):
        raise ConfigError(f"nbar of tracer {name!r}: expected finite values > 0 on the shell")
    return 1.0 / (ns.wr * ns.r ** 2 * n)


def _edge_sets(edges, n_spectra):
    """One array of k bin edges per spectrum from ``edges`` (one array for all, or a list)."""
    try:
        one = np.asarray(edges, dtype=float)
    except ValueError:
        one = None                              # ragged: a list of arrays
    if one is not None and one.ndim == 1:
        return [one] * n_spectra
    sets = [np.asarray(e, dtype=float) for e in edges]
    if len(sets) != n_spectra or any(e.ndim != 1 or e.size < 2 or e[0] <= 0
                                     or np.any(np.diff(e) <= 0) for e in sets):
        raise ConfigError(f"edges: expected one array of increasing positive k bin edges, or "
                          f"one per spectrum ({n_spectra})")
    return sets


def _bin_nodes(ns, k_weights, nb):
    """(k nodes (n_bins n,), weights (n_bins, n)): the Gauss nodes of ``ns`` or the caller's."""
    if k_weights is None:
        return ns.k, ns.wk
    k, w = (np.asarray(a, dtype=float) for a in k_weights)
    if k.ndim != 2 or k.shape != w.shape or k.shape[0] != nb or np.any(k <= 0) \
            or np.any(w < 0) or np.any(w.sum(1) <= 0):
        raise ConfigError(f"k_weights: expected (k, weights) of shape ({nb}, n), k > 0, "
                          "weights >= 0 with a positive sum per bin")
    return k.ravel(), w / w.sum(1, keepdims=True)


def harmonic_covariance(cosmo, shell, edges, tracers, spectra, nbar=None, ic="none",
                        resolution=EstimatorResolution(), snapshot_z=None, k_weights=None,
                        cross_noise=None):
    """Gaussian covariance of the bin-averaged multipoles (module docstring).

    ``tracers``: {name: (TracerCoefficients, terms)} (the kernel at the fiducial parameters);
    ``spectra``: [((X, Y), ells), ...] (X carries the Legendre weight; odd ℓ as Π_ℓ);
    ``resolution``: the estimator's (its k_nodes raised by :func:`covariance_resolution`);
    ``nbar``: {name: n̄ [(h/Mpc)³], number or callable of r} for the shot noise (None or a
    missing name: no noise); ``edges``: the k bin edges [h/Mpc], one array for every spectrum
    or a list with one per spectrum (spectra on different bins; then no ``k_weights``);
    ``cross_noise``: {(X, Y): N_XY [(Mpc/h)³]} the shared noise n̄_XY/(n̄_X n̄_Y) of
    overlapping populations X ≠ Y (absent pairs: disjoint);
    ``ic``: none / global / radial.
    ``k_weights``: optional (k, weights), each (n_bins, n), replacing the Gauss nodes of the
    bin averages (e.g. the distinct |k| of an FFT lattice in each bin and their mode counts,
    to compare with a lattice estimator; weights normalised per bin).
    Returns the covariance of the data vector ordered spectrum by spectrum, then ℓ-major
    (n, n), (Mpc/h)⁶. Memory: 8 (J_max + 1) n_r² bytes per pair of tracers.
    """
    if ic not in IC_KINDS:
        raise ConfigError(f"ic = {ic!r}: expected one of {IC_KINDS}")
    if not isinstance(tracers, dict) or not tracers:
        raise ConfigError("tracers: expected {name: (TracerCoefficients, terms)}")
    names = list(tracers)
    specs = spectrum_list(spectra, names)
    basis = []
    for name, val in tracers.items():
        try:
            tc, terms = val
        except (TypeError, ValueError):
            raise ConfigError(f"tracers[{name!r}]: expected (TracerCoefficients, terms)") from None
        basis.append(BasisKernel(name, ((1.0, tc, tuple(terms)),)))
    sets = _edge_sets(edges, len(specs))
    groups = []                                 # the distinct edge sets, in order of use
    for e in sets:
        if not any(np.array_equal(e, g) for g in groups):
            groups.append(e)
    group_of = [next(i for i, g in enumerate(groups) if np.array_equal(e, g)) for e in sets]
    if len(groups) > 1 and k_weights is not None:
        raise ConfigError("k_weights: only with one set of k bins for every spectrum")
    res_cov = max((covariance_resolution(shell, g, resolution) for g in groups),
                  key=lambda r: r.k_nodes)
    span = groups[0] if len(groups) == 1 else np.unique(np.concatenate(groups))
    ns = NodeSpectra(cosmo, shell, span, basis, resolution=res_cov, snapshot_z=snapshot_z)
    nt, nr = len(names), ns.r.size
    pairs = [(a, b) for a in range(nt) for b in range(a, nt)]
    c_l = ns.spectra(ns.j_max, pairs)
    noise = [_noise_diag(nbar, n, ns) for n in names]
    for (x, y), amp in (cross_noise or {}).items():
        if x not in names or y not in names or x == y or not np.isfinite(amp) or amp < 0:
            raise ConfigError(f"cross_noise[({x!r}, {y!r})] = {amp!r}: expected two different "
                              f"tracers among {names} and a finite value >= 0")
    shared = {(names.index(x), names.index(y)): float(amp)
              for (x, y), amp in (cross_noise or {}).items()}
    v = ns.base / ns.base.sum()
    proj = np.eye(nr) - np.outer(np.ones(nr), v)
    ells = sorted({l for _, _, e in specs for l in e} | {0})
    if len(groups) == 1:
        nodes = [_bin_nodes(ns, k_weights, groups[0].size - 1)]
    else:    # each set's Gauss nodes, by the rule of the NodeSpectra grids (same k_max, J_max)
        nodes = [resolution_grids(shell, g, res_cov)[3] for g in groups]
    k_nodes = np.concatenate([k for k, _ in nodes])
    jk = spherical_jn_all(ns.j_max + max(ells) + 1, k_nodes[:, None] * ns.r[None, :])
    n_k = k_nodes.size
    # node-level covariance blocks, per (spectrum s, ℓ of s, spectrum t, ℓ of t)
    blocks = {(s, la, t, lb): np.zeros((n_k, n_k)) for s, (_, _, ea) in enumerate(specs)
              for t, (_, _, eb) in enumerate(specs) if t >= s for la in ea for lb in eb}
    idx = {n: i for i, n in enumerate(names)}
    for J in range(ns.j_max + 1):
        if J == 0 and ic == "radial":
            continue                 # a_00(r) removed at every distance
        rows = projection_rows(J, ells, jk, ns.base)
        L = np.concatenate([rows[l] for l in ells])                          # (n_l n_k, n_r)
        M = {}
        for a, b in pairs:
            c = c_l[a, b][J]
            if a == b and noise[a] is not None:
                c = c + np.diag(noise[a])
            amp = shared.get((a, b), shared.get((b, a), 0.0))
            if a != b and amp > 0:
                c = c + np.diag(amp / (ns.wr * ns.r ** 2))
            if J == 0 and ic == "global":
                c = proj @ c @ proj.T
            m = (L @ c @ L.T).reshape(len(ells), n_k, len(ells), n_k)
            M[a, b] = m
            M[b, a] = m.transpose(2, 3, 0, 1)
        i0 = ells.index(0)
        for (s, la, t, lb), blk in blocks.items():
            x, y, _ = specs[s]
            z, w, _ = specs[t]
            X, Y, Z, W = idx[x], idx[y], idx[z], idx[w]
            ia, ib = ells.index(la), ells.index(lb)
            blk += (2 * J + 1) * (M[X, Z][ia, :, ib] * M[Y, W][i0, :, i0]
                                  + M[X, W][ia, :, i0] * M[Y, Z][i0, :, ib])
    i2 = 4.0 * np.pi * float(np.sum(ns.wr * ns.r ** 2 * ns.weight ** 2))
    avg, start = [], 0                      # bin averages over each edge set's k nodes
    for k, wk in nodes:
        nb, per = wk.shape[0], k.size // wk.shape[0]
        a = np.zeros((nb, n_k))
        for b in range(nb):
            a[b, start + b * per:start + (b + 1) * per] = wk[b]
        avg.append(a)
        start += k.size
    nbs = [sets[s].size - 1 for s in range(len(specs))]
    off = np.concatenate([[0], np.cumsum([len(e) * n for (_, _, e), n in zip(specs, nbs)])])
    cov = np.zeros((off[-1], off[-1]))
    for (s, la, t, lb), blk in blocks.items():
        fac = (2 * la + 1) * (2 * lb + 1) * (4.0 * np.pi / i2) ** 2
        r0 = off[s] + specs[s][2].index(la) * nbs[s]
        c0 = off[t] + specs[t][2].index(lb) * nbs[t]
        val = fac * avg[group_of[s]] @ blk @ avg[group_of[t]].T
        cov[r0:r0 + nbs[s], c0:c0 + nbs[t]] = val
        cov[c0:c0 + nbs[t], r0:r0 + nbs[s]] = val.T
    return cov
