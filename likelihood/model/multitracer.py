"""Several tracers in one fit: auto and cross spectra, their fast-path templates, the likelihood.

Model of a spectrum X × Y (plane-parallel engine)
-------------------------------------------------
Each tracer has the kernel Z_X = A_X + iμB_X + Fμ² of :mod:`likelihood.theory.tracer` and the
cross power P_XY(k, μ) = Z_X Z_Y^* P_m (even ℓ real, odd ℓ = iΠ_ℓ: the Doppler dipole and octupole,
McDonald 2009; Bonvin, Hui & Gaztañaga 2014). The observation operator of the spectrum is a
:class:`~likelihood.observation.matrix.WindowMatrix` from the theory multipoles (0, 2, 4 for an
auto spectrum; 0..4 for a cross spectrum) to its own bins and multipoles; the Wilson et al. (2017)
coupling (ℓ ℓ' L; 0 0 0)² holds for odd ℓ too. Both populations fill the same survey, so they
share the window; each tracer's own mean is estimated, and in the global form of the integral
constraint the cross spectrum loses P̂^XY_0(0) W²_ℓ(k)/W²_0(0), the same linear operator as an
auto spectrum. Shot noise: A_sn,X/n̄_X (white-noise response of the operator) in the auto
spectrum of X; none in a cross spectrum of disjoint populations; A_sn,XY n̄_XY/(n̄_X n̄_Y) when the
populations share n̄_XY objects per volume (``shared_nbar``). The flat Poisson 1/n̄_X subtracted
from measured auto monopoles (``data.shot_noise_subtracted``) is moved to the data side.

Fast path: Z_X = Σ_a x^X_a Z^X_a (basis of :func:`likelihood.model.templates.basis_kernels`,
x^X = (1, b1_X, f_NL(b1_X − p_X), b_e,X, 𝒬_X)), hence

    model_XY = Σ_ab x^X_a x^Y_b T^XY_ab + Σ noise amplitudes × noise rows,

T^XY_ab = M_XY[multipoles of Z^X_a Z^Y_b^* P_m] (a ≤ b symmetrised for autos). The direct path
recomputes every spectrum from the tracers and must agree to 1e-10 (tests).

With ``engine.kind: curved_sky`` the spectra come from the curved-sky engine instead
(:mod:`likelihood.model.curved_multitracer`: same Spectrum records, templates, design and
MultiLikelihood; the wide-angle odd multipoles included).
"""
from __future__ import annotations

import functools
import warnings

import numpy as np

from ..config.engine import is_curved
from ..config.multitracer import parameter_table
from ..data import DataVector, check_covariance, condition_number
from ..errors import ConfigError, DataError
from ..observation.matrix import KBins, WindowMatrix, theory_k_grid
from ..spectra import (SpectraVector, load_spectra, load_spectra_covariance, pair_label,
                       spectra_covariance_from_mocks)
from ..theory import tracer as tr
from .fiducial import COSMO_PARAMS, fiducial_values, held_values
from .likelihood import Likelihood, covariance_line, mock_corrections
from .templates import basis_kernels

ELLS_AUTO = (0, 2, 4)
ELLS_CROSS = (0, 1, 2, 3, 4)


def covariance_function():
    """``multi_tracer_covariance`` of :mod:`likelihood.covariance`."""
    from ..covariance import multi_tracer_covariance
    return multi_tracer_covariance


class Spectrum:
    """One fitted spectrum: pair, tracer indices, operator, noise row, mask, data part and its
    observer term (None when off)."""

    def __init__(self, pair, part, operator, mask, noise_name, noise_scale, sn_sub, observer=None):
        self.pair, self.part = tuple(pair), part
        self.auto = pair[0] == pair[1]
        self.operator, self.mask, self.observer = operator, mask, observer
        self.noise_name, self.noise_scale = noise_name, noise_scale
        n_b = part.n_bins
        self.monopole = np.repeat(np.array([l == 0 for l in part.ells], float), n_b)
        #: the flat 1/n̄ subtracted from a measured auto monopole (0 for crosses)
        self.sn_flat = self.monopole * noise_scale * sn_sub if self.auto else 0.0 * self.monopole
        #: the plane-parallel operator's white-noise response (the curved-sky engine gives its
        #: own noise template: model/curved_multitracer.py)
        self.noise_row = (operator.white_noise_response() * noise_scale
                          if noise_name is not None and isinstance(operator, WindowMatrix) else None)

    @property
    def label(self):
        return pair_label(self.pair)


