"""Config variants: the analysis model that neglects effects, and the config at one scan point
(method: :mod:`likelihood.forecast`)."""
from __future__ import annotations

import copy

import numpy as np

from .engine import INTEGRATED_EFFECTS, OBSERVER_EFFECTS, is_curved
from .schema import FORECAST_NEGLECT, SCHEMA, Config, validate
from ..errors import ConfigError, ErgofitError



def config_to_raw(cfg):
    """A raw config mapping that :func:`likelihood.config.validate` turns back into ``cfg``."""
    if not isinstance(cfg, Config):
        raise ErgofitError(f"expected a validated Config, got {type(cfg).__name__}")
    if "tracers" in cfg:          # several tracers: the validator rewrote sections; keep the file's
        return {**copy.deepcopy(cfg.raw), "run": cfg["run"]}
    raw = {"run": cfg["run"]}
    for name in SCHEMA:
        if name in cfg:
            raw[name] = copy.deepcopy(cfg[name])
    params = {}
    for name, spec in cfg["parameters"].items():
        pr = spec["prior"]
        if pr["kind"] == "flat":
            out = {"flat": [pr["lower"], pr["upper"]]}
        else:
            out = {"gauss": [pr["mean"], pr["sigma"]]}
            if np.isfinite(pr["lower"]) or np.isfinite(pr["upper"]):
                out["bounds"] = [pr["lower"], pr["upper"]]
        out.update(start=spec["start"], scale=spec["scale"])
        params[name] = out
    for name, val in cfg["fixed"].items():
        params[name] = {"fixed": val}
    raw["parameters"] = params
    return raw


def _revalidate(cfg, raw, note):
    return validate(raw, src=f"{cfg.path} [{note}]", base_dir=cfg.base_dir)


def analysis_config(cfg, neglect):
    """The config with the effects in ``neglect`` switched off (the analysis model)."""
    neglect = list(neglect)
    for n in neglect:
        if n not in FORECAST_NEGLECT:
            raise ConfigError(f"{cfg.path}: forecast.neglect: '{n}' is not an effect; choose from "
                              f"{', '.join(FORECAST_NEGLECT)}")
    if not neglect:
        return cfg
    raw = config_to_raw(cfg)
    e = raw.setdefault("effects", {})
    for n in neglect:
        if n in CURVED_NEGLECT:
            _neglect_curved(cfg, raw, n, neglect)
        else:
            e[n] = "none" if n == "integral_constraint" else False
    if "observer" in neglect:
        spec = raw["parameters"].get("nu_obs")
        if isinstance(spec, dict) and "fixed" not in spec:
            del raw["parameters"]["nu_obs"]   # nothing to sample without the observer term
    return _revalidate(cfg, raw, "analysis without " + ", ".join(neglect))


#: neglected "effects" that are approximations of a curved-sky truth model
CURVED_NEGLECT = ("plane_parallel", "radial_integral_constraint", "effective_redshift") \
    + INTEGRATED_EFFECTS + OBSERVER_EFFECTS


