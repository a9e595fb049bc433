"""The parameter table and priors.

Every parameter ergofit knows has a name, a LaTeX label, a default value and a group
(tracer, observer, noise, cosmology). A run samples some of them (flat or Gaussian prior) and keeps
the others fixed. Derived parameters are computed from each sample after the fit.
"""
from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np

from ..errors import ConfigError


@dataclass(frozen=True)
class ParamInfo:
    label: str
    default: float
    group: str
    doc: str


#: Parameters that can be sampled or fixed (defaults are the demo's fiducial values).
KNOWN = {
    "b1": ParamInfo(r"b_1", 2.0, "tracer", "linear bias"),
    "fnl": ParamInfo(r"f_{\rm NL}", 0.0, "tracer", "local primordial non-Gaussianity (CMB convention)"),
    "b_e": ParamInfo(r"b_e", 0.0, "tracer", "evolution bias d ln(a^3 n)/d ln a"),
    "s": ParamInfo(r"s", 0.0, "tracer", "magnification bias: slope of the cumulative counts"),
    "nu_obs": ParamInfo(r"\nu_{\rm obs}", 1.0, "observer",
                        "value of the constraint field at the observer in units of its rms"),
    "shot_noise": ParamInfo(r"A_{\rm sn}", 1.0, "noise", "shot-noise amplitude in units of 1/nbar"),
    "h": ParamInfo(r"h", 0.6736, "cosmology", "H0 / (100 km/s/Mpc)"),
    "omega_c": ParamInfo(r"\omega_{\rm c}", 0.1200, "cosmology", "physical CDM density omega_c = Omega_c h^2"),
    "omega_b": ParamInfo(r"\omega_{\rm b}", 0.02237, "cosmology", "physical baryon density"),
    "n_s": ParamInfo(r"n_s", 0.9649, "cosmology", "scalar spectral index"),
    "ln_1e10_As": ParamInfo(r"\ln(10^{10}A_s)", 3.044, "cosmology", "primordial amplitude ln(1e10 A_s)"),
    "sigma8": ParamInfo(r"\sigma_8", 0.8111, "cosmology", "rms linear density in 8 Mpc/h spheres"),
}

#: Derived parameters (computed per sample).
DERIVED = {
    "fnl_eff": ParamInfo(r"f_{\rm NL}^{\rm proj}", 0.0, "derived",
                         "f_NL mimicked by the projection terms at k -> 0"),
    "b1_sigma8": ParamInfo(r"b_1\sigma_8", 0.0, "derived", "b1 times sigma8(z)"),
    "sigma8_0": ParamInfo(r"\sigma_8", 0.0, "derived", "sigma8 at z = 0"),
}


#: Priors used when a sampled parameter is listed without one (design: ν ~ N(0, 1), the
#: constraint field's value at the observer in units of its rms is a unit Gaussian variable).
DEFAULT_PRIORS = {"nu_obs": {"gauss": [0.0, 1.0]}}


#: Old spellings of parameter names and the names that replaced them (issue 15, item 20): our own
#: names follow the literature's notation, ω_c = Ω_c h² and ln(10¹⁰ A_s).
RENAMED = {"omega_cdm": ("omega_c", "omega_c = Omega_c h^2"),
           "ln10As": ("ln_1e10_As", "ln_1e10_As = ln(1e10 A_s)")}


def suggest(name, choices):
    """' (did you mean 'x'?)' for the nearest valid name, or ''; for an old spelling of a renamed
    parameter, the new name."""
    if name in RENAMED and RENAMED[name][0] in choices:
        new, meaning = RENAMED[name]
        return f" (renamed: write '{new}', {meaning})"
    best = difflib.get_close_matches(str(name), list(choices), n=1, cutoff=0.5)
    return f" (did you mean '{best[0]}'?)" if best else ""


def check_name(name, where="parameters", known=None):
    """Refuse a name outside ``known`` (default: the single-tracer table KNOWN)."""
    known = KNOWN if known is None else known
    if name not in known:
        raise ConfigError(f"{where}: unknown parameter '{name}'{suggest(name, known)}; "
                          f"known: {', '.join(known)}")


