"""The Gaussian likelihood of the measured multipoles: stores the parts, whitens, evaluates.

Built by :func:`likelihood.model.factories.build` from one factory per config section. With the data
whitened by the Cholesky factor L of the covariance (C = L Lᵀ), the fast path of
:mod:`likelihood.model.templates` gives χ² = |d_w|² − 2 c·g + cᵀ G c with g = W d_w, G = W Wᵀ,
W = L⁻¹ T: an evaluation is a handful of tiny dot products. When cosmological parameters are
sampled the templates are rebuilt per walker (the window matrix is reused). The direct path
(``log_likelihood_direct``, ``model_vector(direct=True)``) recomputes the full model and must
agree with the fast path to 1e-10 (tests).
"""
from __future__ import annotations

import numpy as np
from scipy.linalg import cho_solve

from ..config.parameters import DERIVED, KNOWN, suggest
from ..data import check_covariance, condition_number
from ..errors import ConfigError, ErgofitError
from ..theory import tracer as tr
from .fiducial import COSMO_PARAMS, make_tracer


def mock_corrections(cfg, mock_cov, n_data, n_params):
    """(n_mocks, t_likelihood, precision_scale, percival_m1) of a covariance from mocks
    (``mock_cov`` a MockCovariance, or None: (None, False, 1.0, None)): the Sellentin-Heavens
    t-likelihood with covariance.method: t, else the Hartlap factor; Percival et al. (2014)
    eq. 18: parameter variances from a mock covariance are inflated by m1 (reported; the
    posterior itself is not rescaled)."""
    if mock_cov is None:
        return None, False, 1.0, None
    t = cfg["covariance"]["kind"] == "mocks" and cfg["covariance"]["method"] == "t"
    return (mock_cov.n_mocks, t, 1.0 if t else mock_cov.hartlap(n_data),
            mock_cov.percival_m1(n_data, n_params))


def covariance_line(lik):
    """The ``describe`` line of the covariance of a likelihood (with its mock corrections)."""
    return (f"covariance: {lik.config['covariance']['kind']}, condition number {lik.condition_number:.3g}"
            + (f"; {lik.n_mocks} mocks, "
               + ("Sellentin-Heavens t-likelihood" if lik.t_likelihood else
                  f"Hartlap factor {lik.precision_scale:.3f}")
               + ("" if lik.t_likelihood else
                  f"; Percival m1 = {lik.percival_m1:.3f} (inflate parameter errors by "
                  f"{np.sqrt(lik.percival_m1):.3f})") if lik.mock_cov is not None else ""))


