"""The ``engine`` section: which theory route computes the model of a run, and the settings of
the curved-sky route (likelihood.curved; docs/curved_sky.md, "Configuration").

    engine:
      kind: plane_parallel | curved_sky        # default plane_parallel
      snapshot: false                          # curved_sky: coefficients at survey.redshift,
                                               #   local terms only (the plane-parallel
                                               #   assumptions, for comparison)
      bias_evolution: constant | inverse_growth   # b1(z) = b1, or b1 D(z_eff)/D(z)
      tracer_table: FILE                       # or: the redshift dependence of b1, b_e, s from
                                               #   a table (columns z b1 b_e s; model/curved.py)
      resolution: {j_factor, q_range, q_density, r_density, k_nodes}
      mask_tolerance: 1e-4                     # angular mask power left beyond the band limit
                                               #   (likelihood.curved.mask.masked_templates)
    survey.geometry (curved_sky): shape: shell (full sky, or a HEALPix map: mask: FILE, needs
      the optional extra healpix) or shape: cap (r_min, r_max, fsky: a polar cap), each with an
      optional radial selection (selection: an n(z) table or randoms file; fkp_p0), or
      shape: randoms (randoms: FILE, nside: the selection and mask of a random catalogue);
      likelihood/model/curved_window.py
    effects:
      integral_constraint: none | global | radial  # radial: curved_sky only
      lensing: true, isw: true, time_delay: true   # integrated terms: curved_sky only
                                                   #   (default on there, off in snapshot mode)
      observer_motion: false | averaged | conditioned   # the observer's velocity (J = 1);
                                                   #   true = averaged; conditioned on
                                                   #   observer.speed (km/s; default the CMB
                                                   #   dipole), full sky only
      observer_potential: false | true             # the observer's potential (J = 0),
                                                   #   averaged; conditioned: effects.observer
                                                   #   with observer.field: potential
    (observer terms: curved_sky only, not in snapshot mode; likelihood.curved.observer_terms)

Several tracers (``tracers``): each entry may set its own ``bias_evolution`` or
``tracer_table`` (curved_sky only); without them a tracer takes the engine section's
(check_tracer_evolution).

Covariance: ``covariance.kind: harmonic`` (curved_sky, full sky only) is the Gaussian
covariance of the estimator from the harmonic expansion at the fiducial parameters
(likelihood.curved.covariance), for one tracer or several (``tracers``); refused with a cap or a
map, a radial selection and with the plane-parallel engine.

Observer term (effects.observer): available with the none and global integral constraints, on the
full sky or with an angular mask (cap or map); with the radial one it vanishes exactly (the
field is isotropic about the observer, so each distance's mean inside the mask is the field) and
is refused.

Integral constraint: the plane-parallel route's ``global`` is the approximate form
P̂_0(0) W̃²_ℓ(k)/W̃²_0(0) (Peacock & Nicholson 1991); the curved-sky route's ``global`` removes
the survey mean exactly and ``radial`` removes each distance's angular mean (de Mattia &
Ruhlmann-Kleider 2019), exact on the full sky.

A plane-parallel config never stores this section (its config hash is unchanged by it).
"""
from __future__ import annotations

import os

from ..errors import ConfigError
from .parameters import suggest

ENGINES = ("plane_parallel", "curved_sky")
BIAS_EVOLUTION = ("constant", "inverse_growth")
INTEGRATED_EFFECTS = ("lensing", "isw", "time_delay")
OBSERVER_EFFECTS = ("observer_motion", "observer_potential")
MOTION_MODES = ("averaged", "conditioned")
#: resolution key -> (default, lowest, highest): factors on the rules of
#: likelihood.curved.estimator.EstimatorResolution (1 = the default rule), k_nodes per bin
RESOLUTION = {"j_factor": (1.0, 0.5, 4.0), "q_range": (1.0, 0.5, 4.0),
              "q_density": (1.0, 0.5, 4.0), "r_density": (1.0, 0.5, 4.0),
              "k_nodes": (4, 2, 16)}
CURVED_KEYS = ("snapshot", "bias_evolution", "resolution", "tracer_table", "mask_tolerance")
#: curved_sky geometries: a full-sky shell (optionally with a HEALPix mask), a polar cap, or
#: the radial selection and angular mask of a random catalogue (model/curved_window.py)
CURVED_SHAPES = ("shell", "cap", "randoms")
#: survey.geometry keys of the curved-sky window only (model/curved_window.py)
CURVED_GEOMETRY_KEYS = ("selection", "fkp_p0", "nside")


def table_path(val, where):
    """engine.tracer_table: a file name (existence is checked against the config's folder)."""
    if not isinstance(val, str) or not val.strip():
        raise ConfigError(f"{where}: expected a file name, got {val!r}")
    return val


