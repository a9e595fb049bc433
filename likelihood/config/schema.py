"""YAML run configuration: loading and validation.

A config is read with ``yaml.safe_load`` and checked completely before any work starts: unknown
keys (with the nearest valid one suggested), wrong types, out-of-range values, missing files,
prior bounds and starts outside their priors all raise :class:`~likelihood.errors.ConfigError`
with one line naming the file and the key.

Input file paths (data, covariance, tables, randoms) are resolved relative to the folder of the
config file; the output folder is relative to the current working directory.

The vocabulary (all sections but ``survey`` optional)::

    run: NAME                      # run name; default output folder chains/NAME
    forecast:   {neglect: [effects], parameters, priors, threshold, step_rtol, scan: {...}}
                (see likelihood.forecast)
    cosmology:  {preset, overrides: {h, omega_b, omega_c, n_s, ln_1e10_As | sigma8, w, m_nu},
                 transfer: eh98 | eh98_nowiggle | table, table: FILE, table_kind: power | transfer}
    survey:     {redshift, nbar, geometry: {shape: box | sphere | shell | cap | randoms | window,
                 volume | radius | r_min, r_max | fsky | randoms: FILE | file: FILE [, volume]
                 [, mask: FILE (shell, curved_sky: a HEALPix map)]}}
    tracer:     {b1, fnl, p, b_e, s}
    tracers:    [{name, nbar, b1, p, b_e, s}, ...]   several populations (replaces tracer and
    spectra:    [{pair: [X, Y], ells, k_min, k_max, shared_nbar}, ...]   survey.nbar; see
                likelihood.config.multitracer)
    samples:    [{name, survey, tracers, spectra, data, covariance}, ...]   independent samples
                (see likelihood.config.samples)
    effects:    {rsd, fnl, doppler, potential, window, integral_constraint: none | global | radial,
                 observer, lensing, isw, time_delay, observer_motion, observer_potential}
                (radial and the last five: curved_sky)
    engine:     {kind: plane_parallel | curved_sky, snapshot, bias_evolution | tracer_table: FILE,
                 resolution, mask_tolerance}
                (see likelihood.config.engine)
    observer:   {field: potential | density, smoothing, k_ir, nu_true, speed}
    data:       {file: FILE | mock: {seed, noise, truth: {...}, k_min, k_max, n_bins},
                 ells, k_min, k_max, shot_noise_subtracted}
    covariance: {kind: gaussian | file | mocks | harmonic (curved_sky), file: FILE, mocks: GLOB, method: hartlap | t}
    parameters: {NAME: {flat: [lo, hi] | gauss: [mean, sigma] | fixed: x, start, scale, bounds}}
    sampling:   {walkers, max_steps, check_every, tau_factor, tau_rtol, seed, progress,
                 moves: {stretch | differential_evolution | de_snooker: weight},
                 start: optimum | ball}
    output:     {folder}
"""
from __future__ import annotations

import copy
import glob
import hashlib
import json
import math
import os
import re

import numpy as np
import yaml

from ..errors import ConfigError
from .engine import BIAS_EVOLUTION, ENGINES, check_engine, check_tracer_evolution
from .engine import motion_mode as engine_motion
from .engine import resolution as engine_resolution
from .engine import table_path as engine_table
from .multitracer import check_analytic, check_covariance_kind, parameter_table, validate_tracers
from .parameters import KNOWN, ParameterSet, parse_parameter, suggest

_NUM = (int, float)


def _as_number(val):
    """YAML 1.1 reads '1.0e11' (no sign in the exponent) as a string: accept such numbers."""
    if isinstance(val, str):
        try:
            return float(val)
        except ValueError:
            return val
    return val


def _finite(val):
    """True for a finite number (Python ints beyond the float range count as not finite)."""
    try:
        return math.isfinite(float(val))
    except OverflowError:
        return False


