"""The curved-sky forward model: the run's model from the curved-sky engine
(:mod:`likelihood.curved`), behind the same interface as
:class:`likelihood.model.templates.ForwardModel` (``engine.kind: curved_sky``).

Fast path
---------
The number-count kernel of the engine (docs/curved_sky.md, section 2) is, at fixed cosmology,
linear in a short vector of amplitudes x_a with parameter-free basis kernels W_a:

    W = W_1 + b1 W_b1 + v W_v + b_e W_be + s W_s,               (bias_evolution: constant)
    W = W_1 + b1 W_b1 + (f_NL b1) W_fb + f_NL W_f + b_e W_be + s W_s   (inverse_growth)

with W_1 the rsd, doppler, potential and integrated pieces at the held b_e, s (0 for a sampled
one), W_b1 the density of unit bias b(z) = g(z) (g = 1, or D(z_eff)/D(z)), v = f_NL (b1 − p)
and W_v the f_NL piece of unit amplitude; with an evolving bias f_NL (b1 g(z) − p) needs the
two amplitudes f_NL b1 and f_NL. W_be = W(b_e = 1) − W(b_e = 0) over the doppler, potential and
ISW pieces and W_s = W(s = 1) − W(s = 0) over those and lensing and time delay: all are affine in
b_e and 𝒬 = 5s/2 with no product b_e 𝒬 (docs/projection.md eq. 6.2), so the differences are
exact. The expected estimator is then Σ_{a≤b} x_a x_b T_ab + A_sn N − s_sub e₀/n̄ with T_ab the
engine's pair templates of the basis, N its shot-noise template (same window and integral
constraint) and the flat 1/n̄ monopole subtraction as in the plane-parallel model; with
``effects.observer`` the constrained-field term adds (ν² − 1) Σ_{a≤b} x_a x_b O_ab, the mean
field being linear in the basis kernels too (:class:`CurvedObserver`). The direct
path (:meth:`CurvedForwardModel.full`) recomputes the engine with the tracer at the parameter
values; they agree to 1e-10 (tests/model/test_curved.py).

The pair templates of the build-time cosmology are cached on disk (like the window matrix),
keyed by a hash of everything that defines them (the observer templates, a J = 0 computation,
are recomputed at each build). When cosmological parameters are sampled the
engine runs at every evaluation (seconds each; README, "The curved-sky engine").

The Gaussian covariance (covariance.kind: gaussian) stays the plane-parallel one at the
effective redshift (likelihood.data.gaussian_covariance); ``covariance.kind: harmonic`` is the
curved-sky Gaussian covariance of the estimator at the fiducial parameters (full sky: window,
integral constraint, light cone and fiducial f_NL included; likelihood.curved.covariance),
cached on disk beside the templates; a covariance from mocks or a file is used as given.
"""
from __future__ import annotations

import hashlib
import json
import os
import warnings
from dataclasses import replace

import numpy as np

from ..config.engine import INTEGRATED_EFFECTS
from ..curved import ResolutionWarning, TracerCoefficients
from ..curved.estimator import (BasisKernel, EstimatorResolution, Shell, Templates,
                                monopole_profiles, multipole_templates, radial_field_templates)
from ..curved.mask import (MASK_TOLERANCE, Cap, HealpixMask, masked_radial_field_templates,
                           masked_templates)
from ..curved.quadrature import composite_gl
from ..io import cache_folder, open_atomic
from ..observation.matrix import KBins
from ..theory import tracer as tr
from . import factories
from .fiducial import COSMO_PARAMS, fiducial_values, held_values, make_tracer
from .likelihood import Likelihood

#: bump when the engine's numbers change, so old cache entries are not reused
CACHE_VERSION = "curved-templates-1"
#: pieces of the engine that depend on b_e, on s (through 𝒬), in engine order
_BE_TERMS = ("doppler", "potential", "isw")
_S_TERMS = ("doppler", "potential", "isw", "lensing", "time_delay")


