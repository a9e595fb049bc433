"""``ergofit theory``: the model multipoles component by component, the effective f_NL of the
projection terms, and a plot.

Components (each adds to the previous): Newtonian (b1 + Kaiser RSD), + f_NL scale-dependent bias,
+ relativistic projection terms (Doppler and potential). Linear theory, plane-parallel kernel,
local projection terms only: see the README's regime of validity.

With ``effects.observer`` on, also the observer term (:mod:`likelihood.observation.observer`): the correction
(ν² − 1) E_ℓ[m] for ν = 0, 1, 2, 3 next to the cosmic-variance band σ_P = P₀ √(2/N_modes),
N_modes = V 4πk²Δk/(2π)³, in bins of width the survey's fundamental mode, saved as
``<out stem>_observer.png``.
"""
from __future__ import annotations

import os

import numpy as np

from ..config.engine import is_curved
from ..theory import tracer as tr
from ..io import open_atomic, save_figure
from ..model import factories
from ..model.fiducial import config_tracer
from ..observation.geometry import effects_tuple

ELLS = (0, 2, 4)
ELLS_CROSS = (0, 1, 2, 3, 4)


def _steps(eff):
    """The cumulative components: Newtonian, + f_NL, + projection (effects of each)."""
    rsd = ("rsd",) if "rsd" in eff else ()
    fnl = ("fnl",) if "fnl" in eff else ()
    proj = tuple(e for e in eff if e in ("doppler", "potential"))
    return {"newtonian": rsd, "plus_fnl": rsd + fnl, "plus_projection": rsd + fnl + proj}


def components(cfg, k, fnl=None):
    """dict name -> (len(ELLS), len(k)) multipoles (no window, no shot noise), and the tracer.

    ``fnl`` overrides the tracer's f_NL for the "+ f_NL" component (default: tracer.fnl)."""
    cosmo = factories.cosmology(cfg)
    z = cfg["survey"]["redshift"]
    t = cfg["tracer"]
    tracer = config_tracer(cfg, dict(t, fnl=t["fnl"] if fnl is None else float(fnl)))
    eff = effects_tuple(cfg)
    out = {name: tr.multipoles(cosmo, z, k, tracer, effects=e, ells=ELLS, shot_noise=False)
           for name, e in _steps(eff).items()}
    return out, cosmo, tracer, eff


def spectra_components(cfg, k, fnl=None):
    """Several tracers: [(pair, ells, {component: (len(ells), len(k))})] for each spectrum of the
    config (autos ℓ = 0, 2, 4; crosses ℓ = 0–4 with Π_ℓ for odd ℓ), the tracers at their fiducial
    values (the ``tracers`` entries; f_NL from the parameters or ``fnl``); no window, no noise."""
    from ..config.multitracer import parameter_table
    from ..model.fiducial import fiducial_values
    cosmo = factories.cosmology(cfg)
    z = cfg["survey"]["redshift"]
    fid = fiducial_values(cfg, parameter_table(cfg))
    f = fid["fnl"] if fnl is None else float(fnl)
    tracers = {t["name"]: tr.Tracer(b1=fid[f"b1_{t['name']}"], fnl=f, p=fid[f"p_{t['name']}"],
                                    nbar=t["nbar"], b_e=fid[f"b_e_{t['name']}"],
                                    s=fid[f"s_{t['name']}"], name=t["name"])
               for t in cfg["tracers"]}
    eff = effects_tuple(cfg)
    out = []
    for spec in cfg["spectra"]:
        x, y = spec["pair"]
        if x == y:
            comps = {name: tr.multipoles(cosmo, z, k, tracers[x], effects=e, ells=ELLS,
                                         shot_noise=False) for name, e in _steps(eff).items()}
            out.append(((x, y), ELLS, comps))
        else:
            comps = {name: tr.cross_multipoles(cosmo, z, k, tracers[x], tracers[y], effects=e,
                                               ells=ELLS_CROSS) for name, e in _steps(eff).items()}
            out.append(((x, y), ELLS_CROSS, comps))
    return out, tracers, eff, f


