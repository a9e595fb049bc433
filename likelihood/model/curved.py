"""The curved-sky forward model: the run's model from the curved-sky engine
(:mod:`likelihood.curved`), behind the same interface as
:class:`likelihood.model.templates.ForwardModel` (``engine.kind: curved_sky``).

Fast path
---------
The number-count kernel of the engine (docs/curved_sky.md, section 2) is, at fixed cosmology,
linear in a short vector of amplitudes x_a with parameter-free basis kernels W_a:

    W = W_1 + b1 W_b1 + v W_v + b_e W_be + s W_s,               (bias_evolution: constant)
    W = W_1 + b1 W_b1 + (f_NL b1) W_fb + (f_NL p) W_fp + b_e W_be + s W_s   (inverse_growth)

with W_1 the rsd, doppler, potential and integrated pieces at the held b_e, s (0 for a sampled
one), W_b1 the density of unit bias b(z) = g(z) (g = 1, or D(z_eff)/D(z)), v = f_NL (b1 − p)
and W_v the f_NL piece of unit amplitude; with an evolving bias f_NL (b1 g(z) − p) needs the
two amplitudes f_NL b1 and f_NL p (W_fp the f_NL piece of b = 0, p = 1, so p may be sampled).
W_be = W(b_e = 1) − W(b_e = 0) over the doppler, potential and ISW pieces and
W_s = W(s = 1) − W(s = 0) over those and lensing and time delay: all are affine in b_e and
𝒬 = 5s/2 with no product b_e 𝒬 (docs/projection.md eq. 6.2), so the differences are exact.
The expected estimator is then Σ_{a≤b} x_a x_b T_ab + A_sn N − s_sub e₀/n̄ with T_ab the
engine's pair templates of the basis, N its shot-noise template (same window and integral
constraint) and the flat 1/n̄ monopole subtraction as in the plane-parallel model; with
``effects.observer`` the constrained-field term adds (ν² − 1) Σ_{a≤b} x_a x_b O_ab, the mean
field being linear in the basis kernels too (:class:`CurvedObserver`); with
``effects.observer_motion: conditioned`` the pair templates gain (ν_v² − 1) D_ab, the
conditioning on our measured speed (ν_v = observer.speed/σ_3D fixed by the config and the
cosmology; likelihood.curved.observer_terms.MotionConditioning, docs/observer_terms.md). The
observer pieces themselves (observer_motion, observer_potential) are affine in b_e and s and sit
in W_1, W_be and W_s like the other projection pieces. The direct
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

from ..config.engine import INTEGRATED_EFFECTS, OBSERVER_EFFECTS
from ..curved import ResolutionWarning, TracerCoefficients
from ..curved.estimator import (BasisKernel, EstimatorResolution, Templates,
                                monopole_profiles, multipole_templates, radial_field_templates)
from ..curved.mask import (MASK_TOLERANCE, Cap, masked_radial_field_templates,
                           masked_templates)
from ..curved.observer_terms import CMB_DIPOLE_SPEED, MotionConditioning, observer_q_grid
from ..curved.randoms_mask import RandomsMask
from ..curved.selection import noise_level
from ..io import cache_folder, open_atomic
from ..observation.matrix import KBins
from ..theory import tracer as tr
from . import factories
from .curved_window import check_resolvable, curved_window, z_of_distance
from .fiducial import COSMO_PARAMS, fiducial_values, held_values, make_tracer
from .likelihood import Likelihood

#: bump when the engine's numbers change, so old cache entries are not reused
CACHE_VERSION = "curved-templates-2"
#: pieces of the engine that depend on b_e, on s (through 𝒬), in engine order
_BE_TERMS = ("doppler", "potential", "isw") + OBSERVER_EFFECTS
_S_TERMS = ("doppler", "potential", "isw", "lensing", "time_delay") + OBSERVER_EFFECTS


def engine_terms(cfg):
    """The engine's kernel pieces switched on by the ``effects`` section."""
    e = cfg["effects"]
    local = ["density"] + [t for t in ("rsd", "doppler", "potential", "fnl") if e[t]]
    return tuple(local + [t for t in INTEGRATED_EFFECTS + OBSERVER_EFFECTS if e.get(t)])


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