def resolution(val, where):
    """engine.resolution: a mapping of the RESOLUTION keys (numbers in their ranges)."""
    if not isinstance(val, dict):
        raise ConfigError(f"{where}: expected a mapping like {{q_range: 1.5}}, got {val!r}")
    out = {}
    for key, (default, lo, hi) in RESOLUTION.items():
        v = val.get(key, default)
        whole = isinstance(default, int)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not lo <= v <= hi \
                or (whole and int(v) != v):
            raise ConfigError(f"{where}.{key}: expected a {'whole ' if whole else ''}number "
                              f"from {lo} to {hi}, got {v!r}")
        out[key] = int(v) if whole else float(v)
    for key in val:
        if key not in RESOLUTION:
            raise ConfigError(f"{where}: unknown key '{key}'{suggest(key, RESOLUTION)}; "
                              f"allowed: {', '.join(RESOLUTION)}")
    return out


def motion_mode(val, where):
    """effects.observer_motion: false, true (= averaged), averaged or conditioned."""
    if val is False or val is True:
        return "averaged" if val else False
    if val not in MOTION_MODES:
        raise ConfigError(f"{where}: expected false, averaged or conditioned, got {val!r}")
    return val


def is_curved(cfg):
    """True when the run uses the curved-sky engine."""
    return cfg.get("engine", {}).get("kind") == "curved_sky"


def check_engine(cfg, src):
    """Cross-section checks of the engine choice; fills the curved-sky defaults in place.

    Raises ConfigError (one line naming the key) for a setting the chosen engine cannot model.
    """
    eng, eff = cfg["engine"], cfg["effects"]
    kind = eng.get("kind", "plane_parallel")
    if kind == "plane_parallel":
        for key in CURVED_KEYS:
            if key in eng:
                raise ConfigError(f"{src}: engine.{key} applies to engine.kind: curved_sky only; "
                                  "remove it or choose the curved-sky engine")
        for key in INTEGRATED_EFFECTS:
            if eff.get(key):
                raise ConfigError(f"{src}: effects.{key}: the integrated terms are modelled by "
                                  "engine.kind: curved_sky only; set it false or choose that engine")
            eff.pop(key, None)
        for key in OBSERVER_EFFECTS:
            if eff.get(key):
                raise ConfigError(f"{src}: effects.{key}: the observer terms of the number counts "
                                  "are modelled by engine.kind: curved_sky only; set it false or "
                                  "choose that engine")
            eff.pop(key, None)
        if "speed" in cfg["observer"]:
            raise ConfigError(f"{src}: observer.speed applies to effects.observer_motion: "
                              "conditioned (engine.kind: curved_sky); remove it")
        if eff["integral_constraint"] == "radial":
            raise ConfigError(f"{src}: effects.integral_constraint: radial needs engine.kind: "
                              "curved_sky; the plane-parallel engine has none or global")
        if "mask" in cfg["survey"]["geometry"]:
            raise ConfigError(f"{src}: survey.geometry.mask: a HEALPix mask is modelled by "
                              "engine.kind: curved_sky only; the plane-parallel engine takes a "
                              "window from randoms (shape: randoms)")
        for key in CURVED_GEOMETRY_KEYS:
            if key in cfg["survey"]["geometry"]:
                raise ConfigError(f"{src}: survey.geometry.{key} applies to engine.kind: "
                                  "curved_sky only; remove it or choose the curved-sky engine")
        if cfg["covariance"]["kind"] == "harmonic":
            raise ConfigError(f"{src}: covariance.kind: harmonic is the curved-sky covariance; "
                              "it needs engine.kind: curved_sky (use gaussian, file or mocks)")
        cfg["engine"] = {}
        return
    geo = cfg["survey"]["geometry"]
    shape = geo["shape"]
    if shape not in CURVED_SHAPES:
        raise ConfigError(f"{src}: survey.geometry.shape: '{shape}' is not available with "
                          "engine.kind: curved_sky, which models a radial selection times an "
                          "angular mask; use shape: shell (full sky, or mask: a HEALPix map), "
                          "shape: cap, or shape: randoms (both from a random catalogue)")
    if "fkp_p0" in geo and shape != "randoms" and "selection" not in geo:
        raise ConfigError(f"{src}: survey.geometry.fkp_p0: FKP weights need a radial selection "
                          "(selection: FILE); with a constant density they are a constant")
    masked = "mask" in geo or shape == "randoms" or (shape == "cap" and geo["fsky"] < 1.0)
    if "mask" in geo or shape == "randoms":
        try:
            import healpy  # noqa: F401
        except ImportError:
            key = "mask" if "mask" in geo else "randoms"
            raise ConfigError(f"{src}: survey.geometry.{key}: a HEALPix mask needs healpy, the "
                              "optional extra 'healpix' (pip install \"ergofit[healpix]\")") \
                from None
    if cfg["covariance"]["kind"] == "harmonic" and ("selection" in geo or shape == "randoms"):
        raise ConfigError(f"{src}: covariance.kind: harmonic is computed for tracers of uniform "
                          "density on a shell; not yet with a radial selection (use gaussian, "
                          "file or mocks)")
    if masked and cfg["covariance"]["kind"] == "harmonic":
        raise ConfigError(f"{src}: covariance.kind: harmonic is computed for the full sky only "
                          "(an angular mask couples the harmonic orders); use shape: shell "
                          "without a mask, or covariance.kind gaussian, file or mocks")
    if not eff["window"]:
        raise ConfigError(f"{src}: effects.window: false is not possible with engine.kind: "
                          "curved_sky (the survey's shell is the window it models); set it true")
    if eff["observer"] and eff["integral_constraint"] == "radial":
        raise ConfigError(f"{src}: effects.observer: with integral_constraint: radial the "
                          "constrained-field observer term vanishes exactly (the radial mean "
                          "inside the mask removes every isotropic field); set it false")
    snapshot = eng.get("snapshot", False)
    for key in INTEGRATED_EFFECTS:
        if snapshot and eff.get(key):
            raise ConfigError(f"{src}: effects.{key}: engine.snapshot has local terms only; set "
                              f"effects.{key}: false or snapshot: false")
        eff[key] = eff.get(key, not snapshot)
    for key in OBSERVER_EFFECTS:
        if snapshot and eff.get(key):
            raise ConfigError(f"{src}: effects.{key}: engine.snapshot has local terms only; set "
                              f"effects.{key}: false or snapshot: false")
        if not eff.get(key):
            eff.pop(key, None)        # stored only when on: the hash of earlier curved configs
    if eff.get("observer_motion") == "conditioned" and masked:
        raise ConfigError(f"{src}: effects.observer_motion: conditioned is modelled on the full "
                          "sky only (with a mask it depends on the direction of our motion); use "
                          "averaged or a full-sky shell")
    if "speed" in cfg["observer"] and eff.get("observer_motion") != "conditioned":
        raise ConfigError(f"{src}: observer.speed applies to effects.observer_motion: "
                          "conditioned; remove it or set that mode")
    table = eng.get("tracer_table")
    if table is not None:
        if "bias_evolution" in eng:
            raise ConfigError(f"{src}: engine.tracer_table sets the redshift dependence of b1; "
                              "remove engine.bias_evolution")
        if not os.path.isfile(cfg.resolve(table)):
            raise ConfigError(f"{src}: engine.tracer_table: file '{table}' not found (looked for "
                              f"{cfg.resolve(table)})")
    cfg["engine"] = {"kind": kind, "snapshot": snapshot,
                     "bias_evolution": "table" if table else eng.get("bias_evolution", "constant"),
                     "resolution": eng.get("resolution", resolution({}, ""))}
    if table:
        cfg["engine"]["tracer_table"] = table
    if "mask_tolerance" in eng:
        if not masked:
            raise ConfigError(f"{src}: engine.mask_tolerance applies to an angular mask "
                              "(shape: cap, shape: randoms, or shape: shell with mask: FILE); "
                              "remove it")
        cfg["engine"]["mask_tolerance"] = eng["mask_tolerance"]


