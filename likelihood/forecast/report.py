"""Forecast outputs: fisher.json, forecast.md, ellipse and scan figures, scan tables, and the
driver that writes them (``ergofit forecast``)."""
from __future__ import annotations

import csv
import io
import json
import math
import os
import warnings

import numpy as np

from ..config.schema import Config, load_config
from ..io import ensure_folder, open_atomic, plain_data, write_text
from .bias import bias_forecast, forecast_settings
from .mcmc import mcmc_check
from .multitracer import config_split_scan, split_scan_tables
from .scans import bias_scan, no_scan_with_samples
from ..errors import ConfigError

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


def _survey_lines(info):
    """Survey, data vector and truth model of one forecast (one sample)."""
    return [f"- Survey: z = {info['redshift']:g}, n̄ = {info['nbar']:g} h³/Mpc³, geometry "
            f"{info['geometry']['shape']}, volume {info['volume']:.3g} (Mpc/h)³.",
            f"- Data vector: {info['n_data']} points, multipoles {info['ells']}, k in "
            f"[{info['k_range'][0]:.4g}, {info['k_range'][1]:.4g}] h/Mpc.",
            f"- Truth model: effects {', '.join(info['truth_model']['effects']) or 'none'}; window "
            f"{'on' if info['truth_model']['window'] else 'off'}; integral constraint "
            f"{info['truth_model']['integral_constraint']}; observer term "
            f"{'on' if info['truth_model']['observer'] else 'off'}."]


def _headline(bias):
    """The parameter compared sample by sample: fnl, else the first one every sample has."""
    return next((n for n in ["fnl"] + list(bias.fisher.names)
                 if all(n in b.fisher.names for b in bias.samples.values())), None)


def _samples_table(bias):
    """Each sample's forecast alone next to the combination, for :func:`_headline`."""
    name = _headline(bias)
    if name is None:
        return []
    rows = [(n, b) for n, b in bias.samples.items()] + [("all combined", bias)]
    lines = ["", f"### Each sample alone ({name})", "",
             f"| sample | data points | σ({name}) | Δ{name} | Δ/σ | χ² of the neglected effect |",
             "|---|---:|---:|---:|---:|---:|"]
    for label, b in rows:
        lines.append(f"| {label} | {b.info['n_data']} | {b.value('sigma', name):.3g} | "
                     f"{b.value('delta', name):+.3g} | {b.value('ratio', name):+.2f} | "
                     f"{b.chi2_total:.3g} |")
    return lines


