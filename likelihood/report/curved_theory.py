"""``ergofit theory`` for a curved-sky run: the curved-sky multipoles beside the plane-parallel
ones on the data bins, term by term, and what each approximation of the plane-parallel model
moves, in σ of the data (the square root of the covariance's diagonal).

Steps (each the difference of two models at the fiducial tracer, signal only, no shot noise):

* curved terms: each piece of the engine added in turn (rsd, doppler, potential, f_NL,
  lensing, ISW, time delay, the observer's motion and potential) on the light cone with the
  run's exact integral constraint; ``curved_motion_conditioned``: the conditioning on the
  observer's measured speed (effects.observer_motion: conditioned);
* plane-parallel terms: the same local terms added in turn in the plane-parallel model
  (kernel at z_eff, window convolution, the approximate global integral constraint);
* approximations: ``snapshot`` (coefficients at z_eff instead of along the light cone, local
  terms: curved snapshot − curved light cone), ``plane_parallel`` (the plane-parallel
  geometry and integral-constraint form against the exact curved-sky estimator, both at
  z_eff: plane-parallel − curved snapshot), ``no_integrated`` (the integrated terms dropped),
  ``no_observer`` (the observer terms dropped);
  ``total`` = plane-parallel − curved (what the plane-parallel model misses in all).
"""
from __future__ import annotations

import os
import warnings

import numpy as np

from ..curved.lightcone import INTEGRATED_TERMS, LOCAL_TERMS, OBSERVER_TERMS
from ..errors import ConfigError
from ..io import open_atomic, save_figure
from ..model import factories
from ..model.fiducial import make_tracer
from ..observation.matrix import WindowMatrix, theory_k_grid
from ..theory import tracer as tr

PP_TERMS = ("rsd", "fnl", "doppler", "potential")


def _partial(t, names):
    """Σ of the engine's pair templates over pieces in ``names`` (flat, ℓ-major)."""
    return sum(v for (a, b), v in t.pairs.items() if a in names and b in names).ravel()


def check_comparable(cfg):
    """ConfigError (one line) when the run has no plane-parallel counterpart: a HEALPix mask
    gives no plane-parallel window, nor does a radial selection from a table or FKP weights."""
    if "mask" in cfg["survey"]["geometry"]:
        raise ConfigError(f"{cfg.path}: survey.geometry.mask: the plane-parallel comparison "
                          "needs a plane-parallel window, which a HEALPix map does not give "
                          "(use shape: cap, or a window from randoms in a plane-parallel run)")
    for key in ("selection", "fkp_p0"):
        if key in cfg["survey"]["geometry"]:
            raise ConfigError(f"{cfg.path}: survey.geometry.{key}: the plane-parallel "
                              "comparison has no radial selection other than a window from "
                              "randoms (shape: randoms); it would change the window too")


def comparison(cfg, fnl=None):
    """dict with ells, k, sigma, curved (full), plane_parallel (full) and steps: an ordered
    dict name -> shift of each bin (flat, ℓ-major) in (Mpc/h)³ (module docstring)."""
    check_comparable(cfg)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")      # shown once already by the run's own build
        lik = factories.build(cfg)
    fw, cosmo = lik.forward, lik.cosmo
    values = {k: np.atleast_1d(v) for k, v in lik.fiducial.items()}
    if fnl is not None:
        values["fnl"] = np.atleast_1d(float(fnl))
    tracer = fw.tracer(cosmo, values)
    local = tuple(t for t in fw.terms if t in LOCAL_TERMS)
    light = fw.engine_templates(cosmo, tracer, fw.terms)
    snap = fw.engine_templates(cosmo, tracer, local, snapshot_z=fw.z)

    steps = {}
    on = ["density"]
    for t in fw.terms[1:]:
        steps[f"curved_{t}"] = _partial(light, on + [t]) - _partial(light, on)
        on.append(t)
    motion = 0.0
    if getattr(fw, "motion", None) is not None:
        motion = sum(fw.motion_part(cosmo, tracer).values()).ravel()
        steps["curved_motion_conditioned"] = motion
    # plane-parallel: kernel at z_eff, window matrix with the approximate global IC
    pp_ic = "global" if fw.ic == "radial" else fw.ic
    kt = theory_k_grid()
    op = WindowMatrix(kt, factories.ELLS_THEORY, fw.operator.bins, fw.ells,
                      window=lik.survey.window, ic=pp_ic)
    ppt = make_tracer(values, fw.p, fw.nbar)
    on, prev = [], None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        for t in ("",) + tuple(e for e in PP_TERMS if e in fw.effects):
            on = on + [t] if t else on
            cur = op(tr.multipoles(cosmo, fw.z, kt, ppt, effects=tuple(on), ells=factories.ELLS_THEORY,
                                   shot_noise=False))
            if prev is not None:
                steps[f"plane_parallel_{t}"] = cur - prev
            prev = cur
    curved = _partial(light, fw.terms) + motion
    local_light = _partial(light, local)
    steps["approx_snapshot"] = _partial(snap, local) - local_light
    steps["approx_plane_parallel"] = prev - _partial(snap, local)
    for name, group in (("integrated", INTEGRATED_TERMS), ("observer", OBSERVER_TERMS)):
        if any(t in group for t in fw.terms):
            kept = [t for t in fw.terms if t not in group]
            steps[f"approx_no_{name}"] = _partial(light, kept) + \
                (motion if name == "integrated" else 0.0) - curved
    steps["total"] = prev - curved
    return dict(ells=fw.ells, k=np.tile(lik.data_full.k_eff, len(fw.ells)),
                ell=np.repeat(fw.ells, fw.n_bins), sigma=np.sqrt(np.diag(lik.covariance_full)),
                curved=curved, plane_parallel=prev, steps=steps, pp_ic=pp_ic, ic=fw.ic,
                fnl=float(values["fnl"][0]), ir=light.meta.get("ir_per_decade", 0.0),
                observer_terms=[t for t in fw.terms if t in OBSERVER_TERMS])