class Likelihood:
    """Gaussian likelihood of the measured multipoles; built by :func:`likelihood.build`.

    Public surface: ``parameter_names``, ``labels``, ``prior_bounds``, ``start``, ``start_scale``,
    ``log_prob(theta)`` (vectorised over walkers), ``log_likelihood(params)``,
    ``log_likelihood_direct(params)``, ``model_vector(params)``, ``chi2(theta)``, ``derived(theta)``.
    """

    def __init__(self, cfg, params, cosmo, survey, data_full, mask, forward, covariance_full,
                 mock_cov, fiducial):
        self.config = cfg
        self.config_hash = cfg.hash
        self.params = params
        self.parameter_names = params.names
        self.labels = params.labels
        self.prior_bounds = params.bounds
        self.start = params.start
        self.start_scale = params.start_scale
        self.survey = survey
        self.z, self.nbar, self.p, self.effects = survey.z, survey.nbar, survey.p, survey.effects
        self.window, self.volume = survey.window, survey.volume
        self.observer_on = survey.observer_on
        self.cosmo = cosmo
        self.cosmo_free = [n for n in self.parameter_names if n in COSMO_PARAMS]
        self.forward = forward
        self.lin_free = forward.lin_free
        self.sn_sub = forward.sn_sub
        self.operator, self.observer = forward.operator, forward.observer
        self.bins, self.k_theory, self.ells_theory = forward.operator.bins, forward.k_theory, forward.ells_theory
        self.ells = tuple(cfg["data"]["ells"])
        self.fiducial = fiducial
        self.data_full = data_full
        self.mask = mask
        self.covariance_full, self.mock_cov = covariance_full, mock_cov
        self.data = data_full.flat[mask]
        cov = covariance_full[np.ix_(mask, mask)]
        self.chol = check_covariance(cov, n=self.data.size, source="covariance")
        self.covariance = cov
        self.condition_number = condition_number(cov)
        (self.n_mocks, self.t_likelihood, self.precision_scale,
         self.percival_m1) = mock_corrections(cfg, mock_cov, self.data.size, len(self.parameter_names))
        self.dof = int(self.data.size - len(self.parameter_names))
        self._fixed_floats = forward.held
        self._chol_inv = np.linalg.inv(self.chol)   # tiny matrix; matmul beats repeated solves
        # the estimator subtracts a flat 1/n̄ from the monopole (shot_noise_subtracted); the model
        # carries A_sn × (noise response incl. the integral constraint) − that flat term, whose
        # constant part is moved to the data side here so the fast path stays a quadratic form
        self._sn_shift = self.sn_sub * forward.monopole[mask] / self.nbar
        self._d_w = self._chol_inv @ (self.data + self._sn_shift)
        self._dd = float(self._d_w @ self._d_w)
        self._templates = self._whitened_templates(cosmo)

    def _whitened_templates(self, cosmo):
        """The forward model's templates at ``cosmo`` with W = L⁻¹ M, G = W Wᵀ, g = W d_w."""
        tpl = self.forward.templates(cosmo)
        W = tpl["M"] @ self._chol_inv.T
        tpl.update(W=W, G=W @ W.T, g=W @ self._d_w)
        return tpl

    # --- evaluation -----------------------------------------------------------------------------
    def _chi2_fast(self, values, tpl):
        c = self.forward.design(values, tpl)
        return self._dd - 2.0 * (c @ tpl["g"]) + np.sum((c @ tpl["G"]) * c, axis=1)

    def _loglike_from_chi2(self, chi2):
        """Gaussian (Hartlap-scaled) or t log likelihood; −inf, never NaN, for a non-finite χ²
        (overflowing parameter values such as b1 = 1e154)."""
        chi2 = np.where(np.isnan(chi2), np.inf, chi2)
        if self.t_likelihood:
            ns = self.n_mocks
            return -0.5 * ns * np.log1p(chi2 / (ns - 1.0))
        return -0.5 * self.precision_scale * chi2

    def log_prob(self, theta):
        """Log posterior for an (n_walkers, n_dim) array (or one point); −inf outside the prior."""
        theta = np.asarray(theta, float)
        single = theta.ndim == 1
        n_dim = len(self.parameter_names)
        if theta.ndim not in (1, 2) or theta.shape[-1] != n_dim:
            raise ErgofitError(f"log_prob: theta of shape {theta.shape}: expected ({n_dim},) or "
                               f"(n_walkers, {n_dim}) for the parameters {', '.join(self.parameter_names)}")
        if single and not self.cosmo_free:
            return self._log_prob_single(theta)
        theta = np.atleast_2d(theta)
        lp = self.params.log_prior(theta)
        ok = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            values = self._theta_values(theta[ok])
            chi2 = self._chi2(values)
            ll = self._loglike_from_chi2(chi2)
            res = lp[ok] + ll
            out[ok] = np.where(np.isfinite(res), res, -np.inf)
        return out[0] if single else out

    def _log_prob_single(self, theta):
        """Scalar fast path for one point at fixed cosmology (what a per-walker pool calls)."""
        lo, hi, mean, inv_sig, any_gauss = self.params.prior_arrays()
        th = theta.tolist()
        lp = 0.0
        for i, x in enumerate(th):
            if not lo[i] <= x <= hi[i]:       # also False for NaN
                return -np.inf
            if inv_sig[i]:
                lp -= 0.5 * ((x - mean[i]) * inv_sig[i]) ** 2
        vals = dict(self._fixed_floats)
        vals.update(zip(self.parameter_names, th))
        x = self._amplitudes(vals)
        tpl = self._templates
        c = [x[a] * x[b] for a, b in tpl["pair_list"]]
        if self.observer is not None:
            w = vals["nu_obs"] ** 2 - 1.0
            c += [w * ci for ci in c]
        c.append(vals["shot_noise"])
        c = np.array(c)
        chi2 = self._dd - 2.0 * (c @ tpl["g"]) + c @ (tpl["G"] @ c)
        res = lp + float(self._loglike_from_chi2(chi2))
        return res if res == res else -np.inf

    def _amplitudes(self, vals):
        """The forward model's coefficient vector x for one point (floats; same order as
        ``ForwardModel.coefficients``), without numpy overhead."""
        b1 = vals["b1"]
        x = [1.0, b1]
        if "fnl" in self.effects:
            x.append(vals["fnl"] * (b1 - self.p))
        for name in self.lin_free:
            x.append(vals[name])
        return x

    def _chi2(self, values):
        if not self.cosmo_free:
            return self._chi2_fast(values, self._templates)
        n = max(np.size(v) for v in values.values())
        chi2 = np.empty(n)
        for i in range(n):
            row = {k: (v[i] if np.ndim(v) else v) for k, v in values.items()}
            try:
                cosmo = self.forward.cosmology({k: row[k] for k in self.cosmo_free})
                tpl = self._whitened_templates(cosmo)
            except ValueError:
                chi2[i] = np.inf   # e.g. a cosmology the background cannot describe
                continue
            chi2[i] = self._chi2_fast(row, tpl)[0]
        return chi2

    def _theta_values(self, theta):
        """Dict name -> (n,) array (sampled) or float (fixed/fiducial) for (n, n_dim) theta."""
        theta = np.atleast_2d(np.asarray(theta, float))
        vals = dict(self._fixed_floats)
        for i, name in enumerate(self.parameter_names):
            vals[name] = theta[:, i]
        return vals

    @property
    def varied_names(self):
        """Parameters a call to ``log_likelihood``/``model_vector`` may set: the sampled ones plus
        those that enter the fast path's coefficients whether sampled or not (b1, shot_noise,
        f_NL when its effect is on, ν when the observer term is on)."""
        names = set(self.parameter_names) | {"b1", "shot_noise"}
        if "fnl" in self.effects:
            names.add("fnl")
        if self.observer is not None:
            names.add("nu_obs")
        return names

    def _values(self, params):
        """Parameter arrays for a dict of values; the others at their fixed/fiducial values.

        A parameter this likelihood cannot vary (a fixed b_e or s is folded into the templates, a
        cosmological parameter that is not sampled fixes the templates' cosmology) is refused by
        name unless it equals the value held, so no value is ever silently dropped.
        """
        vals = {k: np.atleast_1d(float(v)) for k, v in self.fiducial.items()}
        for k in self.params.fixed:
            vals[k] = np.atleast_1d(float(self.params.fixed[k]))
        varied = self.varied_names
        for k, v in params.items():
            if k not in KNOWN:
                raise ConfigError(f"unknown parameter '{k}'{suggest(k, KNOWN)}")
            x = np.atleast_1d(np.asarray(v, float))
            if k not in varied and not np.all(x == self._fixed_floats[k]):
                why = {"fnl": " (effects.fnl is off)", "nu_obs": " (effects.observer is off)"}.get(
                    k, f"; sample it (parameters.{k}) to vary it")
                raise ConfigError(f"parameter '{k}' = {float(x[0]):g} cannot be varied by this "
                                  f"likelihood: it is held at {self._fixed_floats[k]:g}{why}")
            vals[k] = x
        return vals

    def log_likelihood(self, params):
        """Log likelihood (fast path) for a dict of parameter values (others at fiducial/fixed);
        −inf (never NaN) where the model is not finite."""
        vals = self._values(params)
        with np.errstate(over="ignore", invalid="ignore"):
            return float(self._loglike_from_chi2(self._chi2(vals))[0])

    def model_full(self, values, cosmo_keys=None):
        """Full (unmasked) model vector(s) by the direct path for arrays of parameter values."""
        return self.forward.full(values, cosmo_keys)

    def model_vector(self, params, direct=True):
        """Masked model vector for a dict of parameters (direct path by default)."""
        vals = self._values(params)
        if direct:
            return self.model_full(vals)[0][self.mask]
        tpl = self._templates
        if self.cosmo_free:   # the templates of this point's cosmology, as log_likelihood uses
            tpl = self.forward.templates(self.forward.cosmology(
                {k: float(vals[k][0]) for k in self.cosmo_free}))
        return (self.forward.design(vals, tpl) @ tpl["M"])[0] - self._sn_shift

    def log_likelihood_direct(self, params):
        """Log likelihood by full recomputation (reference for the fast path)."""
        r = self.data - self.model_vector(params, direct=True)
        chi2 = float(r @ cho_solve((self.chol, True), r))
        return float(self._loglike_from_chi2(np.array([chi2]))[0])

    def __reduce__(self):
        """Pickle as "the model of this config": process/MPI pools send the config (a few kB)
        and each worker rebuilds the likelihood once (window matrix from the disk cache)."""
        cfg = self.config
        from .factories import rebuild_in_worker
        return (rebuild_in_worker, (cfg.raw, cfg.path, cfg.base_dir, self.config_hash))

    # --- helpers for the sampler/summary -------------------------------------------------------
    def n_walkers_min(self):
        return 2 * len(self.parameter_names)

    def theta_to_dict(self, theta):
        return {n: float(v) for n, v in zip(self.parameter_names, np.asarray(theta, float))}

    def chi2(self, theta):
        vals = self._theta_values(np.atleast_2d(theta))
        return float(self._chi2(vals)[0])

    @property
    def derived_names(self):
        """Derived parameters that vary over the posterior: f_NL mimicked by the projection terms
        (when they are on) and b1 σ8(z) (when b1 is sampled)."""
        names = []
        proj = any(e in self.effects for e in ("doppler", "potential"))
        if proj and any(self.params.is_free(n) for n in ("b1", "b_e", "s")):
            names.append("fnl_eff")
        if self.params.is_free("b1"):
            names.append("b1_sigma8")
        return names

    @property
    def derived_labels(self):
        return [DERIVED[n].label for n in self.derived_names]

    def derived(self, theta):
        """(n, len(derived_names)) derived parameters for (n, n_dim) theta."""
        theta = np.atleast_2d(theta)
        vals = self._theta_values(theta)
        names = self.derived_names
        out = np.empty((theta.shape[0], len(names)))
        cosmos = {}

        def cosmo_of(i):
            """The sample's own cosmology when cosmological parameters are sampled."""
            if not self.cosmo_free:
                return self.cosmo
            key = tuple(float(vals[k][i]) for k in self.cosmo_free)
            if key not in cosmos:
                cosmos[key] = self.forward.cosmology(dict(zip(self.cosmo_free, key)))
            return cosmos[key]

        cache = {}
        for i in range(theta.shape[0]):
            cosmo = cosmo_of(i)
            if "fnl_eff" in names:
                t = make_tracer(vals, self.p, self.nbar, i)
                key = (id(cosmo), t.b1, t.b_e, t.s)
                if key not in cache:
                    cache[key] = tr.effective_fnl(cosmo, self.z, t, effects=self.effects)
                out[i, names.index("fnl_eff")] = cache[key]
            if "b1_sigma8" in names:
                b1 = vals["b1"][i] if np.ndim(vals["b1"]) else vals["b1"]
                out[i, names.index("b1_sigma8")] = (b1 * cosmo.sigma8 * cosmo.growth_factor(self.z)
                                                    / cosmo.growth_factor(0.0))
        return out

    def observables(self):
        """Data per multipole for plots: ells, k, data, sigma (masked)."""
        sig = np.sqrt(np.diag(self.covariance))
        m2 = self.mask.reshape(len(self.data_full.ells), -1)
        out = dict(ells=[], k=[], data=[], sigma=[])
        pos = 0
        for j, l in enumerate(self.data_full.ells):
            sel = m2[j]
            if not sel.any():
                continue
            n = int(sel.sum())
            out["ells"].append(l)
            out["k"].append(self.data_full.k_eff[sel])
            out["data"].append(self.data[pos:pos + n])
            out["sigma"].append(sig[pos:pos + n])
            pos += n
        return out

    def model_observables(self, theta):
        vec = self.model_vector(self.theta_to_dict(theta), direct=False)
        parts, pos = [], 0
        for k in self.observables()["k"]:
            parts.append(vec[pos:pos + k.size])
            pos += k.size
        return parts

    def describe(self):
        """Multi-line human summary of the model (used by ``ergofit check``)."""
        cfg = self.config
        lines = [f"run: {cfg['run']}  (config hash {self.config_hash})",
                 f"survey: z = {self.z:g}, nbar = {self.nbar:g} (h/Mpc)^3, geometry "
                 f"{cfg['survey']['geometry']['shape']}, volume {self.volume:.4g} (Mpc/h)^3",
                 f"effects on: {', '.join(self.effects) or 'none'}; window: "
                 f"{'yes' if self.window is not None else 'no'}; integral constraint: {self.operator.ic}; "
                 f"observer term: {'yes (' + cfg['observer']['field'] + ')' if self.observer_on else 'no'}",
                 f"data: {self.data.size} points, multipoles {list(self.ells)}, k in "
                 f"[{self.data_full.k_eff[self.mask.reshape(len(self.data_full.ells), -1).any(0)].min():.4g}, "
                 f"{self.data_full.k_eff[self.mask.reshape(len(self.data_full.ells), -1).any(0)].max():.4g}] h/Mpc",
                 covariance_line(self),
                 "sampled parameters:"]
        for p in self.params.free:
            lines.append(f"  {p.name:<10s} {p.prior.describe():<30s} start {p.start:g}")
        if self.params.fixed:
            lines.append("fixed: " + ", ".join(f"{k} = {v:g}" for k, v in self.params.fixed.items()))
        return "\n".join(lines)
