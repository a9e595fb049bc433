"""Fisher forecasts and f_NL bias studies: how far does neglecting an effect push f_NL?

The question: "if I analyse my survey without the projection terms (or without the integral
constraint, or ignoring the observer term), how far is f_NL pushed, in units of its error?"
It is answered with Fisher matrices built on exactly the likelihood of a config (same data
vector, k bins, window, integral constraint, observer term and covariance; the model comes from
:func:`likelihood.model.build`), and confirmed by MCMC on a noiseless mock.

Fisher matrix
-------------
For a Gaussian likelihood whose covariance C does not depend on the parameters
(Tegmark, Taylor & Heavens 1997, ApJ 480, 22, eq. 15, first term)::

    F_ij = h ∂μᵀ/∂θ_i C⁻¹ ∂μ/∂θ_j  +  δ_ij / σ_i²   (Gaussian prior N(m_i, σ_i) on θ_i)

μ is the masked model vector, h the Hartlap factor when C was estimated from mocks (1 otherwise).
Flat priors do not enter (the Fisher matrix knows no bounds: a warning says when a marginalised
error reaches a quarter of a flat prior's width); the truncation bounds of a Gaussian prior are
ignored. Marginalised errors are sqrt((F⁻¹)_ii), conditional errors 1/sqrt(F_ii), the correlation
(F⁻¹)_ij / (σ_i σ_j). Parameters that are not in the Fisher matrix are held at their fiducial or
fixed values (the errors are conditional on them, e.g. on the cosmology unless it is sampled).

Derivatives are central differences [μ(θ + h e_i) − μ(θ − h e_i)] / 2h. The first step is the
parameter's ``scale`` (config ``parameters.NAME.scale``); the step is halved until two successive
estimates agree to ``step_rtol`` in the whitened norm |L⁻¹(D_h − D_h/2)| / |L⁻¹ D_h/2| (C = L Lᵀ)
(or two successive Richardson combinations (4 D_h/2 − D_h)/3 do), and the last Richardson
combination is returned. The model is a polynomial of degree
≤ 2 in b1, f_NL, b_e, s, ν_obs and the shot-noise amplitude (see :mod:`likelihood.model`), so for
them central differences are exact up to rounding; cosmological parameters are not polynomial
and are differentiated by the slower direct path (a warning names any derivative that does not
stabilise).

Bias from a mis-modelled effect
-------------------------------
The *truth* model is the config as written (all effects it switches on); the *analysis* model is
the same config with the effects of ``forecast.neglect`` switched off (doppler, potential, fnl,
rsd, window, observer → false; integral_constraint → none). To first order in the model error
the maximum of the analysis posterior on noiseless truth data moves by (the systematic-shift
formula, e.g. Huterer, Takada, Bernstein & Jain 2006, MNRAS 366, 101, eq. 4 — cited from
memory; it follows from expanding χ² to second order around the fiducial point)::

    Δθ = F⁻¹ [ h ∂μᵀ/∂θ C⁻¹ (μ_truth − μ_analysis) + Σ_i e_i (m_i − θ_i^fid) / σ_i² ]

F, ∂μ/∂θ, C and h are those of the analysis model (what the analyst would use). μ_truth is the
noiseless mock of the truth model at the fiducial values (``data.mock.truth`` over the tracer
block and fixed values); μ_analysis is the analysis model at the fiducial values of the Fisher
parameters with its own fixed values, so a parameter fixed to a value different from the mock
truth is a mis-modelling too. The last term is the pull of a Gaussian prior not centred on the
fiducial value (zero for centred priors).

Validity. Linear response: the shift is accurate while Δθ is small compared to the scale on which
∂μ/∂θ changes. The model is quadratic in f_NL (the [f_NL (b1 − p) α(k)]² term), so the first-order
shift degrades once f_NL (b1 − p) α(k_min) is no longer small next to b1 over the range
fiducial ± (σ + |Δ|); when |Δf_NL| ≳ σ(f_NL), confirm with ``--check-mcmc``. The model itself is
linear theory with a plane-parallel kernel and local projection terms only (see
:mod:`likelihood.tracer`); the Fisher matrix inherits those limits.

Scans
-----
A grid over one of redshift, volume, fsky, thickness, b1, nbar, b_e, s, k_min; each grid point
is an independent pair (truth, analysis) of models, run serially, on a process pool or on MPI
ranks. What changes with the scanned quantity:

* ``redshift``: survey.redshift; for shell and cap geometries the shell is re-centred at χ(z).
  ``redshift_geometry: recentre`` (default) keeps its comoving thickness r_max − r_min (the
  volume grows with z); ``fixed_volume`` re-centres and adjusts the thickness so the volume stays
  that of the config. If the re-centred shell would reach the observer it is cut at r_min = 0
  (a note says so). Box, sphere (centred on the observer) and random-catalogue geometries do not
  change. ``bias_evolution: inverse_growth`` scales b1 as b1(z) = b1(z₀) D(z₀)/D(z) (constant
  clustering amplitude, common practice); ``constant`` (default) keeps b1.
* ``volume``: box volume; sphere radius; shell/cap thickness about the fixed centre distance.
* ``fsky``: the cap's sky fraction (a full-sky shell becomes a cap).
* ``thickness``: r_max − r_min of a shell or cap about the fixed centre distance.
* ``b1``, ``b_e``, ``s``: the fiducial value (tracer block, fixed value, mock truth, and the
  start of a sampled parameter).
* ``nbar``: survey.nbar. ``k_min``: data.k_min (same k bins, fewer of them used).

Public API: :class:`Fisher`, :func:`fisher_from_derivatives`, :func:`derivative`,
:func:`likelihood_fisher`, :class:`BiasForecast`, :func:`bias_forecast`, :func:`analysis_config`,
:func:`scan_config`, :class:`ScanResult`, :func:`bias_scan`, :func:`mcmc_check`,
:func:`run_forecast`, :func:`forecast_cli`, :func:`config_to_raw`, :func:`forecast_settings`;
output helpers :func:`plot_ellipses`, :func:`plot_scan`, :func:`scan_tables`,
:func:`forecast_markdown`. Speed figures: ``python bench/forecast.py``.
"""
from __future__ import annotations

