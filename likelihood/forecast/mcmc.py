"""MCMC check of a bias forecast on the noiseless truth mock (one tracer, or several: the mock is
then a labelled spectra file holding each spectrum's fitted multipoles and k bins; several
samples: each sample's truth mock in its own subfolder, the chain over the sum of the samples'
likelihoods compared with the combined Fisher forecast)."""
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


def _kept(mask2, what):
    """(kept multipole rows, slice of the kept k bins) of a (n_ell, n_bins) mask: every kept
    multipole must keep the same contiguous k bins (the mock file holds a rectangle)."""
    rows = [j for j in range(mask2.shape[0]) if mask2[j].any()]
    kmask = mask2[rows].any(0)
    idx = np.flatnonzero(kmask)
    if np.any(np.diff(idx) != 1) or np.any(mask2[rows] != kmask):
        raise ErgofitError(f"MCMC check: the selected k bins of {what} are not contiguous and "
                           "common to its multipoles")
    return rows, slice(idx[0], idx[-1] + 1)


def _truth_spectra(bias, alik, folder):
    """Write the truth mock of a multi-tracer analysis (a SpectraVector of the fitted points) and
    its covariance; returns (data path, covariance path, {spectrum index: kept ells})."""
    from ..spectra import SpectraVector, save_spectra_covariance
    from ..data import DataVector
    parts, pairs, kept, pos = [], [], {}, 0
    for i, s in enumerate(alik.forward.spectra):
        m2 = s.mask.reshape(len(s.part.ells), -1)
        if not m2.any():
            continue
        rows, ks = _kept(m2, f"spectrum {s.label}")
        ells = tuple(s.part.ells[j] for j in rows)
        n = len(ells) * (ks.stop - ks.start)
        parts.append(DataVector(ells, s.part.edges[ks.start:ks.stop + 1], s.part.k_eff[ks],
                                s.part.n_modes[ks], bias.mu_truth[pos:pos + n].reshape(len(ells), -1),
                                source="truth mock"))
        pairs.append(s.pair)
        kept[i] = list(ells)
        pos += n
    sv = SpectraVector(alik.forward.names, pairs, parts,
                       {"generated": "ergofit forecast: noiseless truth mock",
                        "config_hash": bias.config.hash}, source="truth mock")
    data_path = os.path.abspath(os.path.join(folder, "truth_mock.npz"))
    cov_path = os.path.abspath(os.path.join(folder, "analysis_covariance.npz"))
    sv.save(data_path)
    save_spectra_covariance(cov_path, alik.covariance / alik.precision_scale, sv)
    return data_path, cov_path, kept


def _multi_raw(bias, alik, folder, used):
    """Raw analysis config of several tracers on the truth mock: the kept spectra and ℓ, each
    tracer's fiducial values in its ``tracers`` entry, ν in observer.nu_true."""
    acfg = bias.analysis_config
    data_path, cov_path, kept = _truth_spectra(bias, alik, folder)
    raw = config_to_raw(acfg)
    raw["spectra"] = [{**{k: v for k, v in sp.items() if k not in ("k_min", "k_max")},
                       "ells": kept[i]} for i, sp in enumerate(raw["spectra"]) if i in kept]
    raw["data"] = {"file": data_path,
                   "shot_noise_subtracted": acfg["data"]["shot_noise_subtracted"]}
    raw["covariance"] = {"kind": "file", "file": cov_path}
    for t in raw["tracers"]:
        for base in ("b1", "b_e", "s", "p"):
            if f"{base}_{t['name']}" in used:
                t[base] = float(used[f"{base}_{t['name']}"])
    raw.setdefault("observer", {})["nu_true"] = float(used["nu_obs"])
    return raw


