"""Posterior summaries of a run: getdist statistics, tables, triangle and multipoles figures.

Everything here reads a :class:`likelihood.sampling.SamplerResult` (or the run folder through
:func:`likelihood.sampling.load_chain`) and writes into the run folder:

``summary.json``      per parameter (sampled and derived): mean, std, median, 68% and 95%
                      marginal limits (getdist), best fit; plus run diagnostics, chi2/dof at the
                      best fit, config hash and notes.
``constraints.md``    mean with 68% limits and the 95% interval per parameter (Markdown table).
``constraints.tex``   the same as a LaTeX ``tabular`` to ``\\input`` in a paper.
``triangle.png/pdf``  getdist triangle plot, filled 68/95% contours and 1-D marginals.
``multipoles.png``    data with error bars per multipole, best-fit model, residuals in sigma.

Several tracers or samples (:mod:`likelihood.report.breakdown`): ``summary.json`` gains
``fit_blocks`` (χ² and points per sample and spectrum at the best fit) and, per parameter, the
sample it belongs to ("shared" for f_NL, ν, cosmology); ``constraints.md`` shows both; each
sample gets ``triangle_NAME.png/pdf`` (the shared parameters and its own); ``multipoles.png``
has a panel per spectrum (odd ℓ of a cross spectrum apart) and a row per sample.

Statistics. Marginal limits are getdist's (Lewis 2019, arXiv:1910.13970): from the kernel-
smoothed 1-D marginal, integrating inwards equally from both tails unless the posterior is
skewed, then equal-probability (density-threshold) limits; one-tailed limits are reported when
the posterior hits a prior bound (``limit_type`` "upper limit"/"lower limit"). The credible
levels are 0.68 and 0.95 (getdist's default convention, not 0.6827/0.9545). "Best fit" is the
highest-posterior sample in the stored chain, not an optimiser's maximum: with flat priors it
approximates the maximum likelihood only to within the sampling scatter (for d parameters
chi2 exceeds its minimum by about a few hundredths to a few tenths).

Numbers in the tables are rounded by the Particle Data Group rule (PDG, Review of Particle
Physics, Introduction, "Rounding"): the three leading digits of the error decide between two
significant digits (100-354), one (355-949) or rounding up to two (950-999).

Files are written atomically (temporary file in the same folder, then ``os.replace``), so an
interrupted summary never leaves a half-written file. Figures use matplotlib's Agg canvas.

Public API: :func:`make_samples`, :func:`marginal_stats`, :func:`write_summary`,
:func:`plot_triangle`, :func:`plot_multipoles`, :func:`overlay`, :func:`summarize`.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import warnings
from typing import Any, Callable, Sequence

import numpy as np

from ..errors import ErgofitError
from ..io import write_text
from ..sampling import SamplerResult, load_chain
from .breakdown import fit_blocks, parameter_samples, triangle_groups
from .figures import check_observables, plot_multipoles, plot_triangle
from .tables import constraints_markdown, constraints_tex, constraints_text

__all__ = [
    "constraints_text",
    "make_samples",
    "marginal_stats",
    "overlay",
    "plot_multipoles",
    "plot_triangle",
    "summarize",
    "write_summary",
]

_CONTOURS = (0.68, 0.95)
_LIMIT_TYPES = {"two": "two-sided", ">": "upper limit", "<": "lower limit", "none": "none"}


# --------------------------------------------------------------------------------------------
# Atomic file output
# --------------------------------------------------------------------------------------------


# --------------------------------------------------------------------------------------------
# getdist samples and statistics
# --------------------------------------------------------------------------------------------


def _derived_values(lik: Any, theta: np.ndarray) -> tuple[list[str], list[str], np.ndarray]:
    names = list(getattr(lik, "derived_names", []) or [])
    labels = list(getattr(lik, "derived_labels", []) or [])
    if not names:
        return [], [], np.empty((theta.shape[0], 0))
    if len(labels) != len(names):
        raise ErgofitError(
            f"likelihood derived_labels has {len(labels)} entries, expected {len(names)}"
        )
    values = np.asarray(lik.derived(theta), dtype=float)
    if values.shape != (theta.shape[0], len(names)):
        raise ErgofitError(
            f"likelihood derived() returned shape {values.shape}, expected "
            f"({theta.shape[0]}, {len(names)})"
        )
    bad = ~np.isfinite(values).all(axis=0)
    if bad.any():
        raise ErgofitError(
            f"likelihood derived() gave non-finite values for '{names[int(np.argmax(bad))]}'"
        )
    return names, labels, values


def _check_same_run(result: SamplerResult, lik: Any) -> None:
    if lik is not None and getattr(lik, "config_hash", result.config_hash) != result.config_hash:
        raise ErgofitError(
            f"likelihood config hash {lik.config_hash} differs from {result.config_hash} of chain "
            f"{result.chain_path}; the config changed after the run, summarise with the run's "
            "config.yaml"
        )
    if lik is not None and list(lik.parameter_names) != list(result.parameter_names):
        raise ErgofitError(
            f"likelihood samples {list(lik.parameter_names)} but chain {result.chain_path} holds "
            f"{list(result.parameter_names)}"
        )


def _check_labels(names: Sequence[str], labels: Sequence[str]) -> None:
    """Every label must be typeset by matplotlib's mathtext (the figures use it)."""
    from matplotlib.mathtext import MathTextParser

    parser = MathTextParser("path")
    for name, label in zip(names, labels):
        try:
            parser.parse(f"${label}$")
        except ValueError as exc:
            reason = " ".join(str(exc).split())
            raise ErgofitError(
                f"label '{label}' of parameter '{name}' is not valid LaTeX for matplotlib "
                f"(write it without $, e.g. f_{{\\rm NL}}): {reason}"
            ) from None