class MultiForwardModel:
    """Model vector of several spectra of several tracers (direct path and templates).

    tracers: the config's ``tracers`` entries; spectra: [Spectrum]; held: floats of every
    parameter not sampled; lin_free: {tracer name: sampled b_e/s}.
    """

    def __init__(self, survey, tracers, spectra, k_theory, held, lin_free, cosmology, cosmo_keys):
        self.survey, self.z, self.effects = survey, survey.z, survey.effects
        self.tracers, self.spectra = tracers, spectra
        self.names = [t["name"] for t in tracers]
        self.k_theory = k_theory
        self.held, self.lin_free = held, lin_free
        self.cosmology, self.cosmo_keys = cosmology, list(cosmo_keys)
        self.mask = np.concatenate([s.mask for s in spectra])
        self.sn_flat = np.concatenate([s.sn_flat for s in spectra])
        self.observer_on = spectra[0].observer is not None

    def engine_line(self):
        """One line for ``describe``."""
        return "engine: plane-parallel (kernel at the effective redshift, window convolution)"

    # --- direct path ----------------------------------------------------------------------------
    def tracer(self, values, name, i=0):
        t = self.tracers[self.names.index(name)]

        def g(key):
            v = values[key]
            return float(v[i] if np.ndim(v) else v)
        return tr.Tracer(b1=g(f"b1_{name}"), fnl=g("fnl"), p=g(f"p_{name}"), nbar=t["nbar"],
                         b_e=g(f"b_e_{name}"), s=g(f"s_{name}"), name=name)

    def full(self, values, cosmo_keys=None):
        """(n, N) full (unmasked) model vectors by the direct path, the constant −1/n̄ of
        subtracted auto monopoles included (as in the single-tracer model)."""
        cosmo_keys = self.cosmo_keys if cosmo_keys is None else cosmo_keys
        cosmo = self.cosmology({k: float(np.atleast_1d(values[k])[0]) for k in cosmo_keys if k in values})
        n = max([np.size(v) for v in values.values()] + [1])
        out = []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", tr.PlaneParallelWarning)
            for i in range(n):
                parts = []
                for s in self.spectra:
                    tx, ty = self.tracer(values, s.pair[0], i), self.tracer(values, s.pair[1], i)
                    if s.auto:
                        pl = tr.multipoles(cosmo, self.z, self.k_theory, tx, effects=self.effects,
                                           ells=ELLS_AUTO, shot_noise=False)
                    else:
                        pl = tr.cross_multipoles(cosmo, self.z, self.k_theory, tx, ty,
                                                 effects=self.effects, ells=ELLS_CROSS)
                    m = s.operator(pl) - s.sn_flat
                    if s.observer is not None:
                        nu = values["nu_obs"]
                        w = float(nu[i] if np.ndim(nu) else nu) ** 2 - 1.0
                        kx = tr.kernel(cosmo, self.z, self.k_theory, tx, effects=self.effects)
                        corr = (s.observer.correction(cosmo, self.z, self.k_theory, kx) if s.auto else
                                s.observer.cross_correction(cosmo, self.z, self.k_theory, kx, tr.kernel(
                                    cosmo, self.z, self.k_theory, ty, effects=self.effects)))
                        m = m + w * corr
                    if s.noise_name is not None:
                        amp = values[s.noise_name]
                        m = m + float(amp[i] if np.ndim(amp) else amp) * s.noise_row
                    parts.append(m)
                out.append(np.concatenate(parts))
        return np.array(out)

    # --- templates ------------------------------------------------------------------------------
    def bases(self, cosmo, k):
        return {t["name"]: basis_kernels(cosmo, self.z, k, self.effects, self.held[f"b_e_{t['name']}"],
                                         self.held[f"s_{t['name']}"], self.lin_free[t["name"]])
                for t in self.tracers}

    def templates(self, cosmo):
        """Unwhitened template rows over the masked vector, and the index maps of :meth:`design`."""
        k = self.k_theory
        pm = cosmo.power(k, self.z)
        bases = self.bases(cosmo, k)
        col0 = {}                                  # first column of each tracer's x in X
        pos = 0
        for name in self.names:
            col0[name] = pos
            pos += len(bases[name])
        n_masked = int(self.mask.sum())
        rows, ia, ib, noise_names = [], [], [], []
        starts = np.concatenate([[0], np.cumsum([s.mask.sum() for s in self.spectra])])
        for j, s in enumerate(self.spectra):
            bx, by = bases[s.pair[0]], bases[s.pair[1]]
            pairs = ([(a, b) for a in range(len(bx)) for b in range(a, len(bx))] if s.auto else
                     [(a, b) for a in range(len(bx)) for b in range(len(by))])
            for a, b in pairs:
                pab = tr.pair_multipoles(bx[a][1], by[b][1], pm, ELLS_AUTO if s.auto else ELLS_CROSS)
                if s.auto and a != b:
                    pab = pab + tr.pair_multipoles(bx[b][1], bx[a][1], pm, ELLS_AUTO)
                row = np.zeros(n_masked)
                row[starts[j]:starts[j + 1]] = s.operator(pab)[s.mask]
                rows.append(row)
                ia.append(col0[s.pair[0]] + a)
                ib.append(col0[s.pair[1]] + b)
        n_pairs = len(rows)
        if self.observer_on:
            for j, s in enumerate(self.spectra):
                kx = [z for _, z in bases[s.pair[0]]]
                if s.auto:
                    pairs = [(a, b) for a in range(len(kx)) for b in range(a, len(kx))]
                    obs = s.observer.templates(cosmo, self.z, k, kx, pairs)
                else:
                    obs = s.observer.cross_templates(cosmo, self.z, k, kx, [z for _, z in bases[s.pair[1]]])
                block = np.zeros((obs.shape[0], n_masked))
                block[:, starts[j]:starts[j + 1]] = obs[:, s.mask]
                rows.extend(block)
        for j, s in enumerate(self.spectra):
            if s.noise_name is not None:
                row = np.zeros(n_masked)
                row[starts[j]:starts[j + 1]] = s.noise_row[s.mask]
                rows.append(row)
                noise_names.append(s.noise_name)
        return dict(M=np.array(rows), ia=np.array(ia), ib=np.array(ib), n_pairs=n_pairs,
                    noise_names=noise_names,
                    sigma8=cosmo.sigma8, growth=cosmo.growth_factor(self.z) / cosmo.growth_factor(0.0))

    def x_layout(self):
        """Columns of the side-by-side coefficient vectors: [(parameter or None, p parameter or
        None)]: None → 1; (b1_X, None) → b1_X; (b1_X, p_X) → f_NL (b1_X − p_X); (b_e_X/s_X, None).
        p_X enters only through that product, so sampling it keeps the fast path."""
        cols = []
        for t in self.tracers:
            n = t["name"]
            cols += [(None, None), (f"b1_{n}", None)]
            if "fnl" in self.effects:
                cols.append((f"b1_{n}", f"p_{n}"))
            cols += [(f"{par}_{n}", None) for par in self.lin_free[n]]
        return cols

    def x_point(self, vals):
        """The coefficient vector x of one point (``vals``: name → float; scalar fast path)."""
        fnl = vals["fnl"]
        return np.array([1.0 if name is None else (vals[name] if p is None else
                                                   fnl * (vals[name] - vals[p]))
                         for name, p in self._layout])

    @functools.cached_property
    def _layout(self):
        return self.x_layout()

    def coefficients(self, values):
        """(n, Σ_X n_basis_X) coefficient vectors x^X of all tracers side by side."""
        layout = self.x_layout()
        n = max(np.size(values[k]) for k in {k for k, _ in layout if k is not None} | {"fnl"})
        x = np.ones((n, len(layout)))
        fnl = values["fnl"]
        for j, (key, p) in enumerate(layout):
            if key is not None:
                x[:, j] = values[key] if p is None else fnl * (values[key] - values[p])
        return x

    def design(self, values, tpl):
        """(n, n_templates) coefficients of the template rows ``tpl["M"]``."""
        x = self.coefficients(values)
        out = np.empty((x.shape[0], tpl["M"].shape[0]))
        npair = tpl["n_pairs"]
        out[:, :npair] = x[:, tpl["ia"]] * x[:, tpl["ib"]]
        if self.observer_on:
            out[:, npair:2 * npair] = out[:, :npair] * (np.reshape(values["nu_obs"], (-1, 1)) ** 2 - 1.0)
        first = 2 * npair if self.observer_on else npair
        for j, name in enumerate(tpl["noise_names"]):
            out[:, first + j] = values[name]
        return out


