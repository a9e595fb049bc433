"""Several tracers through the curved-sky engine (``tracers`` with ``engine.kind: curved_sky``).

Model of a spectrum X × Y
-------------------------
The engine (:mod:`likelihood.curved`) gives the exact linear-theory expectation of the end-point
estimator for two kernels W^X, W^Y on the light cone: tracer X carries the Legendre weight (the
first point), Y the plain transform; odd ℓ of a cross spectrum hold Π_ℓ (P_ℓ = iΠ_ℓ), and they
contain the wide-angle dipole ∝ f (b_X − b_Y)/(kχ) (docs/wide_angle.md) beside the Doppler
dipole of the plane-parallel kernel. Each tracer X has its own b1, b_e, s, p, n̄ and redshift
dependence (``bias_evolution`` or ``tracer_table`` per entry, else the engine section's), so
its kernel is W^X = Σ_a x^X_a W^X_a on the basis of :class:`~likelihood.model.curved.TracerBasis`
(the single-tracer fast path's basis), and

    model_XY = Σ_ab x^X_a x^Y_b T^XY_ab + A_sn N_XY + (ν² − 1) Σ_ab x^X_a x^Y_b O^XY_ab,

T^XY_ab the engine's pair templates of the two bases (autos: a ≤ b, both orderings summed), O
the observer's constrained-field templates (:class:`~likelihood.model.curved.CurvedObserver`,
cross pairs F_ℓ[m^X_a] F_0[m^Y_b]), N_XY the shot-noise template through the same window and
integral constraint: 1/n̄_X for an auto spectrum (amplitude ``shot_noise_X``), n̄_XY/(n̄_X n̄_Y)
for overlapping populations (``shared_nbar``, amplitude ``shot_noise_X_Y``), none for disjoint
ones. Integral constraint: both populations fill the same shell, each tracer's own mean is
removed (global) or its own mean at each distance (radial), exactly, by the same operator on
both sides of the spectrum. The flat 1/n̄_X of subtracted auto monopoles moves to the data side
as in the plane-parallel path. Templates are cached on disk per spectrum (like the single-tracer
ones); the direct path reruns the engine with each tracer's coefficients and agrees to 1e-10.

The Gaussian covariance (covariance.kind: gaussian) stays the plane-parallel multi-tracer one at
the effective redshift (likelihood.covariance); ``covariance.kind: harmonic`` is the curved-sky
Gaussian covariance of the estimator of every spectrum (autos, crosses with their odd ℓ, and all
their cross-covariances) at the fiducial parameters of each tracer
(:meth:`CurvedMultiForwardModel.harmonic_covariance`; full sky, uniform density; each spectrum
on its own k bins; the shared noise of overlapping populations included); mocks or a file are
used as given.
"""
from __future__ import annotations

import functools

import numpy as np

from .curved import (CurvedObserver, CurvedOperator, CurvedSky, TracerBasis, amplitude_matrix,
                     cached_covariance, cached_templates, cosmology_fingerprint, point,
                     template_key, tracer_table, warn_regime)
from ..errors import ConfigError
from ..observation.matrix import KBins
from .multitracer import MultiForwardModel, Spectrum