def _num(lo=None, hi=None, lo_open=False, integer=False):
    """Validator for a number in a range."""
    def check(val, where):
        val = _as_number(val)
        if isinstance(val, bool) or not isinstance(val, _NUM) or not _finite(val):
            raise ConfigError(f"{where}: expected a finite {'whole ' if integer else ''}number, "
                              f"got {val!r}")
        if integer and int(val) != val:
            raise ConfigError(f"{where}: expected a whole number, got {val!r}")
        if lo is not None and (val <= lo if lo_open else val < lo):
            raise ConfigError(f"{where}: must be {'>' if lo_open else '>='} {lo}, got {val}")
        if hi is not None and val > hi:
            raise ConfigError(f"{where}: must be <= {hi}, got {val}")
        return int(val) if integer else float(val)
    return check


def _walkers(val, where):
    """An even number of walkers, 4 to 100000 (emcee's stretch move updates two halves)."""
    n = _num(4, 100000, integer=True)(val, where)
    if n % 2:
        raise ConfigError(f"{where}: expected an even number of walkers, got {n}")
    return n


def _moves(val, where, n_walkers=None):
    """A move mixture {name: weight} (likelihood.sampling.moves: published moves, emcee.moves)."""
    from ..sampling.moves import check_moves
    return check_moves(val, where, n_walkers)


#: Largest distance a geometry may name [Mpc/h]: the comoving particle horizon is ~9.7e3 Mpc/h
#: for the Planck 2018 preset (common practice: chi(z -> infinity) of flat LCDM), so larger
#: radii are not a survey; the bound also caps the window grids before anything is allocated.
R_MAX = 1.0e4
#: Largest box volume [(Mpc/h)^3]: the volume inside R_MAX.
V_MAX = 4.0 / 3.0 * math.pi * R_MAX ** 3


def _choice(*options):
    def check(val, where):
        if val not in options:
            raise ConfigError(f"{where}: '{val}' is not allowed{suggest(val, [str(o) for o in options])}; "
                              f"choose one of {', '.join(str(o) for o in options)}")
        return val
    return check


def _bool(val, where):
    if not isinstance(val, bool):
        raise ConfigError(f"{where}: expected true or false, got {val!r}")
    return val


def _str(val, where):
    if not isinstance(val, str) or not val.strip():
        raise ConfigError(f"{where}: expected a non-empty string, got {val!r}")
    return val


def _ells(val, where):
    if not isinstance(val, list) or not val or not all(isinstance(v, int) and not isinstance(v, bool)
                                                       for v in val):
        raise ConfigError(f"{where}: expected a list of multipoles like [0, 2], got {val!r}")
    if any(v < 0 or v > 4 for v in val) or len(set(val)) != len(val):
        raise ConfigError(f"{where}: multipoles must be distinct integers in 0..4, got {val}")
    if any(v % 2 for v in val):
        raise ConfigError(f"{where}: odd multipoles {[v for v in val if v % 2]} need the cross spectrum "
                          "of two tracers, which the likelihood does not fit yet; use even ones "
                          "(0, 2, 4)")
    return sorted(val)


def _run_name(val, where):
    """A run name is a plain folder name under chains/ (letters, digits, '.', '_', '-'; not
    starting with '.'); a folder elsewhere is chosen explicitly with output.folder."""
    if isinstance(val, bool) or not isinstance(val, (str, int)) or \
            not re.fullmatch(r"[A-Za-z0-9_][A-Za-z0-9._-]*", str(val)):
        raise ConfigError(f"{where}: expected a plain name like 'my-run' (letters, digits, '.', '_', "
                          f"'-'), got {val!r}; to write elsewhere set output.folder")
    return str(val)


def _mapping(val, where):
    if not isinstance(val, dict):
        raise ConfigError(f"{where}: expected a mapping, got {val!r}")
    return val