@dataclass(frozen=True)
class Prior:
    """A flat prior on [lower, upper] or a Gaussian N(mean, sigma) truncated to [lower, upper]."""

    kind: str
    lower: float = -np.inf
    upper: float = np.inf
    mean: float = 0.0
    sigma: float = 1.0

    def __post_init__(self):
        if self.kind not in ("flat", "gauss"):
            raise ConfigError(f"prior kind '{self.kind}' unknown; use 'flat' or 'gauss'")
        if not self.lower < self.upper:
            raise ConfigError(f"prior bounds [{self.lower}, {self.upper}]: lower must be below upper")
        if self.kind == "flat" and not (np.isfinite(self.lower) and np.isfinite(self.upper)):
            raise ConfigError("a flat prior needs finite bounds [lower, upper]")
        if self.kind == "gauss" and not self.sigma > 0:
            raise ConfigError(f"Gaussian prior sigma must be > 0, got {self.sigma}")

    def log_pdf(self, x):
        """Log prior density (up to a constant): vectorised, −inf outside the bounds, never NaN."""
        x = np.asarray(x, float)
        inside = (x >= self.lower) & (x <= self.upper) & np.isfinite(x)
        if self.kind == "flat":
            val = np.zeros_like(x)
        else:
            val = -0.5 * ((np.where(inside, x, self.mean) - self.mean) / self.sigma) ** 2
        return np.where(inside, val, -np.inf)

    def contains(self, x):
        return bool(self.lower <= x <= self.upper)

    def describe(self):
        if self.kind == "flat":
            return f"flat [{self.lower:g}, {self.upper:g}]"
        bounds = "" if np.isinf(self.lower) and np.isinf(self.upper) else \
            f" on [{self.lower:g}, {self.upper:g}]"
        return f"Gaussian N({self.mean:g}, {self.sigma:g}){bounds}"


@dataclass(frozen=True)
class Parameter:
    name: str
    prior: Prior
    start: float
    scale: float
    info: ParamInfo | None = None     # set for names outside KNOWN (per-tracer parameters)
    analytic: bool = False            # marginalised analytically, not sampled (linear parameters)

    @property
    def label(self):
        return (self.info or KNOWN[self.name]).label


class ParameterSet:
    """Ordered sampled parameters plus fixed values of all the others.

    The model maps theta to parameter values itself (fixed and fiducial values included).
    """

    def __init__(self, free, fixed):
        self.free = list(free)
        self.fixed = dict(fixed)
        names = [p.name for p in self.free]
        for p in self.free:
            if not p.prior.contains(p.start):
                raise ConfigError(f"parameters.{p.name}: start {p.start} is outside its prior "
                                  f"{p.prior.describe()}")
        if len(set(names)) != len(names):
            raise ConfigError("parameters: a parameter is listed twice")
        self.names = names

    @property
    def labels(self):
        return [p.label for p in self.free]

    @property
    def bounds(self):
        return np.array([[p.prior.lower, p.prior.upper] for p in self.free], float).reshape(-1, 2)

    @property
    def start(self):
        return np.array([p.start for p in self.free], float)

    @property
    def start_scale(self):
        return np.array([p.scale for p in self.free], float)

    def prior_arrays(self):
        """(lower bounds, upper bounds, Gaussian means, 1/σ or 0 for flat, any Gaussian), cached."""
        if not hasattr(self, "_pa"):
            lo, hi = self.bounds.T.copy()
            gauss = np.array([p.prior.kind == "gauss" for p in self.free])
            mean = np.array([p.prior.mean for p in self.free], float)
            inv_sig = np.where(gauss, 1.0 / np.array([p.prior.sigma for p in self.free], float), 0.0)
            self._pa = (lo, hi, mean, inv_sig, bool(gauss.any()))
        return self._pa

    def log_prior(self, theta):
        """Sum of log prior densities for (n, n_dim) theta; −inf outside the bounds, never NaN."""
        theta = np.atleast_2d(theta)
        lo, hi, mean, inv_sig, any_gauss = self.prior_arrays()
        inside = np.all((theta >= lo) & (theta <= hi), axis=1)
        if any_gauss:
            lp = -0.5 * np.sum(((np.where(inside[:, None], theta, mean) - mean) * inv_sig) ** 2, axis=1)
        else:
            lp = np.zeros(theta.shape[0])
        return np.where(inside, lp, -np.inf)

    def is_free(self, name):
        return name in self.names