def sky_fingerprint(sky):
    """What defines the mask in a cache key: None, the cap's f_sky, or the map's content hash
    (values, and the K up to which its power is used)."""
    if sky is None:
        return None
    if hasattr(sky, "fingerprint"):
        return sky.fingerprint()
    if isinstance(sky, Cap):
        return ["cap", float(sky.f_sky)]
    return ["healpix", hashlib.sha256(np.ascontiguousarray(sky.map).tobytes()).hexdigest(),
            int(sky.lmax)]


def tracer_table(cfg, cosmo, path, shell):
    """The :class:`TracerTable` at ``path`` (relative to the config), checked to cover the
    survey's ``shell``."""
    z_lo, z_hi = (z_of_distance(cosmo, r, "survey.geometry.r_max")
                  for r in (shell.r_min, shell.r_max))
    return TracerTable(cfg.resolve(path), z_lo, z_hi)


class TracerBasis:
    """One tracer's basis kernels on the curved sky and their amplitudes (module docstring).

    ``terms``: the engine's kernel pieces switched on; ``evolution``: constant, inverse_growth or
    table (then ``table`` a :class:`TracerTable`); ``z``: the effective redshift at which b1,
    b_e, s are quoted; ``held``: {"b_e", "s"} values when not sampled; ``lin_free``: the sampled
    ones among b_e, s. The f_NL pieces: constant bias, one kernel of unit f_NL (b1 − p),
    amplitude v = f_NL (b1 − p); evolving bias f_NL (b1 g(z) − p) = f_NL b1 g(z) − f_NL p, two
    kernels (b = g, p = 0) and (b = 0, p = 1) with amplitudes f_NL b1 and f_NL p, so p enters
    only the amplitudes (it may be sampled)."""

    def __init__(self, terms, evolution, table, z, held, lin_free):
        self.terms, self.evolution, self.table, self.z = tuple(terms), evolution, table, z
        self.held = {k: float(held[k]) for k in ("b_e", "s")}
        self.lin_free = list(lin_free)
        self.names = [name for name, _ in self.spec(None)]

    def spec(self, g):
        """[(name, ((weight, TracerCoefficients, terms), ...))] of the basis kernels; ``g`` the
        bias shape (None: constant, or a placeholder when only the names are wanted). Kernels
        with no piece switched on are left out."""
        on = set(self.terms)
        unit = 1.0 if g is None else g
        be0 = self.held_shape("b_e", 0.0 if "b_e" in self.lin_free else self.held["b_e"])
        s0 = self.held_shape("s", 0.0 if "s" in self.lin_free else self.held["s"])
        t1 = tuple(t for t in self.terms if t not in ("density", "fnl"))
        spec = [("1", ((1.0, TracerCoefficients(0.0, be0, s0), t1),)),
                ("b1", ((1.0, TracerCoefficients(unit), ("density",)),))]
        if "fnl" in on:
            if self.evolution == "constant":
                spec.append(("v", ((1.0, TracerCoefficients(1.0, fnl=1.0, p=0.0), ("fnl",)),)))
            else:
                spec.append(("fnl_b1", ((1.0, TracerCoefficients(unit, fnl=1.0, p=0.0),
                                         ("fnl",)),)))
                spec.append(("fnl_p", ((1.0, TracerCoefficients(0.0, fnl=1.0, p=1.0),
                                        ("fnl",)),)))
        for name, terms, one in (("b_e", _BE_TERMS, dict(b_e=1.0)), ("s", _S_TERMS, dict(s=1.0))):
            terms = tuple(t for t in terms if t in on)
            if name in self.lin_free:
                spec.append((name, ((1.0, TracerCoefficients(0.0, **one), terms),
                                    (-1.0, TracerCoefficients(0.0), terms))))
        return [(n, parts) for n, parts in spec if all(p[2] for p in parts)]

    def held_shape(self, name, value):
        """b_e or s of the kernel: the number, or value + the table's shape (a callable of z)."""
        if self.table is None:
            return value
        shape = self.table.shape(name, self.z)
        return lambda z: value + shape(z)

    def amplitudes(self, values, p=None):
        """The amplitudes x of the basis kernels, in the order of ``names``, for parameter values
        (floats or arrays) keyed b1, fnl, p (or ``p`` given), b_e, s. Plain branches, no
        containers: this runs once per likelihood call on the single-point path."""
        b1, fnl = values["b1"], values.get("fnl", 0.0)
        p = values["p"] if p is None else p
        out = []
        for n in self.names:
            if n == "1":
                out.append(1.0)
            elif n == "b1":
                out.append(b1)
            elif n == "v":
                out.append(fnl * (b1 - p))
            elif n == "fnl_b1":
                out.append(fnl * b1)
            elif n == "fnl_p":
                out.append(fnl * p)
            else:                                   # b_e, s
                out.append(values[n])
        return out

    def basis(self, cosmo):
        """The BasisKernels at ``cosmo``."""
        g = bias_shape(self.evolution, cosmo, self.z, self.table)
        return [BasisKernel(n, parts) for n, parts in self.spec(g)]

    def coefficients(self, cosmo, t, fnl_on=True):
        """The engine's TracerCoefficients of a :class:`~likelihood.theory.tracer.Tracer`."""
        g = bias_shape(self.evolution, cosmo, self.z, self.table)
        b = t.b1 if g is None else (lambda z: t.b1 * g(z))
        return TracerCoefficients(b, self.held_shape("b_e", t.b_e), self.held_shape("s", t.s),
                                  t.fnl if fnl_on else 0.0, t.p)

    def fingerprint(self):
        """What defines the basis in a cache key."""
        return dict(names=self.names, lin_free=self.lin_free, held=self.held, z=self.z,
                    evolution=self.evolution,
                    table=None if self.table is None else self.table.data.tolist())


