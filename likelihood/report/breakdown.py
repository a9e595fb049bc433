"""A run by sample and by spectrum: the χ² of each block at the best fit, which sample each
parameter belongs to, and the parameters of each sample's triangle plot.

χ² of a spectrum s: r_sᵀ C_ss⁻¹ r_s, r = data − model at θ, C_ss its own diagonal block of the
covariance. The cross-covariance with the other spectra of the sample is left out, so the
spectra's χ² do not add up to the sample's (common practice for a per-block goodness of fit;
its expectation is the number of points of the block, less what the fit absorbed). The χ² of a
sample (spectrum "all") is rᵀ C⁻¹ r with its whole covariance; the samples being independent,
theirs add up to the run's χ² (without the Hartlap factor or t-likelihood of a mock covariance,
and with analytically marginalised parameters at their conditional best fit).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from ..config.multitracer import SHARED as SHARED_PARAMETERS

SHARED = "shared"


def sample_parts(lik: Any) -> list[tuple[str | None, Any, np.ndarray | None]]:
    """[(sample name, its likelihood, its columns of θ)] of a run with several samples (a
    :class:`~likelihood.model.samples.SampleSum`), or [(None, lik, None)]."""
    if hasattr(lik, "parts") and hasattr(lik, "columns") and hasattr(lik, "names"):
        return list(zip(lik.names, lik.parts, lik.columns))
    return [(None, lik, None)]


def fit_blocks(lik: Any, theta: np.ndarray) -> list[dict]:
    """χ² at ``theta`` per sample and spectrum (module docstring): a list of
    {sample, spectrum, n_points, chi2}; empty for a likelihood without labelled spectra."""
    theta = np.asarray(theta, float)
    rows = []
    for name, part, cols in sample_parts(lik):
        obs = part.observables()
        if "spectra" not in obs or not hasattr(part, "covariance"):
            continue
        th = theta if cols is None else theta[cols]
        r = np.concatenate(obs["data"]) - np.concatenate(part.model_observables(th))
        labels = np.repeat(np.array(obs["spectra"], dtype=object), [k.size for k in obs["k"]])
        cov = np.asarray(part.covariance, float)
        for lab in dict.fromkeys(obs["spectra"]):
            sel = labels == lab
            rows.append({"sample": name, "spectrum": lab, "n_points": int(sel.sum()),
                         "chi2": float(r[sel] @ np.linalg.solve(cov[np.ix_(sel, sel)], r[sel]))})
        if name is not None:
            rows.append({"sample": name, "spectrum": "all", "n_points": int(r.size),
                         "chi2": float(r @ np.linalg.solve(cov, r))})
    return rows


def parameter_samples(lik: Any) -> dict[str, str]:
    """{parameter or derived name: the sample it belongs to, or "shared"} for a run with
    several samples; {} otherwise. f_NL, ν, the cosmology and any parameter read by more than
    one sample are shared."""
    parts = sample_parts(lik)
    if parts[0][0] is None:
        return {}
    owners: dict[str, list] = {}
    for name, part, _ in parts:
        for n in list(part.parameter_names) + list(part.derived_names):
            owners.setdefault(n, []).append(name)
    return {n: (o[0] if len(o) == 1 and n not in SHARED_PARAMETERS else SHARED)
            for n, o in owners.items()}


def triangle_groups(lik: Any, names: list[str]) -> dict[str, list[str]]:
    """{sample: the sampled parameters of its triangle plot (the shared ones, then its own)}."""
    owner = parameter_samples(lik)
    if not owner:
        return {}
    shared = [n for n in names if owner.get(n) == SHARED]
    return {s: shared + [n for n in names if owner.get(n) == s] for s, _, _ in sample_parts(lik)}