def make_samples(result: SamplerResult, lik: Any = None, label: str | None = None):
    """getdist ``MCSamples`` of a run: LaTeX labels, prior ranges, derived parameters.

    result: the run (its kept samples, names, labels and prior bounds are used).
    lik: optional likelihood; when given (and it has ``derived_names``), ``lik.derived`` is
        evaluated on every kept sample and added as derived parameters.
    label: legend label of these samples (default: the run folder's name).
    Infinite prior bounds become open ranges (getdist ``None``).
    """
    from getdist import MCSamples

    _check_same_run(result, lik)
    names = list(result.parameter_names)
    _check_labels(names, result.labels)
    ranges = {
        n: [float(lo) if np.isfinite(lo) else None, float(hi) if np.isfinite(hi) else None]
        for n, (lo, hi) in zip(names, np.asarray(result.prior_bounds, dtype=float))
    }
    if label is None:
        label = os.path.basename(os.path.dirname(os.path.abspath(result.chain_path)))
    with contextlib.redirect_stdout(io.StringIO()):  # getdist prints "Removed no burn in"
        samples = MCSamples(
            samples=np.asarray(result.samples, dtype=float),
            loglikes=-np.asarray(result.log_prob, dtype=float),
            names=names, labels=list(result.labels), ranges=ranges, label=label,
            sampler="mcmc", ignore_rows=0,
            settings={"contours": " ".join(str(c) for c in _CONTOURS)},
        )
    if lik is not None:
        d_names, d_labels, values = _derived_values(lik, np.asarray(result.samples, dtype=float))
        _check_labels(d_names, d_labels)
        for j, (n, lab) in enumerate(zip(d_names, d_labels)):
            samples.addDerived(values[:, j], name=n, label=lab)
    return samples


def _num(x: Any) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def marginal_stats(samples) -> dict[str, dict]:
    """Per parameter: label, mean, std, median, interval68/95 and their limit types (getdist)."""
    marge = samples.getMargeStats()
    contours = [float(c) for c in samples.contours[: len(_CONTOURS)]]
    if not np.allclose(contours, _CONTOURS):
        raise ErgofitError(f"getdist contours are {contours}, expected {list(_CONTOURS)}")
    out: dict[str, dict] = {}
    for info in samples.paramNames.names:
        p = marge.parWithName(info.name)
        column = samples.samples[:, samples.index[info.name]]
        entry = {
            "label": info.label,
            "derived": bool(info.isDerived),
            "mean": _num(p.mean),
            "std": _num(p.err),
            "median": _num(np.median(column)),
        }
        for level, lim in zip(("68", "95"), p.limits[:2]):
            entry[f"interval{level}"] = [_num(lim.lower), _num(lim.upper)]
            entry[f"limit_type{level}"] = _LIMIT_TYPES[lim.limitTag()]
        out[info.name] = entry
    return out


