"""Mocks of the configured survey (``ergofit simulate CONFIG --n N [--validate] [--no-poisson]``).

The mocks are Poisson sampled by default: the tracer's counts per cell are drawn with mean
n̄ H³ W (1 + Δ), so their scatter holds the shot-noise variance, and the estimator treats the
shot noise as the data do (``data.shot_noise_subtracted``: the Poisson 1/n̄ subtracted from the
monopole or not). A Gaussian field has cells with 1 + Δ < 0 (about 1 % of the demo's mesh,
σ_Δ ≈ 0.44 per cell; 4 % for σ_Δ ≈ 0.53): they are clipped to 0 after the first-order gain of
:func:`likelihood.simulate.fields.clip_gain` (clipping alone lowered the monopole by 6 % at 3.6 %
clipped cells; with the gain the mean of the Poisson mocks is within 2 % of the continuous ones,
measured); a warning gives the clipped fraction above 0.1 %.
``--no-poisson`` gives the continuous Gaussian field (no shot noise, no clipping).

The mesh is chosen from the config unless given: box side L = 4.1 r_max of the window (more than twice the
survey diameter, so periodic images do not correlate survey points; a box geometry uses
L = V^(1/3)), and N cells per side so
that the Nyquist frequency is at least 1.5 times the data's k_max. The mocks are measured with the
FFT estimator (:mod:`likelihood.observation.estimator`) on the data's k bins and multipoles; ``--validate``
compares their mean with the model they were made from (:func:`validation_model`), using the
mocks' own scatter, and writes ``validation.png`` and ``validation.json``.

A curved-sky config (``engine.kind: curved_sky``) gets light-cone mocks
(:mod:`likelihood.simulate.lightcone`; snapshot mocks with ``engine.snapshot: true``) with the mean
subtraction of its integral constraint; its validation model leaves out the integrated terms,
which the mocks do not have.

Several tracers (a config with ``tracers``, one sample): all populations from one Gaussian field,
each Poisson sampled independently (:func:`simulate_several_tracers`), measured into the spectra
of the config's data vector on one set of k bins and written as labelled spectra files; the
validation is made per spectrum and multipole. The mocks' estimator takes the line of sight at
each galaxy, so their odd cross multipoles carry the wide-angle dipole ∝ (b_X − b_Y)/(kχ) that the
plane-parallel model leaves out: those tests fail where kχ is small (README).

Several samples (a config with ``samples``): each sample's mocks as for several tracers, from its
own survey, tracers, spectra and k bins, into ``NAME/`` of the output folder, with independent
random streams (:func:`simulate_samples`).
"""
from __future__ import annotations

import copy
import json
import math
import os
import warnings

import numpy as np

from ..theory import tracer as tr
from ..config.schema import Config, load_config, validate as validate_config
from ..config.engine import INTEGRATED_EFFECTS, is_curved
from ..errors import ErgofitError
from ..io import write_text
from ..model import build
from ..model.fiducial import make_tracer
from ..numerics.mesh import Mesh
from ..simulate.lightcone import LightConeSpec
from ..simulate.mocks import simulate_from_settings
from ..simulate.validation import validate
from ..data import DataVector, save_covariance
from ..spectra import SpectraVector, is_single_tracer_file, pair_label, save_spectra_covariance


def choose_mesh(lik, n_mesh=None):
    """Mesh for the survey of ``lik``: (L, N) as described in the module docstring."""
    dv = lik.data_full
    k_max = float(max(p.edges[-1] for p in dv.parts) if hasattr(dv, "parts") else dv.edges[-1])
    if "mask" in lik.config["survey"]["geometry"]:
        raise ErgofitError("simulate: survey.geometry.mask: a HEALPix mask cannot be meshed yet; "
                           "use shape: cap for mocks")
    if lik.window is None:
        box = lik.volume ** (1.0 / 3.0)
    else:
        geo = lik.config["survey"]["geometry"]
        r_max = geo.get("r_max", geo.get("radius"))
        if r_max is None:
            raise ErgofitError("simulate: a window from randoms or a window table cannot be meshed yet; "
                               "use an analytic geometry (sphere, shell, cap) for mocks")
        box = 4.1 * float(r_max)
    if n_mesh is None:
        n_mesh = int(math.ceil(1.5 * k_max * box / math.pi))
        n_mesh += n_mesh % 2
    return Mesh(int(n_mesh), float(box), dtype="float32")