import copy
import csv
import io
import json
import math
import os
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular

from ..config.schema import FORECAST_NEGLECT, SCHEMA, Config, load_config, validate
from ..io import ensure_folder, open_atomic, write_text
from ..errors import ConfigError, ErgofitError
from ..config.parameters import KNOWN

__all__ = ["Fisher", "fisher_from_derivatives", "derivative", "likelihood_fisher", "BiasForecast",
           "bias_forecast", "analysis_config", "scan_config", "ScanResult", "bias_scan",
           "mcmc_check", "run_forecast", "config_to_raw", "forecast_settings",
           "plot_ellipses", "plot_scan", "scan_tables", "forecast_markdown", "DEFAULTS"]

#: Defaults of the config's ``forecast`` section.
DEFAULTS = {"neglect": ["doppler", "potential"], "parameters": None, "priors": {},
            "threshold": 0.5, "step_rtol": 1e-3, "scan": None}

_SINGULAR_RCOND = 1e-10      # smallest/largest eigenvalue of the normalised Fisher matrix
_MAX_HALVINGS = 8
_MCMC_TOLERANCE = 0.2        # |MCMC shift − Fisher shift| / σ_F(f_NL) for a near-Gaussian posterior


def forecast_settings(cfg):
    """The config's ``forecast`` section with defaults filled in."""
    out = copy.deepcopy(DEFAULTS)
    out.update({k: copy.deepcopy(v) for k, v in (cfg.get("forecast") or {}).items()})
    return out


# --------------------------------------------------------------------------------------------
# Warnings collected from the model builds (reported once, not once per grid point)
# --------------------------------------------------------------------------------------------

@contextmanager
def _collect(sink):
    """Record warnings raised inside the block as unique one-line strings in ``sink``."""
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        yield
    for w in rec:
        msg = f"{w.category.__name__}: {str(w.message).splitlines()[0]}"
        if msg not in sink:
            sink.append(msg)


def _rewarn(messages):
    for m in messages:
        warnings.warn(m, UserWarning, stacklevel=3)


# --------------------------------------------------------------------------------------------
# Fisher matrix
# --------------------------------------------------------------------------------------------

@dataclass
class Fisher:
    """A Fisher matrix with its ingredients (built by :func:`fisher_from_derivatives`).

    names, labels: parameters (order of the matrix); fiducial: (n,) expansion point;
    matrix: (n, n) F including the Gaussian-prior terms; data_matrix: F without them;
    whitened: (n_data, n) √h L⁻¹ ∂μ/∂θ; prior_pull: (n,) Σ (m_i − θ_i)/σ_i² of the Gaussian priors;
    priors: {name: (mean, sigma)}; chol: Cholesky factor L of the data covariance;
    precision_scale: h; steps: per-parameter derivative diagnostics.
    """

    names: list
    labels: list
    fiducial: np.ndarray
    matrix: np.ndarray
    data_matrix: np.ndarray
    whitened: np.ndarray
    prior_pull: np.ndarray
    priors: dict
    chol: np.ndarray
    precision_scale: float = 1.0
    steps: list = field(default_factory=list)

    @property
    def covariance(self):
        """Parameter covariance F⁻¹ (Cramér–Rao bound for unbiased estimators)."""
        return _inverse(self.matrix, names=self.names)

    @property
    def errors(self):
        """Marginalised 1σ errors sqrt((F⁻¹)_ii)."""
        return np.sqrt(np.diag(self.covariance))

    @property
    def conditional_errors(self):
        """Errors with all other parameters fixed: 1/sqrt(F_ii)."""
        return 1.0 / np.sqrt(np.diag(self.matrix))

    @property
    def correlation(self):
        cov = self.covariance
        s = np.sqrt(np.diag(cov))
        return cov / np.outer(s, s)

    def index(self, name):
        if name not in self.names:
            raise ErgofitError(f"parameter '{name}' is not in this Fisher matrix "
                               f"(parameters: {', '.join(self.names)})")
        return self.names.index(name)

    def bias(self, delta_mu):
        """First-order shift Δθ of the best fit when the data are μ_analysis + ``delta_mu``.

        Δθ = F⁻¹ [h ∂μᵀ/∂θ C⁻¹ δμ + prior_pull] (see the module docstring).
        """
        d = np.asarray(delta_mu, float)
        if d.shape != (self.whitened.shape[0],):
            raise ErgofitError(f"delta_mu has shape {d.shape}; expected ({self.whitened.shape[0]},) "
                               "like the masked data vector")
        if not np.all(np.isfinite(d)):
            raise ErgofitError("delta_mu contains NaN or infinite values")
        dw = solve_triangular(self.chol, d, lower=True) * math.sqrt(self.precision_scale)
        return self.covariance @ (self.whitened.T @ dw + self.prior_pull)

    def chi2_of(self, delta_mu):
        """(χ² of the model error at the fiducial point, χ² left after the parameters absorb it).

        The second is min_x |L⁻¹δμ √h − W x|² (W the whitened derivatives, priors ignored), i.e.
        δμᵀC⁻¹δμ − bᵀF₀⁻¹b: a large value means the analysis model cannot mimic the neglected
        effect and the data would show a poor fit; a small one that the shift hides it.
        """
        dw = solve_triangular(self.chol, np.asarray(delta_mu, float), lower=True) \
            * math.sqrt(self.precision_scale)
        x = np.linalg.lstsq(self.whitened, dw, rcond=None)[0]
        r = dw - self.whitened @ x
        return float(dw @ dw), float(r @ r)

    def to_dict(self):
        cov = self.covariance
        return {"parameters": list(self.names), "labels": list(self.labels),
                "fiducial": dict(zip(self.names, self.fiducial.tolist())),
                "fisher_matrix": self.matrix.tolist(),
                "fisher_matrix_without_priors": self.data_matrix.tolist(),
                "parameter_covariance": cov.tolist(),
                "errors": dict(zip(self.names, self.errors.tolist())),
                "conditional_errors": dict(zip(self.names, self.conditional_errors.tolist())),
                "correlation": self.correlation.tolist(),
                "gaussian_priors": {k: {"mean": m, "sigma": s} for k, (m, s) in self.priors.items()},
                "precision_scale": self.precision_scale,
                "derivatives": self.steps}


