"""Fisher matrices of a likelihood: derivatives by stable finite differences, priors,
singularity checks (method: :mod:`likelihood.forecast`)."""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular

from ..errors import ConfigError, ErgofitError

_SINGULAR_RCOND = 1e-10      # smallest/largest eigenvalue of the normalised Fisher matrix
_MAX_HALVINGS = 8


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
    return _assemble(W, L, names, labels, fid, priors, precision_scale, steps)


def _assemble(W, L, names, labels, fid, priors, precision_scale, steps):
    """Fisher of whitened derivatives W (n_data, n_par): F = WᵀW plus the Gaussian priors."""
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


def combine_independent(fishers, names):
    """Fisher matrix of independent data sets on the union ``names`` of their parameters.

    The log-likelihood of independent data is the sum of theirs, so its Fisher matrix is the sum
    of theirs (Tegmark, Taylor & Heavens 1997, ApJ 480, 22, eq. 15 applied to a block-diagonal
    covariance): F = Σ_s E_s F_s E_sᵀ, E_s placing data set s's parameters in ``names``; a
    parameter shared by several data sets adds, one of a single data set stays in its block.
    The Gaussian priors are counted once (they are the same for every data set that has the
    parameter; different means or widths raise an error). The result keeps the stacked whitened
    derivatives and a block-diagonal Cholesky factor (each with its own Hartlap factor folded
    in), so :meth:`Fisher.bias` of the stacked model error is F⁻¹ Σ_s B_s + the prior pull.
    Shared parameters must have one fiducial value.
    """
    from scipy.linalg import block_diag
    names = list(names)
    fid, labels, priors = {}, {}, {}
    blocks = []
    for f in fishers:
        for n, x, lab in zip(f.names, f.fiducial, f.labels):
            if n not in names:
                raise ErgofitError(f"combining Fisher matrices: '{n}' is not among {', '.join(names)}")
            if n in fid and not math.isclose(fid[n], x, rel_tol=1e-12, abs_tol=1e-12):
                raise ErgofitError(f"combining Fisher matrices: the shared parameter '{n}' has "
                                   f"two fiducial values ({fid[n]:g} and {x:g}); give every sample "
                                   f"the same one (data.mock.truth, parameters.{n}.start)")
            fid[n], labels[n] = float(x), lab
        for n, pr in f.priors.items():
            if n in priors and not np.allclose(priors[n], pr, rtol=1e-12, atol=0):
                raise ErgofitError(f"combining Fisher matrices: two different Gaussian priors on "
                                   f"'{n}' ({priors[n]} and {pr}); a shared parameter has one prior")
            priors[n] = tuple(pr)
        W = np.zeros((f.whitened.shape[0], len(names)))
        W[:, [names.index(n) for n in f.names]] = f.whitened
        blocks.append(W)
    missing = [n for n in names if n not in fid]
    if missing:
        raise ErgofitError(f"combining Fisher matrices: no data set constrains {', '.join(missing)}")
    L = block_diag(*[f.chol / math.sqrt(f.precision_scale) for f in fishers])
    return _assemble(np.vstack(blocks), L, names, [labels[n] for n in names],
                     np.array([fid[n] for n in names]), priors, 1.0,
                     [s for f in fishers for s in f.steps])


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
                                   labels=[dict(zip(lik.parameter_names, lik.labels))[n] for n in names],
                                   fiducial=[point[n] for n in names], priors=gauss,
                                   precision_scale=lik.precision_scale, steps=steps)

