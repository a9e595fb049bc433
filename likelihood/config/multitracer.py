"""The ``tracers`` and ``spectra`` sections: several galaxy populations in one fit.

Vocabulary (replaces the single ``tracer`` section, ``survey.nbar`` and ``data.ells/k_min/k_max``)::

    tracers:                       # one entry per population; names: a letter, then letters/digits
      - {name: bright, nbar: 1.0e-4, b1: 2.4, p: 1.0, b_e: 0.0, s: 0.0}
      - {name: faint,  nbar: 3.0e-4, b1: 1.3}
                                   # engine.kind: curved_sky also takes, per tracer, the redshift
                                   # dependence: bias_evolution: constant | inverse_growth, or
                                   # tracer_table: FILE (default: the engine section's)
    spectra:                       # the spectra fitted, in the order of the data vector
      - {pair: [bright, bright], ells: [0, 2]}
      - {pair: [bright, faint],  ells: [0, 1, 2], k_max: 0.04}
      - {pair: [faint, faint],   ells: [0, 2], k_min: 0.003, k_max: 0.05}

A cross spectrum [X, Y] is <δ_X δ_Y^*>; its odd multipoles (Doppler dipole, octupole) are
allowed, an auto spectrum's are not (they vanish). ``k_min``/``k_max`` per spectrum cut its bins.
``shared_nbar`` on a cross spectrum: number density of the objects that belong to both
populations (overlapping samples); the cross spectrum then carries the shared Poisson noise
n̄_XY/(n̄_X n̄_Y) times the amplitude ``shot_noise_X_Y`` (disjoint samples: no cross noise).

Parameters per tracer (names a user can guess): ``b1_NAME``, ``b_e_NAME``, ``s_NAME``, ``p_NAME``,
``shot_noise_NAME`` and ``shot_noise_X_Y`` for an overlapping pair; shared by all tracers:
``fnl``, ``nu_obs`` and the cosmological parameters. The fiducial values of the per-tracer
parameters are the ``tracers`` entries (shot-noise amplitudes 1).
"""
from __future__ import annotations

from ..checks import finite_number, positive_number
from ..errors import ConfigError
from ..spectra import TRACER_NAME, pair_label
from .parameters import KNOWN, ParamInfo, suggest

#: per-tracer parameters: base name -> tracers entry key (None: no entry, default from KNOWN)
PER_TRACER = {"b1": "b1", "b_e": "b_e", "s": "s", "p": "p", "shot_noise": None}
#: label, default and meaning of each per-tracer base name
BASE_INFO = {**{k: KNOWN[k] for k in ("b1", "b_e", "s", "shot_noise")},
             "p": ParamInfo("p", 1.0, "tracer", "response of the f_NL bias, Δb ∝ f_NL (b1 − p)")}
#: global parameters shared by the tracers
SHARED = ("fnl", "nu_obs", "h", "omega_c", "omega_b", "n_s", "ln_1e10_As", "sigma8")

TRACER_KEYS = ("name", "nbar", "b1", "p", "b_e", "s", "bias_evolution", "tracer_table")
SPECTRUM_KEYS = ("pair", "ells", "k_min", "k_max", "shared_nbar")


def _number(val, where, positive=False):
    """A finite (positive) number; YAML strings such as '1e-4' are read as numbers, booleans not."""
    if isinstance(val, bool):
        raise ConfigError(f"{where} = {val!r}: expected a number")
    return (positive_number if positive else finite_number)(val, where, ConfigError)


def check_entry_keys(entry, allowed, where):
    """Refuse a key of a list entry (tracer, spectrum, sample) outside ``allowed``."""
    for key in entry:
        if key not in allowed:
            raise ConfigError(f"{where}: unknown key '{key}'{suggest(key, allowed)}; "
                              f"allowed: {', '.join(allowed)}")