class MultiLikelihood(Likelihood):
    """Gaussian likelihood of several spectra of several tracers (same public surface as
    :class:`~likelihood.model.likelihood.Likelihood`; parameters named per tracer)."""

    def __init__(self, cfg, params, cosmo, survey, data_full, forward, covariance_full, fiducial,
                 known, mock_cov=None):
        self.config, self.config_hash = cfg, cfg.hash
        self.params, self.parameter_names = params, params.names
        self.labels, self.prior_bounds = params.labels, params.bounds
        self.start, self.start_scale = params.start, params.start_scale
        self.survey, self.z, self.effects = survey, survey.z, survey.effects
        self.window, self.volume = survey.window, survey.volume
        self.observer_on = forward.observer_on
        self.observer = None          # one observer term per spectrum: forward.spectra[i].observer
        self.cosmo = cosmo
        self.cosmo_free = [n for n in self.parameter_names if n in COSMO_PARAMS]
        self.forward, self.known, self.fiducial = forward, known, fiducial
        self.data_full, self.mask = data_full, forward.mask
        self.covariance_full, self.mock_cov = covariance_full, mock_cov
        self.data = data_full.flat[self.mask]
        (self.n_mocks, self.t_likelihood, self.precision_scale,
         self.percival_m1) = mock_corrections(cfg, mock_cov, self.data.size, len(params.names))
        cov = covariance_full[np.ix_(self.mask, self.mask)]
        self.chol = check_covariance(cov, n=self.data.size, source="covariance")
        self.covariance = cov
        self.condition_number = condition_number(cov)
        self.dof = int(self.data.size - len(self.parameter_names))
        self._fixed_floats = forward.held
        self._chol_inv = np.linalg.inv(self.chol)
        self._sn_shift = forward.sn_flat[self.mask]
        self._d_w = self._chol_inv @ (self.data + self._sn_shift)
        self._dd = float(self._d_w @ self._d_w)
        self._templates = self._whitened_templates(cosmo)
        self._setup_analytic(getattr(cfg, "_analytic", []))

    # --- analytic marginalisation over linear parameters ------------------------------------------
    def _setup_analytic(self, pars):
        """Linear parameters integrated out (Taylor & Kitching 2010, MNRAS 408, 865, eqs. 8-10 for
        a Gaussian prior; the flat-prior limit drops the prior terms). With the whitened model
        m = Σ_n c_n W_n + Σ_j A_j T_j and the prior A ~ N(μ, diag σ²) (flat: 1/σ² = 0, bounds
        ignored, the integral runs over all A), the Gaussian integral over A gives

            −2 ln L_marg = |r|² + μᵀS⁻¹μ − bᵀF⁻¹b + ln det F + const,
            r = d_w − Σ c_n W_n,  F = TᵀT + S⁻¹,  b = Tᵀr + S⁻¹μ;

        F depends on the noise templates only (no cosmology), so ln det F is a constant and is
        left out: the value reported as χ² is min over A of χ² + prior penalty (A = F⁻¹b)."""
        names = self._templates["noise_names"]
        for p in pars:
            if p.name not in names:
                raise ConfigError(f"{self.config.path}: parameters.{p.name}.analytic: {p.name} does not "
                                  f"enter this model (its noise terms: {', '.join(names) or 'none'})")
        first = self._templates["n_pairs"] * (2 if self.observer_on else 1)
        self._lin_names = [p.name for p in pars]
        self._lin = np.array([first + names.index(p.name) for p in pars], int)
        gauss = [p.prior.kind == "gauss" for p in pars]
        self._lin_ivar = np.array([1.0 / p.prior.sigma ** 2 if g else 0.0 for p, g in zip(pars, gauss)])
        self._lin_mean = np.array([p.prior.mean if g else 0.0 for p, g in zip(pars, gauss)])
        self.dof -= len(pars)
        self._templates = self._whitened_templates(self.cosmo)

    def _whitened_templates(self, cosmo):
        tpl = super()._whitened_templates(cosmo)
        lin = getattr(self, "_lin", None)
        if lin is not None and lin.size:
            F = tpl["G"][np.ix_(lin, lin)] + np.diag(self._lin_ivar)
            tpl["F_inv"] = np.linalg.inv(F)
        return tpl

    def _analytic_best(self, c, tpl):
        """(n, n_lin) conditional best fit A = F⁻¹b of the marginalised parameters, and b."""
        lin = self._lin
        b = tpl["g"][lin] + self._lin_ivar * self._lin_mean - c @ tpl["G"][:, lin]
        return b @ tpl["F_inv"], b

    def _chi2_fast(self, values, tpl):
        c = self.forward.design(values, tpl)
        if not self._lin.size:
            return self._dd - 2.0 * (c @ tpl["g"]) + np.sum((c @ tpl["G"]) * c, axis=1)
        c[:, self._lin] = 0.0
        chi2 = self._dd - 2.0 * (c @ tpl["g"]) + np.sum((c @ tpl["G"]) * c, axis=1)
        a, b = self._analytic_best(c, tpl)
        return chi2 + float(self._lin_ivar @ self._lin_mean ** 2) - np.sum(a * b, axis=1)

    def model_observables(self, theta):
        """Model per (spectrum, ℓ) at theta; marginalised parameters at their conditional best fit."""
        params = self.theta_to_dict(theta)
        if self._lin.size:
            vals = self._values(params)
            c = self.forward.design(vals, self._templates)
            c[:, self._lin] = 0.0
            a = self._analytic_best(c, self._templates)[0][0]
            params.update(zip(self._lin_names, a))
        vec = self.model_vector(params, direct=False)
        parts, pos = [], 0
        for k in self.observables()["k"]:
            parts.append(vec[pos:pos + k.size])
            pos += k.size
        return parts

    def _log_prob_single(self, theta):
        if self._lin.size or self.t_likelihood:
            return float(self.log_prob(theta[None])[0])
        lo, hi, mean, inv_sig, _ = self.params.prior_arrays()
        th = theta.tolist()
        lp = 0.0
        for i, v in enumerate(th):
            if not lo[i] <= v <= hi[i]:
                return -np.inf
            if inv_sig[i]:
                lp -= 0.5 * ((v - mean[i]) * inv_sig[i]) ** 2
        vals = dict(self._fixed_floats)
        vals.update(zip(self.parameter_names, th))
        x = self.forward.x_point(vals)
        tpl = self._templates
        c = x[tpl["ia"]] * x[tpl["ib"]]
        noise = [vals[n] for n in tpl["noise_names"]]
        c = (np.concatenate([c, (vals["nu_obs"] ** 2 - 1.0) * c, noise]) if self.observer_on
             else np.concatenate([c, noise]))
        chi2 = self._dd - 2.0 * (c @ tpl["g"]) + c @ (tpl["G"] @ c)
        res = lp - 0.5 * self.precision_scale * chi2
        return res if res == res else -np.inf

    @property
    def varied_names(self):
        names = set(self.parameter_names) | {n for n in self.known if n.startswith(("b1_", "shot_noise_"))}
        if "fnl" in self.effects:
            names |= {n for n in self.known if n.startswith("p_")}
        if "fnl" in self.effects:
            names.add("fnl")
        if self.observer_on:
            names.add("nu_obs")
        return names

    def _values(self, params):
        vals = {k: np.atleast_1d(float(v)) for k, v in self._fixed_floats.items()}
        varied = self.varied_names
        for k, v in params.items():
            if k not in self.known:
                from ..config.parameters import suggest
                raise ConfigError(f"unknown parameter '{k}'{suggest(k, self.known)}")
            x = np.atleast_1d(np.asarray(v, float))
            if k not in varied and not np.all(x == self._fixed_floats[k]):
                raise ConfigError(f"parameter '{k}' = {float(x[0]):g} cannot be varied by this "
                                  f"likelihood: it is held at {self._fixed_floats[k]:g}; sample it "
                                  f"(parameters.{k}) to vary it")
            vals[k] = x
        return vals

    def model_vector(self, params, direct=True):
        vals = self._values(params)
        if direct:
            return self.forward.full(vals)[0][self.mask]
        tpl = self._templates
        return (self.forward.design(vals, tpl) @ tpl["M"])[0] - self._sn_shift

    @property
    def _b1_free(self):
        return [t["name"] for t in self.forward.tracers if self.params.is_free(f"b1_{t['name']}")]

    @property
    def derived_names(self):
        """b1 σ8(z) of each tracer whose b1 is sampled (``b1_sigma8_NAME``)."""
        return [f"b1_sigma8_{n}" for n in self._b1_free]

    @property
    def derived_labels(self):
        return [rf"b_1\sigma_8^{{\rm {n}}}" for n in self._b1_free]

    def derived(self, theta):
        """(n, len(derived_names)): b1_X σ8 D(z)/D(0) at the sample's cosmology."""
        vals = self._theta_values(np.atleast_2d(theta))
        n = np.atleast_2d(theta).shape[0]

        def amplitude(cosmo):
            return cosmo.sigma8 * cosmo.growth_factor(self.z) / cosmo.growth_factor(0.0)
        if self.cosmo_free:
            amp = np.array([amplitude(self.forward.cosmology({k: float(vals[k][i]) for k in self.cosmo_free}))
                            for i in range(n)])
        else:
            amp = np.full(n, amplitude(self.cosmo))
        return np.column_stack([vals[f"b1_{t}"] * amp for t in self._b1_free] or [np.empty((n, 0))])

    def observables(self):
        """Data per (spectrum, multipole) for plots: spectra, ells, k, data, sigma (masked)."""
        sig = np.sqrt(np.diag(self.covariance))
        out = dict(spectra=[], ells=[], k=[], data=[], sigma=[])
        pos = 0
        for s in self.forward.spectra:
            m2 = s.mask.reshape(len(s.part.ells), -1)
            for j, l in enumerate(s.part.ells):
                n = int(m2[j].sum())
                if not n:
                    continue
                out["spectra"].append(s.label)
                out["ells"].append(l)
                out["k"].append(s.part.k_eff[m2[j]])
                out["data"].append(self.data[pos:pos + n])
                out["sigma"].append(sig[pos:pos + n])
                pos += n
        return out

    def describe(self):
        cfg = self.config
        lines = [f"run: {cfg['run']}  (config hash {self.config_hash})",
                 f"survey: z = {self.z:g}, geometry {cfg['survey']['geometry']['shape']}, volume "
                 f"{self.volume:.4g} (Mpc/h)^3; window: {'yes' if self.window is not None else 'no'}, "
                 f"integral constraint: {self.survey.ic}",
                 "tracers: " + "; ".join(f"{t['name']} (nbar {t['nbar']:g} (h/Mpc)^3, b1 {t['b1']:g}, "
                                         f"p {t['p']:g})" for t in self.forward.tracers),
                 f"effects on: {', '.join(self.effects) or 'none'}; observer term: "
                 + (f"yes ({cfg['observer']['field']})" if self.observer_on else "no"),
                 self.forward.engine_line(),
                 f"data: {self.data.size} points in {len(self.forward.spectra)} spectra"]
        for s in self.forward.spectra:
            k = s.part.k_eff[s.mask.reshape(len(s.part.ells), -1).any(0)]
            lines.append(f"  {s.label:<16s} ells {list(s.part.ells)}, k in [{k.min():.4g}, {k.max():.4g}] "
                         f"h/Mpc, {int(s.mask.sum())} points"
                         + (f", noise {s.noise_name}" if s.noise_name else ""))
        lines.append(covariance_line(self))
        if self._lin.size:
            lines.append("marginalised analytically: " + ", ".join(
                f"{n} ({'Gaussian N(%g, %g)' % (m, iv ** -0.5) if iv else 'flat, unbounded'})"
                for n, m, iv in zip(self._lin_names, self._lin_mean, self._lin_ivar)))
        return "\n".join(lines + parameter_lines(self.params))