# --- forecast section (Fisher forecasts and f_NL bias studies, read by likelihood.forecast) ---
# forecast: {neglect: [doppler, potential, fnl, rsd, integral_constraint, window, observer,
#                      plane_parallel, radial_integral_constraint, effective_redshift, lensing,
#                      isw, time_delay, observer_motion, observer_potential],
#            parameters: [NAME, ...], priors: {NAME: sigma}, threshold: x, step_rtol: x,
#            scan: {quantity: redshift | volume | fsky | thickness | b1 | nbar | b_e | s | k_min
#                             | bias_split (several tracers; with nbar: [total n̄, ...]),
#                   values: [x, ...] | range: [lo, hi, n], spacing: linear | log,
#                   redshift_geometry: recentre | fixed_volume,
#                   bias_evolution: constant | inverse_growth}}
# Defaults are applied by likelihood.forecast (none are stored here).
FORECAST_NEGLECT = ("doppler", "potential", "fnl", "rsd", "integral_constraint", "window", "observer",
                    # curved-sky truth models only (config/variants.py)
                    "plane_parallel", "radial_integral_constraint", "effective_redshift", "lensing",
                    "isw", "time_delay", "observer_motion", "observer_potential")
FORECAST_SCAN = ("redshift", "volume", "fsky", "thickness", "b1", "nbar", "b_e", "s", "k_min",
                 "bias_split")
_SCAN_POSITIVE = ("redshift", "volume", "fsky", "thickness", "nbar", "k_min")


def _name_list(allowed, what):
    def check(val, where):
        if not isinstance(val, list) or not all(isinstance(v, str) for v in val):
            raise ConfigError(f"{where}: expected a list of {what} like [{allowed[0]}], got {val!r}")
        for v in val:
            if v not in allowed:
                raise ConfigError(f"{where}: '{v}' is not one of the {what}{suggest(v, allowed)}; "
                                  f"choose from {', '.join(allowed)}")
        if len(set(val)) != len(val):
            raise ConfigError(f"{where}: a name is listed twice in {val}")
        return list(val)
    return check


def _forecast_priors(val, where):
    _mapping(val, where)
    out = {}
    for name, sigma in val.items():
        if name not in KNOWN:
            raise ConfigError(f"{where}: unknown parameter '{name}'{suggest(name, KNOWN)}")
        out[name] = _num(0.0, lo_open=True)(sigma, f"{where}.{name} (prior sigma)")
    return out