def parse_parameter(name, spec, where, known=None):
    """Parse one entry of the config's ``parameters`` block.

    ``known``: the parameter table (default KNOWN; a multi-tracer config passes its own, see
    :func:`likelihood.config.multitracer.parameter_table`).
    Vocabulary: ``{fixed: v}`` or ``{flat: [lo, hi] | gauss: [mean, sigma], bounds: [lo, hi],
    start: v, scale: s, analytic: false}`` (``analytic: true``: integrate the parameter out
    analytically instead of sampling it; parameters entering the model linearly only).
    Returns ``(Parameter or None, fixed value or None)``.
    """
    check_name(name, where, known)
    info = (KNOWN if known is None else known)[name]
    if not isinstance(spec, dict):
        # a bare number fixes the parameter
        if isinstance(spec, (int, float)) and not isinstance(spec, bool):
            if not np.isfinite(spec):
                raise ConfigError(f"{where}.{name}: expected a finite fixed value, got {spec!r}")
            return None, float(spec)
        raise ConfigError(f"{where}.{name}: expected a mapping like {{flat: [lo, hi], start: x}} "
                          f"or {{fixed: x}}, got {spec!r}")
    allowed = ("fixed", "flat", "gauss", "bounds", "start", "scale", "analytic")
    for key in spec:
        if key not in allowed:
            raise ConfigError(f"{where}.{name}: unknown key '{key}'{suggest(key, allowed)}; "
                              f"allowed: {', '.join(allowed)}")
    kinds = [k for k in ("fixed", "flat", "gauss") if k in spec]
    if not kinds and name in DEFAULT_PRIORS:
        spec = dict(spec, **DEFAULT_PRIORS[name])
        kinds = [k for k in ("flat", "gauss") if k in spec]
    if len(kinds) != 1:
        raise ConfigError(f"{where}.{name}: give exactly one of fixed / flat / gauss")
    kind = kinds[0]

    def as_num(v):   # YAML 1.1 reads '1e-3' as a string
        try:
            return float(v) if isinstance(v, str) else v
        except ValueError:
            return v

    def pair(key):
        val = spec[key]
        if isinstance(val, (list, tuple)):
            val = [as_num(v) for v in val]
        if (not isinstance(val, (list, tuple)) or len(val) != 2
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in val)):
            raise ConfigError(f"{where}.{name}.{key}: expected two numbers [a, b], got {val!r}")
        if key != "bounds" and not all(np.isfinite(val)):
            raise ConfigError(f"{where}.{name}.{key}: expected two finite numbers, got {val!r}")
        return float(val[0]), float(val[1])

    def number(key, default):
        val = as_num(spec.get(key, default))
        if not isinstance(val, (int, float)) or isinstance(val, bool) or not np.isfinite(val):
            raise ConfigError(f"{where}.{name}.{key}: expected a finite number, got {val!r}")
        return float(val)

    analytic = spec.get("analytic", False)
    if not isinstance(analytic, bool):
        raise ConfigError(f"{where}.{name}.analytic: expected true or false, got {analytic!r}")
    if kind == "fixed":
        if analytic:
            raise ConfigError(f"{where}.{name}.analytic: a fixed parameter is not marginalised")
        return None, number("fixed", None)
    try:
        if kind == "flat":
            lo, hi = pair("flat")
            prior = Prior("flat", lo, hi)
        else:
            mean, sigma = pair("gauss")
            lo, hi = pair("bounds") if "bounds" in spec else (-np.inf, np.inf)
            prior = Prior("gauss", lo, hi, mean, sigma)
    except ConfigError as exc:
        raise ConfigError(f"{where}.{name}: {exc}") from None
    centre = 0.5 * (prior.lower + prior.upper) if kind == "flat" else prior.mean
    start = number("start", info.default if prior.contains(info.default) else centre)
    width = (prior.upper - prior.lower) if kind == "flat" else prior.sigma
    scale = number("scale", 1e-2 * width)
    if scale <= 0:
        raise ConfigError(f"{where}.{name}.scale: must be > 0, got {scale}")
    return Parameter(name, prior, start, scale, None if name in KNOWN else info, analytic), None
