"""Shared fixtures: small configs written into a temporary folder."""
import copy
import os

import pytest
import yaml

BASE = {
    "run": "unit",
    "survey": {"redshift": 1.2, "nbar": 3.0e-4,
               "geometry": {"shape": "shell", "r_min": 1950.0, "r_max": 3140.0}},
    "tracer": {"b1": 2.0, "fnl": 0.0, "b_e": 0.5, "s": 0.2},
    "effects": {"observer": False},
    "data": {"mock": {"seed": 3, "truth": {"fnl": 5.0}, "k_min": 0.002, "k_max": 0.05, "n_bins": 12},
             "ells": [0, 2]},
    "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.02},
                   "fnl": {"flat": [-200.0, 200.0], "start": 0.0, "scale": 2.0},
                   "shot_noise": {"gauss": [1.0, 0.1], "start": 1.0}},
    "sampling": {"walkers": 16, "max_steps": 400, "check_every": 100, "seed": 1, "progress": False},
}


@pytest.fixture(scope="session")
def two_samples():
    """as_two_samples(cfg): see :func:`as_two_samples`."""
    return as_two_samples


def as_two_samples(cfg):
    """The two-tracer demo config (configs/multi_demo.yaml, read as a dict) made sample 'north',
    beside a one-tracer mock sample 'south' (tracer lrg, 8 bins); changes ``cfg`` in place."""
    north = {k: cfg.pop(k) for k in ("survey", "tracers", "spectra", "data", "covariance")}
    south = {"survey": {"redshift": 0.6, "geometry": {"shape": "shell", "r_min": 1200, "r_max": 1900}},
             "tracers": [{"name": "lrg", "nbar": 3e-4, "b1": 2.0}],
             "spectra": [{"pair": ["lrg", "lrg"], "ells": [0, 2]}],
             "data": {"mock": {"seed": 5, "k_min": 0.004, "k_max": 0.05, "n_bins": 8}}}
    cfg["samples"] = [dict(name="north", **north), dict(name="south", **south)]
    cfg["parameters"]["b1_lrg"] = {"flat": [0.5, 5.0]}
    return cfg


def merge(base, over):
    out = copy.deepcopy(base)
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict) and not k == "parameters":
            out[k] = merge(out[k], v)
        elif v is None:
            out.pop(k, None)
        else:
            out[k] = copy.deepcopy(v)
    return out


@pytest.fixture
def write_config(tmp_path):
    """write_config(overrides=None, name='c.yaml') -> path of a YAML config in tmp_path."""
    def _write(overrides=None, name="c.yaml"):
        cfg = merge(BASE, overrides or {})
        cfg.setdefault("output", {"folder": os.fspath(tmp_path / "out")})
        path = tmp_path / name
        path.write_text(yaml.safe_dump(cfg, sort_keys=False))
        return os.fspath(path)
    return _write
