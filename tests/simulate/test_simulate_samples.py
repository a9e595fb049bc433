"""`ergofit simulate` on a config with several samples: each sample's mocks in its own folder,
with its own geometry, tracers, spectra, k bins and data-file format, independent random
streams, --validate per sample, and the mocks usable as that sample's covariance."""
import copy
import glob
import json
import os
import warnings

import numpy as np
import yaml

from likelihood.cli import main
from likelihood.config import validate
from likelihood.model import build
from likelihood.data import DataVector
from likelihood.spectra import SpectraVector, is_single_tracer_file

N_MOCKS = 26
NORTH = {"survey": {"redshift": 1.0, "geometry": {"shape": "sphere", "radius": 500.0}},
         "tracers": [{"name": "bright", "nbar": 3.0e-4, "b1": 2.0, "b_e": 1.0, "s": 0.4},
                     {"name": "faint", "nbar": 6.0e-4, "b1": 1.2}],
         "spectra": [{"pair": ["bright", "bright"], "ells": [0, 2]},
                     {"pair": ["bright", "faint"], "ells": [0, 1, 2]},
                     {"pair": ["faint", "faint"], "ells": [0, 2]}],
         "data": {"mock": {"k_min": 0.02, "k_max": 0.05, "n_bins": 3, "seed": 2}}}
SOUTH = {"survey": {"redshift": 0.6, "geometry": {"shape": "sphere", "radius": 400.0}},
         "tracers": [{"name": "lrg", "nbar": 4.0e-4, "b1": 1.8}],
         "spectra": [{"pair": ["lrg", "lrg"], "ells": [0, 2]}],
         "data": {"mock": {"k_min": 0.025, "k_max": 0.06, "n_bins": 4, "seed": 9}}}
TOP = {"run": "two-samples", "effects": {"observer": False},
       "parameters": {"fnl": {"flat": [-200, 200]}, "b1_bright": {"flat": [0.5, 5]},
                      "b1_faint": {"flat": [0.5, 5]}, "b1_lrg": {"flat": [0.5, 5]}},
       "sampling": {"walkers": 8, "max_steps": 60, "check_every": 30, "seed": 1, "progress": False}}


def _write(folder, raw, name):
    path = os.path.join(folder, name)
    with open(path, "w") as fh:
        yaml.safe_dump(raw, fh)
    return path


def test_simulate_two_samples_each_in_its_own_layout(tmp_path):
    folder = str(tmp_path)
    # the south sample's data file is a single-tracer .npz data vector (one tracer, 4 bins)
    one = dict(copy.deepcopy(TOP), **copy.deepcopy(SOUTH))
    one["parameters"] = {"b1_lrg": {"flat": [0.5, 5]}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        south_data = build(validate(one, src="south.yaml", base_dir=folder)).data_full
    south_data.parts[0].save(os.path.join(folder, "south.npz"))
    south = dict(copy.deepcopy(SOUTH), data={"file": "south.npz"})
    raw = dict(copy.deepcopy(TOP), samples=[dict(name="north", **NORTH), dict(name="south", **south)])
    cfg = _write(folder, raw, "both.yaml")
    out = os.path.join(folder, "mocks")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["simulate", cfg, "--n", str(N_MOCKS), "--out", out, "--validate"]) == 0

    north_files = sorted(glob.glob(os.path.join(out, "north", "mock_*.txt")))
    south_files = sorted(glob.glob(os.path.join(out, "south", "mock_*.npz")))
    assert len(north_files) == N_MOCKS and len(south_files) == N_MOCKS
    assert os.path.isfile(os.path.join(out, "south", "covariance.npz"))
    n0 = SpectraVector.load(north_files[0])                 # labelled spectra, as north's data
    assert n0.pairs == [("bright", "bright"), ("bright", "faint"), ("faint", "faint")]
    assert [p.ells for p in n0.parts] == [(0, 2), (0, 1, 2), (0, 2)]
    assert is_single_tracer_file(south_files[0])            # single-tracer vectors, as south's
    s0 = DataVector.load(south_files[0])
    assert s0.ells == (0, 2)
    np.testing.assert_allclose(s0.edges, south_data.parts[0].edges, rtol=1e-12)
    assert n0.meta["seed"] == "2 0" and s0.meta["seed"] == "0 1"   # independent streams
    for name, blocks in (("north", 7), ("south", 2)):
        res = json.load(open(os.path.join(out, name, "validation.json")))
        assert res["n_mocks"] == N_MOCKS and len(res["blocks"]) == blocks
        for key in res["blocks"]:
            if not key.endswith("ell=1"):      # even multipoles: the model the mocks came from
                assert res["p_value"][key] > 1e-3, (name, key, res["p_value"])

    # the mocks are each sample's covariance: a two-sample likelihood on them
    raw["samples"][0]["covariance"] = {"kind": "mocks", "mocks": "mocks/north/mock_*.txt"}
    raw["samples"][1]["covariance"] = {"kind": "mocks", "mocks": "mocks/south/mock_*.npz"}
    raw["samples"][1]["data"] = {"file": "mocks/south/mock_0000.npz"}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(_write(folder, raw, "fit.yaml"))
    assert [p.n_mocks for p in lik.parts] == [N_MOCKS, N_MOCKS]
    x = np.array([DataVector.load(f).flat for f in south_files])
    np.testing.assert_allclose(lik.parts[1].covariance, np.cov(x, rowvar=False), rtol=1e-10)
    theta = np.array([{"fnl": 0.0, "b1_bright": 2.0, "b1_faint": 1.2, "b1_lrg": 1.8}[n]
                      for n in lik.parameter_names])
    assert np.isfinite(lik.log_prob(theta))