def parameter_lines(params):
    """Lines of ``describe``: the sampled parameters with their priors and starts, the fixed ones."""
    lines = ["sampled parameters:"]
    lines += [f"  {p.name:<18s} {p.prior.describe():<30s} start {p.start:g}" for p in params.free]
    if params.fixed:
        lines.append("fixed: " + ", ".join(f"{k} = {v:g}" for k, v in params.fixed.items()))
    return lines


# --- factories --------------------------------------------------------------------------------
def data_spectra(cfg, srv):
    """(data vector, the file's vector, positions of the former in the latter): the spectra of
    ``data.file`` (a multi-tracer file, or a single-tracer file when the config has one tracer)
    that the config names, in its order (a subset of the file's tracers and spectra is allowed);
    or empty bins for ``data.mock`` (then the file's vector is None)."""
    names = [t["name"] for t in cfg["tracers"]]
    pairs = [tuple(s["pair"]) for s in cfg["spectra"]]
    d = cfg["data"]
    if "file" in d:
        sv = load_spectra(cfg.resolve(d["file"]), names[0] if len(names) == 1 else None)
        absent = [t for t in names if t not in sv.tracers]
        if absent:
            raise DataError(f"{d['file']}: the config's tracers {absent} are not in the file "
                            f"(its tracers: {list(sv.tracers)})")
        offsets = np.cumsum([0] + sv.sizes)
        parts, take = [], []
        for pair, spec in zip(pairs, cfg["spectra"]):
            i = sv.index(pair)
            if i is None:
                raise DataError(f"{d['file']}: no spectrum {pair_label(pair)} (the file has "
                                f"{', '.join(pair_label(p) for p in sv.pairs)})")
            if sv.pairs[i] != pair:
                raise DataError(f"{d['file']}: spectrum {pair_label(sv.pairs[i])} is stored as "
                                f"<{sv.pairs[i][0]} {sv.pairs[i][1]}^*>; write the config pair in "
                                f"that order, [{sv.pairs[i][0]}, {sv.pairs[i][1]}] (odd multipoles "
                                "change sign with the order)")
            missing = [l for l in spec["ells"] if l not in sv.parts[i].ells]
            if missing:
                raise DataError(f"{d['file']}: spectrum {pair_label(pair)}: the config asks for "
                                f"ells {missing} but the file has {list(sv.parts[i].ells)}")
            parts.append(sv.parts[i])
            take.append(np.arange(offsets[i], offsets[i + 1]))
        return (SpectraVector(names, pairs, parts, sv.meta, source=sv.source), sv,
                np.concatenate(take))
    m = d["mock"]
    edges = np.linspace(m["k_min"], m["k_max"], m["n_bins"] + 1)
    kb = KBins.from_edges(edges, volume=srv.volume)
    parts = [DataVector(tuple(s["ells"]), edges, kb.k_eff, kb.n_modes,
                        np.zeros((len(s["ells"]), edges.size - 1)), source="mock")
             for s in cfg["spectra"]]
    return SpectraVector(names, pairs, parts, source="mock"), None, None