class CurvedMultiForwardModel(MultiForwardModel):
    """Model vector of several spectra of several tracers from the curved-sky engine: the
    surface of :class:`~likelihood.model.multitracer.MultiForwardModel` (``templates``,
    ``design``, ``coefficients``, ``x_point``, ``full``, ``tracer``) with the engine's templates.

    ``bases``: {tracer name: TracerBasis}; ``engine``: the run's :class:`CurvedSky`."""

    def __init__(self, survey, tracers, spectra, engine, bases, held, lin_free, cosmology,
                 cosmo_keys, cosmo_free, cache_dir=None):
        super().__init__(survey, tracers, spectra, None, held, lin_free, cosmology, cosmo_keys)
        self.engine, self.bases = engine, bases
        self.terms = engine.terms
        self.disk_cache = not cosmo_free          # only the build cosmology is worth a file
        self.cache_dir = cache_dir
        self.nbar = {t["name"]: t["nbar"] for t in tracers}

    def engine_line(self):
        """One line for ``describe``: the engine's set-up and each tracer's redshift dependence."""
        e = self.engine
        mode = f"snapshot at z = {e.snapshot_z:g}" if e.snapshot_z is not None else "light cone"
        sky = "full sky" if e.sky is None else e.sky.describe()
        evo = ", ".join(f"{n}: {b.evolution}" for n, b in self.bases.items())
        return (f"engine: curved sky ({mode}), shell {e.shell.r_min:g}-{e.shell.r_max:g} Mpc/h, "
                f"{sky}, terms {', '.join(e.terms)}, exact {e.ic} integral constraint; bias "
                f"evolution {evo}")

    # --- amplitudes -----------------------------------------------------------------------------
    def _tracer_values(self, values, name):
        """The values of tracer ``name`` under the base names TracerBasis reads."""
        out = {"fnl": values["fnl"]}
        for base in ("b1", "p", "b_e", "s"):
            out[base] = values[f"{base}_{name}"]
        return out

    def x_layout(self):
        """Columns of the side-by-side coefficient vectors: [(tracer, basis kernel name)]."""
        return [(n, a) for n in self.names for a in self.bases[n].names]

    def coefficients(self, values):
        """(n, Σ_X n_basis_X) amplitudes x^X of all tracers side by side."""
        cols = []
        for n in self.names:
            cols += self.bases[n].amplitudes(self._tracer_values(values, n))
        return amplitude_matrix(cols)

    @functools.cached_property
    def _columns(self):
        """(code, name, name) per column of x: 0 → 1; 1 → v[a]; 2 → f_NL (v[a] − v[b]);
        3 → f_NL v[a] (the amplitudes of TracerBasis.amplitudes, for the scalar path)."""
        out = []
        for n in self.names:
            b1, p = f"b1_{n}", f"p_{n}"
            code = {"1": (0, None, None), "b1": (1, b1, None), "v": (2, b1, p),
                    "fnl_b1": (3, b1, None), "fnl_p": (3, p, None),
                    "b_e": (1, f"b_e_{n}", None), "s": (1, f"s_{n}", None)}
            out += [code[a] for a in self.bases[n].names]
        return out

    def x_point(self, vals):
        """The coefficient vector x of one point (``vals``: name → float); equals a row of
        :meth:`coefficients` (tests)."""
        fnl = vals["fnl"]
        return np.array([1.0 if c == 0 else vals[a] if c == 1 else
                         fnl * (vals[a] - vals[b]) if c == 2 else fnl * vals[a]
                         for c, a, b in self._columns])

    # --- templates ------------------------------------------------------------------------------
    def noise_nbar(self, s):
        """n̄ of the shot-noise template of spectrum ``s`` (None: no noise term)."""
        return None if s.noise_name is None else 1.0 / s.noise_scale

    def spectrum_templates(self, cosmo, s, basis):
        """The engine's Templates of spectrum ``s`` for the bases {tracer: [BasisKernel]} (from
        the disk cache when this is the build cosmology)."""
        x, y = s.pair
        part = s.part

        def compute():
            return self.engine.templates(cosmo, part.edges, part.ells, basis[x], False,
                                         tracer_b=None if s.auto else basis[y],
                                         nbar=self.noise_nbar(s))
        if not self.disk_cache:
            return compute()
        spec = dict(cosmology_fingerprint(cosmo), engine=self.engine.fingerprint(),
                    a=self.bases[x].fingerprint(), b=None if s.auto else self.bases[y].fingerprint(),
                    nbar=self.noise_nbar(s), edges=[float(e) for e in part.edges],
                    ells=list(part.ells))
        return cached_templates(self.cache_dir, spec, compute)

    def templates(self, cosmo):
        """Unwhitened template rows over the masked vector and the index maps of ``design``
        (the layout of MultiForwardModel.templates)."""
        basis = {n: self.bases[n].basis(cosmo) for n in self.names}
        col0 = dict(zip(self.names, np.cumsum([0] + [len(self.bases[n].names)
                                                      for n in self.names])))
        n_masked = int(self.mask.sum())
        starts = np.concatenate([[0], np.cumsum([s.mask.sum() for s in self.spectra])])
        rows, obs_rows, ia, ib, noise_names, noise_rows = [], [], [], [], [], []

        def place(j, vec):
            row = np.zeros(n_masked)
            row[starts[j]:starts[j + 1]] = vec
            return row
        for j, s in enumerate(self.spectra):
            x, y = s.pair
            na, nb = self.bases[x].names, self.bases[y].names
            pairs = ([(a, b) for a in range(len(na)) for b in range(a, len(na))] if s.auto else
                     [(a, b) for a in range(len(na)) for b in range(len(nb))])
            t = self.spectrum_templates(cosmo, s, basis)
            obs = (s.observer.templates(cosmo, basis[x], na, None if s.auto else basis[y])
                   if s.observer is not None else None)
            for a, b in pairs:
                rows.append(place(j, t.pairs[na[a], nb[b]].ravel()[s.mask]))
                if obs is not None:
                    obs_rows.append(place(j, obs[na[a], nb[b]].ravel()[s.mask]))
                ia.append(col0[x] + a)
                ib.append(col0[y] + b)
            if s.noise_name is not None:
                noise_rows.append(place(j, t.noise.ravel()[s.mask]))
                noise_names.append(s.noise_name)
        return dict(M=np.array(rows + obs_rows + noise_rows), ia=np.array(ia), ib=np.array(ib),
                    n_pairs=len(rows), noise_names=noise_names, sigma8=cosmo.sigma8,
                    growth=cosmo.growth_factor(self.z) / cosmo.growth_factor(0.0))

    # --- covariance -----------------------------------------------------------------------------
    def harmonic_covariance(self, cosmo, values):
        """The curved-sky Gaussian covariance (likelihood.curved.covariance.harmonic_covariance,
        Wick's theorem on the a_JM: docs/curved_covariance.md) of the full data vector, spectrum
        by spectrum in the config's order, ℓ-major within each, at the parameter values
        ``values`` (the fiducial ones): each tracer's kernel from :meth:`coefficients_of` (its b1,
        b_e, s, p, redshift dependence, the shared f_NL), the Poisson noise of tracer X with
        n̄_X/shot_noise_X, the shared noise shot_noise_X_Y n̄_XY/(n̄_X n̄_Y) of overlapping
        populations (``shared_nbar``), each spectrum's own k bins, the run's integral constraint
        and resolution. Cached on disk."""
        from ..curved.covariance import harmonic_covariance
        edges = [s.part.edges for s in self.spectra]
        keys = ["fnl"] + [f"{b}_{n}" for n in self.names
                          for b in ("b1", "p", "b_e", "s", "shot_noise")]
        keys += [s.noise_name for s in self.spectra if s.noise_name and not s.auto]
        vals = {k: float(np.atleast_1d(values[k])[0]) for k in keys}
        spectra = [(s.pair, tuple(s.part.ells)) for s in self.spectra]

        def compute():
            tc = {n: (self.coefficients_of(cosmo, vals, n), self.terms) for n in self.names}
            amp = {n: vals[f"shot_noise_{n}"] for n in self.names}
            nbar = {n: self.nbar[n] / amp[n] if amp[n] > 0 else None for n in self.names}
            shared = {s.pair: vals[s.noise_name] * s.noise_scale for s in self.spectra
                      if s.noise_name and not s.auto}
            return harmonic_covariance(cosmo, self.engine.shell, edges, tc, spectra, nbar,
                                       self.engine.ic, self.engine.resolution,
                                       self.engine.snapshot_z, cross_noise=shared)
        if not self.disk_cache:
            return compute()
        spec = dict(cosmology_fingerprint(cosmo), engine=self.engine.fingerprint(),
                    bases={n: self.bases[n].fingerprint() for n in self.names}, nbar=self.nbar,
                    edges=[[float(e) for e in es] for es in edges], spectra=spectra)
        return cached_covariance(self.cache_dir, [template_key(spec), "multi-covariance-1", vals],
                                 compute)

    # --- direct path ----------------------------------------------------------------------------
    def coefficients_of(self, cosmo, values, name, i=0):
        """The engine's TracerCoefficients of tracer ``name`` at point ``i`` of ``values``."""
        return self.bases[name].coefficients(cosmo, self.tracer(values, name, i),
                                             "fnl" in self.effects)

    def full(self, values, cosmo_keys=None):
        """(n, N) full (unmasked) model vectors by direct runs of the engine at each point, the
        constant −1/n̄ of subtracted auto monopoles included."""
        keys = self.cosmo_keys if cosmo_keys is None else cosmo_keys
        n = max([np.size(v) for v in values.values()] + [1])
        out = []
        for i in range(n):
            cosmo = self.cosmology({k: point(values[k], i) for k in keys if k in values})
            tc = {name: self.coefficients_of(cosmo, values, name, i) for name in self.names}
            parts = []
            for s in self.spectra:
                x, y = s.pair
                tb = None if s.auto else tc[y]
                t = self.engine.templates(cosmo, s.part.edges, s.part.ells, tc[x], True,
                                          tracer_b=tb, nbar=self.noise_nbar(s))
                amp = 0.0 if s.noise_name is None else point(values[s.noise_name], i)
                m = t.combine({}, {}, noise=amp).ravel()
                if s.observer is not None:
                    m = m + (point(values["nu_obs"], i) ** 2 - 1.0) * s.observer.correction(
                        cosmo, tc[x], self.terms, tb).ravel()
                parts.append(m - s.sn_flat)
            out.append(np.concatenate(parts))
        return np.array(out)