def check_tracer_evolution(cfg, src):
    """Per-tracer redshift dependence of a config with ``tracers``: ``bias_evolution`` or
    ``tracer_table`` in an entry (curved_sky only), else the engine section's; fills
    ``bias_evolution`` (constant | inverse_growth | table) and ``tracer_table`` of every entry of
    a curved-sky run."""
    curved = is_curved(cfg)
    eng = cfg["engine"]
    for i, t in enumerate(cfg["tracers"]):
        where = f"{src}: tracers[{i}]"
        own = [k for k in ("bias_evolution", "tracer_table") if k in t]
        if own and not curved:
            raise ConfigError(f"{where}.{own[0]}: the redshift dependence of a tracer is modelled "
                              "by engine.kind: curved_sky only; remove it or choose that engine")
        if not curved:
            continue
        if len(own) == 2:
            raise ConfigError(f"{where}: give bias_evolution or tracer_table, not both (the table "
                              "sets the redshift dependence of b1)")
        if "bias_evolution" in t and t["bias_evolution"] not in BIAS_EVOLUTION:
            raise ConfigError(f"{where}.bias_evolution: expected one of "
                              f"{', '.join(BIAS_EVOLUTION)}, got {t['bias_evolution']!r}")
        if "tracer_table" in t:
            table_path(t["tracer_table"], f"{where}.tracer_table")
            if not os.path.isfile(cfg.resolve(t["tracer_table"])):
                raise ConfigError(f"{where}.tracer_table: file '{t['tracer_table']}' not found "
                                  f"(looked for {cfg.resolve(t['tracer_table'])})")
            t["bias_evolution"] = "table"
        elif "bias_evolution" not in t:
            t["bias_evolution"] = eng["bias_evolution"]
            if "tracer_table" in eng:
                t["tracer_table"] = eng["tracer_table"]