def _inverse(F, check=True, names=None):
    """Inverse of a symmetric positive-definite matrix via its normalised eigen-decomposition."""
    d = np.sqrt(np.diag(F))
    if check:
        _check_singular(F, names)
    R = F / np.outer(d, d)
    w, V = np.linalg.eigh(R)
    return (V / w) @ V.T / np.outer(d, d)


def _check_singular(F, names=None):
    """Raise a one-line ErgofitError naming the degenerate parameters of a singular F."""
    n = F.shape[0]
    names = list(names) if names is not None else [f"p{i}" for i in range(n)]
    diag = np.diag(F)
    zero = [names[i] for i in range(n) if not diag[i] > 0]
    if zero:
        raise ErgofitError(f"Fisher matrix is singular: the model does not depend on "
                           f"{', '.join(zero)} (zero derivative, no prior); fix them or add a "
                           "Gaussian prior under forecast.priors")
    d = np.sqrt(diag)
    w, V = np.linalg.eigh(F / np.outer(d, d))
    if w[0] <= _SINGULAR_RCOND * w[-1]:
        v = V[:, 0] / np.max(np.abs(V[:, 0]))
        order = np.argsort(-np.abs(v))
        involved = [i for i in order if abs(v[i]) > 0.1]
        combo = " ".join(f"{'+' if v[i] >= 0 else '-'} {abs(v[i]):.2f} {names[i]}" for i in involved)
        cond = w[-1] / w[0] if w[0] > 0 else np.inf
        raise ErgofitError(f"Fisher matrix is singular (condition number {cond:.2g}): parameters "
                           f"{', '.join(names[i] for i in involved)} are degenerate (only the "
                           f"combination {combo.lstrip('+ ')} in units of conditional errors is "
                           "unconstrained); fix one of them or add a Gaussian prior under "
                           "forecast.priors")


def fisher_from_derivatives(derivs, chol, names, labels=None, fiducial=None, priors=None,
                            precision_scale=1.0, steps=None):
    """Fisher matrix from model derivatives.

    derivs: (n_par, n_data) ∂μ/∂θ_i; chol: lower Cholesky factor L of the data covariance
    (C = L Lᵀ); names: parameter names; priors: {name: (mean, sigma)} Gaussian priors (their mean
    only enters the bias, through ``prior_pull``); precision_scale: h multiplying C⁻¹.
    Raises a one-line :class:`ErgofitError` if F is singular, naming the degenerate parameters.
    """
    D = np.atleast_2d(np.asarray(derivs, float))
    L = np.asarray(chol, float)
    names = list(names)
    if D.shape[0] != len(names):
        raise ErgofitError(f"derivatives: {D.shape[0]} rows for {len(names)} parameters {names}")
    if L.ndim != 2 or L.shape != (D.shape[1], D.shape[1]):
        raise ErgofitError(f"chol: expected a ({D.shape[1]}, {D.shape[1]}) Cholesky factor, "
                           f"got shape {L.shape}")
    if not (np.all(np.isfinite(D)) and np.all(np.isfinite(L))):
        raise ErgofitError("derivatives or covariance contain NaN or infinite values")
    if not precision_scale > 0:
        raise ErgofitError(f"precision_scale = {precision_scale}: expected > 0")
    fid = np.zeros(len(names)) if fiducial is None else np.asarray(fiducial, float)
    W = solve_triangular(L, D.T, lower=True) * math.sqrt(precision_scale)     # (n_data, n_par)
    F0 = W.T @ W
    F0 = 0.5 * (F0 + F0.T)
    F = F0.copy()
    pull = np.zeros(len(names))
    priors = dict(priors or {})
    for name, (mean, sigma) in priors.items():
        if name not in names:
            raise ErgofitError(f"prior on '{name}': not a Fisher parameter ({', '.join(names)})")
        if not sigma > 0:
            raise ErgofitError(f"prior on '{name}': sigma = {sigma}, expected > 0")
        i = names.index(name)
        F[i, i] += 1.0 / sigma ** 2
        pull[i] += (mean - fid[i]) / sigma ** 2
    _check_singular(F, names)
    return Fisher(names=names, labels=list(labels) if labels else list(names), fiducial=fid,
                  matrix=F, data_matrix=F0, whitened=W, prior_pull=pull, priors=priors,
                  chol=L, precision_scale=float(precision_scale), steps=list(steps or []))