def forecast_scan(val, where):
    """Validate forecast.scan and normalise it to {quantity, values, redshift_geometry, bias_evolution}."""
    allowed = ("quantity", "values", "range", "spacing", "redshift_geometry", "bias_evolution", "nbar")
    _mapping(val, where)
    _check_keys(val, allowed, where)
    if "quantity" not in val:
        raise ConfigError(f"{where}.quantity is required (one of {', '.join(FORECAST_SCAN)})")
    q = val["quantity"]
    if q not in FORECAST_SCAN:
        raise ConfigError(f"{where}.quantity: '{q}' cannot be scanned{suggest(q, FORECAST_SCAN)}; "
                          f"choose one of {', '.join(FORECAST_SCAN)}")
    if ("values" in val) == ("range" in val):
        raise ConfigError(f"{where}: give exactly one of 'values: [x, ...]' or 'range: [lo, hi, n]'")
    spacing = _choice("linear", "log")(val.get("spacing", "linear"), f"{where}.spacing")
    if "values" in val:
        vals = val["values"]
        if not isinstance(vals, list):
            raise ConfigError(f"{where}.values: expected a list of numbers, got {vals!r}")
        if not vals:
            raise ConfigError(f"{where}.values: the grid is empty; give at least one value")
        grid = [_num()(v, f"{where}.values[{i}]") for i, v in enumerate(vals)]
    else:
        rng = val["range"]
        if not isinstance(rng, list) or len(rng) != 3:
            raise ConfigError(f"{where}.range: expected [lo, hi, n], got {rng!r}")
        lo = _num()(rng[0], f"{where}.range[0] (lo)")
        hi = _num()(rng[1], f"{where}.range[1] (hi)")
        n = _num(integer=True)(rng[2], f"{where}.range[2] (n)")
        if n < 1:
            raise ConfigError(f"{where}.range: the grid is empty (n = {n}); give n >= 1")
        if n > 1 and not lo < hi:
            raise ConfigError(f"{where}.range: expected lo < hi, got {lo} >= {hi}")
        if spacing == "log":
            if lo <= 0:
                raise ConfigError(f"{where}.range: log spacing needs lo > 0, got {lo}")
            grid = [float(x) for x in np.geomspace(lo, hi, n)]
        else:
            grid = [float(x) for x in np.linspace(lo, hi, n)]
    if len(set(grid)) != len(grid):
        raise ConfigError(f"{where}.values: the grid repeats a value: {grid}")
    if q in _SCAN_POSITIVE and min(grid) <= 0:
        raise ConfigError(f"{where}: {q} must be > 0 at every grid point, got {min(grid)}")
    if q == "fsky" and max(grid) > 1:
        raise ConfigError(f"{where}: fsky must be <= 1 at every grid point, got {max(grid)}")
    extra = {}
    if "nbar" in val:
        if q != "bias_split":
            raise ConfigError(f"{where}.nbar: only with quantity: bias_split (the total densities "
                              "of the split); scan nbar with quantity: nbar")
        nb = val["nbar"]
        if not isinstance(nb, list) or not nb:
            raise ConfigError(f"{where}.nbar: expected a list of total number densities, got {nb!r}")
        extra["nbar"] = [_num(0.0, lo_open=True)(v, f"{where}.nbar[{i}]") for i, v in enumerate(nb)]
    return {"quantity": q, "values": grid, **extra,
            "redshift_geometry": _choice("recentre", "fixed_volume")(
                val.get("redshift_geometry", "recentre"), f"{where}.redshift_geometry"),
            "bias_evolution": _choice("constant", "inverse_growth")(
                val.get("bias_evolution", "constant"), f"{where}.bias_evolution")}


# section -> key -> (validator, default); default None means "optional, no default"
SCHEMA = {
    "cosmology": {
        "preset": (_choice("planck2018", "planck2018_bao"), "planck2018"),
        "overrides": (_mapping, {}),
        "transfer": (_choice("eh98", "eh98_nowiggle", "table"), "eh98"),
        "table": (_str, None),
        "table_kind": (_choice("power", "transfer"), "power"),
    },
    "survey": {
        "redshift": (_num(0.0, 10.0, lo_open=True), None),
        "nbar": (_num(0.0, lo_open=True), None),
        "geometry": (_mapping, None),
    },
    "tracer": {
        "b1": (_num(), KNOWN["b1"].default),
        "fnl": (_num(), KNOWN["fnl"].default),
        "p": (_num(0.0, lo_open=True), 1.0),
        "b_e": (_num(), KNOWN["b_e"].default),
        "s": (_num(), KNOWN["s"].default),
    },
    "effects": {
        "rsd": (_bool, True),
        "fnl": (_bool, True),
        "doppler": (_bool, True),
        "potential": (_bool, True),
        "window": (_bool, True),
        "integral_constraint": (_choice("none", "global", "radial"), "global"),
        "observer": (_bool, False),
        # integrated terms: curved-sky engine only; no default here (config/engine.py)
        "lensing": (_bool, None),
        "isw": (_bool, None),
        "time_delay": (_bool, None),
        # observer terms: curved-sky engine only (config/engine.py)
        "observer_motion": (engine_motion, None),
        "observer_potential": (_bool, None),
    },
    # the theory engine (config/engine.py); a plane-parallel config stores nothing here
    "engine": {
        "kind": (_choice(*ENGINES), None),
        "snapshot": (_bool, None),
        "bias_evolution": (_choice(*BIAS_EVOLUTION), None),
        "resolution": (engine_resolution, None),
        "tracer_table": (engine_table, None),
        "mask_tolerance": (_num(0.0, 0.1, lo_open=True), None),
    },
    "observer": {
        "field": (_choice("potential", "density"), "potential"),
        "smoothing": (_num(0.0, lo_open=True), None),
        "k_ir": (_num(0.0, lo_open=True), None),
        "nu_true": (_num(), 1.0),
        "speed": (_num(0.0), None),     # km/s, effects.observer_motion: conditioned
    },
    "data": {
        "file": (_str, None),
        "mock": (_mapping, None),
        "ells": (_ells, [0, 2]),
        "k_min": (_num(0.0, lo_open=True), None),
        "k_max": (_num(0.0, lo_open=True), None),
        "shot_noise_subtracted": (_bool, True),
    },
    "covariance": {
        "kind": (_choice("gaussian", "file", "mocks", "harmonic"), "gaussian"),
        "file": (_str, None),
        "mocks": (_str, None),
        "method": (_choice("hartlap", "t"), "hartlap"),
    },
    "sampling": {
        "walkers": (_walkers, 32),
        "max_steps": (_num(1, 10**8, integer=True), 20000),
        "check_every": (_num(1, integer=True), 200),
        "tau_factor": (_num(1.0), 50.0),
        "tau_rtol": (_num(0.0, lo_open=True), 0.01),
        "seed": (_num(0, 2**32 - 1, integer=True), 0),
        "progress": (_bool, True),
        "moves": (_moves, None),          # default: sampling.moves.default_moves(walkers)
        "start": (_choice("optimum", "ball"), "optimum"),
    },
    "output": {
        "folder": (_str, None),
    },
    "forecast": {
        "neglect": (_name_list(FORECAST_NEGLECT, "effects"), None),
        "parameters": (_name_list(tuple(KNOWN), "parameters"), None),
        "priors": (_forecast_priors, None),
        "threshold": (_num(0.0, lo_open=True), None),
        "step_rtol": (_num(0.0, 0.1, lo_open=True), None),
        "scan": (forecast_scan, None),
    },
}

