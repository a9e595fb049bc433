"""Build the likelihood of a config: one factory per config section, in the order data flows.

    parameters → cosmology → survey → data → window operator → observer → forward model
    (templates) → covariance → mock → :class:`~likelihood.model.likelihood.Likelihood`

Each factory reads its own section(s) of a validated :class:`~likelihood.config.Config` and the
parts built before it; the side roads (simulate, forecast, theory report) call the same
factories instead of repeating them.
"""
from __future__ import annotations

import functools
import warnings

import numpy as np

from ..config import Config, load_config, parameter_set, validate
from ..config.engine import is_curved
from ..data import (DataVector, check_covariance, covariance_from_mocks, gaussian_covariance,
                    load_covariance)
from ..errors import DataError
from ..observation.geometry import survey_from_config
from ..observation.matrix import KBins, WindowMatrix, theory_k_grid
from ..theory import tracer as tr
from ..theory.cosmology import Cosmology
from .fiducial import COSMO_PARAMS, fiducial_values, held_values
from .likelihood import Likelihood
from .templates import ForwardModel

#: multipoles of the theory (tracer) multipoles the window matrix maps from
ELLS_THEORY = (0, 2, 4)


def parameters(cfg):
    """The :class:`~likelihood.config.parameters.ParameterSet` of the ``parameters`` section."""
    return parameter_set(cfg)


def cosmology(cfg, values=None):
    """Cosmology from the config's preset and overrides, then sampled/fixed values on top."""
    c = cfg["cosmology"]
    over = dict(c["overrides"])
    for name in COSMO_PARAMS:
        if name in cfg["fixed"]:
            over[name] = cfg["fixed"][name]
    if values:
        over.update({k: float(v) for k, v in values.items() if k in COSMO_PARAMS})
    if "ln_1e10_As" in over:
        over["A_s"] = np.exp(over.pop("ln_1e10_As")) * 1e-10
        over["sigma8"] = None
    elif "sigma8" in over:
        over["A_s"] = None
    kwargs = dict(transfer=c["transfer"])
    if c["transfer"] == "table":
        kwargs.update(table_file=cfg.resolve(c["table"]), table_kind=c["table_kind"])
    return Cosmology.from_preset(c["preset"], **kwargs, **over)


def survey(cfg, cosmo=None):
    """The :class:`~likelihood.observation.geometry.Survey` (``survey`` and ``effects`` sections)."""
    return survey_from_config(cfg, cosmo)


def data_bins(cfg, srv):
    """The data vector of ``data.file``, or the empty k bins of ``data.mock`` (values filled by
    :func:`mock`)."""
    d = cfg["data"]
    ells = tuple(d["ells"])
    if "file" in d:
        dv = DataVector.load(cfg.resolve(d["file"]))
        missing = [l for l in ells if l not in dv.ells]
        if missing:
            raise DataError(f"{dv.source}: data.ells asks for {missing} but the file has {list(dv.ells)}")
        return dv
    m = d["mock"]
    edges = np.linspace(m["k_min"], m["k_max"], m["n_bins"] + 1)
    kb = KBins.from_edges(edges, volume=srv.volume)
    return DataVector(ells, edges, kb.k_eff, kb.n_modes,
                      np.zeros((len(ells), edges.size - 1)), source="mock")


def data_mask(cfg, dv):
    """Entries of the full data vector that are fitted (``data.ells``, ``data.k_min/k_max``)."""
    d = cfg["data"]
    return dv.mask(tuple(d["ells"]), d.get("k_min"), d.get("k_max"))


def k_used(dv, mask):
    """Effective k of the bins with at least one fitted multipole."""
    return dv.k_eff[mask.reshape(len(dv.ells), -1).any(0)]


def window_operator(srv, dv, k_theory=None):
    """The window matrix (window, integral constraint, mode-averaged bins) onto the data bins."""
    k_theory = theory_k_grid() if k_theory is None else k_theory
    bins = KBins(dv.edges, dv.k_eff, dv.n_modes)
    return WindowMatrix(k_theory, ELLS_THEORY, bins, dv.ells, window=srv.window, ic=srv.ic)