def derivative(model, point, name, step, chol, rtol=1e-3, max_halvings=_MAX_HALVINGS,
               allow_zero=False):
    """Central-difference derivative of ``model(point)`` with respect to ``point[name]``.

    model: callable dict -> 1-D vector; point: dict of parameter values; step: first step h.
    The step is halved until |L⁻¹(D_h − D_h/2)| <= rtol |L⁻¹ D_h/2| (whitened norm), or until two
    successive Richardson combinations R_h = (4 D_h/2 − D_h)/3 agree to rtol in that norm; the
    result is the last Richardson combination. Returns (derivative, info dict with the final
    step, the relative change and whether it met rtol). A parameter the model does not depend on
    raises a one-line :class:`ErgofitError`, unless ``allow_zero`` (then zeros are returned and
    ``info["zero"]`` is True).
    """
    if not (np.isfinite(step) and step > 0):
        raise ErgofitError(f"derivative step for '{name}': {step}, expected a finite number > 0")
    x0 = float(point[name])

    def cdiff(h):
        lo = model({**point, name: x0 - h})
        hi = model({**point, name: x0 + h})
        d = (np.asarray(hi, float) - np.asarray(lo, float)) / (2.0 * h)
        if not np.all(np.isfinite(d)):
            raise ErgofitError(f"derivative of the model with respect to '{name}' at {x0:g} ± {h:g}"
                               " is not finite; choose a smaller parameters."
                               f"{name}.scale (the first step)")
        return d

    def wnorm(v):
        return float(np.linalg.norm(solve_triangular(chol, v, lower=True)))

    h = float(step)
    d_prev = cdiff(h)
    r_prev = None
    rel = np.inf
    for _ in range(max_halvings):
        h *= 0.5
        d_new = cdiff(h)
        scale = wnorm(d_new)
        if scale == 0.0 and wnorm(d_prev) == 0.0:
            if allow_zero:
                return d_new, {"name": name, "step": h, "rel_change": 0.0, "stable": True,
                               "zero": True}
            raise ErgofitError(f"the model does not depend on '{name}' (zero derivative at "
                               f"{name} = {x0:g}): is the effect it belongs to switched off "
                               "(effects, forecast.neglect)? Fix it under parameters or leave it "
                               "out of forecast.parameters")
        best = (4.0 * d_new - d_prev) / 3.0
        if scale > 0:
            # change of the plain estimate, and of the Richardson estimate between two levels
            rel = wnorm(d_new - d_prev) / scale
            if r_prev is not None:
                rel = min(rel, wnorm(best - r_prev) / scale)
        if rel <= rtol:
            return best, {"name": name, "step": h, "rel_change": rel, "stable": True}
        d_prev, r_prev = d_new, best
    warnings.warn(f"derivative with respect to '{name}' did not stabilise: relative change "
                  f"{rel:.2g} > step_rtol = {rtol:g} after {max_halvings} halvings of the step "
                  f"(now {h:g}); the Fisher errors involving {name} are uncertain at that level",
                  UserWarning, stacklevel=2)
    return best, {"name": name, "step": h, "rel_change": rel, "stable": False}


def likelihood_fisher(lik, names=None, priors=None, step_rtol=1e-3):
    """Fisher matrix of a built :class:`likelihood.model.Likelihood` at its fiducial point.

    names: parameters (default: all sampled ones; each must be sampled in ``lik``).
    priors: extra Gaussian priors {name: sigma} centred on the fiducial values, added to the
    Gaussian priors of the config's ``parameters`` block.
    Tracer, observer and noise parameters use the exact polynomial fast path; cosmological ones
    the direct path.
    """
    from ..model.fiducial import COSMO_PARAMS
    names = list(lik.parameter_names if names is None else names)
    if not names:
        raise ConfigError("forecast.parameters: empty; list at least one sampled parameter")
    free = {p.name: p for p in lik.params.free}
    for n in names:
        if n not in free:
            raise ConfigError(f"forecast.parameters: '{n}' is not sampled in this model; "
                              f"sampled: {', '.join(lik.parameter_names)}")
    point = {n: float(lik.fiducial[n]) for n in names}
    with_prior = {n for n in names if free[n].prior.kind == "gauss"} | set(priors or {})
    D, steps = [], []
    for n in names:
        direct = n in COSMO_PARAMS

        def model(p, _direct=direct):
            return lik.model_vector(p, direct=_direct)

        d, info = derivative(model, point, n, free[n].scale, lik.chol, rtol=step_rtol,
                             allow_zero=n in with_prior)
        if info.get("zero"):
            warnings.warn(f"the model does not depend on '{n}' to first order at {n} = {point[n]:g} "
                          f"(zero derivative, e.g. nu_obs = 0 where the model goes as nu_obs^2): "
                          "its Fisher error is its prior width and the linear forecast says "
                          "nothing about it", UserWarning, stacklevel=2)
        D.append(d)
        steps.append(info)
    gauss = {}
    for n in names:
        pr = free[n].prior
        if pr.kind == "gauss":
            gauss[n] = (float(pr.mean), float(pr.sigma))
    for n, sigma in (priors or {}).items():
        if n not in names:
            raise ConfigError(f"forecast.priors: '{n}' is not a forecast parameter "
                              f"({', '.join(names)})")
        if n in gauss:  # two independent Gaussian constraints combine by inverse variances
            m0, s0 = gauss[n]
            w0, w1 = 1.0 / s0 ** 2, 1.0 / sigma ** 2
            gauss[n] = ((w0 * m0 + w1 * point[n]) / (w0 + w1), 1.0 / math.sqrt(w0 + w1))
        else:
            gauss[n] = (point[n], float(sigma))
    return fisher_from_derivatives(np.array(D), lik.chol, names,
                                   labels=[KNOWN[n].label for n in names],
                                   fiducial=[point[n] for n in names], priors=gauss,
                                   precision_scale=lik.precision_scale, steps=steps)


# --------------------------------------------------------------------------------------------
# Config variants: analysis model and scan points
# --------------------------------------------------------------------------------------------

def config_to_raw(cfg):
    """A raw config mapping that :func:`likelihood.config.validate` turns back into ``cfg``."""
    if not isinstance(cfg, Config):
        raise ErgofitError(f"expected a validated Config, got {type(cfg).__name__}")
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
    e = raw["effects"]
    for n in neglect:
        e[n] = "none" if n == "integral_constraint" else False
    if "observer" in neglect:
        spec = raw["parameters"].get("nu_obs")
        if isinstance(spec, dict) and "fixed" not in spec:
            del raw["parameters"]["nu_obs"]   # nothing to sample without the observer term
    return _revalidate(cfg, raw, "analysis without " + ", ".join(neglect))


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


# --------------------------------------------------------------------------------------------
# Bias forecast for one config
# --------------------------------------------------------------------------------------------