#: curved_sky radial selection (likelihood/model/curved_window.py): an n(z) table or randoms
#: file, and the P0 [(Mpc/h)^3] of FKP weights 1/(1 + nbar P0)
CURVED_RADIAL = {"selection": _str, "fkp_p0": _num(0.0, 1.0e7)}

GEOMETRY = {
    "box": {"shape": None, "volume": _num(0.0, V_MAX, lo_open=True)},
    "sphere": {"shape": None, "radius": _num(0.0, R_MAX, lo_open=True)},
    "shell": {"shape": None, "r_min": _num(0.0, R_MAX), "r_max": _num(0.0, R_MAX, lo_open=True),
              "mask": _str,      # a HEALPix map of the angular mask (curved_sky only)
              **CURVED_RADIAL},
    "cap": {"shape": None, "r_min": _num(0.0, R_MAX), "r_max": _num(0.0, R_MAX, lo_open=True),
            "fsky": _num(0.0, 1.0, lo_open=True), **CURVED_RADIAL},
    "randoms": {"shape": None, "randoms": _str,
                # curved_sky: HEALPix resolution of the randoms' angular mask; FKP weights
                "nside": _num(1, 8192, integer=True), "fkp_p0": CURVED_RADIAL["fkp_p0"]},
    # a precomputed Q_ℓ(s) table (written by `ergofit window`); volume from its header or given
    "window": {"shape": None, "file": _str, "volume": _num(0.0, V_MAX, lo_open=True)},
}
#: geometry keys that are optional (all others are required for their shape)
GEOMETRY_OPTIONAL = {("window", "volume"), ("shell", "mask"), ("randoms", "nside"),
                     ("randoms", "fkp_p0")} | {(shape, key) for shape in ("shell", "cap")
                                              for key in ("selection", "fkp_p0")}
#: geometry keys that name an input file (hashed by contents, copied into the run folder)
GEOMETRY_FILES = ("randoms", "file", "mask", "selection")

MOCK = {"seed": (_num(0, integer=True), 1), "noise": (_bool, True), "truth": (_mapping, {}),
        "k_min": (_num(0.0, lo_open=True), 0.002), "k_max": (_num(0.0, lo_open=True), 0.05),
        "n_bins": (_num(2, 1000, integer=True), 16)}