def observer(cfg, srv, bins, ells, ic, k_min_data=None):
    """The observer term of the ``observer`` section on ``bins``/``ells`` (None when
    ``effects.observer`` is off)."""
    if not srv.observer_on:
        return None
    from ..observation.observer import ObserverTerm
    o = cfg["observer"]
    return ObserverTerm(field=o["field"], smoothing=o.get("smoothing"), k_ir=o.get("k_ir"),
                        window=srv.window, volume=srv.volume, bins=bins, ells=ells, ic=ic,
                        k_min_data=k_min_data)


def forward_model(cfg, srv, params, operator, obs, dv, mask, fiducial):
    """The :class:`~likelihood.model.templates.ForwardModel` (direct path and templates)."""
    cosmo_free = [n for n in params.names if n in COSMO_PARAMS]
    return ForwardModel(srv, operator.k_theory, ELLS_THEORY, operator, obs, dv.ells, dv.n_bins, mask,
                        held=held_values(fiducial, params.fixed),
                        lin_free=[n for n in ("b_e", "s") if params.is_free(n)],
                        cosmology=functools.partial(cosmology, cfg),
                        cosmo_keys=[k for k in COSMO_PARAMS if k in cosmo_free or k in cfg["fixed"]],
                        shot_noise_subtracted=cfg["data"]["shot_noise_subtracted"])


def covariance(cfg, dv, cosmo, forward, fiducial, mask=None):
    """(full covariance, :class:`~likelihood.data.MockCovariance` or None) of the ``covariance``
    section: a file, mocks, or the analytic Gaussian covariance at the fiducial model
    (plane-parallel, or with ``kind: harmonic`` the curved-sky one of model/curved.py).

    Mocks: the inverse of a sample covariance of n_s mocks is unbiased (after the factor
    (n_s − n_d − 2)/(n_s − 1)) only for n_s > n_d + 2 (Hartlap, Simon & Schneider 2007, eq. 17),
    n_d the data points used (``mask``); fewer mocks are refused with the number needed."""
    c = cfg["covariance"]
    n = dv.flat.size
    n_used = n if mask is None else int(np.count_nonzero(mask))
    if c["kind"] == "file":
        cov, ells = load_covariance(cfg.resolve(c["file"]))
        if ells is not None and tuple(ells) != dv.ells:
            raise DataError(f"{c['file']}: covariance multipoles {list(ells)} differ from the data's "
                            f"{list(dv.ells)}")
        check_covariance(cov, n=n, source=c["file"])
        return cov, None
    if c["kind"] == "mocks":
        mc, first = covariance_from_mocks(cfg.resolve(c["mocks"]))
        if first.ells != dv.ells or not np.allclose(first.edges, dv.edges):
            raise DataError(f"{c['mocks']}: mock multipoles/k bins differ from the data vector")
        mc.require(n_used, f"{cfg.path}: covariance.mocks '{c['mocks']}'")
        return mc.covariance, mc
    if c["kind"] == "harmonic":              # curved sky (model/curved.py)
        return forward.harmonic_covariance(cosmo, fiducial), None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        kern = forward.kernel(cosmo, fiducial, dv.k_eff)
    pm = cosmo.power(dv.k_eff, forward.z)
    coeffs = np.column_stack([kern.A ** 2 * pm, (2 * kern.A * kern.F + kern.B ** 2) * pm,
                              np.full_like(pm, kern.F ** 2) * pm])
    cov = gaussian_covariance(dv.k_eff, coeffs, 1.0 / forward.nbar, dv.n_modes, dv.ells)
    return cov, None


def mock_vector(cfg, forward, fiducial, cosmo_free, cov_full):
    """(flat mock vector, meta) of ``data.mock``: the direct model of ``forward`` at the truth,
    plus Gaussian noise drawn from ``cov_full`` when ``data.mock.noise``."""
    m = cfg["data"]["mock"]
    truth = {k: np.atleast_1d(v) for k, v in fiducial.items()}
    # cosmological values in the mock truth define the mock's cosmology too
    keys = [k for k in COSMO_PARAMS if k in m["truth"] or k in cosmo_free or k in cfg["fixed"]]
    mean = forward.full(truth, cosmo_keys=keys)[0]
    if m["noise"]:
        rng = np.random.default_rng(m["seed"])
        mean = mean + np.linalg.cholesky(cov_full) @ rng.standard_normal(mean.size)
    meta = {"generated": "ergofit mock", "seed": m["seed"], "noise": m["noise"]}
    meta.update({f"truth.{k}": v for k, v in m["truth"].items()})
    return mean, meta