@dataclass
class BiasForecast:
    """Fisher matrix of the analysis model and the shift caused by the neglected effects.

    fisher: :class:`Fisher` of the analysis model; neglect: the neglected effects; delta: (n,)
    first-order shift Δθ (same order as ``fisher.names``); mu_truth, mu_analysis: masked model
    vectors at the fiducial point; chi2_total, chi2_residual: see :meth:`Fisher.chi2_of`;
    fnl_eff_neglected / fnl_eff_projection: f_NL mimicked at k → 0 by the neglected projection
    terms / by all projection terms of the truth model (:func:`likelihood.tracer.effective_fnl`;
    None when undefined, e.g. b1 = p); info: survey and model description; warnings: unique
    warnings raised while building the models; analysis_config: the analysis Config.
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
    analysis_config: Config
    config: Config

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
            "integral_constraint": lik.operator.ic, "observer": bool(lik.observer_on)}


def _effective_fnl(lik, terms):
    from ..theory import tracer as tr
    terms = [t for t in terms if t in lik.effects]
    if not terms:
        return 0.0
    fid = lik.fiducial
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
    fs = forecast_settings(cfg)
    neglect = list(fs["neglect"] if neglect is None else neglect)
    parameters = fs["parameters"] if parameters is None else parameters
    priors = fs["priors"] if priors is None else priors
    step_rtol = fs["step_rtol"] if step_rtol is None else step_rtol
    notes = []
    with _collect(notes):
        truth = build(cfg)
        acfg = analysis_config(cfg, neglect)
        analysis = truth if acfg is cfg else build(acfg)
    for n in neglect:
        on = {"integral_constraint": truth.operator.ic != "none",
              "window": truth.window is not None, "observer": truth.observer_on}.get(
                  n, n in truth.effects)
        if not on:
            notes.append(f"forecast.neglect: '{n}' is already off in the truth model; "
                         "neglecting it changes nothing")
    if truth.data.size != analysis.data.size:
        raise ErgofitError(f"{cfg.path}: the analysis model has {analysis.data.size} data points, "
                           f"the truth model {truth.data.size}; they must share the data vector")
    with _collect(notes):
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
            "nbar": truth.nbar, "geometry": dict(cfg["survey"]["geometry"]),
            "volume": float(truth.volume), "n_data": int(truth.data.size),
            "ells": list(truth.ells), "k_range": _k_range(truth),
            "truth_model": _describe_model(truth), "analysis_model": _describe_model(analysis),
            "fiducial": {n: float(v) for n, v in truth.fiducial.items()}}
    return BiasForecast(fisher=fisher, neglect=neglect, delta=delta, mu_truth=mu_t, mu_analysis=mu_a,
                        chi2_total=chi2_t, chi2_residual=chi2_r,
                        fnl_eff_neglected=_effective_fnl(truth, [t for t in ("doppler", "potential")
                                                                 if t in neglect]),
                        fnl_eff_projection=_effective_fnl(truth, ["doppler", "potential"]),
                        info=info, warnings=notes, analysis_config=acfg, config=cfg)


def _k_range(lik):
    m2 = lik.mask.reshape(len(lik.data_full.ells), -1).any(0)
    k = lik.data_full.k_eff[m2]
    return [float(k.min()), float(k.max())]


def _flat_prior_notes(lik, fisher, notes):
    for p in lik.params.free:
        if p.name in fisher.names and p.prior.kind == "flat":
            s = fisher.errors[fisher.index(p.name)]
            width = p.prior.upper - p.prior.lower
            if s > 0.25 * width:
                notes.append(f"Fisher error of {p.name} ({s:.3g}) exceeds a quarter of its flat "
                             f"prior width {width:g}: the prior bounds matter and the Fisher "
                             "matrix, which ignores them, overestimates the error")


# --------------------------------------------------------------------------------------------
# Scans
# --------------------------------------------------------------------------------------------

@dataclass
class ScanResult:
    """A bias scan: one row per grid point (dicts with the columns of :meth:`columns`)."""

    quantity: str
    rows: list
    neglect: list
    threshold: float
    notes: list

    def columns(self):
        keys = []
        for r in self.rows:
            keys += [k for k in r if k not in keys]
        return keys

    def exceeding(self):
        """Grid values where |Δf_NL|/σ(f_NL) exceeds the threshold."""
        return [r[self.quantity] for r in self.rows if abs(r["delta_fnl_over_sigma"]) > self.threshold]


def _scan_point(payload):
    """Worker: one grid point -> (row dict, notes). Top level so process pools can pickle it."""
    (raw, src, base_dir, quantity, value, zgeo, bevo, neglect, parameters, priors, rtol) = payload
    cfg = validate(raw, src=src, base_dir=base_dir)
    notes = []
    try:
        with _collect(notes):
            pcfg, geo_notes = scan_config(cfg, quantity, value, zgeo, bevo)
        notes += geo_notes
        res = bias_forecast(pcfg, neglect, parameters, priors, rtol)
    except ErgofitError as exc:
        raise ErgofitError(f"scan {quantity} = {value:g}: {str(exc).splitlines()[0]}") from None
    f = res.fisher
    row = {quantity: float(value), "sigma_fnl": float(res.value("sigma")),
           "delta_fnl": float(res.value("delta")),
           "delta_fnl_over_sigma": float(res.value("ratio")), "fnl_eff_neglected": res.fnl_eff_neglected,
           "b1": float(res.info["fiducial"]["b1"]), "volume": res.info["volume"],
           "r_min": pcfg["survey"]["geometry"].get("r_min"),
           "r_max": pcfg["survey"]["geometry"].get("r_max"), "n_data": res.info["n_data"],
           "chi2_residual": res.chi2_residual}
    for i, n in enumerate(f.names):
        if n != "fnl":
            row[f"sigma_{n}"] = float(f.errors[i])
            row[f"delta_{n}"] = float(res.delta[i])
    if row["r_min"] is None:
        del row["r_min"], row["r_max"]
    return row, notes + res.warnings


def bias_scan(config, scan=None, neglect=None, parameters=None, priors=None, step_rtol=None,
              threshold=None, pool=None):
    """Bias forecast over a grid (the config's ``forecast.scan`` unless ``scan`` is given).

    scan: mapping like the config's (``{quantity, values | range, spacing, redshift_geometry,
    bias_evolution}``), validated the same way; pool: optional object with ``map`` (process
    pool, MPI pool) over which the grid points are spread. Returns a :class:`ScanResult`.
    """
    from ..config.schema import _forecast_scan
    cfg = config if isinstance(config, Config) else load_config(config)
    fs = forecast_settings(cfg)
    if scan is not None:
        scan = _forecast_scan(scan, f"{cfg.path}: forecast.scan")
    else:
        scan = fs["scan"]
    if not scan:
        raise ConfigError(f"{cfg.path}: forecast.scan is missing; give {{quantity, values}}")
    neglect = list(fs["neglect"] if neglect is None else neglect)
    parameters = fs["parameters"] if parameters is None else parameters
    priors = fs["priors"] if priors is None else priors
    step_rtol = fs["step_rtol"] if step_rtol is None else step_rtol
    threshold = fs["threshold"] if threshold is None else threshold
    if parameters is not None and "fnl" not in parameters:
        raise ConfigError(f"{cfg.path}: forecast.parameters must include fnl for a scan "
                          "(it reports sigma(f_NL) and the f_NL shift)")
    if parameters is None and "fnl" not in cfg["parameters"]:
        raise ConfigError(f"{cfg.path}: a scan reports sigma(f_NL): sample fnl under parameters")
    q = scan["quantity"]
    raw = config_to_raw(cfg)
    payloads = [(raw, cfg.path, cfg.base_dir, q, v, scan["redshift_geometry"],
                 scan["bias_evolution"], neglect, parameters, priors, step_rtol)
                for v in scan["values"]]
    results = list(pool.map(_scan_point, payloads)) if pool is not None else \
        [_scan_point(p) for p in payloads]
    notes = []
    for _, n in results:
        notes += [m for m in n if m not in notes]
    return ScanResult(quantity=q, rows=[r for r, _ in results], neglect=neglect,
                      threshold=float(threshold), notes=notes)


# --------------------------------------------------------------------------------------------
# MCMC check on the noiseless truth mock
# --------------------------------------------------------------------------------------------

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
    settings: :class:`likelihood.sampler.SamplerSettings` (default: the config's sampling section,
    no progress bar).
    """
    import yaml
    from ..model import build
    from ..sampling.driver import CHAIN_FILENAME, SamplerSettings, run_sampler
    os.makedirs(out_dir, exist_ok=True)
    mcfg = _mcmc_config(bias, out_dir)
    notes = []
    with _collect(notes):
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
                yaml.safe_dump(_plain(config_to_raw(mcfg)), sort_keys=False))
    with _collect(notes):
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


