"""Gaussian mocks of the configured survey (``ergofit simulate CONFIG --n N [--validate]``).

The mesh is chosen from the config unless given: box side L = 4.1 r_max of the window (more than twice the
survey diameter, so periodic images do not correlate survey points; a box geometry uses
L = V^(1/3)), and N cells per side so
that the Nyquist frequency is at least 1.5 times the data's k_max. The mocks are measured with the
FFT estimator (:mod:`likelihood.observation.estimator`) on the data's k bins and multipoles; ``--validate``
compares their mean with the full observed model of the likelihood (window, integral
constraint, observer term at ν = observer.nu_true, projection terms) and writes
``validation.png`` and ``validation.json``.
"""
from __future__ import annotations

import json
import math
import os
import warnings

import numpy as np

from ..theory import tracer as tr
from ..config.schema import load_config
from ..errors import ErgofitError
from ..io import write_text
from ..model import build
from ..model.fiducial import make_tracer
from ..numerics.mesh import Mesh
from ..simulate.mocks import simulate_from_settings
from ..simulate.validation import validate


def choose_mesh(lik, n_mesh=None):
    """Mesh for the survey of ``lik``: (L, N) as described in the module docstring."""
    k_max = float(lik.data_full.edges[-1])
    if lik.window is None:
        box = lik.volume ** (1.0 / 3.0)
    else:
        geo = lik.config["survey"]["geometry"]
        r_max = geo.get("r_max", geo.get("radius"))
        if r_max is None:
            raise ErgofitError("simulate: a window from randoms cannot be meshed yet; "
                               "use an analytic geometry (sphere, shell, cap) for mocks")
        box = 4.1 * float(r_max)
    if n_mesh is None:
        n_mesh = int(math.ceil(1.5 * k_max * box / math.pi))
        n_mesh += n_mesh % 2
    return Mesh(int(n_mesh), float(box), dtype="float32")


def simulate_survey(config, n, out=None, mesh_n=None, check=False, echo=print):
    """``n`` Gaussian mocks of the survey of ``config`` written into ``out`` (default
    ``<output folder>/mocks``), with the validation against the model when ``check``; ``echo``
    (a print-like callable) receives the progress and result lines."""
    cfg = load_config(config)
    if n < 2:
        raise ErgofitError(f"--n {n}: need at least 2 mocks for a covariance")
    lik = build(cfg)
    mesh = choose_mesh(lik, mesh_n)
    out = out or os.path.join(cfg.output_folder, "mocks")
    fid = lik.fiducial
    tracer = make_tracer(fid, lik.p, lik.nbar)
    observer = dict(cfg["observer"]) if cfg["effects"]["observer"] else None
    echo(f"simulate: {n} mocks on a {mesh.n}^3 mesh, box {mesh.box:.0f} Mpc/h "
          f"(k_Nyquist = {mesh.k_nyquist:.3g} h/Mpc), writing into {out}/")

    def progress(i, n):
        echo(f"  mock {i}/{n}", flush=True)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        mocks, mc = simulate_from_settings(lik.cosmo, lik.z, tracer, lik.effects, mesh, lik.window,
                                           lik.data_full.edges, lik.data_full.ells, n,
                                           cfg["data"].get("mock", {}).get("seed", 0), nbar=None,
                                           observer=observer, out_dir=out, progress=progress)
    echo(f"wrote {len(mocks)} data vectors and covariance.txt into {out}/")
    if check:
        truth = {k: np.atleast_1d(v) for k, v in fid.items()}
        truth["shot_noise"] = np.atleast_1d(lik.sn_sub)   # mocks are not Poisson sampled: no noise
        model = lik.model_full(truth)[0].reshape(lik.data_full.values.shape)
        n_data = model.size
        cov = None
        if len(mocks) <= n_data + 2:
            cov = lik.covariance_full
            echo(f"  {len(mocks)} mocks for {n_data} data points: comparing with the likelihood's "
                  f"{cfg['covariance']['kind']} covariance instead of the mocks' own")
        res = validate(mocks, model, covariance=cov, plot=os.path.join(out, "validation.png"))
        write_text(os.path.join(out, "validation.json"),
                   json.dumps({k: (v if not isinstance(v, dict) else {str(a): b for a, b in v.items()})
                               for k, v in res.items()}, indent=2, default=float))
        for l in res["ells"]:
            echo(f"  ell = {l}: chi2 = {res['chi2'][l]:.1f} for {res['dof'][l]} bins "
                  f"(p = {res['p_value'][l]:.3f})")
        echo(f"  total: chi2 = {res['chi2_total']:.1f} / {res['dof_total']} (p = {res['p_value_total']:.3f}); "
              f"plot {res['plot']}")
    return 0