def mock(cfg, dv, forward, fiducial, cosmo_free, cov_full):
    """The ``data.mock`` data vector (see :func:`mock_vector`)."""
    mean, meta = mock_vector(cfg, forward, fiducial, cosmo_free, cov_full)
    return DataVector(dv.ells, dv.edges, dv.k_eff, dv.n_modes, mean.reshape(dv.values.shape),
                      meta=meta, source="mock")


def warn_regime(srv, cosmo, dv, mask, ic):
    """Say where the plane-parallel, linear-theory kernel is stretched by the data."""
    k = k_used(dv, mask)
    chi = float(cosmo.comoving_distance(srv.z))
    if any(e in srv.effects for e in ("doppler", "potential")) and k[0] * chi < tr.PLANE_PARALLEL_KCHI:
        warnings.warn(f"data k_min = {k[0]:.3g} h/Mpc gives k chi = {k[0] * chi:.2g} < "
                      f"{tr.PLANE_PARALLEL_KCHI:g} at z = {srv.z:g}: the plane-parallel projection "
                      "terms miss wide-angle corrections of order 1/(k chi) there",
                      tr.PlaneParallelWarning, stacklevel=3)
    if srv.window is not None and ic == "none" and any(e in srv.effects for e in ("fnl", "potential")):
        warnings.warn("integral_constraint: none with f_NL or potential terms: the window-convolved "
                      "power of these k^-3..k^-4 terms is infrared divergent without the "
                      "data-estimated mean, so the result depends on the lowest k of the theory "
                      "grid (1e-6 h/Mpc, a stand-in for the horizon); use integral_constraint: global",
                      UserWarning, stacklevel=3)
    if k[-1] > 0.1:
        warnings.warn(f"data k_max = {k[-1]:.3g} h/Mpc: the model is linear theory "
                      "(no non-linear damping or loop corrections); keep k_max <~ 0.1 h/Mpc at z ~ 1",
                      UserWarning, stacklevel=3)


def build(config):
    """Build the likelihood of a validated config (or a path to a YAML file)."""
    cfg = config if isinstance(config, Config) else load_config(config)
    if "samples" in cfg:                      # several samples: likelihood.model.samples
        from .samples import build_samples
        return build_samples(cfg)
    if "tracers" in cfg:                      # several tracers: likelihood.model.multitracer
        from .multitracer import build_multi
        return build_multi(cfg)
    if is_curved(cfg):                       # engine.kind: curved_sky (model/curved.py)
        from . import curved
        return curved.build(cfg)
    params = parameters(cfg)
    cosmo = cosmology(cfg)
    srv = survey(cfg, cosmo)
    fiducial = fiducial_values(cfg)
    dv = data_bins(cfg, srv)
    operator = window_operator(srv, dv)
    mask = data_mask(cfg, dv)
    obs = observer(cfg, srv, operator.bins, dv.ells, operator.ic, float(k_used(dv, mask)[0]))
    warn_regime(srv, cosmo, dv, mask, operator.ic)
    forward = forward_model(cfg, srv, params, operator, obs, dv, mask, fiducial)
    cov_full, mock_cov = covariance(cfg, dv, cosmo, forward, fiducial, mask)
    if cfg["data"].get("mock") is not None:
        dv = mock(cfg, dv, forward, fiducial, [n for n in params.names if n in COSMO_PARAMS], cov_full)
    return Likelihood(cfg, params=params, cosmo=cosmo, survey=srv, data_full=dv, mask=mask,
                      forward=forward, covariance_full=cov_full, mock_cov=mock_cov, fiducial=fiducial)


#: Per-process memo used only when a pickled Likelihood arrives in a pool worker (see
#: ``Likelihood.__reduce__``): each worker rebuilds the model once from its config instead of
#: receiving megabytes of matrices with every task.
_WORKER_MODELS = {}


def rebuild_in_worker(raw, src, base_dir, config_hash):
    """The likelihood of a pickled config, built once per process (pool workers)."""
    lik = _WORKER_MODELS.get(config_hash)
    if lik is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")       # the master has shown them already
            lik = build(validate(raw, src=src, base_dir=base_dir))
        if lik.config_hash != config_hash:
            raise DataError(f"{src}: the input files changed while the run was going "
                            "(pool worker rebuilt a different model)")
        _WORKER_MODELS.clear()
        _WORKER_MODELS[config_hash] = lik
    return lik