def spectra_models(cfg, engine, sv):
    """[Spectrum] of a curved-sky config: bins, mask, noise name and scale, observer term."""
    nbar = {t["name"]: t["nbar"] for t in cfg["tracers"]}
    out = []
    for spec, pair, part in zip(cfg["spectra"], sv.pairs, sv.parts):
        x, y = pair
        op = CurvedOperator(KBins(part.edges, part.k_eff, part.n_modes), engine.ic)
        mask = part.mask(tuple(spec["ells"]), spec.get("k_min"), spec.get("k_max"))
        if x == y:
            noise_name, scale = f"shot_noise_{x}", 1.0 / nbar[x]
        elif "shared_nbar" in spec:
            noise_name, scale = f"shot_noise_{x}_{y}", spec["shared_nbar"] / (nbar[x] * nbar[y])
        else:
            noise_name, scale = None, 0.0
        obs = (CurvedObserver(cfg, engine, part.edges, part.ells) if cfg["effects"]["observer"]
               else None)
        out.append(Spectrum(pair, part, op, mask, noise_name, scale,
                            cfg["data"]["shot_noise_subtracted"], obs))
    return out


def forward_model(cfg, srv, sv, cosmo_free, held, lin_free, cosmology, cosmo_keys):
    """The :class:`CurvedMultiForwardModel` of a validated curved-sky config with ``tracers``."""
    cosmo = cosmology({})
    engine = CurvedSky(cfg, cosmo)
    if engine.selection is not None:
        raise ConfigError(f"{cfg.path}: survey.geometry: a radial selection (selection, or shape: "
                          "randoms) is not available with several tracers yet; expected a shell "
                          "or cap of uniform density")
    bases = {}
    for t in cfg["tracers"]:
        n = t["name"]
        table = (tracer_table(cfg, cosmo, t["tracer_table"], engine.shell) if t["bias_evolution"] == "table"
                 else None)
        bases[n] = TracerBasis(engine.terms, t["bias_evolution"], table, srv.z,
                               {"b_e": held[f"b_e_{n}"], "s": held[f"s_{n}"]}, lin_free[n])
    spectra = spectra_models(cfg, engine, sv)
    for s in spectra:
        warn_regime(s.part, s.mask)
    return CurvedMultiForwardModel(srv, cfg["tracers"], spectra, engine, bases, held, lin_free,
                                   cosmology, cosmo_keys, cosmo_free)