def spectra_models(cfg, srv, sv, k_theory):
    """[Spectrum] of the config: operator, mask, noise row and observer term of each spectrum."""
    from . import factories as fac
    nbar = {t["name"]: t["nbar"] for t in cfg["tracers"]}
    out = []
    for spec, pair, part in zip(cfg["spectra"], sv.pairs, sv.parts):
        x, y = pair
        auto = x == y
        bins = KBins(part.edges, part.k_eff, part.n_modes)
        op = WindowMatrix(k_theory, ELLS_AUTO if auto else ELLS_CROSS, bins, part.ells,
                          window=srv.window, ic=srv.ic)
        mask = part.mask(tuple(spec["ells"]), spec.get("k_min"), spec.get("k_max"))
        if auto:
            noise_name, scale = f"shot_noise_{x}", 1.0 / nbar[x]
        elif "shared_nbar" in spec:
            noise_name, scale = f"shot_noise_{x}_{y}", spec["shared_nbar"] / (nbar[x] * nbar[y])
        else:
            noise_name, scale = None, 0.0
        used = part.k_eff[mask.reshape(len(part.ells), -1).any(0)]
        obs = fac.observer(cfg, srv, bins, part.ells, op.ic, float(used[0]))
        out.append(Spectrum(pair, part, op, mask, noise_name, scale, cfg["data"]["shot_noise_subtracted"],
                            obs))
    return out


