"""``ergofit theory``: the model multipoles component by component, the effective f_NL of the
projection terms, and a plot.

Components (each adds to the previous): Newtonian (b1 + Kaiser RSD), + f_NL scale-dependent bias,
+ relativistic projection terms (Doppler and potential). Linear theory, plane-parallel kernel,
local projection terms only: see the README's regime of validity.
"""
from __future__ import annotations

import os

import numpy as np

from . import tracer as tr
from .model import effects_tuple, make_cosmology

ELLS = (0, 2, 4)


def components(cfg, k):
    """dict name -> (len(ELLS), len(k)) multipoles (no window, no shot noise), and the tracer."""
    cosmo = make_cosmology(cfg)
    z = cfg["survey"]["redshift"]
    t = cfg["tracer"]
    tracer = tr.Tracer(b1=t["b1"], fnl=t["fnl"], p=t["p"], nbar=cfg["survey"]["nbar"], b_e=t["b_e"], s=t["s"])
    eff = effects_tuple(cfg)
    rsd = ("rsd",) if "rsd" in eff else ()
    fnl = ("fnl",) if "fnl" in eff else ()
    proj = tuple(e for e in eff if e in ("doppler", "potential"))
    steps = {"newtonian": rsd, "plus_fnl": rsd + fnl, "plus_projection": rsd + fnl + proj}
    out = {name: tr.multipoles(cosmo, z, k, tracer, effects=e, ells=ELLS, shot_noise=False)
           for name, e in steps.items()}
    return out, cosmo, tracer, eff


def theory_report(cfg, out_path, k=None):
    """Write the component table to ``out_path`` and a PNG beside it; return lines to print."""
    k = np.geomspace(1e-3, 0.2, 60) if k is None else np.asarray(k, float)
    comps, cosmo, tracer, eff = components(cfg, k)
    z = cfg["survey"]["redshift"]
    fnl_eff = tr.effective_fnl(cosmo, z, tracer, effects=eff)
    cols = ["k"] + [f"{name}_P{l}" for name in comps for l in ELLS]
    table = np.column_stack([k] + [comps[name][i] for name in comps for i in range(len(ELLS))])
    tmp = out_path + ".tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write("# ergofit theory multipoles (linear theory, plane-parallel kernel, no window, "
                 "no shot noise)\n")
        fh.write(f"# z = {z:g}, b1 = {tracer.b1:g}, fnl = {tracer.fnl:g}, p = {tracer.p:g}, "
                 f"b_e = {tracer.b_e:g}, s = {tracer.s:g}; effects: {', '.join(eff)}\n")
        fh.write(f"# effective f_NL of the projection terms: {fnl_eff:.4g}\n")
        fh.write("# units: k in h/Mpc, P in (Mpc/h)^3\n# columns: " + " ".join(cols) + "\n")
        np.savetxt(fh, table, fmt="%.8e")
    os.replace(tmp, out_path)
    png = os.path.splitext(out_path)[0] + ".png"
    plot_components(k, comps, png, title=f"z = {z:g}, b1 = {tracer.b1:g}, fNL = {tracer.fnl:g}")
    lines = [f"theory multipoles written to {out_path}; plot {png}",
             f"effective f_NL mimicked by the projection terms (k -> 0 monopole): {fnl_eff:.3f}"]
    for i, kk in enumerate(k[:: max(1, len(k) // 6)]):
        j = i * max(1, len(k) // 6)
        lines.append(f"  k = {kk:.4f}  P0 newtonian {comps['newtonian'][0, j]:.4g}  +fNL "
                     f"{comps['plus_fnl'][0, j]:.4g}  +projection {comps['plus_projection'][0, j]:.4g}")
    return lines


def plot_components(k, comps, path, title=""):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, axes = plt.subplots(1, len(ELLS), figsize=(4.2 * len(ELLS), 3.8), sharex=True)
    styles = {"newtonian": ("0.2", "-"), "plus_fnl": ("tab:orange", "--"),
              "plus_projection": ("tab:purple", ":")}
    names = {"newtonian": "Newtonian (b1 + RSD)", "plus_fnl": "+ f_NL", "plus_projection": "+ projection"}
    for i, (ax, ell) in enumerate(zip(axes, ELLS)):
        for name, pl in comps.items():
            c, ls = styles[name]
            ax.loglog(k, np.abs(pl[i]), color=c, ls=ls, lw=1.6, label=names[name])
        ax.set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
        ax.set_title(rf"$|P_{ell}(k)|$")
    axes[0].set_ylabel(r"$[({\rm Mpc}/h)^3]$")
    axes[0].legend(fontsize=8)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    tmp = path + ".tmp.png"
    fig.savefig(tmp, dpi=110)
    plt.close(fig)
    os.replace(tmp, path)
