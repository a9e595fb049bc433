"""Forecast of a config with several independent samples (method: :mod:`likelihood.forecast`).

Each sample is forecast alone from its own validated config (``cfg.sample_configs``: its survey,
tracers, spectra, data and covariance, the shared sections and the top-level parameters that
concern it), with ``forecast.neglect`` applied to its analysis model. The samples are
independent, so (exact for Gaussian likelihoods of independent data)::

    F = Σ_s E_s F_s E_sᵀ + P              Δθ = F⁻¹ [ Σ_s E_s B_s + p ]

F_s = h_s ∂μ_sᵀ/∂θ C_s⁻¹ ∂μ_s/∂θ is sample s's Fisher matrix without priors, B_s = h_s ∂μ_sᵀ/∂θ
C_s⁻¹ (μ_s,truth − μ_s,analysis) its bias vector, E_s places its parameters among the union
(shared ones — f_NL, ν, cosmology — add; a sample's own nuisance parameters only in its block),
and P, p are the Gaussian priors and their pull, counted once. This is the first-order bias
formula of Amara & Réfrégier 2008 (MNRAS 391, 228; the Fisher-matrix bias b = F⁻¹B, cited from
memory, equation number not checked) summed over independent data sets; see
:func:`likelihood.forecast.fisher.combine_independent`. The result is a
:class:`~likelihood.forecast.bias.BiasForecast` of the combination whose ``samples`` holds each
sample's own forecast (its σ and Δ alone).
"""
from __future__ import annotations

import numpy as np

from ..config import parameter_set
from ..errors import ConfigError
from ..model.samples import in_sample
from .bias import BiasForecast, forecast_settings
from .fisher import combine_independent


def samples_forecast(cfg, neglect=None, parameters=None, priors=None, step_rtol=None):
    """Combined and per-sample :class:`BiasForecast` of a validated config with ``samples``.

    Arguments as :func:`likelihood.forecast.bias_forecast` (defaults from the top-level
    ``forecast`` section). ``forecast.parameters`` and ``forecast.priors`` name parameters of
    the whole run; each sample takes those it has.
    """
    from .bias import bias_forecast
    fs = forecast_settings(cfg)
    neglect = list(fs["neglect"] if neglect is None else neglect)
    parameters = fs["parameters"] if parameters is None else parameters
    priors = dict(fs["priors"] if priors is None else priors)
    step_rtol = fs["step_rtol"] if step_rtol is None else step_rtol
    sampled = parameter_set(cfg).names
    names = list(sampled if parameters is None else parameters)
    for n in list(names) + list(priors):
        if n not in sampled:
            key = "forecast.parameters" if n in names else "forecast.priors"
            raise ConfigError(f"{cfg.path}: {key}: '{n}' is not sampled in this run; sampled: "
                              f"{', '.join(sampled)}")
    for n in priors:
        if n not in names:
            raise ConfigError(f"{cfg.path}: forecast.priors: '{n}' is not a forecast parameter "
                              f"({', '.join(names)})")
    per_sample = {}
    for i, (s, sc) in enumerate(zip(cfg["samples"], cfg.sample_configs)):
        own = [n for n in names if n in parameter_set(sc).names]
        if not own:
            raise ConfigError(f"{cfg.path}: sample {s['name']} has none of the forecast parameters "
                              f"{', '.join(names)}; add one of its parameters to forecast.parameters")
        per_sample[s["name"]] = in_sample(i, s["name"], bias_forecast, sc, neglect, own,
                                          {n: v for n, v in priors.items() if n in own}, step_rtol)
    parts = list(per_sample.values())
    fisher = combine_independent([b.fisher for b in parts], names)
    mu_t = np.concatenate([b.mu_truth for b in parts])
    mu_a = np.concatenate([b.mu_analysis for b in parts])
    delta = fisher.bias(mu_t - mu_a)
    chi2_t, chi2_r = fisher.chi2_of(mu_t - mu_a)
    notes = [f"sample {name}: {m}" for name, b in per_sample.items() for m in b.warnings]
    first = parts[0].info
    fiducial = {}
    for b in parts:
        fiducial.update(b.info["fiducial"])
    info = {"config": cfg.path, "config_hash": cfg.hash, "run": cfg["run"],
            "samples": list(per_sample), "n_data": int(mu_t.size),
            "truth_model": first["truth_model"], "analysis_model": first["analysis_model"],
            "fiducial": fiducial}
    return BiasForecast(fisher=fisher, neglect=neglect, delta=delta, mu_truth=mu_t,
                        mu_analysis=mu_a, chi2_total=chi2_t, chi2_residual=chi2_r,
                        fnl_eff_neglected=None, fnl_eff_projection=None, info=info,
                        warnings=notes, analysis_config=None, config=cfg, samples=per_sample)