def analytic_covariance(sv, cosmo, forward, fiducial):
    """Analytic Gaussian covariance of all spectra at the fiducial model (common k bins)."""
    first = sv.parts[0]
    for pair, p in zip(sv.pairs, sv.parts):
        if not np.array_equal(p.edges, first.edges):
            raise DataError(f"{sv.source}: covariance.kind: gaussian needs the same k bins for every "
                            f"spectrum ({pair_label(pair)} differs); give a covariance file")
    k = first.k_eff
    pm = cosmo.power(k, forward.z)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        kern = {n: tr.kernel(cosmo, forward.z, k, forward.tracer(fiducial, n), effects=forward.effects)
                for n in forward.names}

    def pkmu(a, b, mu):
        za, zb = kern[a], kern[b]
        m = mu[None, :]
        return ((za.A[:, None] + 1j * m * za.B[:, None] + za.F * m ** 2)
                * (zb.A[:, None] - 1j * m * zb.B[:, None] + zb.F * m ** 2) * pm[:, None])

    noise = {}
    for s in forward.spectra:
        if s.noise_name is not None:
            noise[s.pair] = s.noise_scale
    spectra = [(pair, part.ells) for pair, part in zip(sv.pairs, sv.parts)]
    return covariance_function()(first.n_modes, spectra, pkmu, noise)