TOP = ("run", *SCHEMA, "parameters", "tracers", "spectra", "samples")


def _check_keys(mapping, allowed, where):
    for key in mapping:
        if key not in allowed:
            raise ConfigError(f"{where}: unknown key '{key}'{suggest(key, allowed)}; "
                              f"allowed: {', '.join(allowed)}")


def _section(raw, name, src):
    spec = SCHEMA[name]
    block = raw.get(name, {})
    if block is None:
        block = {}
    where = f"{src}: {name}"
    _mapping(block, where)
    _check_keys(block, spec, where)
    out = {}
    for key, (check, default) in spec.items():
        if key in block:
            out[key] = check(block[key], f"{where}.{key}")
        elif default is not None:
            out[key] = copy.deepcopy(default)
    return out


class Config(dict):
    """A validated configuration (a plain nested dict plus ``path``, ``base_dir``, ``hash``)."""

    path: str = "<memory>"
    base_dir: str = "."

    def resolve(self, rel):
        """Absolute path of an input file named in the config."""
        return rel if os.path.isabs(rel) else os.path.normpath(os.path.join(self.base_dir, rel))

    #: (section, key) of every input file named in a config
    INPUT_FILES = (("data", "file"), ("covariance", "file"), ("covariance", "mocks"),
                   ("cosmology", "table"), ("engine", "tracer_table"))

    def _file_digest(self, rel):
        """sha256 of the contents of the file(s) a config names (a glob for mocks)."""
        h = hashlib.sha256()
        for path in sorted(glob.glob(self.resolve(rel))):
            with open(path, "rb") as fh:
                h.update(hashlib.sha256(fh.read()).digest())
        return h.hexdigest()

    @property
    def hash(self):
        """Hash of everything that defines the posterior: the settings and the *contents* of the
        input files (so a moved or re-pathed data file keeps its hash, an edited one does not).
        Sampler settings (more steps for a resumed run), forecast studies and the output place
        stay out: they do not change the posterior."""
        core = {k: copy.deepcopy(v) for k, v in self.items()
                if k not in ("forecast", "output", "run", "sampling")}
        if not core.get("engine"):
            core.pop("engine", None)      # plane-parallel: the hash of configs before engines
        for sec, key in self.INPUT_FILES:
            if key in core.get(sec, {}):
                core[sec][key] = self._file_digest(core[sec][key])
        geo = core.get("survey", {}).get("geometry", {})
        for key in GEOMETRY_FILES:
            if key in geo:
                geo[key] = self._file_digest(geo[key])
        blob = json.dumps(core, sort_keys=True, default=str).encode()
        return hashlib.sha256(blob).hexdigest()[:16]

    @property
    def run_name(self):
        return self["run"]

    @property
    def output_folder(self):
        return self["output"].get("folder") or os.path.join("chains", self["run"])