def spectra_theory_report(cfg, out_path, k=None, fnl=None):
    """``ergofit theory`` on a config with several tracers: one table of every spectrum's
    multipoles component by component (columns PAIR_COMPONENT_P<ℓ>, odd ℓ of a cross as Π_ℓ
    with P_ℓ = iΠ_ℓ) and a PNG per spectrum beside it; returns lines to print."""
    from ..spectra import pair_label
    k = np.geomspace(1e-3, 0.2, 60) if k is None else np.asarray(k, float)
    specs, tracers, eff, f = spectra_components(cfg, k, fnl)
    z = cfg["survey"]["redshift"]
    cols, data = ["k"], [k]
    for (x, y), ells, comps in specs:
        tag = x if x == y else f"{x}x{y}"
        for name, pl in comps.items():
            cols += [f"{tag}_{name}_P{l}" for l in ells]
            data += list(pl)

    def write(fh):
        fh.write("# ergofit theory multipoles of several tracers (linear theory, plane-parallel "
                 "kernel, no window, no shot noise; odd ell of a cross spectrum: Pi_ell, P_ell = i Pi_ell)\n")
        fh.write(f"# z = {z:g}, fnl = {f:g}; effects: {', '.join(eff)}\n")
        for t in tracers.values():
            fh.write(f"# tracer {t.name}: b1 = {t.b1:g}, p = {t.p:g}, b_e = {t.b_e:g}, s = {t.s:g}, "
                     f"nbar = {t.nbar:g}\n")
        fh.write("# units: k in h/Mpc, P in (Mpc/h)^3\n# columns: " + " ".join(cols) + "\n")
        np.savetxt(fh, np.column_stack(data), fmt="%.8e")
    open_atomic(out_path, write)
    stem = os.path.splitext(out_path)[0]
    lines = [f"theory multipoles of {len(specs)} spectra written to {out_path}"]
    j = int(np.argmin(np.abs(k - 0.01)))
    for (x, y), ells, comps in specs:
        png = f"{stem}_{x if x == y else x + '_' + y}.png"
        plot_components(k, comps, png, title=f"{pair_label((x, y))}: z = {z:g}, fNL = {f:g}",
                        ells=ells)
        lines.append(f"  {pair_label((x, y))}: plot {png}; at k = {k[j]:.4f} P0 newtonian "
                     f"{comps['newtonian'][0, j]:.4g}, +fNL {comps['plus_fnl'][0, j]:.4g}, "
                     f"+projection {comps['plus_projection'][0, j]:.4g}"
                     + (f", Pi1 (Doppler dipole) {comps['plus_projection'][1, j]:.4g}" if x != y else ""))
    if f == 0 and "fnl" in eff:
        lines.append("  (f_NL = 0: the '+fNL' component equals the Newtonian one; show it with --fnl VALUE)")
    if cfg["effects"]["observer"]:
        lines.append("  (the observer term is not shown for several tracers)")
    if is_curved(cfg):
        lines.append("  (engine.kind: curved_sky: these are the plane-parallel kernel's multipoles; "
                     "the curved-sky comparison term by term covers one tracer: the cross dipole's "
                     "wide-angle part is in the fit's model, not here)")
    return lines


def check_theory(cfg):
    """One-line ConfigError for a config the report cannot describe (before anything is
    written): a curved-sky run without a plane-parallel counterpart (a HEALPix mask)."""
    if is_curved(cfg):
        from .curved_theory import check_comparable
        check_comparable(cfg)


