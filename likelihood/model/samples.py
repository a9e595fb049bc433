"""Several independent samples in one run: the log-likelihood is the sum of the samples'.

Each sample is a :class:`~likelihood.model.multitracer.MultiLikelihood` of its own validated
config (survey, tracers, spectra, data, covariance); the global parameter vector θ holds the
shared parameters (f_NL, ν, cosmology) and every sample's nuisance parameters, and each sample
reads its own columns. The prior is evaluated once, on θ.
"""
from __future__ import annotations

import numpy as np

from ..config import parameter_set
from ..errors import ErgofitError
from .fiducial import COSMO_PARAMS
from .likelihood import Likelihood
from .multitracer import build_multi, parameter_lines


class SampleSum(Likelihood):
    """Sum of independent sample likelihoods over one parameter vector (public surface of
    :class:`~likelihood.model.likelihood.Likelihood` for the sampler and the reports)."""

    def __init__(self, cfg, parts):
        self.config, self.config_hash = cfg, cfg.hash
        self.params = parameter_set(cfg)
        self.parameter_names = self.params.names
        self.labels, self.prior_bounds = self.params.labels, self.params.bounds
        self.start, self.start_scale = self.params.start, self.params.start_scale
        self.parts = parts
        self.names = [s["name"] for s in cfg["samples"]]
        self.cosmo_free = [n for n in self.parameter_names if n in COSMO_PARAMS]
        self.columns = [np.array([self.parameter_names.index(n) for n in p.parameter_names], int)
                        for p in parts]
        self.fiducial = {}
        for p in parts:
            self.fiducial.update(p.fiducial)
        self.dof = int(sum(p.data.size for p in parts) - len(self.parameter_names)
                       - sum(len(p._lin_names) for p in parts))
        self.effects = parts[0].effects

    # the parent's log_prob runs prior → _theta_values → _chi2 → _loglike_from_chi2; with unit
    # precision scale and no t-likelihood here, _chi2 returns −2 Σ ln L_i of the samples (each
    # sample's own Hartlap factor or t-likelihood for a mock covariance included)
    t_likelihood, precision_scale = False, 1.0

    def _theta_values(self, theta):
        return np.atleast_2d(np.asarray(theta, float))

    def _chi2(self, theta):
        """(n,) sum of the samples' χ² for (n, n_dim) theta; each sample reads its own columns."""
        return sum(-2.0 * p._loglike_from_chi2(p._chi2(p._theta_values(theta[:, cols])))
                   for p, cols in zip(self.parts, self.columns))

    def _log_prob_single(self, theta):
        return float(self.log_prob(theta[None])[0])

    def log_likelihood(self, params):
        """Sum of the samples' log-likelihoods for a dict of values (each sample takes its own)."""
        return float(sum(p.log_likelihood({k: v for k, v in params.items() if k in p.known})
                         for p in self.parts))

    def log_likelihood_direct(self, params):
        return float(sum(p.log_likelihood_direct({k: v for k, v in params.items() if k in p.known})
                         for p in self.parts))

    @property
    def derived_names(self):
        return [n for p in self.parts for n in p.derived_names]

    @property
    def derived_labels(self):
        return [lab for p in self.parts for lab in p.derived_labels]

    def derived(self, theta):
        theta = np.atleast_2d(np.asarray(theta, float))
        return np.hstack([p.derived(theta[:, cols]) for p, cols in zip(self.parts, self.columns)])

    def observables(self):
        """Data per (sample, spectrum, multipole): ``spectra`` the spectrum labels, ``samples``
        the sample names."""
        out = dict(spectra=[], samples=[], ells=[], k=[], data=[], sigma=[])
        for name, p in zip(self.names, self.parts):
            o = p.observables()
            out["spectra"] += list(o["spectra"])
            out["samples"] += [name] * len(o["spectra"])
            for key in ("ells", "k", "data", "sigma"):
                out[key] += list(o[key])
        return out

    def model_observables(self, theta):
        theta = np.asarray(theta, float)
        return [m for p, cols in zip(self.parts, self.columns) for m in p.model_observables(theta[cols])]

    def describe(self):
        lines = [f"run: {self.config['run']}  (config hash {self.config_hash}); "
                 f"{len(self.parts)} independent samples, log-likelihood = sum"]
        for name, p in zip(self.names, self.parts):
            lines.append(f"== sample {name}")
            lines += ["  " + line for line in p.describe().splitlines()[1:]
                      if not line.startswith(("sampled parameters", "  ", "fixed:"))
                      or line.startswith("  ") and " ells " in line]
        return "\n".join(lines + parameter_lines(self.params))


def build_samples(cfg):
    """The :class:`SampleSum` of a validated config with ``samples``; an error in a sample's
    files names the sample."""
    return SampleSum(cfg, [in_sample(i, s["name"], build_multi, sc) for i, (s, sc)
                           in enumerate(zip(cfg["samples"], cfg.sample_configs))])


def in_sample(i, name, fn, *args):
    """``fn(*args)`` for sample ``i`` named ``name``; an ErgofitError that does not name the
    sample yet (e.g. a data file's) is raised again with "sample NAME: " in front."""
    try:
        return fn(*args)
    except ErgofitError as exc:
        if f"samples[{i}] {name}" in str(exc):
            raise
        raise type(exc)(f"sample {name}: {exc}") from None
