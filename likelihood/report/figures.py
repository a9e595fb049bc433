"""Figures of a run: getdist triangle plots (one run or several overlaid) and the multipoles
figure (data with error bars, best-fit model, residuals in sigma). Matplotlib's Agg canvas;
files written atomically."""

from __future__ import annotations

import os
import warnings
from typing import Any, Sequence

import numpy as np

from ..errors import ErgofitError
from ..io import save_figure


# --------------------------------------------------------------------------------------------
# Figures
# --------------------------------------------------------------------------------------------


def _base_path(out_path: str | os.PathLike) -> str:
    out_path = os.fspath(out_path)
    root, ext = os.path.splitext(out_path)
    return root if ext.lower() in (".png", ".pdf") else out_path


_PALETTE = ["#1f5f8b", "#c8553d", "#3a8a4f", "#8e5ea2", "#d4a017", "#5c5c5c"]


def plot_triangle(samples_list: Sequence, out_path: str | os.PathLike,
                  legend_labels: Sequence[str] | None = None,
                  params: Sequence[str] | None = None, title: str | None = None) -> list[str]:
    """getdist triangle plot (filled 68/95% contours, 1-D marginals) as PNG and PDF.

    out_path: file name with or without ``.png``/``.pdf``; both files are written; ``title``
    (optional) goes above the plot.
    Returns the two paths.
    """
    import matplotlib.pyplot as plt
    from getdist import plots

    base = _base_path(out_path)
    n_par = len(params) if params is not None else samples_list[0].paramNames.numParams()
    g = plots.get_subplot_plotter(width_inch=min(3.0 + 1.6 * n_par, 12.0))
    paths = [base + ".png", base + ".pdf"]
    try:
        with warnings.catch_warnings():
            # getdist's tick formatter reads an attribute that matplotlib deprecates (not ours)
            warnings.filterwarnings("ignore", category=DeprecationWarning, module="getdist")
            n_runs = len(samples_list)
            # one run: filled contours; several: the first filled, the others as lines on top
            g.triangle_plot(list(samples_list), params=list(params) if params else None,
                            filled=True if n_runs == 1 else [True] + [False] * (n_runs - 1),
                            contour_colors=_PALETTE[:n_runs] if n_runs <= len(_PALETTE) else None,
                            contour_lws=1.8,
                            legend_labels=list(legend_labels) if legend_labels else None)
            if title:
                g.fig.suptitle(title, fontsize=11)
            for p in paths:
                save_figure(g.fig, p, tight=False)  # getdist has laid the figure out
    finally:
        plt.close(g.fig)
    return paths


def check_observables(obs: Any) -> tuple[list, list, list, list]:
    if not isinstance(obs, dict):
        raise ErgofitError("likelihood observables(): expected a dict with ells, k, data, sigma")
    for key in ("ells", "k", "data", "sigma"):
        if key not in obs:
            raise ErgofitError(f"likelihood observables() has no key '{key}'")
    ells = list(obs["ells"])
    arrays = {key: [np.asarray(a, dtype=float) for a in obs[key]] for key in ("k", "data", "sigma")}
    for key, arrs in arrays.items():
        if len(arrs) != len(ells):
            raise ErgofitError(
                f"likelihood observables()['{key}'] has {len(arrs)} entries for {len(ells)} ells"
            )
    for i, ell in enumerate(ells):
        n = arrays["k"][i].shape
        for key in ("data", "sigma"):
            if arrays[key][i].shape != n:
                raise ErgofitError(
                    f"likelihood observables()['{key}'][{i}] (ell={ell}) has shape "
                    f"{arrays[key][i].shape}, expected {n} like k"
                )
        if not np.all(np.isfinite(arrays["sigma"][i])) or np.any(arrays["sigma"][i] <= 0):
            raise ErgofitError(
                f"likelihood observables()['sigma'][{i}] (ell={ell}): expected finite values > 0"
            )
    return ells, arrays["k"], arrays["data"], arrays["sigma"]


def multipole_panels(obs: dict) -> list[tuple[str | None, str | None, list[int]]]:
    """The panels of the multipoles figure: [(sample, title, indices into the observables)].

    One panel per spectrum of each sample, titled "sample: spectrum" (or "spectrum", or nothing
    for one tracer); the odd multipoles of a cross spectrum (Π_ℓ, far below P_0) get a panel of
    their own, titled "... (odd ell)". Panels follow the order of the observables.
    """
    ells = list(obs["ells"])
    spectra = obs.get("spectra", [None] * len(ells))
    samples = obs.get("samples", [None] * len(ells))
    panels: dict = {}
    for i, (ell, spec, sample) in enumerate(zip(ells, spectra, samples)):
        title = spec if sample is None or spec is None else f"{sample}: {spec}"
        if ell % 2 and spec is not None:
            title = f"{title} (odd ell)"
        panels.setdefault((sample, title), []).append(i)
    return [(sample, title, idx) for (sample, title), idx in panels.items()]