def cosmology_fingerprint(cosmo):
    """The cosmology in a cache key: its parameters and probes of its background and power, so
    a changed table or code changes the key."""
    zp, qp = np.array([0.3, 1.0, 3.0]), np.array([1e-3, 1e-2, 0.1])
    return dict(cosmo=repr(cosmo), probes=[float(v) for v in np.concatenate([
        cosmo.comoving_distance(zp), cosmo.growth_factor(zp, norm="today"),
        cosmo.growth_rate(zp), cosmo.power(qp, 0.0)])])


def template_key(spec):
    """sha256 of a JSON-able dict of everything that defines a set of templates."""
    return hashlib.sha256(json.dumps(dict(spec, version=CACHE_VERSION), sort_keys=True,
                                     default=str).encode()).hexdigest()


def _disk_cached(cache_dir, prefix, key, read, write, compute, what):
    """``read(path, key)`` of the cache entry ``prefix-<key>.npz``, or ``compute()`` written there
    by ``write(path, key, value)`` (a warning naming ``what`` if the cache is not writable)."""
    path = os.path.join(cache_folder(cache_dir), f"{prefix}-{key[:24]}.npz")
    cached = read(path, key)
    if cached is not None:
        return cached
    value = compute()
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        write(path, key, value)
    except OSError as exc:
        warnings.warn(f"curved-sky {what} cache {os.path.dirname(path)}: not "
                      f"writable ({exc}); continuing without cache", stacklevel=4)
    return value


def cached_templates(cache_dir, spec, compute):
    """Templates from the disk cache entry of ``spec`` (:func:`template_key`), or ``compute()``
    written there (a warning if the cache is not writable)."""
    return _disk_cached(cache_dir, "curved-templates", template_key(spec), _read_templates,
                        _write_templates, compute, "template")


