"""MCMC check of a bias forecast on the noiseless truth mock."""
from __future__ import annotations

import os
import warnings

import numpy as np

from ..config.schema import validate
from ..io import plain_data, write_text
from ..errors import ErgofitError
from ..config.parameters import KNOWN
from ..config.variants import config_to_raw
from .bias import collect_warnings

_MCMC_TOLERANCE = 0.2        # |MCMC shift − Fisher shift| / σ_F(f_NL) for a near-Gaussian posterior


def _mcmc_config(bias, folder):
    """Analysis config whose data are the noiseless truth mock (files written into ``folder``)."""
    from ..data import DataVector, save_covariance
    from ..model import build
    from ..model.fiducial import COSMO_PARAMS
    acfg = bias.analysis_config
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        alik = build(acfg)
    n_ell = len(alik.data_full.ells)
    m2 = alik.mask.reshape(n_ell, -1)
    kmask = m2.any(0)
    ells = [l for j, l in enumerate(alik.data_full.ells) if m2[j].any()]
    idx = np.flatnonzero(kmask)
    if np.any(np.diff(idx) != 1):
        raise ErgofitError("MCMC check: the selected k bins are not contiguous")
    edges = alik.data_full.edges[idx[0]:idx[-1] + 2]
    dv = DataVector(tuple(ells), edges, alik.data_full.k_eff[kmask], alik.data_full.n_modes[kmask],
                    bias.mu_truth.reshape(len(ells), -1),
                    meta={"generated": "ergofit forecast: noiseless truth mock",
                          "config_hash": bias.config.hash}, source="truth mock")
    data_path = os.path.abspath(os.path.join(folder, "truth_mock.npz"))
    cov_path = os.path.abspath(os.path.join(folder, "analysis_covariance.npz"))
    dv.save(data_path)
    save_covariance(cov_path, alik.covariance / alik.precision_scale, ells, int(kmask.sum()))
    raw = config_to_raw(acfg)
    raw["data"] = {"file": data_path, "ells": ells,
                   "shot_noise_subtracted": acfg["data"]["shot_noise_subtracted"]}
    raw["covariance"] = {"kind": "file", "file": cov_path}
    used = dict(alik.fiducial)
    used.update(alik.params.fixed)    # what the analysis model uses for everything not sampled
    for n in ("b1", "fnl", "b_e", "s"):
        raw["tracer"][n] = float(used[n])
    raw["observer"]["nu_true"] = float(used["nu_obs"])
    for n in KNOWN:
        if n in COSMO_PARAMS or n in raw["parameters"]:
            continue
        raw["parameters"][n] = {"fixed": float(used[n])}
    for p in alik.params.free:          # start the walkers at the fiducial point
        if p.prior.contains(float(alik.fiducial[p.name])):
            raw["parameters"][p.name]["start"] = float(alik.fiducial[p.name])
    raw["forecast"] = {}
    return validate(raw, src=f"{acfg.path} [MCMC check on the truth mock]", base_dir=acfg.base_dir)


def mcmc_check(bias, out_dir, settings=None, tolerance=_MCMC_TOLERANCE):
    """Sample the analysis model on the noiseless truth mock; compare with the Fisher forecast.

    Writes ``out_dir/truth_mock.npz``, ``analysis_covariance.npz``, ``config.yaml`` and the
    chain (``chain.h5``; a chain from an earlier check in this folder is replaced). Returns a
    dict per parameter: Fisher σ and Δ, MCMC posterior mean shift and std, their differences in
    units of the Fisher σ; plus ``agree`` (|shift − Δ| <= tolerance σ for f_NL, or for every
    parameter when f_NL is not forecast), ``converged`` and notes. Disagreement means a
    non-Gaussian posterior or a bias beyond the linear regime (the Fisher shift is first order).
    settings: :class:`likelihood.sampling.SamplerSettings` (default: the config's sampling section,
    no progress bar).
    """
    import yaml
    from ..model import build
    from ..sampling import CHAIN_FILENAME, SamplerSettings, run_sampler
    os.makedirs(out_dir, exist_ok=True)
    mcfg = _mcmc_config(bias, out_dir)
    notes = []
    with collect_warnings(notes):
        lik = build(mcfg)
    f = bias.fisher
    if list(lik.parameter_names) != list(f.names):
        notes.append(f"the MCMC samples {', '.join(lik.parameter_names)} but the Fisher matrix "
                     f"has {', '.join(f.names)}: the comparison is only exact when they agree")
    s = mcfg["sampling"]
    if settings is None:
        settings = SamplerSettings(n_walkers=max(s["walkers"], lik.n_walkers_min()),
                                   max_steps=s["max_steps"], check_every=s["check_every"],
                                   tau_factor=s["tau_factor"], tau_rtol=s["tau_rtol"],
                                   seed=s["seed"], progress=False)
    chain = os.path.join(out_dir, CHAIN_FILENAME)
    if os.path.exists(chain):
        os.remove(chain)
    write_text(os.path.join(out_dir, "config.yaml"),
                yaml.safe_dump(plain_data(config_to_raw(mcfg)), sort_keys=False))
    with collect_warnings(notes):
        result = run_sampler(lik, settings, out_dir, resume=False)
    samples = np.asarray(result.samples, float)
    out = {"parameters": {}, "converged": bool(result.converged), "n_steps": int(result.n_steps),
           "n_samples": int(samples.shape[0]), "tolerance": tolerance, "notes": notes}
    agree = []
    for j, n in enumerate(lik.parameter_names):
        mean, std = float(samples[:, j].mean()), float(samples[:, j].std(ddof=1))
        entry = {"mcmc_shift": mean - float(lik.fiducial[n]), "mcmc_std": std}
        if n in f.names:
            i = f.index(n)
            sig, dlt = float(f.errors[i]), float(bias.delta[i])
            entry.update(fisher_sigma=sig, fisher_delta=dlt,
                         shift_difference_over_sigma=(entry["mcmc_shift"] - dlt) / sig,
                         width_ratio=std / sig)
            if n == "fnl" or "fnl" not in f.names:
                agree.append(abs(entry["shift_difference_over_sigma"]) <= tolerance)
        out["parameters"][n] = entry
    out["agree"] = bool(agree) and all(agree)
    if not result.converged and not any("ConvergenceWarning" in n for n in notes):
        notes.append("the MCMC chain did not meet the convergence rule (raise sampling.max_steps)")
    return out