def validate(raw, src="<memory>", base_dir="."):
    """Validate a raw config mapping; return a :class:`Config` with defaults filled in."""
    if not isinstance(raw, dict):
        raise ConfigError(f"{src}: the top level must be a mapping of sections")
    _check_keys(raw, TOP, src)
    cfg = Config()
    cfg.path, cfg.base_dir = src, base_dir
    cfg.raw = copy.deepcopy(raw)   # what validate() read: lets pool workers rebuild the model
    run = raw.get("run", os.path.splitext(os.path.basename(src))[0] or "run")
    cfg["run"] = _run_name(run, f"{src}: run")
    if raw.get("samples") is not None:          # several samples: likelihood.config.samples
        from .samples import validate_samples
        return validate_samples(raw, src, base_dir, validate, cfg["run"])
    for name in SCHEMA:
        cfg[name] = _section(raw, name, src)

    sv = cfg["survey"]
    multi = raw.get("tracers") is not None
    if multi:
        validate_tracers(raw, cfg, src)     # sets survey.nbar to the tracers' sum
    elif raw.get("spectra") is not None:
        raise ConfigError(f"{src}: spectra: needs a tracers section naming the populations")
    known = parameter_table(cfg) if multi else KNOWN
    for key in ("redshift", "nbar", "geometry"):
        if key not in sv:
            raise ConfigError(f"{src}: survey.{key} is required")
    geo = sv["geometry"]
    shape = geo.get("shape")
    if shape not in GEOMETRY:
        raise ConfigError(f"{src}: survey.geometry.shape '{shape}' is not allowed"
                          f"{suggest(shape, GEOMETRY)}; choose one of {', '.join(GEOMETRY)}")
    _check_keys(geo, GEOMETRY[shape], f"{src}: survey.geometry ({shape})")
    for key, check in GEOMETRY[shape].items():
        if check is None:
            continue
        if key not in geo:
            if (shape, key) in GEOMETRY_OPTIONAL:
                continue
            raise ConfigError(f"{src}: survey.geometry.{key} is required for shape '{shape}'")
        geo[key] = check(geo[key], f"{src}: survey.geometry.{key}")
    if shape in ("shell", "cap") and not geo["r_min"] < geo["r_max"]:
        raise ConfigError(f"{src}: survey.geometry needs r_min < r_max, got {geo['r_min']} >= {geo['r_max']}")
    for key in GEOMETRY_FILES:
        if key in geo:
            _need_file(cfg, geo[key], f"survey.geometry.{key}")
    if shape in ("randoms", "window") and cfg["effects"]["observer"] and cfg["effects"]["window"]:
        raise ConfigError(f"{src}: effects.observer needs an analytic geometry (sphere, shell, cap); "
                          f"survey.geometry.shape '{shape}' is not supported by the observer term: "
                          "set effects.observer: false")
    if shape == "box" and cfg["effects"]["window"]:
        cfg["effects"]["window"] = False  # a periodic box has no window to convolve with

    cosmo = cfg["cosmology"]
    for key, val in cosmo["overrides"].items():
        if key not in ("h", "omega_b", "omega_c", "n_s", "ln_1e10_As", "sigma8", "w", "m_nu"):
            raise ConfigError(f"{src}: cosmology.overrides: unknown key '{key}'"
                              f"{suggest(key, ['h', 'omega_b', 'omega_c', 'n_s', 'ln_1e10_As', 'sigma8', 'w', 'm_nu'])}")
        _num()(val, f"{src}: cosmology.overrides.{key}")
    if cosmo["transfer"] == "table":
        if "table" not in cosmo:
            raise ConfigError(f"{src}: cosmology.table is required with transfer: table")
        _need_file(cfg, cosmo["table"], "cosmology.table")

    data = cfg["data"]
    if ("file" in data) == ("mock" in data):
        raise ConfigError(f"{src}: data needs exactly one of 'file' (a data vector) or 'mock' (generate one)")
    if "file" in data:
        _need_file(cfg, data["file"], "data.file")
    else:
        mock_raw = data["mock"]
        _check_keys(mock_raw, MOCK, f"{src}: data.mock")
        mock = {}
        for key, (check, default) in MOCK.items():
            mock[key] = check(mock_raw[key], f"{src}: data.mock.{key}") if key in mock_raw else copy.deepcopy(default)
        for name, val in mock["truth"].items():
            if name not in known:
                raise ConfigError(f"{src}: data.mock.truth: unknown parameter '{name}'{suggest(name, known)}")
            _num()(val, f"{src}: data.mock.truth.{name}")
        if not mock["k_min"] < mock["k_max"]:
            raise ConfigError(f"{src}: data.mock needs k_min < k_max")
        data["mock"] = mock
    if "k_min" in data and "k_max" in data and not data["k_min"] < data["k_max"]:
        raise ConfigError(f"{src}: data.k_min must be below data.k_max")

    cov = cfg["covariance"]
    if cov["kind"] == "file":
        if "file" not in cov:
            raise ConfigError(f"{src}: covariance.file is required with kind: file")
        _need_file(cfg, cov["file"], "covariance.file")
    if cov["kind"] == "mocks" and "mocks" not in cov:
        raise ConfigError(f"{src}: covariance.mocks (a glob of mock data-vector files) is required with kind: mocks")

    if multi:
        check_covariance_kind(cfg, src)
    check_engine(cfg, src)
    if multi:
        check_tracer_evolution(cfg, src)

    if cfg["effects"]["observer"] and cfg["observer"]["field"] == "density" \
            and "smoothing" not in cfg["observer"]:
        raise ConfigError(f"{src}: observer.smoothing (radius in Mpc/h, > 0) is required for field: density")

    params = raw.get("parameters", {}) or {}
    _mapping(params, f"{src}: parameters")
    free, fixed, analytic = [], {}, []
    for name, spec in params.items():
        par, val = parse_parameter(name, spec, f"{src}: parameters", known)
        if par is None:
            fixed[name] = val
        elif par.analytic:
            analytic.append(check_analytic(par, cfg, src))
        else:
            free.append(par)
    if not free:
        raise ConfigError(f"{src}: parameters: nothing to sample; give at least one parameter a flat or gauss prior")
    if "nu_obs" in [p.name for p in free] and not cfg["effects"]["observer"]:
        raise ConfigError(f"{src}: parameters.nu_obs is sampled but effects.observer is false")
    if "ln_1e10_As" in [p.name for p in free] + list(fixed) and "sigma8" in [p.name for p in free] + list(fixed):
        raise ConfigError(f"{src}: parameters: give ln_1e10_As or sigma8, not both")
    cfg["parameters"] = {p.name: {"prior": p.prior.__dict__, "start": p.start, "scale": p.scale} for p in free}
    cfg["fixed"] = fixed
    cfg._param_objects = (free, fixed)
    cfg._analytic = analytic
    if analytic:
        cfg["analytic"] = {p.name: p.prior.__dict__ for p in analytic}
    smp = cfg["sampling"]
    if "moves" in smp:
        _moves(smp["moves"], f"{src}: sampling.moves", smp["walkers"])
    else:
        from ..sampling.moves import default_moves
        smp["moves"] = default_moves(smp["walkers"])
    return cfg


