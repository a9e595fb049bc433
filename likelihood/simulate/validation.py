"""Validation of mocks against a model: χ² per multipole and a residual figure."""
from __future__ import annotations

import os

import numpy as np

from ..data import check_covariance
from ..errors import ErgofitError

def validate(mocks, model, covariance=None, plot=None):
    """Compare the mean of mock data vectors with a model: χ² per multipole and in total.

    χ² = (x̄ − m)ᵀ (C/N)⁻¹ (x̄ − m) with x̄ the mean of the N mocks. If ``covariance`` (of one
    mock) is given, χ² follows a χ² law with p dof (p-value from scipy.stats.chi2). If not, C is
    the sample covariance of the same mocks and T² = χ² follows Hotelling's law:
    T² (N − p)/(p (N − 1)) ~ F(p, N − p) (Hotelling 1931), used for the p-value; it needs
    N > p, so with more mocks than bins per multipole but not more than all data points the
    per-multipole tests are made and the total is None (chi2_total, p_value_total).
    ``model``: a DataVector or an array of shape (n_ell, n_bins) of the *expected measurement*
    (window-convolved, bin-averaged), supplied by the caller. ``plot``: optional path of a PNG
    with the residuals (x̄ − m)/σ_mean per ℓ against k.
    Returns a dict: {"ells", "chi2": {ℓ: ...}, "dof": {ℓ: ...}, "p_value": {ℓ: ...},
    "chi2_total", "dof_total", "p_value_total", "n_mocks", "plot"}.
    """
    mocks = list(mocks)
    if len(mocks) < 2:
        raise ErgofitError(f"validate: {len(mocks)} mock(s); need at least 2")
    first = mocks[0]
    for m in mocks[1:]:
        if m.ells != first.ells or m.values.shape != first.values.shape \
                or not np.allclose(m.edges, first.edges):
            raise ErgofitError(f"validate: mock {m.source} has multipoles or k bins different from "
                               f"{first.source}")
    mv = np.asarray(model.values if hasattr(model, "values") else model, dtype=float)
    if mv.shape != first.values.shape:
        raise ErgofitError(f"validate: model has shape {mv.shape}; expected "
                           f"{first.values.shape} (multipoles {list(first.ells)} × bins)")
    x = np.array([m.flat for m in mocks])
    nb = first.n_bins
    if covariance is None and x.shape[0] <= nb:
        raise ErgofitError(f"validate: {x.shape[0]} mocks for {nb} bins per multipole; the "
                           "mocks' own scatter needs more mocks than bins (or pass covariance=)")
    blocks = [(ell, slice(a * nb, (a + 1) * nb), first.k_eff, rf"$\ell={ell}$")
              for a, ell in enumerate(first.ells)]
    out = chi2_tests(x, mv.ravel(), blocks, covariance, plot)
    out["ells"] = first.ells
    return out


def validate_spectra(vectors, model, blocks, plot=None):
    """:func:`validate` for the flat vectors of several spectra (``vectors``: (n_mocks, n_data),
    e.g. ``MultiTracerMocks.vectors``; ``model``: (n_data,) expected measurement) with the
    mocks' own scatter: one test per block [(key, slice, k_eff, plot label)] (one spectrum's
    multipole) and the joint test. Returns the dict of :func:`validate` keyed by the blocks'
    keys, with ``blocks`` (the keys) instead of ``ells``."""
    x = np.asarray(vectors, float)
    mv = np.asarray(model, float).ravel()
    if x.ndim != 2 or x.shape[0] < 2 or mv.size != x.shape[1]:
        raise ErgofitError(f"validate: {x.shape} mock vectors and a model of {mv.size} values; "
                           "expected at least 2 mocks of the model's length")
    nb = max(sl.stop - sl.start for _, sl, _, _ in blocks)
    if x.shape[0] <= nb:
        raise ErgofitError(f"validate: {x.shape[0]} mocks for {nb} bins per multipole; the "
                           "mocks' own scatter needs more mocks than bins")
    out = chi2_tests(x, mv, blocks, None, plot)
    out["blocks"] = [b[0] for b in blocks]
    return out


def chi2_tests(x, model, blocks, covariance=None, plot=None):
    """χ² of the mean of the rows of ``x`` against ``model`` per block and in total (see
    :func:`validate` for the statistics); ``blocks``: [(key, slice, k_eff, plot label)]."""
    from scipy import stats

    nm, p = x.shape
    mean = x.mean(axis=0)
    resid = mean - model
    if covariance is None:
        cov = np.cov(x, rowvar=False, ddof=1)
    else:
        cov = np.asarray(getattr(covariance, "covariance", covariance), dtype=float)
        check_covariance(cov, n=p, source="validate covariance")

    def stat(sl):
        c = cov[sl, sl] / nm
        r = resid[sl]
        d = r.size
        if covariance is None and nm <= d:
            return None, d, None            # the sample covariance of nm <= d mocks is singular
        try:
            chi2 = float(r @ np.linalg.solve(c, r))
        except np.linalg.LinAlgError:
            return None, d, None            # no scatter in some direction (identical fields)
        if covariance is None:
            pv = float(stats.f.sf(chi2 * (nm - d) / (d * (nm - 1)), d, nm - d))
        else:
            pv = float(stats.chi2.sf(chi2, d))
        return chi2, d, pv

    out = {"chi2": {}, "dof": {}, "p_value": {}, "n_mocks": nm}
    for key, sl, _, _ in blocks:
        out["chi2"][key], out["dof"][key], out["p_value"][key] = stat(sl)
    c2, d, pv = stat(slice(0, p))
    out.update(chi2_total=c2, dof_total=d, p_value_total=pv, plot=None)
    if plot is not None:
        out["plot"] = _residual_plot(blocks, mean, model, np.sqrt(np.diag(cov) / nm), out, plot)
    return out


def _residual_plot(blocks, mean, model, err, res, path):
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(len(blocks), 1, sharex=True,
                             figsize=(6.0, 1.9 * len(blocks) + 0.6), squeeze=False)
    for a, (key, sl, k, label) in enumerate(blocks):
        ax = axes[a, 0]
        ax.axhspan(-1, 1, color="0.9")
        ax.axhline(0, color="0.4", lw=0.8)
        ax.plot(k, (mean[sl] - model[sl]) / err[sl], "o", ms=3.5)
        ax.set_ylabel(r"$\Delta P/\sigma$")
        ax.text(0.99, 0.92, rf"{label}: $\chi^2$ = {res['chi2'][key]:.1f} / {res['dof'][key]}",
                transform=ax.transAxes, ha="right", va="top", fontsize=8)
    axes[-1, 0].set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
    axes[0, 0].set_title(f"(mean of {res['n_mocks']} mocks − model) / error of the mean",
                         fontsize=9)
    fig.tight_layout()
    path = os.fspath(path)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path