def cached_covariance(cache_dir, spec, compute):
    """A covariance matrix from the disk cache entry of ``spec`` (a JSON-able list of what
    defines it), or ``compute()`` written there atomically (a warning if not writable)."""
    key = hashlib.sha256(json.dumps(spec, sort_keys=True).encode()).hexdigest()
    return _disk_cached(cache_dir, "curved-cov", key, _read_covariance, _write_covariance,
                        compute, "covariance")


class CurvedOperator:
    """What the likelihood and the reports read from an observation operator: the data bins
    and the integral constraint the engine applies (exact forms: docs/curved_sky.md)."""

    def __init__(self, bins, ic):
        self.bins, self.ic = bins, ic


class CurvedSky:
    """The curved-sky engine as a run sets it up: shell, angular mask, integral constraint,
    kernel pieces, snapshot mode and resolution from the config (the window through
    :func:`likelihood.model.curved_window.curved_window`, at the fiducial cosmology ``cosmo``);
    :meth:`templates` runs the engine (full sky or masked) and re-issues its ResolutionWarnings
    naming the config key. With a radial selection, a spectrum's shot noise follows its shape
    n̄(r), scaled to the n̄ asked for (survey.nbar: the selection itself)."""

    def __init__(self, cfg, cosmo):
        eng, geo = cfg["engine"], cfg["survey"]["geometry"]
        self.ic = cfg["effects"]["integral_constraint"]
        self.terms = engine_terms(cfg)
        self.snapshot_z = cfg["survey"]["redshift"] if eng["snapshot"] else None
        self.resolution = EstimatorResolution(**eng["resolution"])
        self.shell, self.sky, self.selection = curved_window(cfg, cosmo)
        self.nbar = cfg["survey"]["nbar"]
        self.fkp_p0 = geo.get("fkp_p0")
        self.mask_tolerance = eng.get("mask_tolerance", MASK_TOLERANCE)

    def fingerprint(self):
        """What defines the engine's set-up in a cache key."""
        out = dict(shell=[self.shell.r_min, self.shell.r_max], ic=self.ic, terms=self.terms,
                   snapshot=self.snapshot_z, resolution=repr(self.resolution),
                   sky=sky_fingerprint(self.sky),
                   mask_tolerance=None if self.sky is None else self.mask_tolerance)
        if self.selection is not None:          # (absent: the keys of uniform shells stay)
            out["selection"] = [self.selection.fingerprint(), self.fkp_p0]
        return out

    def noise_shell(self, nbar):
        """The shell whose n̄ gives the shot-noise template of density ``nbar`` (None: none)."""
        if nbar is None or self.selection is None:
            return replace(self.shell, nbar=nbar)
        shape, scale = self.shell.nbar, float(nbar) / self.nbar
        return self.shell if scale == 1.0 else replace(self.shell,
                                                       nbar=lambda r: scale * shape(r))

    def run(self, cosmo, edges, ells, tracer, terms, combine=False, snapshot_z=None,
            tracer_b=None, nbar=None):
        """The engine's Templates: the full-sky estimator (likelihood.curved.estimator.
        multipole_templates) or, with an angular mask, the masked one (likelihood.curved.mask.
        masked_templates, band-limit tolerance ``engine.mask_tolerance``). ``tracer_b``: the
        second tracer of a cross spectrum; ``nbar``: the n̄ of its shot-noise template (an auto
        spectrum's n̄, or n̄_X n̄_Y/n̄_XY of overlapping populations; None: no noise)."""
        shell = self.noise_shell(nbar)
        run = dict(tracer_b=tracer_b, ells=tuple(ells), ic=self.ic, resolution=self.resolution,
                   combine_pieces=combine, snapshot_z=snapshot_z)
        if self.sky is None:
            return multipole_templates(cosmo, shell, edges, tracer, terms, **run)
        return masked_templates(cosmo, shell, self.sky, edges, tracer, terms,
                                tolerance=self.mask_tolerance, **run)

    def templates(self, cosmo, edges, ells, tracer, combine, tracer_b=None, nbar=None):
        """:meth:`run` with this run's terms and snapshot setting; its ResolutionWarnings are
        re-issued naming the config key."""
        with warnings.catch_warnings(record=True) as rec:
            warnings.simplefilter("always", ResolutionWarning)
            t = self.run(cosmo, edges, ells, tracer, self.terms, combine, self.snapshot_z,
                         tracer_b=tracer_b, nbar=nbar)
        for w in rec:
            msg = str(w.message)
            if issubclass(w.category, ResolutionWarning):
                where = ("survey.geometry.nside or engine.mask_tolerance"
                         if isinstance(self.sky, RandomsMask) else "survey.geometry.mask")
                msg += (f" (config: {where})" if "raise lmax" in msg
                        else " (config: engine.resolution)")
            warnings.warn(msg, w.category, stacklevel=3)
        return t