# --------------------------------------------------------------------------------------------
# Output files
# --------------------------------------------------------------------------------------------

def _plain(obj):
    """JSON/YAML-safe copy: numpy scalars to floats, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


def _g(x, digits=4):
    return "—" if x is None or (isinstance(x, float) and not math.isfinite(x)) else f"{x:.{digits}g}"


def neglect_text(neglect):
    return ", ".join(neglect) if neglect else "nothing (truth = analysis)"


def plot_ellipses(bias, path):
    """getdist triangle plot of the Fisher Gaussians: fiducial-centred, and shifted by Δθ."""
    import matplotlib
    from getdist import plots
    from getdist.gaussian_mixtures import GaussianND
    f = bias.fisher
    cov = f.covariance
    names = list(f.names)
    dists = [GaussianND(f.fiducial, cov, names=names, labels=f.labels,
                        label="full model (Fisher)")]
    if bias.neglect:
        dists.append(GaussianND(f.fiducial + bias.delta, cov, names=names, labels=f.labels,
                                label="without " + ", ".join(bias.neglect) + " (shifted by the bias)"))
    with matplotlib.rc_context({"backend": "Agg"}):
        g = plots.get_subplot_plotter(width_inch=min(3.0 + 1.8 * len(names), 12.0))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                g.triangle_plot(dists, names, filled=True,
                                markers={n: v for n, v in zip(names, f.fiducial)},
                                legend_labels=[d.label for d in dists])
            open_atomic(path, lambda fh: g.fig.savefig(fh, format="png", dpi=130), binary=True)
        finally:
            import matplotlib.pyplot as plt
            plt.close(g.fig)


def plot_scan(scan, path):
    """Δf_NL/σ(f_NL) against the scanned quantity with the ±1σ band; σ(f_NL) and Δf_NL below."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    q = scan.quantity
    x = np.array([r[q] for r in scan.rows])
    ratio = np.array([r["delta_fnl_over_sigma"] for r in scan.rows])
    sig = np.array([r["sigma_fnl"] for r in scan.rows])
    dlt = np.array([r["delta_fnl"] for r in scan.rows])
    fig = Figure(figsize=(6.4, 6.0))
    FigureCanvasAgg(fig)
    ax, bx = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    ax.axhspan(-1.0, 1.0, color="0.85", label=r"$\pm 1\sigma(f_{\rm NL})$")
    for sgn in (1, -1):
        ax.axhline(sgn * scan.threshold, color="0.45", ls="--", lw=1,
                   label=rf"$\pm {scan.threshold:g}\sigma$" if sgn == 1 else None)
    ax.axhline(0.0, color="0.3", lw=0.8)
    ax.plot(x, ratio, "o-", color="C3", label="without " + neglect_text(scan.neglect))
    ax.set_ylabel(r"$\Delta f_{\rm NL} / \sigma(f_{\rm NL})$")
    ax.legend(fontsize=8, loc="best")
    bx.plot(x, sig, "s-", color="C0", label=r"$\sigma(f_{\rm NL})$")
    bx.plot(x, np.abs(dlt), "^-", color="C3", label=r"$|\Delta f_{\rm NL}|$")
    bx.set_yscale("log")
    bx.set_xlabel(_QUANTITY_LABEL.get(q, q))
    bx.legend(fontsize=8, loc="best")
    if np.all(x > 0) and x.max() / x.min() > 20:
        bx.set_xscale("log")
    fig.tight_layout()
    open_atomic(path, lambda fh: fig.savefig(fh, format="png", dpi=130), binary=True)


_QUANTITY_LABEL = {"redshift": "redshift z", "volume": r"volume [$(h^{-1}{\rm Mpc})^3$]",
                   "fsky": r"sky fraction $f_{\rm sky}$",
                   "thickness": r"shell thickness [$h^{-1}$Mpc]", "b1": r"$b_1$",
                   "nbar": r"$\bar n$ [$h^3{\rm Mpc}^{-3}$]", "b_e": r"$b_e$", "s": r"$s$",
                   "k_min": r"$k_{\rm min}$ [$h\,{\rm Mpc}^{-1}$]"}