def mock_covariance(cfg, layout, mask, take):
    """MockCovariance of ``covariance.mocks`` (multi-tracer files laid out like ``layout``, the
    data file's vector or the config's), refusing too few mocks for the points fitted (``mask``)
    in one line; ``take`` (positions of the fitted spectra in ``layout``, or None) selects the
    blocks, the Hartlap factor is then that of the points fitted."""
    pattern = cfg["covariance"]["mocks"]
    one = layout.tracers[0] if len(layout.tracers) == 1 else None
    mc, first = spectra_covariance_from_mocks(cfg.resolve(pattern), one)
    mine = [(p, d.ells, d.n_bins) for p, d in zip(layout.pairs, layout.parts)]
    theirs = [(p, d.ells, d.n_bins) for p, d in zip(first.pairs, first.parts)]
    if theirs != mine or any(not np.allclose(a.edges, b.edges) for a, b in zip(first.parts, layout.parts)):
        raise DataError(f"{pattern}: the mocks' spectra {[(pair_label(p), list(e)) for p, e, _ in theirs]} "
                        f"or k bins differ from the data's {[(pair_label(p), list(e)) for p, e, _ in mine]}; "
                        "make the mocks with ergofit simulate on this config")
    mc.require(int(np.count_nonzero(mask)), f"{cfg.path}: covariance.mocks '{pattern}'")
    return mc