def curved_report(cfg, out_path, fnl=None):
    """Write ``<stem>_curved.txt`` and ``<stem>_curved.png`` beside ``out_path``; lines to print."""
    c = comparison(cfg, fnl)
    stem = os.path.splitext(out_path)[0] + "_curved"
    names = list(c["steps"])
    sig = c["sigma"]
    table = np.column_stack([c["ell"], c["k"], sig, c["curved"], c["plane_parallel"]]
                            + [c["steps"][n] / sig for n in names])

    def write(fh):
        fh.write("# ergofit theory: curved-sky against plane-parallel multipoles on the data bins "
                 "(linear theory, signal only, fiducial tracer)\n")
        fh.write(f"# curved: light cone, exact {c['ic']} integral constraint; plane-parallel: "
                 f"kernel at z_eff, window matrix, approximate {c['pp_ic']} integral constraint; "
                 f"f_NL = {c['fnl']:g}\n")
        fh.write("# shifts d_* are in units of sigma = sqrt(diag(covariance)); "
                 "k in h/Mpc, P in (Mpc/h)^3\n")
        fh.write("# columns: ell k_eff sigma P_curved P_plane_parallel "
                 + " ".join(f"d_{n}" for n in names) + "\n")
        np.savetxt(fh, table, fmt="%.9e")
    open_atomic(stem + ".txt", write)
    plot_shifts(c, stem + ".png")
    lines = [f"curved-sky against plane-parallel, shifts in sigma of the data: {stem}.txt; "
             f"plot {stem}.png",
             "  (curved_*: each term on the curved sky; plane_parallel_*: the same term in the "
             "plane-parallel model; approx_*: what each approximation moves; total = "
             "plane-parallel - curved)"]
    width = max(len(n) for n in names)
    for l in c["ells"]:
        sel = np.flatnonzero(c["ell"] == l)[:5]
        lines.append(f"  ell = {l}, k = " + " ".join(f"{k:9.4f}" for k in c["k"][sel]))
        for n in names:
            lines.append(f"    {n:<{width}s} " + " ".join(f"{c['steps'][n][i] / sig[i]:9.3g}"
                                                        for i in sel))
    obs = c["observer_terms"]
    lines.append(f"  infrared: the curved model moves by {c['ir']:.2g} of P_0 per decade of its "
                 "lowest wavenumber (1e-4 h/Mpc); " + (
                     "the observer terms are on (" + ", ".join(obs) + "): with both, the "
                     "infrared parts cancel" if obs else
                     "the observer terms that cancel this are off (effects.observer_motion, "
                     "effects.observer_potential)")
                 + ("" if c["ic"] == "radial" else "; effects.integral_constraint: radial "
                    "removes the J = 0 part"))
    return lines


def plot_shifts(c, path):
    """Shift of each bin in σ against k, one panel per multipole: curved-sky terms (solid),
    plane-parallel terms (dotted), approximations (dashed); symmetric-log axis (linear within
    ±1e-3 σ) so that the small terms show beside RSD."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    ells = c["ells"]
    fig, axes = plt.subplots(1, len(ells), figsize=(5.0 * len(ells) + 1.8, 4.2), squeeze=False)
    import matplotlib.ticker  # noqa: F401  (NullFormatter for the minor ticks)
    cmap = plt.get_cmap("tab20")
    for ax, l in zip(axes[0], ells):
        sel = c["ell"] == l
        for j, (name, d) in enumerate(c["steps"].items()):
            ls = ":" if name.startswith("plane_parallel_") else \
                "--" if name.startswith("approx_") or name == "total" else "-"
            ax.plot(c["k"][sel], d[sel] / c["sigma"][sel], ls=ls, color=cmap(j % 20), lw=1.5,
                    marker="o", ms=2.5, label=name)
        ax.axhline(0.0, color="0.6", lw=0.8)
        ax.set_xscale("log")
        ax.set_yscale("symlog", linthresh=1e-3)
        ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
        ax.set_xlabel(r"$k\ [h\,{\rm Mpc}^{-1}]$")
        ax.set_title(rf"$\Delta P_{l} / \sigma$")
    axes[0, -1].legend(fontsize=6.5, loc="center left", bbox_to_anchor=(1.02, 0.5))
    fig.tight_layout()
    save_figure(fig, path, dpi=110, tight=False)
    plt.close(fig)
