"""The f_NL bias of an analysis that neglects effects, for one config (method:
:mod:`likelihood.forecast`)."""
from __future__ import annotations

import copy
import warnings
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from ..config.schema import Config, load_config
from ..errors import ErgofitError
from ..config.variants import analysis_config
from .fisher import Fisher, likelihood_fisher

#: Defaults of the config's ``forecast`` section.
DEFAULTS = {"neglect": ["doppler", "potential"], "parameters": None, "priors": {},
            "threshold": 0.5, "step_rtol": 1e-3, "scan": None}


def forecast_settings(cfg):
    """The config's ``forecast`` section with defaults filled in."""
    out = copy.deepcopy(DEFAULTS)
    out.update({k: copy.deepcopy(v) for k, v in (cfg.get("forecast") or {}).items()})
    return out


# --------------------------------------------------------------------------------------------
# Warnings collected from the model builds (reported once, not once per grid point)
# --------------------------------------------------------------------------------------------

@contextmanager
def collect_warnings(sink):
    """Record warnings raised inside the block as unique one-line strings in ``sink``."""
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        yield
    for w in rec:
        msg = f"{w.category.__name__}: {str(w.message).splitlines()[0]}"
        if msg not in sink:
            sink.append(msg)


def rewarn(messages):
    for m in messages:
        warnings.warn(m, UserWarning, stacklevel=3)



@dataclass
class BiasForecast:
    """Fisher matrix of the analysis model and the shift caused by the neglected effects.

    fisher: :class:`Fisher` of the analysis model; neglect: the neglected effects; delta: (n,)
    first-order shift Δθ (same order as ``fisher.names``); mu_truth, mu_analysis: masked model
    vectors at the fiducial point; chi2_total, chi2_residual: see :meth:`Fisher.chi2_of`;
    fnl_eff_neglected / fnl_eff_projection: f_NL mimicked at k → 0 by the neglected projection
    terms / by all projection terms of the truth model (:func:`likelihood.theory.tracer.effective_fnl`;
    None when undefined, e.g. b1 = p); info: survey and model description; warnings: unique
    warnings raised while building the models; analysis_config: the analysis Config (None for a
    config with samples: each sample has its own); samples: for a config with ``samples``, the
    forecast of each sample alone {name: BiasForecast} (this object is then their combination,
    :mod:`likelihood.forecast.samples`), else None.
    """

    fisher: Fisher
    neglect: list
    delta: np.ndarray
    mu_truth: np.ndarray
    mu_analysis: np.ndarray
    chi2_total: float
    chi2_residual: float
    fnl_eff_neglected: float | None
    fnl_eff_projection: float | None
    info: dict
    warnings: list
    analysis_config: Config | None
    config: Config
    samples: dict | None = None

    @property
    def delta_over_sigma(self):
        return self.delta / self.fisher.errors

    def value(self, what, name="fnl"):
        """'sigma', 'delta' or 'ratio' (Δ/σ) of one parameter."""
        i = self.fisher.index(name)
        return {"sigma": self.fisher.errors[i], "delta": self.delta[i],
                "ratio": self.delta_over_sigma[i]}[what]

    def to_dict(self):
        f = self.fisher
        return {"neglect": list(self.neglect),
                "delta": dict(zip(f.names, self.delta.tolist())),
                "delta_over_sigma": dict(zip(f.names, self.delta_over_sigma.tolist())),
                "chi2_mismodelling": self.chi2_total, "chi2_residual": self.chi2_residual,
                "fnl_eff_neglected": self.fnl_eff_neglected,
                "fnl_eff_projection": self.fnl_eff_projection}


def _describe_model(lik):
    return {"effects": list(lik.effects), "window": lik.window is not None,
            "integral_constraint": lik.survey.ic, "observer": bool(lik.observer_on)}


def _effective_fnl(lik, terms):
    from ..theory import tracer as tr
    terms = [t for t in terms if t in lik.effects]
    if not terms:
        return 0.0
    fid = lik.fiducial
    if "b1" not in fid:
        return None                   # several tracers: one effective f_NL per tracer, not shown
    effects = terms + (["rsd"] if "rsd" in lik.effects else [])
    try:
        t = tr.Tracer(b1=fid["b1"], fnl=fid["fnl"], p=lik.p, nbar=lik.nbar, b_e=fid["b_e"],
                      s=fid["s"])
        return float(tr.effective_fnl(lik.cosmo, lik.z, t, effects=effects))
    except ErgofitError:
        return None


