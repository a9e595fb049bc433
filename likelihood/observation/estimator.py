"""The FFT multipole estimator on a mesh (end-point line of sight) and window masks.

Conventions: :mod:`likelihood.numerics.mesh`.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import scipy.fft as sfft

from ..checks import finite_number, increasing_array, multipole_list
from ..data import DataVector
from ..errors import ConfigError, ErgofitError
from ..numerics.mesh import check_real_field, unit_vectors

MAX_ELL = 10

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


def window_weights(mesh, window_mask_or_window, name="window_mask"):
    """None (W = 1 everywhere, periodic box), a geometry, or an array on the mesh."""
    if window_mask_or_window is None:
        return None
    if hasattr(window_mask_or_window, "contains"):
        return window_mask(mesh, window_mask_or_window)
    w = check_real_field(mesh, window_mask_or_window, name)
    if np.any(w < 0):
        raise ErgofitError(f"{name}: weights must be non-negative")
    return _check_window_fits(mesh, w, name)


def extent_warning(mesh, w):
    if w is None:
        return
    r = mesh.radius()
    rmax = float(r[w > 0].max())
    if mesh.box < 4.0 * rmax:
        warnings.warn(f"box L = {mesh.box:g} Mpc/h is less than twice the survey diameter "
                      f"({2 * rmax:.4g} Mpc/h): periodic images correlate distant survey points and "
                      "the mocks miss modes below k_f; compare with theory only for k >> "
                      f"{mesh.k_fundamental:.3g} h/Mpc", stacklevel=3)


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


def check_edges(mesh, edges):
    """Validated k bin edges [h/Mpc] that the mesh resolves (k_max <= Nyquist)."""
    e = increasing_array(edges, "edges", what="k bin edges in h/Mpc", non_negative=True)
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


def _multipole_transforms(mesh, F, ells, flat, khat, with_monopole=True):
    """F_ℓ(k) = H³ Σ_x F(x) e^{-ik·x} L_ℓ(k̂·x̂) at the selected modes, for ℓ in ``ells`` (and 0
    when ``with_monopole``)."""
    out = {0: _fft_at(mesh, F, flat)} if with_monopole else {}
    higher = sorted(l for l in ells if l > 0)
    if not higher:
        return out
    ux, uy, uz = unit_vectors(mesh)
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


def measure_multipoles(mesh, field, window_mask=None, edges=None, ells=(0, 2, 4), nbar=None,
                       subtract_mean=True, cross=None, nbar_cross=None):
    """FFT multipole estimator with the local (end-point) line of sight.

    Yamamoto-type estimator computed with FFTs (Bianchi et al. 2015; Scoccimarro 2015; spherical
    harmonic decomposition as in Hand et al. 2017):

        F(x) = W(x) [Δ(x) − Δ̄],   Δ̄ = Σ W Δ / Σ W    (mean estimated from the data),
        F_ℓ(k) = ∫ d³x F(x) e^{-ik·x} L_ℓ(k̂·x̂),      x̂ from the observer,
        P̂_ℓ(k) = (2ℓ+1)/I₂ < F_ℓ(k) F_0*(k) >_bin − δ_ℓ0 S,     I₂ = ∫ d³x W²,

    i.e. for a pair (x₁, x₂) the line of sight is x̂₁, the point of the un-conjugated factor, and
    the pair enters as e^{-ik·(x₁−x₂)}: the convention of ``likelihood.observation.window`` (Q_ℓ(s) with
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
    of A = ``field`` and B, P_AB(k, μ) = <Δ_A(k) Δ_B*(k)> (the ``likelihood.theory.tracer`` convention):
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
    ells = multipole_list(ells, "ells", max_ell=MAX_ELL)
    e = check_edges(mesh, edges)
    w = window_weights(mesh, window_mask)
    F, shot, i2 = _estimator_field(mesh, field, w, nbar, subtract_mean, "field")
    if cross is not None:
        G, _, _ = _estimator_field(mesh, cross, w, nbar_cross, subtract_mean, "cross")
        shot = 0.0
    else:
        G = F
    bins = _bins(mesh, e)
    Fl = _multipole_transforms(mesh, F, ells, bins["flat"], bins["khat"])
    F0 = Fl[0] if G is F else _fft_at(mesh, G, bins["flat"])
    vals = [_binned_multipole(Fl[ell], F0, ell, bins, i2) - (shot if ell == 0 else 0.0)
            for ell in ells]
    return _data_vector(mesh, e, ells, bins, vals, i2, shot, subtract_mean, "measure_multipoles")


def _bins(mesh, e):
    """The selected modes (``_mode_selection``), their per-bin counts and mean |k|."""
    flat, b, kmag, khat, mult = _mode_selection(mesh, e)
    nbins = e.size - 1
    counts = np.bincount(b, weights=mult, minlength=nbins)
    if np.any(counts == 0):
        i = int(np.flatnonzero(counts == 0)[0])
        raise ErgofitError(f"edges: bin [{e[i]:.4g}, {e[i + 1]:.4g}) h/Mpc contains no Fourier mode "
                           f"of the mesh (k_f = {mesh.k_fundamental:.4g} h/Mpc); widen the bins")
    k_eff = np.bincount(b, weights=mult * kmag, minlength=nbins) / counts
    return {"flat": flat, "b": b, "khat": khat, "mult": mult, "counts": counts, "k_eff": k_eff,
            "nbins": nbins}


def _binned_multipole(Fl, F0, ell, bins, i2):
    """(2ℓ+1)/I₂ <F_ℓ F_0*>_bin: real part for even ℓ, imaginary part (Π_ℓ) for odd ℓ."""
    prod = Fl * np.conj(F0)
    part = prod.imag if ell % 2 else prod.real
    return (2 * ell + 1) / i2 * np.bincount(bins["b"], weights=bins["mult"] * part,
                                            minlength=bins["nbins"]) / bins["counts"]


def _data_vector(mesh, e, ells, bins, vals, i2, shot, subtract_mean, source):
    meta = {"estimator": "FFT local line of sight (end point)", "mesh_n": str(mesh.n),
            "box": f"{mesh.box:.8g}", "I2": f"{i2:.10e}", "shot_noise": f"{shot:.10e}",
            "subtract_mean": "radial" if subtract_mean == "radial" else str(bool(subtract_mean))}
    return DataVector(ells, e, bins["k_eff"], bins["counts"], np.array(vals), meta=meta,
                      source=source)


def measure_spectra(mesh, fields, spectra, edges, window_mask=None, nbar=None,
                    subtract_mean=True):
    """Auto and cross multipoles of several tracers on one mesh, each transform computed once.

    ``fields``: {name: field} (overdensity, or counts when the tracer's n̄ is given, as in
    :func:`measure_multipoles`); ``spectra``: [((X, Y), ells), ...] (odd ℓ only for X ≠ Y);
    ``nbar``: {name: n̄} for the tracers given as counts (others absent or None); one window for
    all tracers. P̂_ℓ^XY = (2ℓ+1)/I₂ <F_ℓ^X F_0^Y*>_bin (line of sight at X's points), minus the
    shot noise S_X of :func:`measure_multipoles` for ℓ = 0 of an auto spectrum; none for a cross
    (independent samples). Identical to :func:`measure_multipoles` pair by pair.
    Returns {(X, Y): DataVector} in the order of ``spectra``.
    """
    from ..covariance import spectra_list

    specs = spectra_list(spectra)
    e = check_edges(mesh, edges)
    nbar = {} if nbar is None else dict(nbar)
    try:
        missing = sorted({t for x, y, _ in specs for t in (x, y)} - set(fields))
    except TypeError:
        raise ErgofitError("fields: expected a dict {tracer name: field on the mesh}") from None
    if missing:
        raise ErgofitError(f"fields: no field for tracer(s) {missing} named in the spectra")
    w = window_weights(mesh, window_mask)
    bins = _bins(mesh, e)
    prepared, transforms = {}, {}
    for x, y, ells in specs:
        multipole_list(ells, f"spectrum ({x}, {y}) ells", max_ell=MAX_ELL)
        for t in (x, y):
            if t not in prepared:
                prepared[t] = _estimator_field(mesh, fields[t], w, nbar.get(t), subtract_mean, t)
                transforms[t] = {0: _fft_at(mesh, prepared[t][0], bins["flat"])}
        need = [l for l in ells if l and l not in transforms[x]]
        if need:
            transforms[x].update(_multipole_transforms(mesh, prepared[x][0], need, bins["flat"],
                                                       bins["khat"], with_monopole=False))
    out = {}
    for x, y, ells in specs:
        _, shot, i2 = prepared[x]
        shot = shot if x == y else 0.0
        vals = [_binned_multipole(transforms[x][l], transforms[y][0], l, bins, i2)
                - (shot if l == 0 else 0.0) for l in ells]
        out[(x, y)] = _data_vector(mesh, e, ells, bins, vals, i2, shot, subtract_mean,
                                   f"measure_spectra ({x}, {y})")
    return out


def radial_shells(mesh):
    """Index of the distance shell [jH, (j+1)H) of every node (H the cell size), for the
    radial integral constraint of ``subtract_mean="radial"``."""
    return np.floor(mesh.radius().astype(float) / mesh.cell).astype(np.int64)


def _radial_mean(mesh, w, d):
    """Per node, the W-weighted mean of d over its distance shell (:func:`radial_shells`): the
    angular mean that a survey removes when it builds n(r) from the data (de Mattia &
    Ruhlmann-Kleider 2019)."""
    idx = radial_shells(mesh).ravel()
    ww = np.ones(idx.size) if w is None else w.astype(float).ravel()
    num = np.bincount(idx, weights=ww * d.astype(float).ravel())
    den = np.bincount(idx, weights=ww)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(den > 0, num / den, 0.0)
    return mean[idx].reshape(d.shape).astype(mesh.real_dtype)


def _estimator_field(mesh, field, w, nbar, subtract_mean, name):
    d = check_real_field(mesh, field, name)
    rdt = mesh.real_dtype
    h3 = mesh.cell ** 3
    wsum = float(np.sum(w, dtype=float)) if w is not None else float(mesh.n ** 3)
    i2 = h3 * (float(np.sum(w.astype(float) ** 2)) if w is not None else mesh.n ** 3)
    if not (isinstance(subtract_mean, str) and subtract_mean == "radial") \
            and subtract_mean not in (True, False):
        raise ErgofitError(f"subtract_mean = {subtract_mean!r}: expected True (survey mean), "
                           "False (true mean 0) or 'radial' (each distance shell's mean)")
    if subtract_mean == "radial":
        ww = w if w is not None else rdt.type(1.0)
        if nbar is None:
            return ww * (d - _radial_mean(mesh, w, d)), 0.0, i2
        nb = finite_number(nbar, "nbar", ConfigError)
        if nb <= 0 or np.any(d < 0):
            raise ErgofitError(f"{name}: with nbar given the field must be galaxy counts (>= 0) "
                               "and nbar > 0")
        ntot = float(np.sum(d, dtype=float))
        # α(r) W with α(r) = N(shell)/(n̄ H³ Σ_shell W): n(r) estimated from the data
        dens = d * rdt.type(1.0 / (nb * h3))
        F = dens - ww * _radial_mean(mesh, w, dens / np.where(ww > 0, ww, 1.0))
        return F.astype(rdt, copy=False), ntot / (nb * nb * i2), i2
    if nbar is None:
        if w is None:
            mean = float(np.mean(d, dtype=float)) if subtract_mean else 0.0
            return (d - rdt.type(mean)), 0.0, i2
        mean = float(np.sum(w * d, dtype=float)) / wsum if subtract_mean else 0.0
        return w * (d - rdt.type(mean)), 0.0, i2
    nb = finite_number(nbar, "nbar", ConfigError)
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