def theory_report(cfg, out_path, k=None, fnl=None):
    """Write the component table to ``out_path`` and a PNG beside it; return lines to print."""
    import warnings
    check_theory(cfg)
    k = np.geomspace(1e-3, 0.2, 60) if k is None else np.asarray(k, float)
    comps, cosmo, tracer, eff = components(cfg, k, fnl)
    z = cfg["survey"]["redshift"]
    fnl_eff = tr.effective_fnl(cosmo, z, tracer, effects=eff)
    cols = ["k"] + [f"{name}_P{l}" for name in comps for l in ELLS]
    table = np.column_stack([k] + [comps[name][i] for name in comps for i in range(len(ELLS))])
    def write(fh):
        fh.write("# ergofit theory multipoles (linear theory, plane-parallel kernel, no window, "
                 "no shot noise)\n")
        fh.write(f"# z = {z:g}, b1 = {tracer.b1:g}, fnl = {tracer.fnl:g}, p = {tracer.p:g}, "
                 f"b_e = {tracer.b_e:g}, s = {tracer.s:g}; effects: {', '.join(eff)}\n")
        fh.write(f"# effective f_NL of the projection terms: {fnl_eff:.4g}\n")
        fh.write("# units: k in h/Mpc, P in (Mpc/h)^3\n# columns: " + " ".join(cols) + "\n")
        np.savetxt(fh, table, fmt="%.8e")
    open_atomic(out_path, write)
    png = os.path.splitext(out_path)[0] + ".png"
    plot_components(k, comps, png, title=f"z = {z:g}, b1 = {tracer.b1:g}, fNL = {tracer.fnl:g}")
    lines = [f"theory multipoles written to {out_path}; plot {png}",
             f"effective f_NL mimicked by the projection terms (k -> 0 monopole): {fnl_eff:.3f}"]
    for i, kk in enumerate(k[:: max(1, len(k) // 6)]):
        j = i * max(1, len(k) // 6)
        lines.append(f"  k = {kk:.4f}  P0 newtonian {comps['newtonian'][0, j]:.4g}  +fNL "
                     f"{comps['plus_fnl'][0, j]:.4g}  +projection {comps['plus_projection'][0, j]:.4g}")
    if tracer.fnl == 0 and "fnl" in eff:
        lines.append("  (f_NL = 0 in the config: the '+fNL' component equals the Newtonian one; "
                     "show it with --fnl VALUE)")
    if is_curved(cfg):                  # engine.kind: curved_sky (report/curved_theory.py)
        from .curved_theory import curved_report
        lines += curved_report(cfg, out_path, fnl)
    if cfg["effects"]["observer"]:
        with warnings.catch_warnings():   # the observer term integrates over the whole theory grid
            warnings.simplefilter("ignore", tr.PlaneParallelWarning)
            lines += observer_report(cfg, os.path.splitext(out_path)[0] + "_observer.png",
                                     cosmo, tracer, eff)
    return lines


OBSERVER_NUS = (0.0, 1.0, 2.0, 3.0)


def observer_report(cfg, png, cosmo, tracer, eff):
    """Observer correction (ν² − 1) E_ℓ[m], ℓ = 0, 2, against the cosmic variance; lines to print.

    Bins of width k_F from k_F/2, k_F = 2π/(2 r_max) for a window (its diameter) or 2π/V^{1/3}
    for a plain volume; up to max(0.05, 8 k_F) h/Mpc (0.05 for windows without spherical
    symmetry, whose correction is measured on a mesh).
    """
    from ..errors import ErgofitError
    from ..observation.matrix import KBins, theory_k_grid

    z = cfg["survey"]["redshift"]
    o = cfg["observer"]
    try:
        srv = factories.survey(cfg, cosmo)
        probe = factories.observer(cfg, srv, None, (0, 2), srv.ic)
    except ErgofitError as exc:
        return [f"observer term: not computed ({exc})"]
    k_f, k_f_text = probe.fundamental_mode()
    k_top = 0.05 if probe.method == "mesh" else max(0.05, 8.0 * k_f)
    edges = k_f * (0.5 + np.arange(int(np.floor(k_top / k_f - 0.5)) + 1))
    bins = KBins.from_edges(edges, volume=srv.volume)
    obs = factories.observer(cfg, srv, bins, (0, 2), srv.ic)
    k_th = theory_k_grid()
    kern = tr.kernel(cosmo, z, k_th, tracer, effects=eff)
    E = obs.correction(cosmo, z, k_th, kern).reshape(2, -1)
    p0 = tr.multipoles(cosmo, z, bins.k_eff, tracer, effects=eff, ells=(0,), shot_noise=False)[0]
    sig_p = np.abs(p0) * np.sqrt(2.0 / bins.n_modes)
    sig_c = obs.sigma_c(cosmo, z)
    plot_observer(bins.k_eff, E, sig_p, k_f, k_f_text, png,
                  title=f"observer term: {o['field']} today, z = {z:g}, b1 = {tracer.b1:g}")
    above = bins.k_eff > k_f
    ratio = np.max(np.abs(E[:, above]), axis=0) / sig_p[above] if above.any() else np.array([np.nan])
    unit = "c^2" if o["field"] == "potential" else "density contrast"
    return [f"observer term ({obs.describe()}): plot {png}",
            f"  sigma_c = {sig_c:.4g} ({unit}); cut-offs: k_IR = {obs.k_ir:.4g} h/Mpc, smoothing "
            f"{'none' if obs.smoothing is None else f'{obs.filter_kind} R = {obs.smoothing:g} Mpc/h'}",
            f"  fundamental mode k_F = {k_f_text} = {k_f:.4g} h/Mpc; above it max |E_l|/sigma_P = "
            f"{np.nanmax(ratio):.3g} (correction = (nu^2 - 1) E)"]


def plot_observer(k, E, sig_p, k_f, k_f_text, path, title=""):
    """|(ν² − 1) E_ℓ| for ν in OBSERVER_NUS (ν = 1: zero, not drawn) and σ_P; log axes."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker  # noqa: F401  (NullFormatter for the minor ticks)
    fig, axes = plt.subplots(1, 2, figsize=(9.0, 3.9), sharex=True, sharey=True)
    colours = {0.0: "tab:blue", 2.0: "tab:orange", 3.0: "tab:red"}
    for ax, ell, e in zip(axes, (0, 2), E):
        ax.fill_between(k, 0, sig_p, color="0.88", label=r"$\sigma_P = P_0\sqrt{2/N_{\rm modes}}$")
        for nu in OBSERVER_NUS:
            if nu == 1.0:
                continue
            v = (nu * nu - 1.0) * e
            ax.plot(k, np.abs(v), color=colours[nu], lw=1.5, label=rf"$\nu = {nu:g}$")
            neg = v < 0
            ax.plot(k[neg], np.abs(v[neg]), "o", mfc="none", ms=3.5, color=colours[nu])
        ax.axvline(k_f, color="0.3", ls="--", lw=1.0, label=f"$k_F$ = {k_f_text}")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
        ax.set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
        ax.set_title(rf"$|(\nu^2-1)\,E_{ell}(k)|$ (open: negative); $\nu = 1$ gives 0", fontsize=9)
    axes[0].set_ylabel(r"$[({\rm Mpc}/h)^3]$")
    axes[0].legend(fontsize=7)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    save_figure(fig, path, dpi=110, tight=False)
    plt.close(fig)


def plot_components(k, comps, path, title="", ells=ELLS):
    """Top row: |P_ℓ(k)| of each component; bottom row: each component relative to the
    Newtonian one, P_ℓ/P_ℓ^Newt − 1, where the f_NL and projection terms show up (an odd ℓ,
    zero in the Newtonian cross spectrum, shows the difference to it instead)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, axes = plt.subplots(2, len(ells), figsize=(4.2 * len(ells), 6.4), sharex=True,
                             gridspec_kw={"height_ratios": [3, 2]})
    styles = {"newtonian": ("0.2", "-"), "plus_fnl": ("tab:orange", "--"),
              "plus_projection": ("tab:purple", ":")}
    names = {"newtonian": "Newtonian (b1 + RSD)", "plus_fnl": "+ f_NL", "plus_projection": "+ projection"}
    newt = comps["newtonian"]
    for i, ell in enumerate(ells):
        top, bot = axes[0, i], axes[1, i]
        for name, pl in comps.items():
            c, ls = styles[name]
            top.loglog(k, np.abs(pl[i]), color=c, ls=ls, lw=1.6, label=names[name])
            with np.errstate(divide="ignore", invalid="ignore"):
                rel = (np.where(newt[i] != 0, pl[i] / newt[i] - 1.0, 0.0) if np.any(newt[i])
                       else pl[i] - newt[i])
            bot.semilogx(k, rel, color=c, ls=ls, lw=1.6)
        top.set_title(rf"$|P_{ell}(k)|$")
        if not np.any(newt[i]):
            bot.set_ylabel(r"$\Pi_\ell - \Pi_\ell^{\rm Newt}$ [(Mpc/h)$^3$]", fontsize=8)
        bot.axhline(0.0, color="0.6", lw=0.8)
        bot.set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
    axes[0, 0].set_ylabel(r"$[({\rm Mpc}/h)^3]$")
    axes[1, 0].set_ylabel(r"$P_\ell/P_\ell^{\rm Newt} - 1$")
    axes[0, 0].legend(fontsize=8)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    save_figure(fig, path, dpi=110, tight=False)
    plt.close(fig)