def bias_forecast(config, neglect=None, parameters=None, priors=None, step_rtol=None):
    """Fisher forecast and first-order bias for a config (path or validated Config).

    neglect, parameters, priors, step_rtol default to the config's ``forecast`` section (and then
    to :data:`DEFAULTS`). Returns a :class:`BiasForecast`.
    """
    from ..model import build
    cfg = config if isinstance(config, Config) else load_config(config)
    if "samples" in cfg:
        from .samples import samples_forecast
        return samples_forecast(cfg, neglect, parameters, priors, step_rtol)
    fs = forecast_settings(cfg)
    neglect = list(fs["neglect"] if neglect is None else neglect)
    parameters = fs["parameters"] if parameters is None else parameters
    priors = fs["priors"] if priors is None else priors
    step_rtol = fs["step_rtol"] if step_rtol is None else step_rtol
    notes = []
    with collect_warnings(notes):
        truth = build(cfg)
        acfg = analysis_config(cfg, neglect)
        analysis = truth if acfg is cfg else build(acfg)
    for n in neglect:
        on = {"integral_constraint": truth.survey.ic != "none",
              "window": truth.window is not None, "observer": truth.observer_on,
              # curved-sky approximations (config/variants.py refuses them otherwise)
              "plane_parallel": True, "radial_integral_constraint": True,
              "effective_redshift": True,
              "lensing": cfg["effects"].get("lensing"), "isw": cfg["effects"].get("isw"),
              "time_delay": cfg["effects"].get("time_delay")}.get(n, n in truth.effects)
        if not on:
            notes.append(f"forecast.neglect: '{n}' is already off in the truth model; "
                         "neglecting it changes nothing")
    if truth.data.size != analysis.data.size:
        raise ErgofitError(f"{cfg.path}: the analysis model has {analysis.data.size} data points, "
                           f"the truth model {truth.data.size}; they must share the data vector")
    with collect_warnings(notes):
        fisher = likelihood_fisher(analysis, parameters, priors, step_rtol)
        mu_t = truth.model_vector({k: v for k, v in truth.fiducial.items()
                                      if k in truth.varied_names}, direct=True)
        mu_a = analysis.model_vector({n: analysis.fiducial[n] for n in fisher.names}, direct=True)
        delta = fisher.bias(mu_t - mu_a)
        chi2_t, chi2_r = fisher.chi2_of(mu_t - mu_a)
    _flat_prior_notes(analysis, fisher, notes)
    mock = cfg["data"].get("mock") or {}
    for n, v in cfg["fixed"].items():
        t = (mock.get("truth") or {}).get(n)
        if t is not None and t != v:
            notes.append(f"parameters.{n} is fixed to {v:g} but data.mock.truth.{n} = {t:g}: the "
                         "truth mock uses the second, the analysis the first, and the mismatch "
                         "enters the bias")
    info = {"config": cfg.path, "config_hash": cfg.hash, "run": cfg["run"], "redshift": truth.z,
            "nbar": truth.survey.nbar, "geometry": dict(cfg["survey"]["geometry"]),
            "volume": float(truth.volume), "n_data": int(truth.data.size),
            **_data_layout(truth),
            "truth_model": _describe_model(truth), "analysis_model": _describe_model(analysis),
            "fiducial": {n: float(v) for n, v in truth.fiducial.items()}}
    return BiasForecast(fisher=fisher, neglect=neglect, delta=delta, mu_truth=mu_t, mu_analysis=mu_a,
                        chi2_total=chi2_t, chi2_residual=chi2_r,
                        fnl_eff_neglected=_effective_fnl(truth, [t for t in ("doppler", "potential")
                                                                 if t in neglect]),
                        fnl_eff_projection=_effective_fnl(truth, ["doppler", "potential"]),
                        info=info, warnings=notes, analysis_config=acfg, config=cfg)


def _data_layout(lik):
    """{"ells": multipoles (several tracers: {spectrum: multipoles}), "k_range": [k_min, k_max]
    of the bins fitted}."""
    if hasattr(lik.data_full, "parts"):
        obs = lik.observables()
        k = np.concatenate(obs["k"])
        ells = {}
        for s in lik.forward.spectra:
            ells[s.label] = [int(l) for l, used in zip(s.part.ells, s.mask.reshape(len(s.part.ells), -1).any(1))
                             if used]
    else:
        m2 = lik.mask.reshape(len(lik.data_full.ells), -1).any(0)
        k, ells = lik.data_full.k_eff[m2], list(lik.ells)
    return {"ells": ells, "k_range": [float(k.min()), float(k.max())]}


def _flat_prior_notes(lik, fisher, notes):
    for p in lik.params.free:
        if p.name in fisher.names and p.prior.kind == "flat":
            s = fisher.errors[fisher.index(p.name)]
            width = p.prior.upper - p.prior.lower
            if s > 0.25 * width:
                notes.append(f"Fisher error of {p.name} ({s:.3g}) exceeds a quarter of its flat "
                             f"prior width {width:g}: the prior bounds matter and the Fisher "
                             "matrix, which ignores them, overestimates the error")