def engine_terms(cfg):
    """The engine's kernel pieces switched on by the ``effects`` section."""
    e = cfg["effects"]
    local = ["density"] + [t for t in ("rsd", "doppler", "potential", "fnl") if e[t]]
    return tuple(local + [t for t in INTEGRATED_EFFECTS if e.get(t)])


def bias_shape(evolution, cosmo, z_eff, table=None):
    """g(z) of b1(z) = b1 g(z): None for a constant bias, D(z_eff)/D(z) for inverse_growth
    (b1 D constant: the clustering amplitude of the tracer does not evolve; a common simple
    model, common practice, also the forecast scans' ``bias_evolution: inverse_growth``), or
    T_b1(z)/T_b1(z_eff) from a :class:`TracerTable`."""
    if evolution == "constant":
        return None
    if evolution == "table":
        return table.shape("b1", z_eff)
    d_eff = float(cosmo.growth_factor(z_eff, norm="today"))
    return lambda z: d_eff / np.asarray(cosmo.growth_factor(z, norm="today"), dtype=float)


class TracerTable:
    """The redshift dependence of b1, b_e and s from a text table (``engine.tracer_table``):
    a header line ``# columns: z b1 b_e s`` and rows of increasing z covering the survey's
    redshifts, interpolated linearly in z. The values at survey.redshift stay those of the
    ``tracer`` block (or the sampled ones): b1(z) = b1 T_b1(z)/T_b1(z_eff),
    b_e(z) = b_e + T_be(z) − T_be(z_eff), s(z) = s + T_s(z) − T_s(z_eff), so the model stays
    linear in b1 and affine in b_e and s (the fast path is unchanged)."""

    COLUMNS = ("z", "b1", "b_e", "s")

    def __init__(self, path, z_lo, z_hi):
        from ..errors import DataError
        from ..io import read_comment_header
        try:
            _, header = read_comment_header(path)
            data = np.loadtxt(path, comments="#", ndmin=2)
        except (OSError, ValueError, UnicodeDecodeError) as exc:
            raise DataError(f"{path}: tracer table unreadable ({exc})") from None
        cols = header.get("columns", [""])[0].split()
        if tuple(cols) != self.COLUMNS or data.shape[1] != 4 or data.shape[0] < 2:
            raise DataError(f"{path}: tracer table: expected a header '# columns: z b1 b_e s' "
                            f"and >= 2 rows of 4 numbers, got columns {cols} and shape "
                            f"{data.shape}")
        z = data[:, 0]
        if not np.all(np.isfinite(data)) or np.any(np.diff(z) <= 0) or np.any(data[:, 1] <= 0):
            raise DataError(f"{path}: tracer table: expected finite values, z strictly "
                            "increasing and b1 > 0")
        if z[0] > z_lo or z[-1] < z_hi:
            raise DataError(f"{path}: tracer table covers z = {z[0]:g}..{z[-1]:g}; the survey "
                            f"needs {z_lo:.4g}..{z_hi:.4g}")
        self.path, self.data = path, data

    def column(self, name):
        i = self.COLUMNS.index(name)
        return lambda z: np.interp(z, self.data[:, 0], self.data[:, i])

    def shape(self, name, z_eff):
        """b1: T(z)/T(z_eff); b_e, s: T(z) − T(z_eff)."""
        f = self.column(name)
        ref = float(f(z_eff))
        if name == "b1":
            return lambda z: f(z) / ref
        return lambda z: f(z) - ref


def sky_mask(cfg):
    """The angular mask of a curved-sky run: None (full-sky shell), a :class:`Cap`
    (shape: cap with fsky < 1) or a :class:`HealpixMask` (shape: shell, mask: FILE)."""
    geo = cfg["survey"]["geometry"]
    if geo["shape"] == "cap" and geo["fsky"] < 1.0:
        return Cap(geo["fsky"])
    if "mask" in geo:
        return HealpixMask.from_file(cfg.resolve(geo["mask"]))
    return None