def mock_model_raw(cfg, poisson, k_ir=None):
    """The raw config of the model the mocks follow (a copy of ``cfg.raw``): without Poisson
    sampling no noise in the monopole (data.shot_noise_subtracted = false), the observer's
    infrared cut-off ``k_ir`` (the mesh's k_f; see :func:`validation_model`), and the analytic
    covariance instead of ``kind: mocks`` (a fit config can make its own mocks before they exist;
    the covariance plays no part in the mocks)."""
    raw = copy.deepcopy(cfg.raw)
    if not poisson:
        raw.setdefault("data", {})["shot_noise_subtracted"] = False
    if k_ir is not None and cfg["effects"]["observer"]:
        raw.setdefault("observer", {})["k_ir"] = float(k_ir)
    if cfg["covariance"]["kind"] == "mocks":
        raw["covariance"] = {"kind": "gaussian"}
    if is_curved(cfg):      # the light-cone mocks have the local terms only
        raw.setdefault("effects", {}).update({t: False for t in INTEGRATED_EFFECTS})
    return raw


def _quiet_build(cfg, raw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")           # the same warnings were shown for the mocks
        return build(validate_config(raw, src=cfg.path, base_dir=cfg.base_dir))


def validation_model(config, mesh, poisson=True):
    """Expected measurement of the mocks on ``mesh``: the likelihood's full observed model
    (window, integral constraint, projection terms, observer term at ν = observer.nu_true) at the
    config's fiducial values, with the two settings the mocks fix:

    * shot noise: Poisson-sampled mocks (``poisson``) carry the noise of n̄ with amplitude 1, and
      their monopole has 1/n̄ subtracted as ``data.shot_noise_subtracted`` says, so the model
      has shot_noise = 1 and the config's convention; mocks of the continuous field
      (``poisson=False``) have no noise term (shot_noise = 0, data.shot_noise_subtracted = false);
    * one infrared cut-off for the constrained potential: the mocks cannot hold modes below the
      mesh's fundamental k_f = 2π/L, so the model's observer.k_ir is set to k_f as well
      (the mocks impose the constraint with the same k_ir).

    Returns (model array (n_ell, n_bins), the likelihood it came from, k_ir).
    """
    cfg = config if isinstance(config, Config) else load_config(config)
    k_ir = float(mesh.k_fundamental)
    raw = mock_model_raw(cfg, poisson, k_ir)
    raw.setdefault("parameters", {})["shot_noise"] = {"fixed": 1.0 if poisson else 0.0}
    if not any(isinstance(v, dict) and ("flat" in v or "gauss" in v)
               for v in raw["parameters"].values()):
        raw["parameters"]["b1"] = {"flat": [0.01, 100.0]}   # the validator wants one sampled
    lik = _quiet_build(cfg, raw)
    truth = {k: np.atleast_1d(v) for k, v in lik.fiducial.items()}
    truth["shot_noise"] = np.atleast_1d(1.0 if poisson else 0.0)
    model = lik.model_full(truth)[0].reshape(lik.data_full.values.shape)
    return model, lik, k_ir


def simulate_survey(config, n, out=None, mesh_n=None, check=False, echo=print, poisson=True):
    """``n`` mocks of the survey of ``config``: :func:`simulate_one_tracer`, or
    :func:`simulate_several_tracers` for a config with a ``tracers`` section (same arguments)."""
    cfg = load_config(config)
    if n < 2:
        raise ErgofitError(f"--n {n}: need at least 2 mocks for a covariance")
    if "samples" in cfg:
        return simulate_samples(cfg, n, out, mesh_n, check, echo, poisson)
    run = simulate_several_tracers if "tracers" in cfg else simulate_one_tracer
    return run(cfg, n, out, mesh_n, check, echo, poisson)


def simulate_samples(cfg, n, out=None, mesh_n=None, check=False, echo=print, poisson=True):
    """Mocks of a config with ``samples``: for each sample, :func:`simulate_several_tracers` of
    that sample's validated config (its own geometry, mesh, tracers, spectra, k bins and the file
    format of its data file) into ``out/NAME/`` (default ``<output folder>/mocks/NAME/``), with
    its own ``--validate``. The samples are independent: sample i draws from the random streams
    of ``SeedSequence((seed, i))``, seed = its ``data.mock.seed`` or 0. Every sample is checked
    and meshed before the first file is written. Returns {sample name: validation result or None}.
    """
    out = out or os.path.join(cfg.output_folder, "mocks")
    from ..model.samples import in_sample
    setups = [in_sample(i, s["name"], _multi_setup, sc, poisson, mesh_n)
              for i, (s, sc) in enumerate(zip(cfg["samples"], cfg.sample_configs))]
    results = {}
    for i, (s, sc, setup) in enumerate(zip(cfg["samples"], cfg.sample_configs, setups)):
        echo(f"== sample {s['name']}")
        seed = (int(sc["data"].get("mock", {}).get("seed", 0)), i)
        results[s["name"]] = simulate_several_tracers(sc, n, os.path.join(out, s["name"]), mesh_n,
                                                      check, echo, poisson, setup, seed)
    return results


def simulate_one_tracer(config, n, out=None, mesh_n=None, check=False, echo=print, poisson=True):
    """``n`` mocks of the survey of ``config`` (Poisson sampled unless ``poisson`` is False: see
    the module docstring) written into ``out`` (default
    ``<output folder>/mocks``: ``mock_0000.txt``, ... and ``covariance.txt``), with the
    validation against the model the mocks were made from when ``check`` (see
    :func:`validation_model`; the test uses the mocks' own scatter, Hotelling's T²);
    ``echo`` (a print-like callable) receives the progress and result lines.
    Returns the validation result (a dict) or None."""
    cfg = config if isinstance(config, Config) else load_config(config)
    if n < 2:
        raise ErgofitError(f"--n {n}: need at least 2 mocks for a covariance")
    lik = build(cfg)
    lightcone = LightConeSpec.of_likelihood(lik) if is_curved(cfg) else None
    mesh = choose_mesh(lik, mesh_n)
    out = out or os.path.join(cfg.output_folder, "mocks")
    fid = lik.fiducial
    tracer = make_tracer(fid, lik.p, lik.nbar)
    observer = None
    if cfg["effects"]["observer"]:
        observer = dict(cfg["observer"])
        observer["k_ir"] = float(mesh.k_fundamental)    # the same IR cut-off as validation_model
    n_data = lik.data_full.flat.size
    sub = bool(cfg["data"]["shot_noise_subtracted"])
    noise_text = (f"Poisson sampled with n̄ = {lik.nbar:.4g} (h/Mpc)^3, 1/n̄ "
                  f"{'subtracted from' if sub else 'kept in'} the monopole as "
                  f"data.shot_noise_subtracted = {str(sub).lower()}" if poisson else
                  "no shot noise (continuous field, --no-poisson)")
    echo(f"simulate: {n} mocks on a {mesh.n}^3 mesh, box {mesh.box:.0f} Mpc/h "
         f"(k_Nyquist = {mesh.k_nyquist:.3g} h/Mpc), {noise_text}, writing into {out}/")
    if lightcone is not None:
        echo(f"  curved sky: {lightcone.describe()}; no integrated terms in the mocks")
    if n <= n_data + 2:
        echo(f"  note: {n} mocks for {n_data} data points; covariance.kind: mocks needs more than "
             f"n_data + 2 (Hartlap et al. 2007): --n {n_data + 3} or more")

    def progress(i, n):
        echo(f"  mock {i}/{n}", flush=True)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        mocks, mc = simulate_from_settings(lik.cosmo, lik.z, tracer, lik.effects, mesh, lik.window,
                                           lik.data_full.edges, lik.data_full.ells, n,
                                           cfg["data"].get("mock", {}).get("seed", 0),
                                           nbar=lik.nbar if poisson else None,
                                           observer=observer, out_dir=out, progress=progress,
                                           subtract_shot_noise=sub, lightcone=lightcone)
    echo(f"wrote {len(mocks)} data vectors (mock_0000.txt ...) and covariance.txt into {out}/")
    if not check:
        return None
    model, _, k_ir = validation_model(cfg, mesh, poisson=poisson)
    nb = lik.data_full.n_bins
    if len(mocks) <= nb:
        echo(f"  validation: no test possible: {len(mocks)} mocks, and the mocks' own scatter "
             f"needs more mocks than bins per multipole ({nb}); use --n {n_data + 1} or more "
             "for the per-multipole and total tests")
        return None
    res = validate(mocks, model, plot=os.path.join(out, "validation.png"))
    res["k_ir"] = k_ir
    res["shot_noise"] = (f"{noise_text}; the model with shot_noise = 1 and the same convention"
                         if poisson else "none (mocks not Poisson sampled; model without noise term)")
    write_text(os.path.join(out, "validation.json"),
               json.dumps({k: (v if not isinstance(v, dict) else {str(a): b for a, b in v.items()})
                           for k, v in res.items()}, indent=2, default=float))
    _echo_validation(echo, res, res["ells"], n_data,
                     f"{'shot noise as in the mocks' if poisson else 'no shot noise'}; observer "
                     f"k_ir = k_f = {k_ir:.3g} h/Mpc in both")
    return res


# --- several tracers ------------------------------------------------------------------------------
def _multi_setup(cfg, poisson, mesh_n):
    """(likelihood of the mocks' model, mesh, [((X, Y), ells)], common k edges) of a multi-tracer
    config; the spectra and bins are those of its data vector (``data.file`` or ``data.mock``)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)   # the mocks say it once below
        lik = build(validate_config(mock_model_raw(cfg, poisson), src=cfg.path, base_dir=cfg.base_dir))
    sv = lik.data_full
    edges = sv.parts[0].edges
    for pair, part in zip(sv.pairs, sv.parts):
        if not np.array_equal(part.edges, edges):
            raise ErgofitError(f"{cfg.path}: ergofit simulate measures all spectra on one set of k "
                               f"bins, but spectrum {pair_label(pair)} has its own (use one data "
                               "binning; cut spectra with spectra[i].k_min/k_max)")
    for spec in cfg["spectra"]:
        if "shared_nbar" in spec:
            raise ErgofitError(f"{cfg.path}: spectra {pair_label(spec['pair'])}: shared_nbar "
                               "(overlapping populations) cannot be simulated: the mocks draw "
                               "independent populations")
    return lik, choose_mesh(lik, mesh_n), list(zip(sv.pairs, (p.ells for p in sv.parts))), edges


def multi_validation_model(cfg, mesh, poisson=True):
    """Expected flat measurement of the multi-tracer mocks on ``mesh`` (the settings of
    :func:`validation_model`: shot-noise amplitude 1 for each auto spectrum of Poisson mocks, 0
    without Poisson sampling; none for a cross spectrum, the populations being independent;
    observer k_ir = k_f). Returns (model (n_data,), the likelihood, k_ir)."""
    k_ir = float(mesh.k_fundamental)
    lik = _quiet_build(cfg, mock_model_raw(cfg, poisson, k_ir))
    vals = {k: np.atleast_1d(v) for k, v in lik.fiducial.items()}
    for s in lik.forward.spectra:
        if s.noise_name is not None:
            vals[s.noise_name] = np.atleast_1d(1.0 if poisson and s.auto else 0.0)
    return lik.forward.full(vals)[0], lik, k_ir


def simulate_several_tracers(cfg, n, out=None, mesh_n=None, check=False, echo=print, poisson=True,
                             setup=None, seed=None):
    """Mocks of a multi-tracer config (one sample): all tracers from one Gaussian field
    (:func:`likelihood.simulate.mocks.simulate_tracers`: each Poisson sampled with its n̄, the
    config's window, effects and observer term), measured into the config's spectra (pairs and
    multipoles of its data vector, on its k bins) and written into ``out`` as labelled spectra
    files ``mock_0000.txt``, ... with their sample covariance ``covariance.txt`` (the formats of
    :mod:`likelihood.spectra`; ``.npz`` files when the config's data file is one, and single-tracer
    data vectors when it is one, i.e. one auto spectrum); ``check``: the
    validation of :func:`simulate_one_tracer` for every (spectrum, ℓ) and jointly. ``setup``:
    the result of :func:`_multi_setup` if already made; ``seed``: the random streams (default
    the config's ``data.mock.seed`` or 0). Returns the validation result or None."""
    from ..simulate.mocks import simulate_tracers
    from ..simulate.validation import validate_spectra
    lik, mesh, spectra, edges = setup or _multi_setup(cfg, poisson, mesh_n)
    if seed is None:
        seed = cfg["data"].get("mock", {}).get("seed", 0)
    data_file = cfg["data"].get("file")
    ext = ".npz" if str(data_file).endswith(".npz") else ".txt"
    # one auto spectrum read from a single-tracer data file: the mocks keep that layout
    single = (data_file is not None and len(spectra) == 1
              and is_single_tracer_file(cfg.resolve(data_file)))
    out = out or os.path.join(cfg.output_folder, "mocks")
    names = lik.forward.names
    tracers = {t: lik.forward.tracer(lik.fiducial, t) for t in names}
    observer = None
    if cfg["effects"]["observer"]:
        observer = dict(cfg["observer"])
        observer["k_ir"] = float(mesh.k_fundamental)    # as in multi_validation_model
    sub = bool(cfg["data"]["shot_noise_subtracted"])
    n_data = lik.data_full.flat.size
    noise_text = (", ".join(f"{t} n̄ = {tracers[t].nbar:.4g}" for t in names)
                  + f" (h/Mpc)^3, Poisson sampled independently, 1/n̄ "
                  f"{'subtracted from' if sub else 'kept in'} the auto monopoles" if poisson else
                  "no shot noise (continuous fields, --no-poisson)")
    echo(f"simulate: {n} mocks of {len(names)} tracers ({noise_text}) on a {mesh.n}^3 mesh, box "
         f"{mesh.box:.0f} Mpc/h (k_Nyquist = {mesh.k_nyquist:.3g} h/Mpc), spectra "
         f"{', '.join(pair_label(p) for p, _ in spectra)}, writing into {out}/")
    if n <= n_data + 2:
        echo(f"  note: {n} mocks for {n_data} data points; covariance.kind: mocks needs more than "
             f"n_data + 2 (Hartlap et al. 2007): --n {n_data + 3} or more")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        mocks = simulate_tracers(lik.cosmo, lik.z, tracers, lik.effects, mesh, spectra, edges, n,
                                 seed, window=lik.window,
                                 poisson=poisson, observer=observer, subtract_shot_noise=sub,
                                 progress=lambda i, m: echo(f"  mock {i}/{m}", flush=True))
    vectors = [_spectra_vector(mocks, names, x, cfg, i, seed) for i, x in enumerate(mocks.vectors)]
    try:
        os.makedirs(out, exist_ok=True)
    except OSError as exc:
        raise ErgofitError(f"--out {out}: cannot create the folder ({exc})") from None
    cov = mocks.covariance().covariance
    for i, v in enumerate(vectors):
        (v.parts[0] if single else v).save(os.path.join(out, f"mock_{i:04d}{ext}"))
    if single:
        save_covariance(os.path.join(out, f"covariance{ext}"), cov, spectra[0][1], edges.size - 1)
    else:
        save_spectra_covariance(os.path.join(out, f"covariance{ext}"), cov, vectors[0])
    echo(f"wrote {n} {'single-tracer data' if single else 'labelled spectra'} files "
         f"(mock_0000{ext} ...) and covariance{ext} into {out}/")
    if not check:
        return None
    model, _, k_ir = multi_validation_model(cfg, mesh, poisson)
    nb = edges.size - 1
    if n <= nb:
        echo(f"  validation: no test possible: {n} mocks, and the mocks' own scatter needs more "
             f"mocks than bins per multipole ({nb}); use --n {n_data + 1} or more for all tests")
        return None
    blocks, pos = [], 0
    for pair, ells in spectra:
        for ell in ells:
            blocks.append((f"{pair_label(pair)} ell={ell}", slice(pos, pos + nb), mocks.k_eff,
                           rf"{pair_label(pair)} $\ell={ell}$"))
            pos += nb
    res = validate_spectra(mocks.vectors, model, blocks, plot=os.path.join(out, "validation.png"))
    res.update(k_ir=k_ir, shot_noise=noise_text)
    write_text(os.path.join(out, "validation.json"), json.dumps(res, indent=2, default=float))
    _echo_validation(echo, res, res["blocks"], n_data,
                     f"shot noise as in the mocks; observer k_ir = k_f = {k_ir:.3g} h/Mpc in both")
    if any(ell % 2 for _, ells in spectra for ell in ells):
        echo("  note: the mocks' estimator takes the line of sight at each galaxy, so their odd "
             "cross multipoles hold the wide-angle dipole ~ (b_X - b_Y) P/(k chi) that the "
             "plane-parallel model leaves out (README, regime of validity): a failed odd-ell test "
             "where k chi is small measures that term, not a bug")
    return res


def _spectra_vector(mocks, names, flat, cfg, i, seed):
    """Mock ``i`` (flat vector ``flat`` of :class:`MultiTracerMocks` ``mocks``) as a SpectraVector."""
    meta = {"mock": str(i), "seed": " ".join(str(s) for s in np.atleast_1d(seed)),
            "z": f"{cfg['survey']['redshift']:.6g}"}
    parts, pos = [], 0
    nb = mocks.k_eff.size
    for pair, ells in mocks.spectra:
        vals = flat[pos:pos + nb * len(ells)].reshape(len(ells), nb)
        parts.append(DataVector(tuple(ells), mocks.edges, mocks.k_eff, mocks.n_modes, vals,
                                meta=dict(meta), source=f"mock {i}"))
        pos += vals.size
    return SpectraVector(names, [p for p, _ in mocks.spectra], parts, meta, source=f"mock {i}")


def _echo_validation(echo, res, keys, n_data, settings):
    """The validation lines of :func:`simulate_one_tracer` / :func:`simulate_several_tracers`."""
    echo(f"  validation against the model the mocks were made from ({settings}), using the "
         f"scatter of the {res['n_mocks']} mocks:")
    for key in keys:
        name = f"ell = {key}" if isinstance(key, int) else key
        if res["chi2"][key] is None:
            echo(f"  {name}: no test (the mocks do not scatter in some direction: identical fields?)")
            continue
        echo(f"  {name}: chi2 = {res['chi2'][key]:.1f} for {res['dof'][key]} bins "
             f"(p = {res['p_value'][key]:.3g})")
    if res["chi2_total"] is None:
        echo(f"  total: no joint test ({res['n_mocks']} mocks for {n_data} data points; "
             f"--n {n_data + 1} or more); plot {res['plot']}")
    else:
        echo(f"  total: chi2 = {res['chi2_total']:.1f} / {res['dof_total']} "
             f"(p = {res['p_value_total']:.3g}); plot {res['plot']}")