class CurvedForwardModel:
    """The model data vector of a shell, on the full sky or with an angular mask (a polar cap or
    a HEALPix map: likelihood.curved.mask), from the curved-sky engine (module docstring).

    Same public surface as :class:`~likelihood.model.templates.ForwardModel`: ``templates``,
    ``design``, ``coefficients``, ``full``, ``kernel`` and the attributes the likelihood reads.
    """

    def __init__(self, cfg, srv, dv, mask, held, lin_free, cosmology, cosmo_keys, cosmo_free,
                 shot_noise_subtracted, cache_dir=None, observer=None):
        eng = cfg["engine"]
        self.survey = srv
        self.z, self.nbar, self.p, self.effects = srv.z, srv.nbar, srv.p, srv.effects
        cosmo0 = cosmology({})
        self.engine = CurvedSky(cfg, cosmo0)
        self.ic, self.terms, self.snapshot_z = self.engine.ic, self.engine.terms, \
            self.engine.snapshot_z
        self.resolution, self.shell, self.sky = (self.engine.resolution, self.engine.shell,
                                                 self.engine.sky)
        self.selection, self.fkp_p0 = self.engine.selection, self.engine.fkp_p0
        self.mask_tolerance = self.engine.mask_tolerance
        check_resolvable(self.shell, dv.edges, self.resolution, self.sky is not None,
                         f"{cfg.path}: data")
        self.evolution = eng["bias_evolution"]
        self.table = None
        if "tracer_table" in eng:
            self.table = tracer_table(cfg, cosmo0, eng["tracer_table"], self.shell)
        self.edges, self.ells, self.n_bins = dv.edges, tuple(dv.ells), dv.edges.size - 1
        self.operator = CurvedOperator(KBins(dv.edges, dv.k_eff, dv.n_modes), self.ic)
        self.observer = observer
        self.motion = None          # MotionConditioning (effects.observer_motion: conditioned)
        self.k_theory, self.ells_theory = dv.k_eff, self.ells
        self.mask = mask
        self.held = held
        self.lin_free = list(lin_free)
        self.tb = TracerBasis(self.terms, self.evolution, self.table, self.z, held, lin_free)
        self.cosmology = cosmology
        self.cosmo_keys = list(cosmo_keys)
        self.disk_cache = not cosmo_free          # only the build cosmology is worth a file
        self.cache_dir = cache_dir
        self.sn_sub = 1.0 if shot_noise_subtracted else 0.0
        self.monopole = np.repeat(np.array([l == 0 for l in self.ells], float), self.n_bins)
        if self.selection is not None:
            # in units of 1/n̄ (survey.nbar): the flat level the estimator subtracts is its
            # shot noise without IC, ∫r²w²/n̄ dr/∫r²w² dr (likelihood.curved.selection)
            self.monopole = self.monopole * self.nbar * noise_level(self.shell)

    # --- basis (one tracer: TracerBasis) -------------------------------------------------------
    @property
    def names(self):
        return self.tb.names

    def amplitudes(self, values):
        """The amplitudes x of the basis kernels (module docstring), in the order of
        ``names``, for parameter values (floats or arrays)."""
        return self.tb.amplitudes(values, self.p)

    def coefficients(self, values):
        """(n, n_basis) amplitudes x of the basis kernels for the parameter values."""
        return amplitude_matrix(self.amplitudes(values))

    def basis(self, cosmo):
        """The BasisKernels of the fast path at ``cosmo`` (module docstring)."""
        return self.tb.basis(cosmo)

    # --- templates ------------------------------------------------------------------------------
    def engine_templates(self, cosmo, tracer, terms, combine=False, snapshot_z=None):
        """The engine's Templates for this run's window and data bins (:meth:`CurvedSky.run`)."""
        return self.engine.run(cosmo, self.edges, self.ells, tracer, terms, combine, snapshot_z,
                               nbar=self.nbar)

    def cache_spec(self, cosmo):
        """Everything the pair templates depend on (the disk cache's key)."""
        return dict(cosmology_fingerprint(cosmo), engine=self.engine.fingerprint(),
                    basis=self.tb.fingerprint(), nbar=self.nbar, p=self.p,
                    edges=[float(e) for e in self.edges], ells=self.ells)

    def cache_key(self, cosmo):
        """The disk cache's key of the pair templates at ``cosmo``."""
        return template_key(self.cache_spec(cosmo))

    def pair_templates(self, cosmo):
        """The engine's :class:`~likelihood.curved.estimator.Templates` of the basis at
        ``cosmo`` (from the disk cache when this is the build cosmology)."""
        def compute():
            return self.engine.templates(cosmo, self.edges, self.ells, self.basis(cosmo), False,
                                         nbar=self.nbar)
        if not self.disk_cache:
            return compute()
        return cached_templates(self.cache_dir, self.cache_spec(cosmo), compute)

    def templates(self, cosmo):
        """Template rows (masked) in the order of :meth:`design`: dict(pairs, pair_list,
        n_pairs, M, sigma8, growth), as ForwardModel.templates."""
        t = self.pair_templates(cosmo)
        n = len(self.names)
        pairs = [(a, b) for a in range(n) for b in range(a, n)]
        motion = self.motion_part(cosmo, self.basis(cosmo)) if self.motion else {}
        rows = [(t.pairs[self.names[a], self.names[b]] + motion.get((self.names[a],
                 self.names[b]), 0.0)).ravel()[self.mask] for a, b in pairs]
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
        return self.tb.coefficients(cosmo, make_tracer(values, self.p, self.nbar, i),
                                    "fnl" in self.effects)

    def full(self, values, cosmo_keys=None):
        """Full (unmasked) model vector(s) by a direct run of the engine at each point."""
        keys = self.cosmo_keys if cosmo_keys is None else cosmo_keys
        out = []
        for i in range(len(np.atleast_1d(values["b1"]))):
            cosmo = self.cosmology({k: point(values[k], i) for k in keys if k in values})
            tracer = self.tracer(cosmo, values, i)
            t = self.engine.templates(cosmo, self.edges, self.ells, tracer, True, nbar=self.nbar)
            amp = point(values["shot_noise"], i)
            model = t.combine({}, {}, noise=amp).ravel()
            if self.motion is not None:
                model = model + sum(self.motion_part(cosmo, tracer).values()).ravel()
            if self.observer is not None:
                model = model + (point(values["nu_obs"], i) ** 2 - 1.0) * \
                    self.observer.correction(cosmo, tracer, self.terms).ravel()
            out.append(model - self.sn_sub * self.monopole / self.nbar)
        return np.array(out)

    def motion_part(self, cosmo, tracer):
        """(ν_v² − 1) × the pair templates of the conditioning on the observer's speed
        (likelihood.curved.observer_terms.MotionConditioning; full sky): keyed by the basis
        names for a basis, by the engine's pieces for a TracerCoefficients."""
        res = replace(self.resolution, k_nodes=max(16, self.resolution.k_nodes))
        terms = None if isinstance(tracer, list) else self.terms
        out, _ = self.motion.templates(cosmo, self.shell, self.edges, tracer, terms, self.ells,
                                       res)
        return out

    def harmonic_covariance(self, cosmo, values):
        """The curved-sky Gaussian covariance of the full data vector (ℓ-major) at the parameter
        values ``values`` (the fiducial ones): the kernel of :meth:`tracer`, shot noise
        shot_noise/n̄, the run's integral constraint and resolution (full sky only; the config
        refuses a mask). Cached on disk (key: the templates' key and the values)."""
        from ..curved.covariance import harmonic_covariance
        vals = {k: float(np.atleast_1d(values[k])[0]) for k in ("b1", "fnl", "b_e", "s",
                                                                 "shot_noise")}

        def compute():
            tracer = self.tracer(cosmo, {k: np.atleast_1d(v) for k, v in vals.items()})
            nbar = self.nbar / vals["shot_noise"] if vals["shot_noise"] > 0 else None
            return harmonic_covariance(cosmo, self.shell, self.edges, {"g": (tracer, self.terms)},
                                       [(("g", "g"), self.ells)], {"g": nbar}, self.ic,
                                       self.resolution, self.snapshot_z)
        if not self.disk_cache:
            return compute()
        return cached_covariance(self.cache_dir, [self.cache_key(cosmo), "covariance-1", vals],
                                 compute)

    def kernel(self, cosmo, values, k, i=0):
        """The plane-parallel kernel at the effective redshift (used only by the Gaussian
        covariance; see the module docstring)."""
        return tr.kernel(cosmo, self.z, k, make_tracer(values, self.p, self.nbar, i),
                         effects=self.effects)