def _tracer(entry, where):
    if not isinstance(entry, dict):
        raise ConfigError(f"{where}: expected a mapping like {{name: bright, nbar: 1e-4, b1: 2.0}}, "
                          f"got {entry!r}")
    check_entry_keys(entry, TRACER_KEYS, where)
    for key in ("name", "nbar"):
        if key not in entry:
            raise ConfigError(f"{where}.{key} is required")
    name = entry["name"]
    if not isinstance(name, str) or not TRACER_NAME.fullmatch(name):
        raise ConfigError(f"{where}.name: expected a letter then letters/digits (no '_', it "
                          f"separates parameter names like b1_NAME), got {name!r}")
    out = {"name": name, "nbar": _number(entry["nbar"], f"{where}.nbar", positive=True),
           "p": _number(entry.get("p", 1.0), f"{where}.p", positive=True)}
    for key in ("b1", "b_e", "s"):
        out[key] = _number(entry.get(key, KNOWN[key].default), f"{where}.{key}")
    for key in ("bias_evolution", "tracer_table"):      # curved_sky only (config/engine.py)
        if key in entry:
            out[key] = entry[key]
    return out


def _ells(val, where, auto):
    if not isinstance(val, list) or not val or not all(isinstance(v, int) and not isinstance(v, bool)
                                                       for v in val):
        raise ConfigError(f"{where}: expected a list of multipoles like [0, 2], got {val!r}")
    if any(v < 0 or v > 4 for v in val) or len(set(val)) != len(val):
        raise ConfigError(f"{where}: multipoles must be distinct integers in 0..4, got {val}")
    odd = [v for v in val if v % 2]
    if auto and odd:
        raise ConfigError(f"{where}: odd multipoles {odd} in an auto spectrum (it is even in mu); "
                          "odd ell only in a cross spectrum of two tracers")
    return sorted(val)


def _spectrum(entry, where, names, data):
    if not isinstance(entry, dict):
        raise ConfigError(f"{where}: expected a mapping like {{pair: [A, B], ells: [0, 1, 2]}}, got {entry!r}")
    check_entry_keys(entry, SPECTRUM_KEYS, where)
    pair = entry.get("pair")
    if not isinstance(pair, list) or len(pair) != 2 or not all(isinstance(t, str) for t in pair):
        raise ConfigError(f"{where}.pair: expected two tracer names like [bright, faint], got {pair!r}")
    for t in pair:
        if t not in names:
            raise ConfigError(f"{where}.pair: unknown tracer '{t}'{suggest(t, names)}; the tracers "
                              f"section names {', '.join(names)}")
    auto = pair[0] == pair[1]
    out = {"pair": list(pair), "ells": _ells(entry.get("ells", [0, 2]), f"{where}.ells", auto)}
    for key in ("k_min", "k_max"):
        val = entry.get(key, data.get(key))
        if val is not None:
            out[key] = _number(val, f"{where}.{key}", positive=True)
    if "k_min" in out and "k_max" in out and not out["k_min"] < out["k_max"]:
        raise ConfigError(f"{where}: k_min must be below k_max")
    if "shared_nbar" in entry:
        if auto:
            raise ConfigError(f"{where}.shared_nbar: only for a cross spectrum of two overlapping "
                              "populations (an auto spectrum has its own 1/nbar)")
        out["shared_nbar"] = _number(entry["shared_nbar"], f"{where}.shared_nbar", positive=True)
    return out