def forecast_markdown(bias, scan=None, mcmc=None, files=()):
    """Human report (Markdown) of a forecast."""
    f, info = bias.fisher, bias.info
    lines = [f"# Fisher forecast and f_NL bias: {info['run']}", "",
             f"Config `{info['config']}` (hash {info['config_hash']}).", ""]
    if bias.samples:
        lines += [f"{len(bias.samples)} independent samples: the Fisher matrix is the sum of the "
                  "samples' (shared parameters add, each sample's nuisance parameters stay in its "
                  "block, Gaussian priors counted once) and the shift is F⁻¹ Σ_s B_s.", ""]
        for name, b in bias.samples.items():
            lines += [f"Sample **{name}**:", ""] + _survey_lines(b.info) + [""]
    else:
        lines += _survey_lines(info)
    lines += [f"- Analysis model neglects: {neglect_text(bias.neglect)}.", "",
              "## Errors and shifts" + (" (all samples combined)" if bias.samples else ""), "",
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
    if bias.samples:
        lines += _samples_table(bias) + [""]
    else:
        lines += ["", f"f_NL mimicked at k → 0 by the neglected projection terms: "
                  f"{_g(bias.fnl_eff_neglected, 3)}; by all projection terms of the truth model: "
                  f"{_g(bias.fnl_eff_projection, 3)} (leading k⁻² term of the monopole only)."]
    lines += [f"χ² of the neglected effect at the fiducial point: {bias.chi2_total:.3g}; left after "
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
    fs = forecast_settings(cfg)
    split = _split_scan(cfg, fs["scan"])
    out_dir = out_dir or os.path.join(cfg.output_folder, "forecast")
    ensure_folder(out_dir, "choose another with --out")
    bias = bias_forecast(cfg)
    scan_res = split_res = None
    if scan and fs["scan"] and not split:
        scan_res = bias_scan(cfg, pool=pool)
    if scan and split:
        split_res = config_split_scan(cfg, fs["scan"]["values"], fs["scan"].get("nbar"))
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
    if split_res is not None:
        csv_text, md_text = split_scan_tables(split_res)
        write_text(os.path.join(out_dir, "scan.csv"), csv_text)
        write_text(os.path.join(out_dir, "scan.md"), md_text)
        files += ["scan.csv", "scan.md"]
    if mcmc is not None:
        files.append("mcmc_check/")
    doc = {"run": cfg["run"], "config": cfg.path, "config_hash": cfg.hash,
           **bias.fisher.to_dict(), "bias": bias.to_dict(),
           "survey": _survey_doc(bias.info),
           "samples": None if not bias.samples else {
               name: {**b.fisher.to_dict(), "bias": b.to_dict(), "survey": _survey_doc(b.info)}
               for name, b in bias.samples.items()},
           "truth_model": bias.info["truth_model"], "analysis_model": bias.info["analysis_model"],
           "scan": None if scan_res is None else {"quantity": scan_res.quantity,
                                                  "threshold": scan_res.threshold,
                                                  "exceeding": scan_res.exceeding(),
                                                  "rows": scan_res.rows},
           "bias_split_scan": split_res,
           "mcmc_check": mcmc,
           "warnings": list(dict.fromkeys(bias.warnings + (scan_res.notes if scan_res else [])))}
    write_text(os.path.join(out_dir, "fisher.json"), json.dumps(plain_data(doc), indent=1) + "\n")
    write_text(os.path.join(out_dir, "forecast.md"),
                forecast_markdown(bias, scan_res, mcmc, files))
    return {"bias": bias, "scan": scan_res, "split": split_res, "mcmc": mcmc, "out_dir": out_dir,
            "files": [os.path.join(out_dir, f) for f in files]}


def _survey_doc(info):
    return {k: info[k] for k in ("redshift", "nbar", "geometry", "volume", "n_data", "ells",
                                 "k_range", "samples") if k in info}


def _split_scan(cfg, scan):
    """True for the bias-split scan of a multi-tracer config; other pairings refused in one line."""
    if not scan:
        return False
    no_scan_with_samples(cfg)
    several = "tracers" in cfg
    if scan["quantity"] == "bias_split" and not several:
        raise ConfigError(f"{cfg.path}: forecast.scan quantity bias_split needs a config with two "
                          "tracers (tracers section)")
    if several and scan["quantity"] != "bias_split":
        raise ConfigError(f"{cfg.path}: forecast.scan quantity {scan['quantity']} is for one tracer; "
                          "with several tracers scan quantity: bias_split (values: splits, nbar: "
                          "total densities)")
    if several and len(cfg["tracers"]) != 2:
        raise ConfigError(f"{cfg.path}: forecast.scan quantity bias_split compares one tracer with "
                          f"a split into two; the config has {len(cfg['tracers'])} tracers (give two)")
    return scan["quantity"] == "bias_split"


def forecast_lines(cfg, res):
    """Lines the ``forecast`` command prints for the result of :func:`run_forecast`."""
    bias = res["bias"]
    f = bias.fisher
    lines = [f"forecast for {cfg['run']}: analysis neglects {neglect_text(bias.neglect)}"]
    for i, n in enumerate(f.names):
        lines.append(f"  {n:<10s} fiducial {f.fiducial[i]:<9.4g} sigma {f.errors[i]:<9.3g} "
                     f"shift {bias.delta[i]:+9.3g} ({bias.delta_over_sigma[i]:+.2f} sigma)")
    head = _headline(bias) if bias.samples else None
    for name, b in (bias.samples or {}).items() if head else ():
        lines.append(f"  sample {name} alone: {head} sigma {b.value('sigma', head):.3g} "
                     f"shift {b.value('delta', head):+.3g} ({b.value('ratio', head):+.2f} sigma)")
    if res["scan"] is not None:
        where = ranges_text(res["scan"])
        lines.append(f"scan over {res['scan'].quantity}: |shift(f_NL)| > {res['scan'].threshold:g} sigma "
                     + (f"for {res['scan'].quantity} = {where}" if where else "nowhere on the grid"))
    sp = res.get("split")
    if sp is not None:
        lines.append(f"bias split b = {sp['b_mean']:.3g} ± split/2, gain sigma(f_NL) one tracer / two:")
        for i, d in enumerate(sp["splits"]):
            lines.append(f"  split {d:<5g} " + "  ".join(
                f"nbar {nb:.3g}: {sp['gain'][i, j]:.3f}" for j, nb in enumerate(sp["nbar"])))
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
