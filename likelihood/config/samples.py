"""The ``samples`` section: several independent samples (redshift bins, regions of sky) in one run.

Vocabulary::

    samples:
      - name: north                  # a letter, then letters/digits
        survey: {redshift: 1.2, geometry: {...}}
        tracers: [{name: brightN, nbar: 1e-4, b1: 2.4}, {name: faintN, nbar: 2e-4, b1: 1.5}]
        spectra: [{pair: [brightN, brightN], ells: [0, 2]}, ...]
        data: {file: north.txt}
        covariance: {kind: file, file: north_cov.txt}
      - name: south
        ...

Each sample is a complete multi-tracer analysis (its own survey geometry, tracers, spectra, data
and covariance; see :mod:`likelihood.config.multitracer`) and is validated as one. The samples are
independent: the log-likelihood is the sum of theirs. They share ``cosmology``, ``effects``,
``observer``, ``sampling`` and the global parameters (``fnl``, ``nu_obs``, cosmology); the
nuisance parameters stay per sample because tracer names must differ between samples
(``b1_brightN``, ``b1_brightS``). The top level keeps ``run``, ``cosmology``, ``effects``,
``observer``, ``parameters``, ``sampling``, ``output`` and ``forecast`` (neglected effects and
forecast parameters of the whole run; ``ergofit forecast`` sums the samples' Fisher matrices).
"""
from __future__ import annotations

import copy

from ..errors import ConfigError
from ..spectra import TRACER_NAME
from .multitracer import PER_TRACER, SHARED, check_entry_keys
from .parameters import parse_parameter, suggest

SAMPLE_KEYS = ("name", "survey", "tracers", "spectra", "data", "covariance")
SHARED_SECTIONS = ("cosmology", "effects", "observer", "sampling")
TOP_KEYS = ("run", "samples", "parameters", "output", "forecast", *SHARED_SECTIONS)


def _own_names(sample):
    """Parameter names of a (raw) sample's tracers: b1_X, b_e_X, s_X, shot_noise_X, shot_noise_X_Y."""
    names = set()
    tracers = sample.get("tracers")
    for t in tracers if isinstance(tracers, list) else []:
        if isinstance(t, dict) and isinstance(t.get("name"), str):
            names.update(f"{base}_{t['name']}" for base in PER_TRACER)
    spectra = sample.get("spectra")
    for s in spectra if isinstance(spectra, list) else []:
        if isinstance(s, dict) and "shared_nbar" in s and isinstance(s.get("pair"), list) \
                and len(s["pair"]) == 2:
            names.add(f"shot_noise_{s['pair'][0]}_{s['pair'][1]}")
    return names


def _check_samples(raw, src):
    for key in raw:
        if key not in TOP_KEYS:
            raise ConfigError(f"{src}: {key}: not allowed at the top level together with samples; "
                              f"give it per sample (samples[i].{key}) or use {', '.join(TOP_KEYS)}"
                              if key in SAMPLE_KEYS or key == "tracer" else
                              f"{src}: unknown key '{key}' with samples{suggest(key, TOP_KEYS)}")
    samples = raw["samples"]
    if not isinstance(samples, list) or not samples:
        raise ConfigError(f"{src}: samples: expected a list of samples like [{{name: north, survey: "
                          "..., tracers: ..., spectra: ..., data: ...}}, ...]")
    names, owner = [], {}
    for i, s in enumerate(samples):
        where = f"{src}: samples[{i}]"
        if not isinstance(s, dict):
            raise ConfigError(f"{where}: expected a mapping with {', '.join(SAMPLE_KEYS)}")
        check_entry_keys(s, SAMPLE_KEYS, where)
        name = s.get("name")
        if not isinstance(name, str) or not TRACER_NAME.fullmatch(name):
            raise ConfigError(f"{where}.name: expected a letter then letters/digits, got {name!r}")
        if name in names:
            raise ConfigError(f"{src}: samples: two samples are named '{name}'; give each its own name")
        names.append(name)
        for t in s.get("tracers") or []:
            t_name = t.get("name") if isinstance(t, dict) else None
            if isinstance(t_name, str):
                if t_name in owner and owner[t_name] != name:
                    raise ConfigError(f"{where}.tracers: tracer '{t_name}' is also in sample "
                                      f"'{owner[t_name]}'; give each sample's tracers their own names "
                                      f"(e.g. {t_name}{name[0].upper()}) so their parameters differ")
                owner[t_name] = name
    return samples


def validate_samples(raw, src, base_dir, validate, run):
    """A validated top-level Config of a run with several samples: ``samples`` holds the name and
    the hash of each validated sample (``cfg.sample_configs``: the sample Configs)."""
    from .schema import Config, _section
    samples = _check_samples(raw, src)
    params = raw.get("parameters") or {}
    if not isinstance(params, dict):
        raise ConfigError(f"{src}: parameters: expected a mapping, got {params!r}")
    own = [_own_names(s) for s in samples]
    everything = set(SHARED).union(*own)
    for name in params:
        if name not in everything:
            raise ConfigError(f"{src}: parameters: unknown parameter '{name}'"
                              f"{suggest(name, sorted(everything))}; per-tracer parameters are "
                              "named after the tracers of the samples (b1_NAME, ...)")
    subs = []
    for i, (s, names) in enumerate(zip(samples, own)):
        sub = {k: copy.deepcopy(raw[k]) for k in SHARED_SECTIONS if k in raw}
        sub.update({k: copy.deepcopy(v) for k, v in s.items() if k != "name"})
        sub["run"] = f"{run}-{s['name']}"
        sub["parameters"] = {k: copy.deepcopy(v) for k, v in params.items() if k in names or k in SHARED}
        if "tracers" not in sub:
            raise ConfigError(f"{src}: samples[{i}].tracers is required (one entry per population)")
        subs.append(validate(sub, src=f"{src} (samples[{i}] {s['name']})", base_dir=base_dir))
    cfg = Config()
    cfg.path, cfg.base_dir, cfg.raw = src, base_dir, copy.deepcopy(raw)
    first = subs[0]
    cfg["run"] = run
    for k in SHARED_SECTIONS:
        cfg[k] = copy.deepcopy(first[k])
    cfg["output"] = _section(raw, "output", src)
    cfg["forecast"] = _section(raw, "forecast", src)     # the run's forecast (likelihood.forecast.samples)
    known = {}
    for sc in subs:
        known.update(_table(sc))
    free, fixed = [], {}
    for name, spec in params.items():
        par, val = parse_parameter(name, spec, f"{src}: parameters", known)
        if par is None:
            fixed[name] = val
        elif not par.analytic:
            free.append(par)
    cfg["parameters"] = {p.name: {"prior": p.prior.__dict__, "start": p.start, "scale": p.scale} for p in free}
    cfg["fixed"] = fixed
    cfg["samples"] = [{"name": s["name"], "hash": sc.hash} for s, sc in zip(samples, subs)]
    cfg._param_objects = (free, fixed)
    cfg._analytic = []
    cfg.sample_configs = subs
    return cfg


def _table(sub):
    from .multitracer import parameter_table
    return parameter_table(sub)
