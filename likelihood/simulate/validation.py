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
    from scipy import stats

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
    nm, p = x.shape
    mean = x.mean(axis=0)
    resid = mean - mv.ravel()
    if covariance is None:
        cov = np.cov(x, rowvar=False, ddof=1)
        if nm <= first.n_bins:
            raise ErgofitError(f"validate: {nm} mocks for {first.n_bins} bins per multipole; the "
                               "mocks' own scatter needs more mocks than bins (or pass covariance=)")
    else:
        cov = np.asarray(getattr(covariance, "covariance", covariance), dtype=float)
        check_covariance(cov, n=p, source="validate covariance")
    nb = first.n_bins

    def stat(sl):
        c = cov[sl, sl] / nm
        r = resid[sl]
        d = r.size
        if covariance is None and nm <= d:
            return None, d, None            # the sample covariance of nm <= d mocks is singular
        chi2 = float(r @ np.linalg.solve(c, r))
        if covariance is None:
            pv = float(stats.f.sf(chi2 * (nm - d) / (d * (nm - 1)), d, nm - d))
        else:
            pv = float(stats.chi2.sf(chi2, d))
        return chi2, d, pv

    out = {"ells": first.ells, "chi2": {}, "dof": {}, "p_value": {}, "n_mocks": nm}
    for a, ell in enumerate(first.ells):
        c2, d, pv = stat(slice(a * nb, (a + 1) * nb))
        out["chi2"][ell], out["dof"][ell], out["p_value"][ell] = c2, d, pv
    c2, d, pv = stat(slice(0, p))
    out.update(chi2_total=c2, dof_total=d, p_value_total=pv, plot=None)
    if plot is not None:
        out["plot"] = _residual_plot(first, mean, mv, np.sqrt(np.diag(cov) / nm), out, plot)
    return out


def _residual_plot(first, mean, model, err, res, path):
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    nb = first.n_bins
    fig, axes = plt.subplots(len(first.ells), 1, sharex=True,
                             figsize=(6.0, 1.9 * len(first.ells) + 0.6), squeeze=False)
    for a, ell in enumerate(first.ells):
        ax = axes[a, 0]
        sl = slice(a * nb, (a + 1) * nb)
        ax.axhspan(-1, 1, color="0.9")
        ax.axhline(0, color="0.4", lw=0.8)
        ax.plot(first.k_eff, (mean[sl] - model[a]) / err[sl], "o", ms=3.5)
        ax.set_ylabel(rf"$\Delta P_{ell}/\sigma$")
        ax.text(0.99, 0.92, rf"$\ell={ell}$: $\chi^2$ = {res['chi2'][ell]:.1f} / {res['dof'][ell]}",
                transform=ax.transAxes, ha="right", va="top", fontsize=8)
    axes[-1, 0].set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
    axes[0, 0].set_title(f"(mean of {res['n_mocks']} mocks − model) / error of the mean",
                         fontsize=9)
    fig.tight_layout()
    path = os.fspath(path)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path