def _neglect_curved(cfg, raw, name, neglect=()):
    """Change ``raw`` (a curved-sky config) into the analysis that neglects ``name``:

    plane_parallel: the plane-parallel engine (kernel at z_eff, window convolution, the
    approximate global integral constraint — for a radial one too —, no integrated terms);
    radial_integral_constraint: the exact global integral constraint instead of the radial one;
    effective_redshift: the curved-sky engine in snapshot mode (engine.snapshot: b1, b_e, s, D,
    f, ℋ, ℋ'/ℋ² and χ of the local kernel all at survey.redshift; the geometry, i.e. the
    end-point line of sight and the window, stays exact) while the truth evolves along the light
    cone; the snapshot has local terms only, so a truth with integrated or observer terms needs
    them in ``neglect`` too (their shift is then included: subtract the forecast that neglects
    only them);
    lensing, isw, time_delay: that integrated term switched off;
    observer_motion, observer_potential: that observer term switched off (with the motion its
    conditioning on observer.speed goes too)."""
    e = raw["effects"]
    if not is_curved(cfg):
        raise ConfigError(f"{cfg.path}: forecast.neglect: '{name}' is an approximation of the "
                          "curved-sky model; the truth model needs engine.kind: curved_sky")
    if name == "plane_parallel":
        geo = raw["survey"]["geometry"]
        for key in ("selection", "fkp_p0"):
            if key in geo:
                raise ConfigError(f"{cfg.path}: forecast.neglect: 'plane_parallel' with "
                                  f"survey.geometry.{key}: the plane-parallel engine has no "
                                  "radial selection other than a window from randoms (shape: "
                                  "randoms); the comparison would change the window too")
        geo.pop("nside", None)          # the curved engine's mask resolution
        raw.pop("engine", None)
        for t in INTEGRATED_EFFECTS + OBSERVER_EFFECTS:
            e.pop(t, None)
        raw.get("observer", {}).pop("speed", None)
        if e["integral_constraint"] == "radial":
            e["integral_constraint"] = "global"
    elif name == "radial_integral_constraint":
        if e["integral_constraint"] != "radial":
            raise ConfigError(f"{cfg.path}: forecast.neglect: 'radial_integral_constraint' needs "
                              "effects.integral_constraint: radial in the truth model")
        e["integral_constraint"] = "global"
    elif not raw.get("engine"):
        return                  # plane_parallel took the integrated terms and z_eff already
    elif name == "effective_redshift":
        if cfg["engine"]["snapshot"]:
            raise ConfigError(f"{cfg.path}: forecast.neglect: 'effective_redshift' needs a truth "
                              "model on the light cone; set engine.snapshot: false")
        kept = [t for t in INTEGRATED_EFFECTS + OBSERVER_EFFECTS
                if cfg["effects"].get(t) and t not in neglect]
        if kept:
            raise ConfigError(f"{cfg.path}: forecast.neglect: 'effective_redshift' analyses with "
                              f"the snapshot mode, which has local terms only; add {', '.join(kept)} "
                              "to forecast.neglect (or switch them off in effects)")
        raw["engine"]["snapshot"] = True
    else:
        e[name] = False
        if name == "observer_motion":
            raw.get("observer", {}).pop("speed", None)


def _fiducial_value(cfg, name):
    """Fiducial value of a tracer parameter as model.Likelihood sees it (mock truth wins)."""
    val = cfg["tracer"][name]
    val = cfg["fixed"].get(name, val)
    mock = cfg["data"].get("mock")
    if mock:
        val = mock["truth"].get(name, val)
    return float(val)


def _set_fiducial(raw, name, value):
    """Set a tracer parameter's fiducial value everywhere the model reads it."""
    raw["tracer"][name] = value
    spec = raw["parameters"].get(name)
    if isinstance(spec, dict):
        if "fixed" in spec:
            spec["fixed"] = value
        else:
            spec["start"] = value
    mock = raw["data"].get("mock")
    if mock is not None:
        mock["truth"][name] = value


def _half_thickness_for_volume(r_c, volume, fsky):
    """Half thickness a of the shell [r_c − a, r_c + a] (sky fraction fsky) of the given volume.

    (4π/3) fsky [(r_c + a)³ − (r_c − a)³] = (4π/3) fsky (6 r_c² a + 2 a³) = V, solved for a
    (monotonic). Returns None if even a = r_c (a ball of radius 2 r_c) is too small.
    """
    from scipy.optimize import brentq
    k = 3.0 * volume / (4.0 * np.pi * fsky)
    if k >= 8.0 * r_c ** 3:
        return None
    return brentq(lambda a: 6.0 * r_c ** 2 * a + 2.0 * a ** 3 - k, 0.0, r_c, xtol=1e-10 * r_c)


