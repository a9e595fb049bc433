"""Fiducial values and the tracer of a parameter point: the rules every road shares.

Fiducial values of every known parameter: defaults < ``tracer`` block < ``observer.nu_true`` <
fixed parameters < mock truth. The *held* values of an analysis (what a parameter that is not
sampled is held at) are the fiducial values with the fixed ones on top.
"""
from __future__ import annotations

import numpy as np

from ..config.parameters import KNOWN
from ..theory import tracer as tr

COSMO_PARAMS = ("h", "omega_c", "omega_b", "n_s", "ln_1e10_As", "sigma8")
TRACER_PARAMS = ("b1", "fnl", "b_e", "s")


def fiducial_values(cfg, known=None):
    """Fiducial values of every known parameter: defaults < tracer block < fixed < mock truth.
    ``known``: the parameter table of a config with several tracers (its defaults are the
    ``tracers`` entries; no tracer block)."""
    vals = {n: info.default for n, info in (KNOWN if known is None else known).items()}
    if known is None:
        vals.update({k: cfg["tracer"][k] for k in TRACER_PARAMS})
    vals["nu_obs"] = cfg["observer"]["nu_true"]
    vals.update(cfg["fixed"])
    mock = cfg["data"].get("mock")
    if mock:
        vals.update(mock["truth"])
    return vals


def held_values(fiducial, fixed):
    """Floats of every parameter when not sampled: the fiducial ones, the fixed ones on top."""
    vals = {k: float(v) for k, v in fiducial.items()}
    vals.update({k: float(v) for k, v in fixed.items()})
    return vals


def make_tracer(values, p, nbar, i=0):
    """The :class:`~likelihood.theory.tracer.Tracer` of point ``i`` of ``values`` (name → float or
    array; b1, fnl, b_e, s) with the survey's p and n̄: the one place config values become a Tracer."""
    def g(name):
        v = values[name]
        return float(v[i] if np.ndim(v) else v)
    return tr.Tracer(b1=g("b1"), fnl=g("fnl"), p=p, nbar=nbar, b_e=g("b_e"), s=g("s"))


def config_tracer(cfg, values=None):
    """The tracer of the config's ``tracer`` block (or of ``values``, e.g. the fiducial ones)."""
    return make_tracer(cfg["tracer"] if values is None else values, cfg["tracer"]["p"],
                       cfg["survey"]["nbar"])