def validate_tracers(raw, cfg, src):
    """Check the ``tracers``/``spectra`` sections of ``raw`` and store them in ``cfg``.

    The survey's ``nbar`` becomes the sum of the tracers' (the combined sample); the single-tracer
    keys it replaces are refused so no value is silently ignored."""
    tr = raw["tracers"]
    if not isinstance(tr, list) or not tr:
        raise ConfigError(f"{src}: tracers: expected a list of populations like "
                          "[{name: bright, nbar: 1e-4, b1: 2.0}, ...]")
    for key, why in (("tracer", "give b1, p, b_e, s per entry of tracers"),):
        if raw.get(key) is not None:
            raise ConfigError(f"{src}: {key}: not allowed together with tracers; {why}")
    if (raw.get("survey") or {}).get("nbar") is not None:
        raise ConfigError(f"{src}: survey.nbar: not allowed together with tracers; give nbar per tracer")
    if "ells" in (raw.get("data") or {}):
        raise ConfigError(f"{src}: data.ells: not allowed together with tracers; give ells per "
                          "entry of spectra")
    tracers = [_tracer(t, f"{src}: tracers[{i}]") for i, t in enumerate(tr)]
    names = [t["name"] for t in tracers]
    for n in names:
        if names.count(n) > 1:
            raise ConfigError(f"{src}: tracers: two tracers are named '{n}'; give each its own name")
    sp = raw.get("spectra")
    if not isinstance(sp, list) or not sp:
        raise ConfigError(f"{src}: spectra: expected a list like [{{pair: [{names[0]}, {names[0]}], "
                          "ells: [0, 2]}, ...] (required with tracers)")
    spectra = [_spectrum(s, f"{src}: spectra[{i}]", names, cfg["data"]) for i, s in enumerate(sp)]
    seen = {}
    for i, s in enumerate(spectra):
        key = frozenset(s["pair"])
        if key in seen:
            raise ConfigError(f"{src}: spectra[{i}]: spectrum {pair_label(s['pair'])} is listed "
                              f"twice (also spectra[{seen[key]}])")
        seen[key] = i
    cfg["tracers"] = tracers
    cfg["spectra"] = spectra
    cfg["survey"]["nbar"] = float(sum(t["nbar"] for t in tracers))
    cfg["data"].pop("ells", None)
    cfg["data"].pop("k_min", None)
    cfg["data"].pop("k_max", None)


def check_covariance_kind(cfg, src):
    """The analytic Gaussian covariance of several tracers needs P_XX and P_YY for a cross
    spectrum X x Y, so a cross spectrum whose autos are not fitted is refused (a covariance file
    or mocks take any spectra)."""
    kind = cfg["covariance"]["kind"]
    if kind != "gaussian":
        return
    autos = {s["pair"][0] for s in cfg["spectra"] if s["pair"][0] == s["pair"][1]}
    for i, s in enumerate(cfg["spectra"]):
        missing = [t for t in dict.fromkeys(s["pair"]) if t not in autos]
        if missing:
            raise ConfigError(f"{src}: spectra[{i}]: cross spectrum {pair_label(s['pair'])} without "
                              f"the auto spectrum of {', '.join(missing)}; covariance.kind: gaussian "
                              "needs both autos (add them to spectra, or give a covariance file)")


def overlapping_pairs(cfg):
    """Cross pairs with a shared-noise term (``shared_nbar``)."""
    return [tuple(s["pair"]) for s in cfg["spectra"] if "shared_nbar" in s]


def parameter_table(cfg):
    """Name -> ParamInfo of every parameter a multi-tracer config knows: the shared ones and
    b1_NAME, b_e_NAME, s_NAME, shot_noise_NAME per tracer, shot_noise_X_Y per overlapping pair."""
    table = {n: KNOWN[n] for n in SHARED}
    for t in cfg["tracers"]:
        name = t["name"]
        for base, key in PER_TRACER.items():
            info = BASE_INFO[base]
            table[f"{base}_{name}"] = ParamInfo(f"{info.label}^{{\\rm {name}}}",
                                                t[key] if key else info.default, "tracer",
                                                f"{info.doc} of {name}")
    for x, y in overlapping_pairs(cfg):
        table[f"shot_noise_{x}_{y}"] = ParamInfo(f"A_{{\\rm sn}}^{{\\rm {x}\\times {y}}}", 1.0, "noise",
                                                 f"shared shot-noise amplitude of {x} x {y}")
    return table


def check_analytic(par, cfg, src):
    """A parameter marked ``analytic: true`` must enter the model linearly: the shot-noise
    amplitudes of a config with ``tracers`` (the marginal is then a Gaussian integral)."""
    if "tracers" not in cfg:
        raise ConfigError(f"{src}: parameters.{par.name}.analytic: analytic marginalisation needs "
                          "the tracers section (a config with one tracer entry works too)")
    if not par.name.startswith("shot_noise_"):
        raise ConfigError(f"{src}: parameters.{par.name}.analytic: only parameters entering the model "
                          "linearly (shot_noise_NAME, shot_noise_X_Y) can be marginalised analytically")
    return par