def _mcmc_config(bias, folder):
    """(Analysis config whose data are the noiseless truth mock (files written into
    ``folder``), the analysis model's fiducial values)."""
    from ..model import build
    from ..model.fiducial import COSMO_PARAMS
    if bias.samples:
        return _samples_config(bias, folder)
    acfg = bias.analysis_config
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        alik = build(acfg)
    used = dict(alik.fiducial)
    used.update(alik.params.fixed)    # what the analysis model uses for everything not sampled
    if "tracers" in acfg:
        raw = _multi_raw(bias, alik, folder, used)
    else:
        raw = _single_raw(bias, alik, folder, used)
    for n in getattr(alik, "known", KNOWN):
        if n in COSMO_PARAMS or n in raw["parameters"]:
            continue
        raw["parameters"][n] = {"fixed": float(used[n])}
    for p in alik.params.free:          # start the walkers at the fiducial point
        spec = raw["parameters"].get(p.name)
        if isinstance(spec, dict) and p.prior.contains(float(alik.fiducial[p.name])):
            spec["start"] = float(alik.fiducial[p.name])
    raw["forecast"] = {}
    cfg = validate(raw, src=f"{acfg.path} [MCMC check on the truth mock]", base_dir=acfg.base_dir)
    return cfg, {n: float(v) for n, v in alik.fiducial.items()}


def _samples_config(bias, folder):
    """The samples config of the check: each sample's analysis config on its own truth mock (in
    ``folder/NAME/``), the shared sections of the first, the parameters of all."""
    from ..config.samples import SAMPLE_KEYS, SHARED_SECTIONS
    cfg, entries, params, fiducial, top = bias.config, [], {}, {}, None
    for name, b in bias.samples.items():
        sub = os.path.join(folder, name)
        os.makedirs(sub, exist_ok=True)
        scfg, fid = _mcmc_config(b, sub)
        raw = config_to_raw(scfg)
        entries.append({"name": name, **{k: raw[k] for k in SAMPLE_KEYS[1:] if k in raw}})
        params.update(raw["parameters"])
        fiducial.update(fid)
        if top is None:
            top = {k: raw[k] for k in SHARED_SECTIONS if k in raw}
    top.update(run=cfg["run"], samples=entries, parameters=params)
    mcfg = validate(top, src=f"{cfg.path} [MCMC check on the truth mocks]", base_dir=cfg.base_dir)
    return mcfg, fiducial


def _single_raw(bias, alik, folder, used):
    """Raw analysis config of one tracer on the truth mock (a data vector of the fitted ℓ and
    contiguous k bins), the fiducial values in the tracer block."""
    from ..data import DataVector, save_covariance
    acfg = bias.analysis_config
    full = alik.data_full
    rows, ks = _kept(alik.mask.reshape(len(full.ells), -1), "the data")
    ells = [full.ells[j] for j in rows]
    dv = DataVector(tuple(ells), full.edges[ks.start:ks.stop + 1], full.k_eff[ks], full.n_modes[ks],
                    bias.mu_truth.reshape(len(ells), -1),
                    meta={"generated": "ergofit forecast: noiseless truth mock",
                          "config_hash": bias.config.hash}, source="truth mock")
    data_path = os.path.abspath(os.path.join(folder, "truth_mock.npz"))
    cov_path = os.path.abspath(os.path.join(folder, "analysis_covariance.npz"))
    dv.save(data_path)
    save_covariance(cov_path, alik.covariance / alik.precision_scale, ells, ks.stop - ks.start)
    raw = config_to_raw(acfg)
    raw["data"] = {"file": data_path, "ells": ells,
                   "shot_noise_subtracted": acfg["data"]["shot_noise_subtracted"]}
    raw["covariance"] = {"kind": "file", "file": cov_path}
    for n in ("b1", "fnl", "b_e", "s"):
        raw["tracer"][n] = float(used[n])
    raw["observer"]["nu_true"] = float(used["nu_obs"])
    return raw


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
    mcfg, fiducial = _mcmc_config(bias, out_dir)
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
        entry = {"mcmc_shift": mean - fiducial[n], "mcmc_std": std}
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