def sky_fingerprint(sky):
    """What defines the mask in a cache key: None, the cap's f_sky, or the map's content hash
    (values, and the K up to which its power is used)."""
    if sky is None:
        return None
    if isinstance(sky, Cap):
        return ["cap", float(sky.f_sky)]
    return ["healpix", hashlib.sha256(np.ascontiguousarray(sky.map).tobytes()).hexdigest(),
            int(sky.lmax)]


def _z_of(cosmo, r):
    """Redshift of the comoving distance r [Mpc/h] (bisection on the cosmology's χ(z))."""
    from scipy.optimize import brentq
    if r <= 0:
        return 0.0
    return brentq(lambda z: float(cosmo.comoving_distance(z)) - r, 0.0, 1100.0, xtol=1e-10)


class CurvedOperator:
    """What the likelihood and the reports read from an observation operator: the data bins
    and the integral constraint the engine applies (exact forms: docs/curved_sky.md)."""

    def __init__(self, bins, ic):
        self.bins, self.ic = bins, ic


class CurvedForwardModel:
    """The model data vector of a shell, on the full sky or with an angular mask (a polar cap or
    a HEALPix map: likelihood.curved.mask), from the curved-sky engine (module docstring).

    Same public surface as :class:`~likelihood.model.templates.ForwardModel`: ``templates``,
    ``design``, ``coefficients``, ``full``, ``kernel`` and the attributes the likelihood reads.
    """

    def __init__(self, cfg, srv, dv, mask, held, lin_free, cosmology, cosmo_keys, cosmo_free,
                 shot_noise_subtracted, cache_dir=None, observer=None):
        eng = cfg["engine"]
        geo = cfg["survey"]["geometry"]
        self.survey = srv
        self.z, self.nbar, self.p, self.effects = srv.z, srv.nbar, srv.p, srv.effects
        self.ic = cfg["effects"]["integral_constraint"]
        self.terms = engine_terms(cfg)
        self.snapshot_z = srv.z if eng["snapshot"] else None
        self.evolution = eng["bias_evolution"]
        self.table = None
        if "tracer_table" in eng:
            z_lo, z_hi = (float(_z_of(cosmology({}), r)) for r in (geo["r_min"], geo["r_max"]))
            self.table = TracerTable(cfg.resolve(eng["tracer_table"]), z_lo, z_hi)
        self.resolution = EstimatorResolution(**eng["resolution"])
        self.shell = Shell(geo["r_min"], geo["r_max"], nbar=srv.nbar)
        self.sky = sky_mask(cfg)
        self.mask_tolerance = eng.get("mask_tolerance", MASK_TOLERANCE)
        self.edges, self.ells, self.n_bins = dv.edges, tuple(dv.ells), dv.edges.size - 1
        self.operator = CurvedOperator(KBins(dv.edges, dv.k_eff, dv.n_modes), self.ic)
        self.observer = observer
        self.k_theory, self.ells_theory = dv.k_eff, self.ells
        self.mask = mask
        self.held = held
        self.lin_free = list(lin_free)
        self.cosmology = cosmology
        self.cosmo_keys = list(cosmo_keys)
        self.disk_cache = not cosmo_free          # only the build cosmology is worth a file
        self.cache_dir = cache_dir
        self.sn_sub = 1.0 if shot_noise_subtracted else 0.0
        self.monopole = np.repeat(np.array([l == 0 for l in self.ells], float), self.n_bins)
        self.names = [name for name, _ in self._basis_spec(None)]

    # --- basis ----------------------------------------------------------------------------------
    def _basis_spec(self, g):
        """[(name, ((weight, TracerCoefficients, terms), ...))] of the basis kernels; ``g`` the
        bias shape (None: constant, or a placeholder when only the names are wanted). Kernels
        with no piece switched on are left out."""
        on = set(self.terms)
        unit = 1.0 if g is None else g
        be0 = self._held_shape("b_e", 0.0 if "b_e" in self.lin_free else self.held["b_e"])
        s0 = self._held_shape("s", 0.0 if "s" in self.lin_free else self.held["s"])
        t1 = tuple(t for t in self.terms if t not in ("density", "fnl"))
        spec = [("1", ((1.0, TracerCoefficients(0.0, be0, s0), t1),)),
                ("b1", ((1.0, TracerCoefficients(unit), ("density",)),))]
        if "fnl" in on:
            if self.evolution == "constant":
                spec.append(("v", ((1.0, TracerCoefficients(1.0, fnl=1.0, p=0.0), ("fnl",)),)))
            else:
                spec.append(("fnl_b1", ((1.0, TracerCoefficients(unit, fnl=1.0, p=0.0),
                                         ("fnl",)),)))
                spec.append(("fnl", ((1.0, TracerCoefficients(0.0, fnl=1.0, p=self.p),
                                      ("fnl",)),)))
        for name, terms, one in (("b_e", _BE_TERMS, dict(b_e=1.0)), ("s", _S_TERMS, dict(s=1.0))):
            terms = tuple(t for t in terms if t in on)
            if name in self.lin_free:
                spec.append((name, ((1.0, TracerCoefficients(0.0, **one), terms),
                                    (-1.0, TracerCoefficients(0.0), terms))))
        return [(n, parts) for n, parts in spec if all(p[2] for p in parts)]

    def _held_shape(self, name, value):
        """b_e or s of the kernel: the number, or value + the table's shape (a callable of z)."""
        if self.table is None:
            return value
        shape = self.table.shape(name, self.z)
        return lambda z: value + shape(z)

    def amplitudes(self, values):
        """The amplitudes x of the basis kernels (module docstring), in the order of
        ``names``, for parameter values (floats or arrays)."""
        b1 = values["b1"]
        fnl = values.get("fnl", 0.0)
        col = {"1": 1.0, "b1": b1, "v": fnl * (b1 - self.p), "fnl_b1": fnl * b1, "fnl": fnl}
        return [values[n] if n in ("b_e", "s") else col[n] for n in self.names]

    def coefficients(self, values):
        """(n, n_basis) amplitudes x of the basis kernels for the parameter values."""
        cols = self.amplitudes(values)
        n = max(np.size(c) for c in cols)
        x = np.empty((n, len(cols)))
        for j, c in enumerate(cols):
            x[:, j] = c
        return x

    # --- templates ------------------------------------------------------------------------------
    def engine_templates(self, cosmo, tracer, terms, combine=False, snapshot_z=None):
        """The engine's Templates for this run's window: the full-sky estimator
        (likelihood.curved.estimator.multipole_templates) or, with an angular mask, the masked
        one (likelihood.curved.mask.masked_templates, band-limit tolerance
        ``engine.mask_tolerance``)."""
        run = dict(ells=self.ells, ic=self.ic, resolution=self.resolution,
                   combine_pieces=combine, snapshot_z=snapshot_z)
        if self.sky is None:
            return multipole_templates(cosmo, self.shell, self.edges, tracer, terms, **run)
        return masked_templates(cosmo, self.shell, self.sky, self.edges, tracer, terms,
                                tolerance=self.mask_tolerance, **run)

    def _engine(self, cosmo, tracer, combine):
        """One engine run; its ResolutionWarnings are re-issued naming the config key."""
        with warnings.catch_warnings(record=True) as rec:
            warnings.simplefilter("always", ResolutionWarning)
            t = self.engine_templates(cosmo, tracer, self.terms, combine, self.snapshot_z)
        for w in rec:
            msg = str(w.message)
            if issubclass(w.category, ResolutionWarning):
                msg += (" (config: survey.geometry.mask)" if "raise lmax" in msg
                        else " (config: engine.resolution)")
            warnings.warn(msg, w.category, stacklevel=3)
        return t

    def cache_key(self, cosmo):
        """sha256 of everything the pair templates depend on (cosmology by its parameters and
        probes of its background and power, so a changed table or code changes the key)."""
        zp, qp = np.array([0.3, 1.0, 3.0]), np.array([1e-3, 1e-2, 0.1])
        spec = dict(version=CACHE_VERSION, cosmo=repr(cosmo),
                    probes=[float(v) for v in np.concatenate([
                        cosmo.comoving_distance(zp), cosmo.growth_factor(zp, norm="today"),
                        cosmo.growth_rate(zp), cosmo.power(qp, 0.0)])],
                    shell=[self.shell.r_min, self.shell.r_max, self.nbar],
                    edges=[float(e) for e in self.edges], ells=self.ells, ic=self.ic,
                    terms=self.terms, names=self.names, lin_free=self.lin_free,
                    held=[self.held["b_e"], self.held["s"]], p=self.p, z=self.z,
                    evolution=self.evolution, snapshot=self.snapshot_z,
                    table=None if self.table is None else self.table.data.tolist(),
                    resolution=repr(self.resolution), sky=sky_fingerprint(self.sky),
                    mask_tolerance=None if self.sky is None else self.mask_tolerance)
        return hashlib.sha256(json.dumps(spec, sort_keys=True).encode()).hexdigest()

    def basis(self, cosmo):
        """The BasisKernels of the fast path at ``cosmo`` (module docstring)."""
        g = bias_shape(self.evolution, cosmo, self.z, self.table)
        return [BasisKernel(n, parts) for n, parts in self._basis_spec(g)]

    def pair_templates(self, cosmo):
        """The engine's :class:`~likelihood.curved.estimator.Templates` of the basis at
        ``cosmo`` (from the disk cache when this is the build cosmology)."""
        path = None
        if self.disk_cache:
            key = self.cache_key(cosmo)
            folder = cache_folder(self.cache_dir)
            path = os.path.join(folder, f"curved-templates-{key[:24]}.npz")
            cached = _read_templates(path, key)
            if cached is not None:
                return cached
        t = self._engine(cosmo, self.basis(cosmo), combine=False)
        if path is not None:
            try:
                os.makedirs(os.path.dirname(path), exist_ok=True)
                _write_templates(path, key, t)
            except OSError as exc:
                warnings.warn(f"curved-sky template cache {os.path.dirname(path)}: not "
                              f"writable ({exc}); continuing without cache", stacklevel=3)
        return t

    def templates(self, cosmo):
        """Template rows (masked) in the order of :meth:`design`: dict(pairs, pair_list,
        n_pairs, M, sigma8, growth), as ForwardModel.templates."""
        t = self.pair_templates(cosmo)
        n = len(self.names)
        pairs = [(a, b) for a in range(n) for b in range(a, n)]
        rows = [t.pairs[self.names[a], self.names[b]].ravel()[self.mask] for a, b in pairs]
        if self.observer is not None:
            obs = self.observer.templates(cosmo, self.basis(cosmo), self.names)
            rows += [obs[self.names[a], self.names[b]].ravel()[self.mask] for a, b in pairs]
        rows.append(t.noise.ravel()[self.mask])
        return dict(pairs=np.array(pairs), n_pairs=len(pairs), pair_list=pairs,
                    M=np.array(rows), sigma8=cosmo.sigma8,
                    growth=cosmo.growth_factor(self.z) / cosmo.growth_factor(0.0))

    def design(self, values, tpl):
        """(n, n_templates) coefficients multiplying the template rows ``tpl["M"]``."""
        x = self.coefficients(values)
        c = x[:, tpl["pairs"][:, 0]] * x[:, tpl["pairs"][:, 1]]
        cols = [c]
        if self.observer is not None:
            cols.append(c * (np.reshape(values["nu_obs"], (-1, 1)) ** 2 - 1.0))
        cols.append(np.broadcast_to(values["shot_noise"], (c.shape[0],))[:, None])
        return np.hstack(cols)

    # --- direct path ----------------------------------------------------------------------------
    def tracer(self, cosmo, values, i=0):
        """The engine's TracerCoefficients of point ``i`` of ``values``."""
        t = make_tracer(values, self.p, self.nbar, i)
        g = bias_shape(self.evolution, cosmo, self.z, self.table)
        b = t.b1 if g is None else (lambda z: t.b1 * g(z))
        return TracerCoefficients(b, self._held_shape("b_e", t.b_e), self._held_shape("s", t.s),
                                  t.fnl if "fnl" in self.effects else 0.0, self.p)

    def full(self, values, cosmo_keys=None):
        """Full (unmasked) model vector(s) by a direct run of the engine at each point."""
        keys = self.cosmo_keys if cosmo_keys is None else cosmo_keys
        out = []
        def at(v, i):
            v = np.atleast_1d(v)
            return float(v[i] if v.size > 1 else v[0])
        for i in range(len(np.atleast_1d(values["b1"]))):
            cosmo = self.cosmology({k: at(values[k], i) for k in keys if k in values})
            tracer = self.tracer(cosmo, values, i)
            t = self._engine(cosmo, tracer, combine=True)
            amp = at(values["shot_noise"], i)
            model = t.combine({}, {}, noise=amp).ravel()
            if self.observer is not None:
                model = model + (at(values["nu_obs"], i) ** 2 - 1.0) * \
                    self.observer.correction(cosmo, tracer, self.terms).ravel()
            out.append(model - self.sn_sub * self.monopole / self.nbar)
        return np.array(out)

    def harmonic_covariance(self, cosmo, values):
        """The curved-sky Gaussian covariance of the full data vector (ℓ-major) at the parameter
        values ``values`` (the fiducial ones): the kernel of :meth:`tracer`, shot noise
        shot_noise/n̄, the run's integral constraint and resolution (full sky only; the config
        refuses a mask). Cached on disk (key: the templates' key and the values)."""
        from ..curved.covariance import harmonic_covariance
        vals = {k: float(np.atleast_1d(values[k])[0]) for k in ("b1", "fnl", "b_e", "s",
                                                                 "shot_noise")}
        path = None
        if self.disk_cache:
            key = hashlib.sha256(json.dumps([self.cache_key(cosmo), "covariance-1", vals],
                                            sort_keys=True).encode()).hexdigest()
            path = os.path.join(cache_folder(self.cache_dir), f"curved-cov-{key[:24]}.npz")
            if os.path.isfile(path):
                try:
                    with np.load(path) as f:
                        if str(f["key"]) == key:
                            return np.array(f["cov"])
                except (OSError, ValueError, KeyError, EOFError):
                    pass            # unreadable entry: recompute and overwrite
        tracer = self.tracer(cosmo, {k: np.atleast_1d(v) for k, v in vals.items()})
        nbar = self.nbar / vals["shot_noise"] if vals["shot_noise"] > 0 else None
        cov = harmonic_covariance(cosmo, self.shell, self.edges, {"g": (tracer, self.terms)},
                                  [(("g", "g"), self.ells)], {"g": nbar}, self.ic,
                                  self.resolution, self.snapshot_z)
        if path is not None:
            try:
                os.makedirs(os.path.dirname(path), exist_ok=True)
                open_atomic(path, lambda fh: np.savez(fh, key=np.array(key), cov=cov),
                            binary=True)
            except OSError as exc:
                warnings.warn(f"curved-sky covariance cache {os.path.dirname(path)}: not "
                              f"writable ({exc}); continuing without cache", stacklevel=3)
        return cov

    def kernel(self, cosmo, values, k, i=0):
        """The plane-parallel kernel at the effective redshift (used only by the Gaussian
        covariance; see the module docstring)."""
        return tr.kernel(cosmo, self.z, k, make_tracer(values, self.p, self.nbar, i),
                         effects=self.effects)