def _shell_of_volume(geo, r_c, volume, what):
    fsky = geo.get("fsky", 1.0)
    a = _half_thickness_for_volume(r_c, volume, fsky)
    notes = []
    if a is None:
        r_max = (3.0 * volume / (4.0 * np.pi * fsky)) ** (1.0 / 3.0)
        geo["r_min"], geo["r_max"] = 0.0, float(r_max)
        notes.append(f"{what}: a shell of volume {volume:.3g} (Mpc/h)^3 centred at {r_c:.0f} Mpc/h "
                     f"would reach the observer; used r in [0, {r_max:.0f}] Mpc/h")
    else:
        geo["r_min"], geo["r_max"] = float(r_c - a), float(r_c + a)
    return notes


def scan_config(cfg, quantity, value, redshift_geometry="recentre", bias_evolution="constant"):
    """The config at one scan point: (validated Config, list of notes). See the module docstring."""
    from ..model.factories import cosmology as make_cosmology
    raw = config_to_raw(cfg)
    geo = raw["survey"]["geometry"]
    shape = geo["shape"]
    notes = []
    what = f"{quantity} = {value:g}"
    value = float(value)
    if quantity == "redshift":
        z0 = cfg["survey"]["redshift"]
        raw["survey"]["redshift"] = value
        cosmo = make_cosmology(cfg)
        if shape in ("shell", "cap"):
            r_c = float(cosmo.comoving_distance(value))
            if redshift_geometry == "recentre":
                half = 0.5 * (geo["r_max"] - geo["r_min"])
                lo = r_c - half
                if lo < 0:
                    notes.append(f"{what}: the re-centred shell would reach the observer; cut at "
                                 "r_min = 0")
                geo["r_min"], geo["r_max"] = max(lo, 0.0), r_c + half
            else:
                volume = (4.0 * np.pi / 3.0) * geo.get("fsky", 1.0) * (
                    cfg["survey"]["geometry"]["r_max"] ** 3 - cfg["survey"]["geometry"]["r_min"] ** 3)
                notes += _shell_of_volume(geo, r_c, volume, what)
        if bias_evolution == "inverse_growth":
            b1 = _fiducial_value(cfg, "b1") * float(cosmo.growth_factor(z0) / cosmo.growth_factor(value))
            _set_fiducial(raw, "b1", b1)
    elif quantity in ("volume", "thickness", "fsky"):
        if quantity == "fsky":
            if shape not in ("shell", "cap"):
                raise ConfigError(f"{cfg.path}: forecast.scan: fsky needs a shell or cap geometry, "
                                  f"not '{shape}'")
            geo["shape"] = "cap"
            geo["fsky"] = value
        elif shape == "box":
            if quantity == "thickness":
                raise ConfigError(f"{cfg.path}: forecast.scan: thickness needs a shell or cap "
                                  "geometry, not 'box'")
            geo["volume"] = value
        elif shape == "sphere":
            if quantity == "thickness":
                raise ConfigError(f"{cfg.path}: forecast.scan: thickness needs a shell or cap "
                                  "geometry, not 'sphere'")
            geo["radius"] = float((3.0 * value / (4.0 * np.pi)) ** (1.0 / 3.0))
        elif shape in ("shell", "cap"):
            r_c = 0.5 * (geo["r_min"] + geo["r_max"])
            if quantity == "volume":
                notes += _shell_of_volume(geo, r_c, value, what)
            else:
                if value > 2.0 * r_c:
                    raise ConfigError(f"{cfg.path}: forecast.scan: thickness {value:g} Mpc/h exceeds "
                                      f"twice the shell's centre distance {r_c:.0f} Mpc/h")
                geo["r_min"], geo["r_max"] = r_c - 0.5 * value, r_c + 0.5 * value
        else:
            raise ConfigError(f"{cfg.path}: forecast.scan: {quantity} cannot be scanned for a "
                              f"'{shape}' geometry (use an analytic box, sphere, shell or cap)")
    elif quantity in ("b1", "b_e", "s"):
        _set_fiducial(raw, quantity, value)
    elif quantity == "nbar":
        raw["survey"]["nbar"] = value
    elif quantity == "k_min":
        raw["data"]["k_min"] = value
    else:
        raise ConfigError(f"{cfg.path}: forecast.scan.quantity: '{quantity}' cannot be scanned")
    return _revalidate(cfg, raw, f"scan {what}"), notes