def warn_plane_parallel(srv, cosmo, spectra):
    """Say where the plane-parallel kernel is stretched, and that odd multipoles of a cross
    spectrum miss the wide-angle dipole (the curved-sky engine has it)."""
    from . import factories as fac
    for s in spectra:
        fac.warn_regime(srv, cosmo, s.part, s.mask, srv.ic)
        fitted = s.mask.reshape(len(s.part.ells), -1).any(1)
        if not s.auto and any(f for l, f in zip(s.part.ells, fitted) if l % 2):
            warnings.warn(f"spectrum {s.label}: odd multipoles fitted with the plane-parallel model; "
                          "the wide-angle dipole ~ (b_X - b_Y) P/(k chi) (not included) is of the "
                          "same order as the Doppler dipole at every k: use engine.kind: curved_sky "
                          "or read the README's regime of validity", tr.PlaneParallelWarning,
                          stacklevel=3)


def build_multi(cfg):
    """The :class:`MultiLikelihood` of a validated multi-tracer config."""
    from . import factories as fac
    known = parameter_table(cfg)
    params = fac.parameters(cfg)
    cosmo = fac.cosmology(cfg)
    srv = fac.survey(cfg, cosmo)
    fiducial = fiducial_values(cfg, known)          # defaults of the table: the tracers entries
    sv, file_sv, take = data_spectra(cfg, srv)
    cosmo_free = [n for n in params.names if n in COSMO_PARAMS]
    common = dict(held=held_values(fiducial, params.fixed),
                  lin_free={t["name"]: [p for p in ("b_e", "s") if params.is_free(f"{p}_{t['name']}")]
                            for t in cfg["tracers"]},
                  cosmology=functools.partial(fac.cosmology, cfg),
                  cosmo_keys=[k for k in COSMO_PARAMS if k in cosmo_free or k in cfg["fixed"]])
    if is_curved(cfg):                               # engine.kind: curved_sky
        from .curved_multitracer import forward_model
        forward = forward_model(cfg, srv, sv, cosmo_free, **common)
    else:
        k_theory = theory_k_grid()
        forward = MultiForwardModel(srv, cfg["tracers"], spectra_models(cfg, srv, sv, k_theory),
                                    k_theory, **common)
        warn_plane_parallel(srv, cosmo, forward.spectra)
    spectra = forward.spectra
    kind, mock_cov = cfg["covariance"]["kind"], None
    if kind in ("file", "mocks"):
        if kind == "file":
            cov = load_spectra_covariance(cfg.resolve(cfg["covariance"]["file"]), file_sv or sv)
        else:
            mock_cov = mock_covariance(cfg, file_sv or sv, forward.mask, take)
            cov = mock_cov.covariance
        if take is not None:
            cov = cov[np.ix_(take, take)]            # the blocks of the spectra fitted
    elif kind == "harmonic":                         # curved sky (model/curved_multitracer.py)
        cov = forward.harmonic_covariance(cosmo, fiducial)
    else:                                            # gaussian (validated)
        cov = analytic_covariance(sv, cosmo, forward, fiducial)
    if cfg["data"].get("mock") is not None:
        mean, meta = fac.mock_vector(cfg, forward, fiducial, cosmo_free, cov)
        parts, pos = [], 0
        for p in sv.parts:
            n = p.flat.size
            parts.append(DataVector(p.ells, p.edges, p.k_eff, p.n_modes,
                                    mean[pos:pos + n].reshape(p.values.shape), source="mock"))
            pos += n
        sv = SpectraVector(sv.tracers, sv.pairs, parts, meta, source="mock")
        for s, p in zip(spectra, parts):
            s.part = p
    return MultiLikelihood(cfg, params, cosmo, srv, sv, forward, cov, fiducial, known, mock_cov)