def ranges_text(scan):
    """'0.5–1.0, 2.5' style list of the grid intervals where |Δ/σ| exceeds the threshold."""
    q = scan.quantity
    flags = [abs(r["delta_fnl_over_sigma"]) > scan.threshold for r in scan.rows]
    xs = [r[q] for r in scan.rows]
    parts, start = [], None
    for i, flag in enumerate(flags + [False]):
        if flag and start is None:
            start = i
        if not flag and start is not None:
            parts.append(f"{xs[start]:g}" if start == i - 1 else f"{xs[start]:g}–{xs[i - 1]:g}")
            start = None
    return ", ".join(parts)


def scan_tables(scan):
    """(csv text, markdown text) of a :class:`ScanResult`."""
    cols = scan.columns()
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(cols)
    for r in scan.rows:
        w.writerow(["" if r.get(c) is None else (f"{r[c]:.8g}" if isinstance(r[c], float) else r[c])
                    for c in cols])
    q = scan.quantity
    md = [f"# f_NL bias scan over {q}", "",
          f"Analysis model neglects: {neglect_text(scan.neglect)}. Δf_NL: first-order shift of the "
          "best fit (Fisher); σ(f_NL): marginalised Fisher error.", "",
          f"| {q} | b1 | σ(f_NL) | Δf_NL | Δf_NL/σ | f_NL^eff (neglected) |",
          "|---:|---:|---:|---:|---:|---:|"]
    for r in scan.rows:
        flag = " **!**" if abs(r["delta_fnl_over_sigma"]) > scan.threshold else ""
        md.append(f"| {r[q]:g} | {r['b1']:.3g} | {_g(r['sigma_fnl'], 3)} | {_g(r['delta_fnl'], 3)} | "
                  f"{r['delta_fnl_over_sigma']:+.2f}{flag} | {_g(r['fnl_eff_neglected'], 3)} |")
    where = ranges_text(scan)
    md += ["", f"**!**: |Δf_NL| > {scan.threshold:g} σ(f_NL). " +
           (f"This happens for {q} = {where}." if where else
            "This happens nowhere on the grid.")]
    return buf.getvalue(), "\n".join(md) + "\n"


def forecast_markdown(bias, scan=None, mcmc=None, files=()):
    """Human report (Markdown) of a forecast."""
    f, info = bias.fisher, bias.info
    lines = [f"# Fisher forecast and f_NL bias: {info['run']}", "",
             f"Config `{info['config']}` (hash {info['config_hash']}).", "",
             f"- Survey: z = {info['redshift']:g}, n̄ = {info['nbar']:g} h³/Mpc³, geometry "
             f"{info['geometry']['shape']}, volume {info['volume']:.3g} (Mpc/h)³.",
             f"- Data vector: {info['n_data']} points, multipoles {info['ells']}, k in "
             f"[{info['k_range'][0]:.4g}, {info['k_range'][1]:.4g}] h/Mpc.",
             f"- Truth model: effects {', '.join(info['truth_model']['effects']) or 'none'}; window "
             f"{'on' if info['truth_model']['window'] else 'off'}; integral constraint "
             f"{info['truth_model']['integral_constraint']}; observer term "
             f"{'on' if info['truth_model']['observer'] else 'off'}.",
             f"- Analysis model neglects: {neglect_text(bias.neglect)}.", "",
             "## Errors and shifts", "",
             "| parameter | fiducial | σ marginalised | σ conditional | Δ (bias) | Δ/σ |",
             "|---|---:|---:|---:|---:|---:|"]
    for i, n in enumerate(f.names):
        lines.append(f"| {n} | {f.fiducial[i]:.4g} | {f.errors[i]:.3g} | "
                     f"{f.conditional_errors[i]:.3g} | {bias.delta[i]:+.3g} | "
                     f"{bias.delta_over_sigma[i]:+.2f} |")
    lines += ["", "Correlation matrix:", "", "| | " + " | ".join(f.names) + " |",
              "|---|" + "---:|" * len(f.names)]
    for i, n in enumerate(f.names):
        lines.append(f"| {n} | " + " | ".join(f"{c:+.3f}" for c in f.correlation[i]) + " |")
    if f.priors:
        lines += ["", "Gaussian priors in the Fisher matrix: " + ", ".join(
            f"{n} ~ N({m:g}, {s:g})" for n, (m, s) in f.priors.items()) + "."]
    lines += ["", f"f_NL mimicked at k → 0 by the neglected projection terms: "
              f"{_g(bias.fnl_eff_neglected, 3)}; by all projection terms of the truth model: "
              f"{_g(bias.fnl_eff_projection, 3)} (leading k⁻² term of the monopole only).",
              f"χ² of the neglected effect at the fiducial point: {bias.chi2_total:.3g}; left after "
              f"the parameters shift: {bias.chi2_residual:.3g} (for {info['n_data']} data points)."]
    if mcmc is not None:
        lines += ["", "## MCMC check (analysis model on the noiseless truth mock)", "",
                  "| parameter | Fisher Δ | MCMC shift | (shift − Δ)/σ_F | MCMC std / σ_F |",
                  "|---|---:|---:|---:|---:|"]
        for n, e in mcmc["parameters"].items():
            if "fisher_delta" in e:
                lines.append(f"| {n} | {e['fisher_delta']:+.3g} | {e['mcmc_shift']:+.3g} | "
                             f"{e['shift_difference_over_sigma']:+.2f} | {e['width_ratio']:.2f} |")
        lines += ["", f"Agreement within {mcmc['tolerance']:g} σ: "
                  f"{'yes' if mcmc['agree'] else 'NO'}; chain converged: "
                  f"{'yes' if mcmc['converged'] else 'no'} ({mcmc['n_steps']} steps)."]
        lines += [f"- {n}" for n in mcmc["notes"]]
    if scan is not None:
        where = ranges_text(scan)
        lines += ["", f"## Scan over {scan.quantity}", "",
                  f"See `scan.md`, `scan.csv` and `scan.png`. |Δf_NL|/σ(f_NL) exceeds "
                  f"{scan.threshold:g} for {scan.quantity} = {where}." if where else
                  f"See `scan.md`, `scan.csv` and `scan.png`. |Δf_NL|/σ(f_NL) stays below "
                  f"{scan.threshold:g} over the whole grid."]
    lines += ["", "## Validity", "",
              "- Fisher errors assume a Gaussian likelihood with a parameter-independent "
              "covariance and a model linear in the parameters near the fiducial point; they are "
              "conditional on every parameter not listed (cosmology unless sampled) and ignore "
              "flat-prior bounds.",
              "- Δ is the first-order shift; when |Δf_NL| ≳ σ(f_NL) (the model is quadratic in "
              "f_NL) confirm it with `--check-mcmc`.",
              "- The model is linear theory with a plane-parallel kernel and local projection "
              "terms only (no lensing, ISW, time delay, wide-angle terms)."]
    notes = list(bias.warnings) + (list(scan.notes) if scan is not None else [])
    if notes:
        lines += ["", "## Warnings and notes", ""] + [f"- {n}" for n in dict.fromkeys(notes)]
    if files:
        lines += ["", "Files: " + ", ".join(f"`{x}`" for x in files) + "."]
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# Driver and command line
# --------------------------------------------------------------------------------------------