def _write_templates(path, key, t):
    arrays = {f"pair:{a}|{b}": v for (a, b), v in t.pairs.items()}
    arrays["noise"] = t.noise
    meta = json.dumps(dict(ells=list(t.ells), meta=t.meta), default=str)
    open_atomic(path, lambda fh: np.savez(fh, key=np.array(key), edges=t.edges,
                                          meta=np.array(meta), **arrays), binary=True)


def _read_templates(path, key):
    if not os.path.isfile(path):
        return None
    try:
        with np.load(path) as f:
            if str(f["key"]) != key:
                return None
            meta = json.loads(str(f["meta"]))
            pairs = {tuple(n[5:].split("|")): np.array(f[n]) for n in f.files
                     if n.startswith("pair:")}
            return Templates(tuple(meta["ells"]), np.array(f["edges"]), pairs,
                             np.array(f["noise"]), True, meta["meta"])
    except (OSError, ValueError, KeyError, EOFError):
        return None     # unreadable entry: rebuild and overwrite


class CurvedObserver:
    """The constrained-field observer term on the curved sky (docs/observer.md; Hoffman &
    Ribak 1991): (ν² − 1) E_ℓ[m] with the mean field m(r) = ξ_gc(r)/σ_c,

        ξ_gc(r) = ∫_{k_IR} q² dq/(2π²) P(q) C(q) W_0(q, r),

    W_0 the angular monopole of the number-count kernel on the light cone (every piece, the
    integrated ones included: only J = 0 correlates with a field at the observer), C the
    constraint field of likelihood.observation.observer (potential or smoothed density today)
    and σ_c its rms with the same cut-offs; E_ℓ the full-sky estimator of a radial field with
    the run's integral constraint (exact; the radial one removes it entirely, so it is refused
    there). m is linear in the basis kernels, so E is a quadratic form like the signal.
    q grid: 32 Gauss–Legendre nodes in ln q from k_IR to 6/r_max, then panels of 4/r_max up to
    0.5 h/Mpc (checked against direct quadrature of ξ_gc to 1e-4 and, in snapshot mode,
    against the plane-parallel ObserverTerm's exact radial path to 1e-4: tests)."""

    def __init__(self, cfg, model):
        from ..observation.observer import K_IR_DEFAULT
        o = cfg["observer"]
        self.field, self.smoothing = o["field"], o.get("smoothing")
        self.k_ir = o.get("k_ir", K_IR_DEFAULT)
        self.model = model
        self.resolution = replace(model.resolution, k_nodes=max(16, model.resolution.k_nodes))

    def _measure(self, cosmo):
        from ..observation.observer import constraint_kernel, sigma_c
        r_max = self.model.shell.r_max
        q_lo = max(6.0 / r_max, 2.0 * self.k_ir)
        t, u = np.polynomial.legendre.leggauss(32)
        span = np.log(q_lo) - np.log(self.k_ir)
        q1 = np.exp(np.log(self.k_ir) + span * 0.5 * (t + 1.0))
        q2, w2 = composite_gl(q_lo, 0.5, 4.0 / r_max)
        q = np.concatenate([q1, q2])
        wq = np.concatenate([q1 * 0.5 * span * u, w2])
        c = constraint_kernel(cosmo, 0.0, q, self.field, self.smoothing)
        sig = sigma_c(cosmo, 0.0, self.field, self.smoothing, k_ir=self.k_ir)
        return q, wq * q * q * np.asarray(cosmo.power(q, 0.0)) * c / (2.0 * np.pi ** 2) / sig

    def _profiles(self, cosmo, tracer, terms):
        m = self.model
        q, meas = self._measure(cosmo)
        return monopole_profiles(cosmo, m.shell, m.edges, q, meas, tracer, terms,
                                 self.resolution, m.snapshot_z)

    def _estimate(self, names, profiles):
        """E_ℓ pair templates of the radial fields: full sky or through the run's mask
        (likelihood.curved.mask.masked_radial_field_templates: exact, only L = 0 couples)."""
        m = self.model
        if m.sky is None:
            return radial_field_templates(m.shell, m.edges, names, profiles, m.ells, m.ic,
                                          self.resolution)
        return masked_radial_field_templates(m.shell, m.sky, m.edges, names, profiles, m.ells,
                                             m.ic, self.resolution)

    def templates(self, cosmo, basis, names):
        """{(a, b): (n_ell, n_bins)} observer templates of the basis kernels (a ≤ b)."""
        _, got, prof = self._profiles(cosmo, basis, None)
        return self._estimate(got, prof)

    def correction(self, cosmo, tracer, terms):
        """E_ℓ[m] (n_ell, n_bins) of one tracer (direct path)."""
        _, _, prof = self._profiles(cosmo, tracer, terms)
        return self._estimate(["m"], prof.sum(0)[None])["m", "m"]