# --------------------------------------------------------------------------------------------
# Summary of one run, re-summary, overlay
# --------------------------------------------------------------------------------------------


def _clean(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _num(obj)
    return obj


def write_summary(out_dir: str | os.PathLike, result: SamplerResult, lik: Any = None,
                  label: str | None = None) -> dict:
    """Write summary.json, constraints.md/.tex, triangle.png/.pdf and multipoles.png.

    lik: the run's likelihood (same config hash as the chain). Without it, derived parameters,
        chi2/dof and multipoles.png are left out and a note says so.
    label: name of the run in the files (default: the folder name).
    Returns the summary dict (the content of summary.json).
    """
    return _write_summary(out_dir, result, lik, label)[0]


def _write_summary(out_dir, result: SamplerResult, lik: Any, label: str | None):
    out_dir = os.fspath(out_dir)
    if not os.path.isdir(out_dir):
        raise ErgofitError(f"output folder {out_dir} does not exist")
    if label is None:
        label = os.path.basename(os.path.abspath(out_dir))
    summary, samples, can_plot = _compute_summary(out_dir, result, lik, label)
    write_text(os.path.join(out_dir, "summary.json"),
               json.dumps(summary, indent=2, allow_nan=False) + "\n")
    write_text(os.path.join(out_dir, "constraints.md"), constraints_markdown(summary))
    write_text(os.path.join(out_dir, "constraints.tex"), constraints_tex(summary))
    plot_triangle([samples], os.path.join(out_dir, "triangle"), params=list(result.parameter_names))
    if lik is not None:
        for name, params in triangle_groups(lik, list(result.parameter_names)).items():
            plot_triangle([samples], os.path.join(out_dir, f"triangle_{name}"), params=params,
                          title=f"sample {name}: the shared parameters and its own")
    if can_plot:
        chi2, dof = summary["chi2"], summary["dof"]
        title = f"{label}: best fit, $\\chi^2$ = {chi2:.1f} for {dof} d.o.f." if chi2 is not None \
            else label
        plot_multipoles(lik, result.best_fit, os.path.join(out_dir, "multipoles.png"), title=title)
    return summary, samples


def _compute_summary(out_dir, result: SamplerResult, lik: Any, label: str):
    """(summary dict, getdist samples, whether multipoles.png can be drawn); writes nothing."""
    samples = make_samples(result, lik, label=label)
    params = marginal_stats(samples)
    notes = list(result.notes)
    for name, value in zip(result.parameter_names, result.best_fit):
        params[name]["best_fit"] = _num(value)
    chi2 = dof = None
    can_plot = lik is not None and hasattr(lik, "observables") and hasattr(lik, "model_observables")
    if can_plot:
        check_observables(lik.observables())  # fail before any file is written
    if lik is not None:
        d_names, _, d_best = _derived_values(lik, np.asarray(result.best_fit, float)[None, :])
        for j, name in enumerate(d_names):
            params[name]["best_fit"] = _num(d_best[0, j])
        if hasattr(lik, "chi2") and hasattr(lik, "dof"):
            chi2, dof = _num(lik.chi2(np.asarray(result.best_fit, float))), int(lik.dof)
            if chi2 is None:
                notes.append("the best-fit chi2 is not finite: the model cannot describe the data")
        if not can_plot:
            notes.append("the likelihood has no observables(): multipoles.png left out")
        for name, sample in parameter_samples(lik).items():
            if name in params:
                params[name]["sample"] = sample
    else:
        notes.append("no likelihood given: derived parameters, chi2/dof and multipoles.png left out")
    if not can_plot and os.path.exists(os.path.join(out_dir, "multipoles.png")):
        notes.append("multipoles.png in this folder is from an earlier summary")
    pte = fit_probability(chi2, dof)
    notes += _fit_warnings(chi2, dof, pte) + prior_edge_notes(result)
    tau = {n: _num(t) for n, t in zip(result.parameter_names, result.tau)}
    summary = {
        "label": label,
        "config_hash": result.config_hash,
        "chain": os.path.relpath(result.chain_path, out_dir),
        "converged": bool(result.converged),
        "status": result.status,
        "n_steps": int(result.n_steps),
        "n_walkers": int(result.n_walkers),
        "burn_in": int(result.burn_in),
        "thin": int(result.thin),
        "n_samples": int(len(result.samples)),
        "tau": tau,
        "tau_max": _num(np.max(result.tau)) if np.all(np.isfinite(result.tau)) else None,
        "acceptance_fraction": float(result.acceptance_fraction),
        "best_fit_log_posterior": _num(result.best_log_prob),
        "chi2": chi2,
        "dof": dof,
        "chi2_pte": pte,
        "credible_levels": list(_CONTOURS),
        "parameters": params,
        "fit_blocks": fit_blocks(lik, np.asarray(result.best_fit, float)) if can_plot else [],
        "sample_triangles": [f"triangle_{s}" for s in
                             triangle_groups(lik, list(result.parameter_names))]
        if lik is not None else [],
        "notes": notes,
    }
    return _clean(summary), samples, can_plot


#: A best fit with a probability to exceed below this is reported as unacceptable.
PTE_MIN = 1e-3
#: Prior-edge rule: more than EDGE_FRACTION of the samples within EDGE_BAND (a fraction of the
#: prior width) of a finite bound, i.e. five times what a posterior flat over the prior puts there.
EDGE_BAND, EDGE_FRACTION = 0.02, 0.10


class FitWarning(UserWarning):
    """The best fit is unacceptable, or the posterior is cut by a prior bound."""


def fit_probability(chi2: float | None, dof: int | None) -> float | None:
    """Probability to exceed the best-fit chi2 for dof degrees of freedom (chi-square
    distribution; valid for a Gaussian likelihood with a known covariance)."""
    if chi2 is None or dof is None or dof <= 0:
        return None
    from scipy.stats import chi2 as chi2_dist
    return float(chi2_dist.sf(chi2, dof))


def _fit_warnings(chi2, dof, pte) -> list[str]:
    if pte is None or pte >= PTE_MIN:
        return []
    msg = (f"unacceptable fit: best-fit chi2 = {chi2:.4g} for {dof} degrees of freedom "
           f"(probability to exceed {pte:.2g} < {PTE_MIN:g}); check the data and covariance "
           "(units, shot-noise convention, k range) and the effects switched on")
    warnings.warn(msg, FitWarning, stacklevel=4)
    return [msg]


def prior_edge_notes(result: SamplerResult) -> list[str]:
    """A note (and a FitWarning) for each parameter whose posterior piles up at a finite prior
    bound (rule: EDGE_FRACTION of the samples within EDGE_BAND of the prior width)."""
    notes = []
    for j, name in enumerate(result.parameter_names):
        lo, hi = (float(b) for b in result.prior_bounds[j])
        if not (np.isfinite(lo) and np.isfinite(hi)) or len(result.samples) == 0:
            continue
        x = result.samples[:, j]
        band = EDGE_BAND * (hi - lo)
        for side, frac in (("lower", np.mean(x < lo + band)), ("upper", np.mean(x > hi - band))):
            if frac > EDGE_FRACTION:
                bound = lo if side == "lower" else hi
                msg = (f"the posterior of '{name}' sits on its {side} prior bound {bound:g} "
                       f"({100 * frac:.0f}% of the samples within {100 * EDGE_BAND:g}% of the prior "
                       f"width): widen parameters.{name} or treat the limit as prior-driven")
                warnings.warn(msg, FitWarning, stacklevel=4)
                notes.append(msg)
    return notes


def _labels_for(run_dirs: Sequence[str], labels: Sequence[str] | None) -> list[str]:
    if labels is None:
        return [os.path.basename(os.path.abspath(d)) for d in run_dirs]
    labels = list(labels)
    if len(labels) != len(run_dirs):
        raise ErgofitError(f"got {len(labels)} labels for {len(run_dirs)} run folders; give one per run")
    return labels


def _overlay_samples(samples_list: list, labels: list[str], out_path: str) -> list[str]:
    names = [[p.name for p in s.paramNames.names if not p.isDerived] for s in samples_list]
    common = [n for n in names[0] if all(n in other for other in names[1:])]
    if not common:
        raise ErgofitError("the runs to overlay share no parameter name")
    return plot_triangle(samples_list, out_path, legend_labels=labels, params=common)


def overlay(run_dirs: Sequence[str | os.PathLike], labels: Sequence[str] | None,
            out_path: str | os.PathLike, lik_factory: Callable[[str], Any] | None = None) -> list[str]:
    """Triangle plot of several runs in one figure (``out_path`` .png and .pdf).

    Only the parameters present in every run are plotted (derived ones only when lik_factory
    rebuilds each run's likelihood). Returns the two file paths.
    """
    run_dirs = [os.fspath(d) for d in run_dirs]
    if not run_dirs:
        raise ErgofitError("overlay: give at least one run folder")
    labels = _labels_for(run_dirs, labels)
    samples_list = []
    for d, lab in zip(run_dirs, labels):
        lik = lik_factory(d) if lik_factory is not None else None
        samples_list.append(make_samples(load_chain(d), lik, label=lab))
    return _overlay_samples(samples_list, labels, os.fspath(out_path))


def summarize(run_dirs: Sequence[str | os.PathLike], labels: Sequence[str] | None = None,
              lik_factory: Callable[[str], Any] | None = None,
              out_dir: str | os.PathLike | None = None) -> list[dict]:
    """Re-summarise runs from their folders alone (the command-line ``summarize``).

    One folder and no ``out_dir``: read the chain, rebuild the likelihood with
    ``lik_factory(run_dir)`` when given (from the run's stored config), and :func:`write_summary`
    into that folder. Otherwise nothing is written into the run folders: ``out_dir`` (created if
    needed) receives ``triangle.png``/``.pdf`` (the runs overlaid, for several runs; the run's own
    triangle for one), ``constraints.md`` (one table per run) and ``summary.json``
    (``{"runs": [summary, ...]}``). Returns the summary dicts.
    """
    run_dirs = [os.fspath(d) for d in run_dirs]
    if not run_dirs:
        raise ErgofitError("summarize: give at least one run folder")
    labels = _labels_for(run_dirs, labels)
    if out_dir is None:
        if len(run_dirs) > 1:
            raise ErgofitError("summarize: several runs need an output folder for the overlay")
        result = load_chain(run_dirs[0])
        lik = lik_factory(run_dirs[0]) if lik_factory is not None else None
        return [_write_summary(run_dirs[0], result, lik, labels[0])[0]]
    out_dir = os.fspath(out_dir)
    if any(os.path.abspath(out_dir) == os.path.abspath(d) for d in run_dirs):
        raise ErgofitError(f"summarize: the output folder {out_dir} is one of the run folders; "
                           "choose another")
    os.makedirs(out_dir, exist_ok=True)
    summaries, samples_list = [], []
    for d, lab in zip(run_dirs, labels):
        lik = lik_factory(d) if lik_factory is not None else None
        summary, samples, _ = _compute_summary(out_dir, load_chain(d), lik, lab)
        summaries.append(summary)
        samples_list.append(samples)
    _overlay_samples(samples_list, labels, os.path.join(out_dir, "triangle"))
    write_text(os.path.join(out_dir, "constraints.md"),
               "\n".join(constraints_markdown(s) for s in summaries))
    write_text(os.path.join(out_dir, "summary.json"),
               json.dumps({"runs": summaries}, indent=2, allow_nan=False) + "\n")
    return summaries