def multipoles_figure(lik: Any, theta: np.ndarray, k_power: int = 1, title: str | None = None):
    """The Figure of :func:`plot_multipoles` (not saved): one row of panels per sample, one
    panel (data and model above, residuals below) per spectrum (:func:`multipole_panels`)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.ticker import FormatStrFormatter, LogLocator, NullFormatter

    obs = lik.observables()
    ells, ks, data, sigma = check_observables(obs)
    model = [np.asarray(m, dtype=float) for m in lik.model_observables(np.asarray(theta, float))]
    if len(model) != len(ells) or any(m.shape != d.shape for m, d in zip(model, data)):
        raise ErgofitError(
            "likelihood model_observables(): expected one array per ell with the shapes of the data"
        )
    panels = multipole_panels(obs)
    rows = list(dict.fromkeys(sample for sample, _, _ in panels))
    n_col = max(sum(1 for p in panels if p[0] == r) for r in rows)
    single = len(panels) == 1
    fig = Figure(figsize=(6.4 if single else 4.3 * n_col, 0.6 + 5.0 * len(rows)))
    FigureCanvasAgg(fig)
    outer = fig.add_gridspec(len(rows), 1, hspace=0.3)
    grids = [outer[r].subgridspec(2, n_col, height_ratios=[3, 1], hspace=0.0, wspace=0.25)
             for r in range(len(rows))]
    kp = "" if k_power == 0 else ("k" if k_power == 1 else f"k^{{{k_power}}}")
    power = 3 - k_power
    unit = "" if power == 0 else (r"\ [h^{-1}{\rm Mpc}]" if power == 1 else
                                  rf"\ [(h^{{-1}}{{\rm Mpc}})^{{{power}}}]")
    worst = max(float(np.max(np.abs((d - m) / s))) for d, m, s in zip(data, model, sigma))
    col_of = {}
    for sample, name, idx in panels:
        row, col = rows.index(sample), col_of.setdefault(sample, [0])[0]
        col_of[sample][0] += 1
        top = fig.add_subplot(grids[row][0, col])
        bottom = fig.add_subplot(grids[row][1, col], sharex=top)
        top.tick_params(labelbottom=False)
        n = len(idx)
        for j, i in enumerate(idx):
            ell, k, d, s, m = ells[i], ks[i], data[i], sigma[i], model[i]
            colour = f"C{(j if name is None else ell) % 10}"
            w = k ** k_power
            shift = 1.0 + 0.012 * (j - (n - 1) / 2)  # spread overlapping points a little
            top.errorbar(k * shift, w * d, yerr=w * s, fmt="o", ms=3.5, color=colour, capsize=0,
                         label=rf"$\ell={ell}$" + (r" ($\Pi_\ell$)" if ell % 2 else ""))
            order = np.argsort(k)
            top.plot(k[order], (w * m)[order], "-", color=colour, lw=1.4)
            bottom.plot(k * shift, (d - m) / s, "o", ms=3.5, color=colour)
        bottom.axhspan(-1, 1, color="0.88", zorder=0)
        bottom.axhline(0, color="0.3", lw=0.8)
        top.set_xscale("log")
        top.xaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
        top.xaxis.set_major_formatter(FormatStrFormatter("%g"))
        top.xaxis.set_minor_formatter(NullFormatter())
        bottom.set_ylim(-max(3.0, 1.15 * worst), max(3.0, 1.15 * worst))
        bottom.set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
        if col == 0:
            top.set_ylabel(rf"${kp}P_\ell(k){unit}$")
            bottom.set_ylabel(r"$\Delta/\sigma$")
        if name is None:
            top.legend(frameon=False, title="points: data, lines: model", alignment="left")
            if title:
                top.set_title(title, fontsize=10)
        else:
            top.set_title(name, fontsize=10)
            top.legend(frameon=False, fontsize=8)
    if title and not (single and panels[0][1] is None):
        fig.suptitle(f"{title} (points: data, lines: model; odd ell: Pi_ell, P_ell = i Pi_ell)",
                     fontsize=10)
    return fig


def plot_multipoles(lik: Any, theta: np.ndarray, out_path: str | os.PathLike,
                    k_power: int = 1, title: str | None = None) -> str:
    """Data multipoles with error bars, the model at ``theta``, and residuals in sigma (PNG).

    Upper panel: k^k_power P_ell(k) (Mpc/h)^3 (h/Mpc)^k_power for data and model, one colour per
    ell; lower panel: (data - model) / sigma with the +-1 band. With several tracers
    (``observables()`` has a ``spectra`` list) each spectrum gets its own panel, titled by its
    tracer pair, and the odd ell of a cross spectrum (Pi_ell) one more; with several samples
    (a ``samples`` list) each sample gets a row (:func:`multipoles_figure`). The error bars are
    the square roots of the covariance diagonal: correlated bins scatter less than they suggest.
    """
    fig = multipoles_figure(lik, theta, k_power, title)
    path = os.fspath(out_path)
    save_figure(fig, path)
    return path