class CurvedLikelihood(Likelihood):
    """:class:`~likelihood.model.likelihood.Likelihood` of a curved-sky run: the single-point
    path takes the forward model's own amplitudes (its basis differs from the plane-parallel
    one), and the plane-parallel effective f_NL is not reported."""

    def _amplitudes(self, vals):
        return self.forward.amplitudes(vals)

    @property
    def derived_names(self):
        return [n for n in super().derived_names if n != "fnl_eff"]

    def describe(self):
        f = self.forward
        mode = f"snapshot at z = {f.snapshot_z:g}" if f.snapshot_z is not None else "light cone"
        sky = "full sky" if f.sky is None else f.sky.describe()
        return (super().describe() + f"\nengine: curved sky ({mode}), shell "
                f"{f.shell.r_min:g}-{f.shell.r_max:g} Mpc/h, {sky}, terms {', '.join(f.terms)}, "
                f"exact {f.ic} integral constraint, bias evolution {f.evolution}")


def warn_regime(dv, mask):
    """The curved engine is exact in linear theory; say where linear theory is stretched."""
    k = factories.k_used(dv, mask)
    if k[-1] > 0.1:
        warnings.warn(f"data k_max = {k[-1]:.3g} h/Mpc: the curved-sky model is linear theory "
                      "(no non-linear damping or loop corrections); keep k_max <~ 0.1 h/Mpc at "
                      "z ~ 1", UserWarning, stacklevel=3)