def _need_file(cfg, rel, key):
    path = cfg.resolve(rel)
    if not os.path.isfile(path):
        raise ConfigError(f"{cfg.path}: {key}: file '{rel}' not found (looked for {path})")


def parameter_set(cfg):
    """The :class:`~likelihood.config.parameters.ParameterSet` of a validated config."""
    free, fixed = cfg._param_objects
    return ParameterSet(free, fixed)


class DuplicateKeyError(yaml.YAMLError):
    pass


class _UniqueKeyLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses a key given twice in one mapping (YAML keeps the last
    silently, so a repeated key would drop a value the user wrote)."""

    def construct_mapping(self, node, deep=False):
        seen = set()
        for key_node, _ in node.value:
            key = self.construct_object(key_node, deep=deep)
            if key in seen:
                raise DuplicateKeyError(f"key '{key}' is given twice (line "
                                        f"{key_node.start_mark.line + 1}); keep one")
            seen.add(key)
        return super().construct_mapping(node, deep=deep)


def load_config(path):
    """Read and validate a YAML config file (safe loading only; duplicate keys refused)."""
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ConfigError(f"{path}: config file not found")
    try:
        with open(path, "r", encoding="utf-8") as fh:
            raw = yaml.load(fh, Loader=_UniqueKeyLoader)
    except DuplicateKeyError as exc:
        raise ConfigError(f"{path}: {exc}") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" (line {mark.line + 1})" if mark is not None else ""
        raise ConfigError(f"{path}: not valid YAML{where}: {getattr(exc, 'problem', exc)}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read ({exc})") from None
    if raw is None:
        raise ConfigError(f"{path}: the config file is empty")
    return validate(raw, src=path, base_dir=os.path.dirname(os.path.abspath(path)))