def point(v, i):
    """Float of point ``i`` of a value (a number, or an array of one or more points)."""
    v = np.atleast_1d(v)
    return float(v[i] if v.size > 1 else v[0])


def amplitude_matrix(cols):
    """(n, len(cols)) from a list of amplitude columns (floats or arrays of n points)."""
    n = max(np.size(c) for c in cols)
    x = np.empty((n, len(cols)))
    for j, c in enumerate(cols):
        x[:, j] = c
    return x


def _write_templates(path, key, t):
    arrays = {f"pair:{a}|{b}": v for (a, b), v in t.pairs.items()}
    if t.noise is not None:              # a cross spectrum of disjoint populations has none
        arrays["noise"] = t.noise
    meta = json.dumps(dict(ells=list(t.ells), auto=t.auto, meta=t.meta), default=str)
    open_atomic(path, lambda fh: np.savez(fh, key=np.array(key), edges=t.edges,
                                          meta=np.array(meta), **arrays), binary=True)


def _write_covariance(path, key, cov):
    open_atomic(path, lambda fh: np.savez(fh, key=np.array(key), cov=cov), binary=True)


def _read_covariance(path, key):
    if not os.path.isfile(path):
        return None
    try:
        with np.load(path) as f:
            return np.array(f["cov"]) if str(f["key"]) == key else None
    except (OSError, ValueError, KeyError, EOFError):
        return None     # unreadable entry: recompute and overwrite


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
            noise = np.array(f["noise"]) if "noise" in f.files else None
            return Templates(tuple(meta["ells"]), np.array(f["edges"]), pairs, noise,
                             meta.get("auto", True), meta["meta"])
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

    def __init__(self, cfg, engine, edges, ells):
        from ..observation.observer import K_IR_DEFAULT
        o = cfg["observer"]
        self.field, self.smoothing = o["field"], o.get("smoothing")
        self.k_ir = o.get("k_ir", K_IR_DEFAULT)
        self.engine, self.edges, self.ells = engine, edges, tuple(ells)
        self.resolution = replace(engine.resolution, k_nodes=max(16, engine.resolution.k_nodes))

    def _measure(self, cosmo):
        from ..observation.observer import constraint_kernel, sigma_c
        q, wq = observer_q_grid(self.engine.shell.r_max, self.k_ir, None)
        c = constraint_kernel(cosmo, 0.0, q, self.field, self.smoothing)
        sig = sigma_c(cosmo, 0.0, self.field, self.smoothing, k_ir=self.k_ir)
        return q, wq * q * q * np.asarray(cosmo.power(q, 0.0)) * c / (2.0 * np.pi ** 2) / sig

    def _profiles(self, cosmo, tracer, terms):
        q, meas = self._measure(cosmo)
        return monopole_profiles(cosmo, self.engine.shell, self.edges, q, meas, tracer, terms,
                                 self.resolution, self.engine.snapshot_z)

    def _estimate(self, names, profiles, names_b=None, profiles_b=None):
        """E_ℓ pair templates of the radial fields: full sky or through the run's mask
        (likelihood.curved.mask.masked_radial_field_templates: exact, only L = 0 couples);
        ``names_b``, ``profiles_b``: tracer B of a cross spectrum."""
        e = self.engine
        cross = dict(names_b=names_b, profiles_b=profiles_b)
        if e.sky is None:
            return radial_field_templates(e.shell, self.edges, names, profiles, self.ells, e.ic,
                                          self.resolution, **cross)
        return masked_radial_field_templates(e.shell, e.sky, self.edges, names, profiles,
                                             self.ells, e.ic, self.resolution, **cross)

    def templates(self, cosmo, basis, names, basis_b=None):
        """{(a, b): (n_ell, n_bins)} observer templates of the basis kernels (a ≤ b; a cross
        spectrum with the basis ``basis_b`` of tracer B: every pair)."""
        _, got, prof = self._profiles(cosmo, basis, None)
        if basis_b is None:
            return self._estimate(got, prof)
        _, got_b, prof_b = self._profiles(cosmo, basis_b, None)
        return self._estimate(got, prof, got_b, prof_b)

    def correction(self, cosmo, tracer, terms, tracer_b=None):
        """E_ℓ[m] (n_ell, n_bins) of one tracer, or of the cross spectrum with ``tracer_b``
        (direct path)."""
        _, _, prof = self._profiles(cosmo, tracer, terms)
        if tracer_b is None:
            return self._estimate(["m"], prof.sum(0)[None])["m", "m"]
        _, _, prof_b = self._profiles(cosmo, tracer_b, terms)
        return self._estimate(["m"], prof.sum(0)[None], ["m"], prof_b.sum(0)[None])["m", "m"]


class CurvedLikelihood(Likelihood):
    """:class:`~likelihood.model.likelihood.Likelihood` of a curved-sky run: the single-point
    path takes the forward model's own amplitudes (its basis differs from the plane-parallel
    one), and the plane-parallel effective f_NL is not reported."""

    def _amplitudes(self, vals):
        f = self.forward
        return f.tb.amplitudes(vals, f.p)

    @property
    def derived_names(self):
        return [n for n in super().derived_names if n != "fnl_eff"]

    def describe(self):
        f = self.forward
        mode = f"snapshot at z = {f.snapshot_z:g}" if f.snapshot_z is not None else "light cone"
        sky = "full sky" if f.sky is None else f.sky.describe()
        if f.selection is not None:
            sky += f", radial selection from {f.selection.source}" + (
                "" if f.fkp_p0 is None else f" with FKP weights (P0 = {f.fkp_p0:g} (Mpc/h)^3)")
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
        model.observer = CurvedObserver(cfg, model.engine, model.edges, model.ells)
    if cfg["effects"].get("observer_motion") == "conditioned":
        model.motion = MotionConditioning(cfg["observer"].get("speed", CMB_DIPOLE_SPEED))
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