def forward_model(cfg, srv, params, dv, mask, fiducial):
    """The :class:`CurvedForwardModel` of a validated curved-sky config."""
    cosmo_free = [n for n in params.names if n in COSMO_PARAMS]
    model = CurvedForwardModel(
        cfg, srv, dv, mask, held=held_values(fiducial, params.fixed),
        lin_free=[n for n in ("b_e", "s") if params.is_free(n)],
        cosmology=lambda values: factories.cosmology(cfg, values),
        cosmo_keys=[k for k in COSMO_PARAMS if k in cosmo_free or k in cfg["fixed"]],
        cosmo_free=cosmo_free, shot_noise_subtracted=cfg["data"]["shot_noise_subtracted"])
    if srv.observer_on:
        model.observer = CurvedObserver(cfg, model)
    return model


def build(cfg):
    """The likelihood of a validated curved-sky config (same steps as factories.build)."""
    params = factories.parameters(cfg)
    cosmo = factories.cosmology(cfg)
    srv = factories.survey(cfg, cosmo)
    fiducial = fiducial_values(cfg)
    dv = factories.data_bins(cfg, srv)
    mask = factories.data_mask(cfg, dv)
    warn_regime(dv, mask)
    forward = forward_model(cfg, srv, params, dv, mask, fiducial)
    cov_full, mock_cov = factories.covariance(cfg, dv, cosmo, forward, fiducial, mask)
    if cfg["data"].get("mock") is not None:
        dv = factories.mock(cfg, dv, forward, fiducial,
                            [n for n in params.names if n in COSMO_PARAMS], cov_full)
    return CurvedLikelihood(cfg, params=params, cosmo=cosmo, survey=srv, data_full=dv, mask=mask,
                            forward=forward, covariance_full=cov_full, mock_cov=mock_cov,
                            fiducial=fiducial)
