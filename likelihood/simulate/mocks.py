"""Gaussian mock surveys on a periodic mesh and the FFT multipole estimator (local line of sight).

The strongest check of the likelihood model is to simulate the observation and measure it the way
a survey is measured; the same machinery gives mock covariances.

Conventions (units, Fourier normalisation on the mesh, the rfftn half layout, the observer at
the box centre and the local line of sight): :mod:`likelihood.numerics.mesh`.

Regime of validity
------------------
* Linear theory: the density is a Gaussian random field with the linear P(k) (no non-linear
  evolution, no mode coupling); the galaxy field is the linear kernel of the tracer applied with
  the local line of sight. Use for the large scales this tool is about, not for k ≳ 0.1 h/Mpc.
* The box is periodic: the mock has no power below the fundamental k_f = 2π/L and points
  separated by more than L/2 see periodic images. Use a box at least twice the survey diameter
  (a warning says so) when comparing with a theory that assumes an infinite volume.
* One redshift: the mocks of a tracer kernel are a snapshot at the effective z (growth, bias, f
  and the projection coefficients γ1, γ2 do not evolve across the survey). Light-cone mocks
  (coefficients at each cell's distance): :mod:`likelihood.simulate.lightcone`.
* Poisson sampling is done per mesh cell: mock galaxies are cell-resolved. Cells with
  1 + aΔ < 0 are clipped to 0, after the gain a of :func:`likelihood.simulate.fields.clip_gain`
  that keeps the large-scale power of the clipped field equal to the Gaussian one to first order
  (Price 1958); a warning gives the clipped fraction above 0.1 %.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from ..checks import finite_number
from ..data import MockCovariance, save_covariance
from ..errors import ConfigError, ErgofitError
from ..numerics.mesh import fourier_array
from ..observation.estimator import MAX_ELL, check_edges, extent_warning, measure_multipoles, multipole_list, window_weights
from .fields import ConstraintTemplate, ObserverConstraint, clip_warning, constrain_at_origin, constraint_sigma, gaussian_field, observed_field, poisson_counts

def _mesh_power(mesh, pk, k_cut, e):
    """P(k) on the rfft layout in the mesh precision, zero above ``k_cut`` (> the last edge)."""
    p = fourier_array(mesh, pk, "pk")
    if k_cut is not None:
        kc = finite_number(k_cut, "k_cut", ConfigError)
        if kc <= e[-1]:
            raise ErgofitError(f"k_cut = {k_cut!r}: must exceed the last bin edge k_max = "
                               f"{e[-1]:.4g} h/Mpc")
        p = np.where(mesh.kmag() <= kc, p, 0.0)
    return np.asarray(p).astype(mesh.real_dtype, copy=False) if np.ndim(p) else p


def _mesh_kernel(mesh, A, B, label):
    """A(k), B(k) (B may be None) on the rfft layout in the mesh precision."""
    rdt = mesh.real_dtype
    a = fourier_array(mesh, A, f"A{label}")
    bk = None if B is None else fourier_array(mesh, B, f"B{label}")
    a = np.asarray(a).astype(rdt, copy=False) if np.ndim(a) else a
    bk = bk if bk is None or not np.ndim(bk) else np.asarray(bk).astype(rdt, copy=False)
    return a, bk


def simulate_mocks(mesh, pk, A, B, F, window, edges, ells=(0, 2, 4), n_mocks=10, seed=0,
                   nbar=None, constraint=None, subtract_mean=True, k_cut=None, progress=None,
                   subtract_shot_noise=True, observe=None):
    """Draw ``n_mocks`` Gaussian mocks, observe them and measure their multipoles.

    Per mock i (random streams spawned from ``seed``, so mock i depends only on (seed, i)):
    δ_k ~ :func:`gaussian_field` (pk); if ``constraint`` (an :class:`ObserverConstraint`) is
    given, c(x_o) = ν σ_c is imposed by :func:`constrain_at_origin`; Δ_g = :func:`observed_field`
    (A, B, F); optional Poisson counts with n̄ (``nbar``; clipping with the gain of
    ``fields.clip_gain``, see the module notes); :func:`measure_multipoles` with the window,
    which subtracts the Poisson shot noise S ≈ 1/n̄ from ℓ = 0 unless ``subtract_shot_noise`` is
    False (then S is added back: the data convention ``data.shot_noise_subtracted: false``).
    Linear-theory Gaussian mocks: see the module notes for the regime of validity.
    ``k_cut`` (h/Mpc, optional): the mock density has no power above k_cut (P = 0 there). Use it
    with Poisson sampling, where the full linear power up to the Nyquist frequency can drive
    1 + Δ < 0 in many cells; keep k_cut well above the last bin (the window mixes modes over a
    few k_f, so the measured bins near k_cut then lack the leakage from k > k_cut).
    ``subtract_mean``: as :func:`measure_multipoles` (True, False or "radial").
    ``observe`` (optional): a callable δ_k → Δ_g(x) on the mesh used instead of the kernel
    (A, B, F), e.g. the light cone of :mod:`likelihood.simulate.lightcone`.
    Returns (list of DataVector, MockCovariance); the covariance is the unbiased sample covariance
    of the flat (ℓ-major) vectors.
    """
    ells = multipole_list(ells, "ells", max_ell=MAX_ELL)
    e = check_edges(mesh, edges)
    n = _mock_count(n_mocks)
    w = window_weights(mesh, window, "window")
    extent_warning(mesh, w)
    p = _mesh_power(mesh, pk, k_cut, e)
    if observe is None:
        a, bk = _mesh_kernel(mesh, A, B, "")
        observe = lambda dk: observed_field(mesh, dk, a, bk, F)  # noqa: E731
    tpl = _constraint_template(mesh, constraint, p)
    c_value = None if tpl is None else constraint.nu * math.sqrt(tpl.sigma2)
    mocks = []
    max_clip, max_gain = 0.0, 1.0
    for i, child in enumerate(np.random.SeedSequence(seed).spawn(n)):
        s_field, s_poisson = child.spawn(2)
        dk = gaussian_field(mesh, p, s_field)
        if constraint is not None:
            dk, _, _ = constrain_at_origin(mesh, dk, None, c_value, p, template=tpl, inplace=True)
        gal = observe(dk)
        del dk
        if nbar is not None:
            gal, frac, gain = poisson_counts(mesh, gal, nbar, w, s_poisson, gaussian_gain=True)
            max_clip, max_gain = max(max_clip, frac), max(max_gain, gain)
        dv = measure_multipoles(mesh, gal, w, e, ells, nbar=nbar, subtract_mean=subtract_mean)
        if nbar is not None and not subtract_shot_noise and 0 in ells:
            dv.values[ells.index(0)] += float(dv.meta["shot_noise"])
            dv.meta["shot_noise_subtracted"] = "False"
        dv.meta.update({"mock": str(i), "seed": str(seed)})
        if constraint is not None:
            dv.meta.update({"constraint": constraint.name, "nu_obs": f"{constraint.nu:.8g}"})
        mocks.append(dv)
        if progress is not None:
            progress(i + 1, n)
    clip_warning(max_clip, stacklevel=3, gain=max_gain)  # once for the set (largest over the mocks)
    x = np.array([m.flat for m in mocks])
    cov = np.cov(x, rowvar=False, ddof=1) if n > 1 else np.zeros((x.shape[1],) * 2)
    return mocks, MockCovariance(np.atleast_2d(cov), n)


@dataclass(frozen=True)
class MeshTracer:
    """One population for :func:`multi_tracer_mocks`: kernel Δ_X = [A + iμB + Fμ²] δ (A, B
    functions of k, numbers or rfft-layout arrays, as :func:`observed_field`) and n̄ in (h/Mpc)³
    for Poisson sampling (None: the continuous field, no shot noise)."""

    A: object
    B: object = None
    F: float = 0.0
    nbar: float = None


@dataclass
class MultiTracerMocks:
    """Multipoles of several tracers measured on ``n`` mocks.

    ``spectra``: [((X, Y), ells)]; ``vectors``: (n, n_data) ordered spectrum by spectrum, then
    ℓ-major (the order of :func:`likelihood.covariance.multi_tracer_covariance`, odd ℓ as Π_ℓ);
    ``edges``, ``k_eff``, ``n_modes``: the k bins (k and −k counted); ``max_clipped``: largest
    fraction of in-window cells where 1 + Δ < 0 was clipped (0 without Poisson sampling).
    """

    spectra: list
    edges: np.ndarray
    k_eff: np.ndarray
    n_modes: np.ndarray
    vectors: np.ndarray
    max_clipped: float = 0.0

    @property
    def mean(self):
        return self.vectors.mean(axis=0)

    def covariance(self):
        """Unbiased sample covariance of the vectors, as a :class:`MockCovariance`."""
        n = self.vectors.shape[0]
        if n < 2:
            raise ErgofitError(f"{n} mock: need at least 2 for a covariance")
        return MockCovariance(np.atleast_2d(np.cov(self.vectors, rowvar=False, ddof=1)), n)

    def index(self, pair, ell):
        """Slice of the flat vector holding multipole ``ell`` of spectrum ``pair``."""
        nb = self.k_eff.size
        start = 0
        for p, ells in self.spectra:
            if tuple(p) == tuple(pair) and ell in ells:
                s0 = start + list(ells).index(ell) * nb
                return slice(s0, s0 + nb)
            start += len(ells) * nb
        raise ErgofitError(f"spectrum {pair!r} with ell = {ell} is not among the mocks' spectra")


def multi_tracer_mocks(mesh, pk, tracers, spectra, edges, n_mocks=10, seed=0, window=None,
                       subtract_mean=True, k_cut=None, progress=None, constraint=None,
                       subtract_shot_noise=True):
    """Mocks of several populations tracing one Gaussian field, with auto and cross multipoles.

    Per mock i (streams spawned from ``seed``: mock i depends only on (seed, i)): one δ_k ~
    :func:`gaussian_field` (pk, zero above ``k_cut``), constrained at the observer by
    ``constraint`` (an :class:`ObserverConstraint`, as in :func:`simulate_mocks`) if given; for each tracer X (a :class:`MeshTracer`
    in the dict ``tracers``) Δ_X = :func:`observed_field` with its own kernel, then, if X has an
    n̄, independent Poisson counts N_X ~ Poisson(n̄_X H³ W [1 + a_X Δ_X]₊) (its own stream; a_X
    the gain of ``fields.clip_gain`` for the rms of Δ_X, see the module notes; a warning gives the
    largest clipped fraction over the mocks when it exceeds 0.1 %); the spectra [((X, Y), ells), ...] are measured by
    :func:`likelihood.observation.estimator.measure_spectra` (autos: the Poisson shot noise
    S_X ≈ 1/n̄_X subtracted from ℓ = 0, the data convention ``data.shot_noise_subtracted: true``,
    or kept when ``subtract_shot_noise`` is False; crosses: nothing subtracted, the samples are independent; odd ℓ of a cross as Π_ℓ).
    Linear-theory Gaussian mocks: see the module notes for the regime of validity.
    Returns :class:`MultiTracerMocks`.
    """
    from ..covariance import spectra_list
    from ..observation.estimator import measure_spectra

    specs = spectra_list(spectra)
    e = check_edges(mesh, edges)
    n = _mock_count(n_mocks)
    if not hasattr(tracers, "items") or not tracers:
        raise ErgofitError("tracers: expected a dict {name: MeshTracer}")
    names = list(tracers)
    for x in names:
        if not isinstance(tracers[x], MeshTracer):
            raise ErgofitError(f"tracers[{x!r}]: expected a MeshTracer(A, B, F, nbar)")
    unknown = sorted({t for x, y, _ in specs for t in (x, y)} - set(names))
    if unknown:
        raise ErgofitError(f"spectra name tracer(s) {unknown} not in tracers {names}")
    w = window_weights(mesh, window, "window")
    extent_warning(mesh, w)
    p = _mesh_power(mesh, pk, k_cut, e)
    kern = {x: _mesh_kernel(mesh, tracers[x].A, tracers[x].B, f" of tracer {x}") for x in names}
    nbar = {x: tracers[x].nbar for x in names if tracers[x].nbar is not None}
    tpl = _constraint_template(mesh, constraint, p)
    vectors, first, max_clip, max_gain = [], None, 0.0, 1.0
    for i, child in enumerate(np.random.SeedSequence(seed).spawn(n)):
        streams = child.spawn(1 + len(names))
        dk = gaussian_field(mesh, p, streams[0])
        if tpl is not None:
            dk, _, _ = constrain_at_origin(mesh, dk, None, constraint.nu * math.sqrt(tpl.sigma2), p,
                                           template=tpl, inplace=True)
        fields = {}
        for x, s_poisson in zip(names, streams[1:]):
            a, b = kern[x]
            fields[x] = observed_field(mesh, dk, a, b, tracers[x].F)
            if x in nbar:
                fields[x], frac, gain = poisson_counts(mesh, fields[x], nbar[x], w, s_poisson,
                                                       gaussian_gain=True)
                max_clip, max_gain = max(max_clip, frac), max(max_gain, gain)
        del dk
        out = measure_spectra(mesh, fields, spectra, e, w, nbar=nbar, subtract_mean=subtract_mean)
        del fields
        if not subtract_shot_noise:
            _add_back_shot_noise(out)
        first = next(iter(out.values()))
        vectors.append(np.concatenate([out[(x, y)].values.ravel() for x, y, _ in specs]))
        if progress is not None:
            progress(i + 1, n)
    clip_warning(max_clip, stacklevel=3, gain=max_gain)
    return MultiTracerMocks([((x, y), ells) for x, y, ells in specs], e, first.k_eff,
                            first.n_modes, np.array(vectors), max_clip)


def _constraint_template(mesh, constraint, p):
    """The :class:`ConstraintTemplate` of ``constraint`` (None: no constraint)."""
    if constraint is None:
        return None
    if not isinstance(constraint, ObserverConstraint):
        raise ErgofitError(f"constraint = {constraint!r}: expected an ObserverConstraint or None")
    return ConstraintTemplate.make(mesh, constraint.kernel, p)


def _add_back_shot_noise(spectra):
    """Convention ``data.shot_noise_subtracted: false``: the subtracted S_X back into ℓ = 0 of
    each auto spectrum of {(X, Y): DataVector} (in place)."""
    for (x, y), dv in spectra.items():
        if x == y and 0 in dv.ells:
            dv.values[list(dv.ells).index(0)] += float(dv.meta["shot_noise"])
            dv.meta["shot_noise_subtracted"] = "False"


def _mock_count(n_mocks):
    n = int(n_mocks)
    if n < 1 or n != n_mocks:
        raise ErgofitError(f"n_mocks = {n_mocks!r}: expected a positive integer")
    return n


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


def _redshift(z):
    try:
        zf = float(z)
    except (TypeError, ValueError):
        raise ConfigError(f"z = {z!r}: expected a redshift") from None
    if not (np.isfinite(zf) and zf >= 0):
        raise ConfigError(f"z = {z!r}: expected a finite redshift >= 0")
    return zf


def _tracer_on_mesh(cosmo, z, tracer, effects, mesh):
    """The kernel (A, B or None, F) of ``likelihood.theory.tracer.kernel`` on the mesh's |k|
    (evaluated once per distinct |k|², in the mesh precision; 0 at k = 0)."""
    from ..theory.tracer import kernel as tracer_kernel

    q = mesh.k_squared_index()
    kq = mesh.k_fundamental * np.sqrt(np.arange(1, int(q.max()) + 1, dtype=float))
    ker = tracer_kernel(cosmo, z, kq, tracer, effects)
    tab_a = np.concatenate([[0.0], np.broadcast_to(np.asarray(ker.A, float), kq.shape)])
    tab_b = np.concatenate([[0.0], np.broadcast_to(np.asarray(ker.B, float), kq.shape)])
    if not (np.all(np.isfinite(tab_a)) and np.all(np.isfinite(tab_b))):
        raise ErgofitError("tracer kernel: A(k) or B(k) is not finite on the mesh wavenumbers")
    rdt = mesh.real_dtype
    a = tab_a.astype(rdt)[q]
    b = tab_b.astype(rdt)[q] if np.any(tab_b) else None
    return a, b, float(np.asarray(ker.F))


def simulate_tracers(cosmo, z, tracers, effects, mesh, spectra, edges, n_mocks, seed=0,
                     window=None, poisson=True, k_cut=None, progress=None, observer=None,
                     subtract_shot_noise=True):
    """Mocks of several populations of ``likelihood.theory.tracer.Tracer`` (dict {name: Tracer}):
    each kernel from ``likelihood.theory.tracer.kernel(cosmo, z, k, tracer, effects)`` on the
    mesh, P(k, z) from ``cosmo``, Poisson sampling with each tracer's n̄ (``poisson``), the
    observer constraint ``observer`` (as in :func:`simulate_from_settings`), then
    :func:`multi_tracer_mocks` (which see). One tracer with the same seed gives the same numbers
    as :func:`simulate_from_settings`. Returns :class:`MultiTracerMocks`."""
    from ..theory.tracer import Tracer

    zf = _redshift(z)
    if not hasattr(tracers, "items") or not tracers:
        raise ErgofitError("tracers: expected a dict {name: likelihood.theory.tracer.Tracer}")
    mesh_tracers = {}
    for name, t in tracers.items():
        if not isinstance(t, Tracer):
            raise ErgofitError(f"tracers[{name!r}]: expected a likelihood.theory.tracer.Tracer")
        a, b, f = _tracer_on_mesh(cosmo, zf, t, effects, mesh)
        mesh_tracers[name] = MeshTracer(a, b, f, t.nbar if poisson else None)
    pk = mesh.on_grid(lambda k: cosmo.power(k, zf), "cosmology power").astype(mesh.real_dtype)
    return multi_tracer_mocks(mesh, pk, mesh_tracers, spectra, edges, n_mocks, seed, window,
                              k_cut=k_cut, progress=progress,
                              constraint=_observer_from_settings(observer),
                              subtract_shot_noise=subtract_shot_noise)


def simulate_from_settings(cosmo, z, tracer, effects, mesh, window, edges, ells, n_mocks, seed,
                           nbar=None, observer=None, out_dir=None, k_cut=None, progress=None,
                           subtract_shot_noise=True, lightcone=None):
    """Mocks of a configured survey: one data-vector file per mock plus ``covariance.txt``.

    ``cosmo`` (``likelihood.theory.cosmology.Cosmology``) gives P(k, z); ``likelihood.theory.tracer.kernel(cosmo,
    z, k, tracer, effects)`` gives the observed-field kernel (A, B, F) evaluated once on the mesh's
    |k|; ``window`` a geometry or mask; ``observer`` None, an :class:`ObserverConstraint`, or a
    mapping like the config's ``observer`` section {"field": "potential"|"density", "nu_true": ν,
    "smoothing": R, "k_ir": k}; ``nbar``: Poisson-sample the tracer with this n̄ (None: the
    continuous field, no shot noise); ``k_cut``, ``subtract_shot_noise``: see
    :func:`simulate_mocks`; ``progress(i, n)``: an optional callback after each mock;
    ``lightcone``: a :class:`likelihood.simulate.lightcone.LightConeSpec` (a curved-sky run):
    the density today through the light-cone kernel instead of ``tracer`` at ``z``.
    Files in ``out_dir`` (created): ``mock_0000.txt``, ... (the documented data-vector text format
    of ``likelihood.data``) and ``covariance.txt`` (``likelihood.data`` covariance format: header
    ``# ergofit covariance``, ``# ells:``, ``# n_bins:``, then the matrix in the ℓ-major order).
    Returns (list of DataVector, MockCovariance).
    """
    zf = _redshift(z)
    constraint = _observer_from_settings(observer)
    ells = multipole_list(ells, "ells", max_ell=MAX_ELL)
    e = check_edges(mesh, edges)
    if lightcone is None:
        pk = mesh.on_grid(lambda k: cosmo.power(k, zf), "cosmology power").astype(mesh.real_dtype)
        a, b, fval = _tracer_on_mesh(cosmo, zf, tracer, effects, mesh)
    if out_dir is not None:
        out_dir = os.fspath(out_dir)
        try:
            os.makedirs(out_dir, exist_ok=True)
        except OSError as exc:
            raise ErgofitError(f"out_dir = {out_dir}: cannot create the folder ({exc})") from None
    run = dict(nbar=nbar, constraint=constraint, k_cut=k_cut, progress=progress,
               subtract_shot_noise=subtract_shot_noise)
    if lightcone is not None:
        mocks, cov = lightcone.mocks(mesh, window, e, ells, n_mocks, seed, **run)
    else:
        mocks, cov = simulate_mocks(mesh, pk, a, b, fval, window, e, ells, n_mocks, seed, **run)
    for m in mocks:
        m.meta["z"] = f"{zf:.6g}"
    if out_dir is not None:
        for i, m in enumerate(mocks):
            m.save(os.path.join(out_dir, f"mock_{i:04d}.txt"))
        save_covariance(os.path.join(out_dir, "covariance.txt"), cov.covariance, ells, e.size - 1)
    return mocks, cov