def run_forecast(config, out_dir=None, check_mcmc=False, pool=None, scan=True):
    """Forecast, bias, optional scan and MCMC check of a config; writes all outputs.

    out_dir: default ``<output folder>/forecast``. pool: object with ``map`` for the scan.
    Files: fisher.json, forecast.md, ellipses.png, and with a scan scan.csv, scan.md, scan.png;
    with the check mcmc_check/ (truth mock, covariance, config, chain). Returns a dict with the
    :class:`BiasForecast` (``bias``), :class:`ScanResult` (``scan``), the MCMC check dict
    (``mcmc``) and the written paths (``files``).
    """
    cfg = config if isinstance(config, Config) else load_config(config)
    out_dir = out_dir or os.path.join(cfg.output_folder, "forecast")
    ensure_folder(out_dir, "choose another with --out")
    fs = forecast_settings(cfg)
    bias = bias_forecast(cfg)
    scan_res = None
    if scan and fs["scan"]:
        scan_res = bias_scan(cfg, pool=pool)
    mcmc = None
    if check_mcmc:
        mcmc = mcmc_check(bias, os.path.join(out_dir, "mcmc_check"))
    files = ["fisher.json", "forecast.md", "ellipses.png"]
    plot_ellipses(bias, os.path.join(out_dir, "ellipses.png"))
    if scan_res is not None:
        csv_text, md_text = scan_tables(scan_res)
        write_text(os.path.join(out_dir, "scan.csv"), csv_text)
        write_text(os.path.join(out_dir, "scan.md"), md_text)
        plot_scan(scan_res, os.path.join(out_dir, "scan.png"))
        files += ["scan.csv", "scan.md", "scan.png"]
    if mcmc is not None:
        files.append("mcmc_check/")
    doc = {"run": cfg["run"], "config": cfg.path, "config_hash": cfg.hash,
           **bias.fisher.to_dict(), "bias": bias.to_dict(),
           "survey": {k: bias.info[k] for k in ("redshift", "nbar", "geometry", "volume", "n_data",
                                                 "ells", "k_range")},
           "truth_model": bias.info["truth_model"], "analysis_model": bias.info["analysis_model"],
           "scan": None if scan_res is None else {"quantity": scan_res.quantity,
                                                  "threshold": scan_res.threshold,
                                                  "exceeding": scan_res.exceeding(),
                                                  "rows": scan_res.rows},
           "mcmc_check": mcmc,
           "warnings": list(dict.fromkeys(bias.warnings + (scan_res.notes if scan_res else [])))}
    write_text(os.path.join(out_dir, "fisher.json"), json.dumps(_plain(doc), indent=1) + "\n")
    write_text(os.path.join(out_dir, "forecast.md"),
                forecast_markdown(bias, scan_res, mcmc, files))
    return {"bias": bias, "scan": scan_res, "mcmc": mcmc, "out_dir": out_dir,
            "files": [os.path.join(out_dir, f) for f in files]}


def forecast_lines(cfg, res):
    """Lines the ``forecast`` command prints for the result of :func:`run_forecast`."""
    bias = res["bias"]
    f = bias.fisher
    lines = [f"forecast for {cfg['run']}: analysis neglects {neglect_text(bias.neglect)}"]
    for i, n in enumerate(f.names):
        lines.append(f"  {n:<10s} fiducial {f.fiducial[i]:<9.4g} sigma {f.errors[i]:<9.3g} "
                     f"shift {bias.delta[i]:+9.3g} ({bias.delta_over_sigma[i]:+.2f} sigma)")
    if res["scan"] is not None:
        where = ranges_text(res["scan"])
        lines.append(f"scan over {res['scan'].quantity}: |shift(f_NL)| > {res['scan'].threshold:g} sigma "
                     + (f"for {res['scan'].quantity} = {where}" if where else "nowhere on the grid"))
    if res["mcmc"] is not None:
        m = res["mcmc"]
        lines.append(f"MCMC check: {'agrees' if m['agree'] else 'DISAGREES'} with the Fisher shift "
                     f"within {m['tolerance']:g} sigma"
                     + ("" if m["converged"] else " (chain not converged: raise sampling.max_steps)"))
    n_warn = len(bias.warnings) + (len(res["scan"].notes) if res["scan"] is not None else 0) \
        + (len(res["mcmc"]["notes"]) if res["mcmc"] is not None else 0)
    if n_warn:
        lines.append(f"{n_warn} warnings/notes: see forecast.md")
    lines.append(f"outputs in {res['out_dir']}/: " + ", ".join(os.path.basename(p.rstrip('/')) or p
                                                               for p in res["files"]))
    return lines
