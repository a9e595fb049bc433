"""covariance.kind: harmonic with several tracers on the curved sky
(CurvedMultiForwardModel.harmonic_covariance): the one-tracer limit against the single-tracer
harmonic covariance, the two-tracer blocks against a direct call of the library function (itself
checked against a Monte Carlo of the a_JM: tests/curved/test_covariance.py), the disk cache and
the command line, and the settings it refuses in one line."""
import copy
import os
import warnings

import numpy as np
import pytest
import yaml

from likelihood.cli.commands import main
from likelihood.config import load_config
from likelihood.curved import TracerCoefficients
from likelihood.curved.covariance import harmonic_covariance
from likelihood.data import DataVector
from likelihood.errors import ConfigError
from likelihood.spectra import SpectraVector
from tests.model.test_curved_multitracer import ENGINE, MOCK, SHELL, TWO, _build

#: two overlapping tracers (shared_nbar = 2e-5), fixed noise amplitudes of faint and the shared
HARM = copy.deepcopy(TWO)
HARM["spectra"][1]["k_max"] = 0.012                 # a masked bin in the cross spectrum
HARM["parameters"]["shot_noise_faint"] = {"fixed": 1.6}
HARM["parameters"]["shot_noise_bright_faint"] = {"fixed": 0.8}
HARM["covariance"] = {"kind": "harmonic"}
HARM["effects"] = {"observer": False, "lensing": False, "isw": False, "time_delay": False}
HARM["parameters"].pop("nu_obs")            # (integrated and observer terms off: a fast build)


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", os.fspath(tmp_path / "cache"))


def test_one_tracer_equals_single_tracer_harmonic_covariance():
    """One tracer under ``tracers`` gives the single-tracer harmonic covariance of the
    equivalent single-tracer config to 1e-10 (same fiducial b1, b_e, s, f_NL = the mock truth,
    bias ∝ 1/D(z), shot-noise amplitude 1.3)."""
    common = {"engine": dict(ENGINE, bias_evolution="inverse_growth"),
              "effects": {"integral_constraint": "global"}, "covariance": {"kind": "harmonic"}}
    single = dict(common, run="one", survey={"redshift": 1.2, "nbar": 3.0e-4, "geometry": SHELL},
                  tracer={"b1": 1.8, "fnl": 0.0, "p": 1.0, "b_e": 1.5, "s": 0.25},
                  data={"mock": MOCK, "ells": [0, 2]},
                  parameters={"b1": {"flat": [0.5, 5]}, "fnl": {"flat": [-200, 200]},
                              "shot_noise": {"fixed": 1.3}})
    multi = dict(common, run="one", survey={"redshift": 1.2, "geometry": SHELL},
                 tracers=[{"name": "g", "nbar": 3.0e-4, "b1": 1.8, "b_e": 1.5, "s": 0.25}],
                 spectra=[{"pair": ["g", "g"], "ells": [0, 2]}], data={"mock": MOCK},
                 parameters={"b1_g": {"flat": [0.5, 5]}, "fnl": {"flat": [-200, 200]},
                             "shot_noise_g": {"fixed": 1.3}})
    ref, lik = _build(single), _build(multi)
    assert lik.covariance_full.shape == ref.covariance_full.shape == (6, 6)
    np.testing.assert_allclose(lik.covariance_full, ref.covariance_full, rtol=1e-10, atol=0)


def test_two_tracer_blocks_against_the_library(tmp_path, capsys):
    """Every block (auto–auto, auto–cross with the cross's odd ℓ, cross–cross) equals a direct
    call of likelihood.curved.covariance.harmonic_covariance with each tracer's kernel written
    out by hand at its fiducial values: bright b1 = 2.4 constant, faint b1(z) = 1.5 D(z_eff)/D(z)
    (inverse_growth), f_NL = 10 (the mock truth), shot noise 1/n̄ of bright and 1.6/n̄ of faint
    (its fixed amplitude), the shared noise 0.8 n̄_XY/(n̄_X n̄_Y) of the overlap; the data mask (k_max of the cross) selects the fitted rows;
    ``ergofit check`` of the config then runs from the disk cache (exit 0)."""
    lik = _build(HARM)
    f = lik.forward
    cosmo = lik.cosmo
    d_eff = float(cosmo.growth_factor(1.2, norm="today"))
    faint_b = lambda z: 1.5 * d_eff / np.asarray(cosmo.growth_factor(z, norm="today"))  # noqa: E731
    tracers = {"bright": (TracerCoefficients(2.4, 1.0, 0.4, 10.0, 1.0), f.terms),
               "faint": (TracerCoefficients(faint_b, 1.75, 0.175, 10.0, 1.0), f.terms)}
    spectra = [(("bright", "bright"), (0, 2)), (("bright", "faint"), (0, 1, 2, 3)),
               (("faint", "faint"), (0, 2))]
    edges = lik.data_full.parts[0].edges
    args = (cosmo, f.engine.shell, edges, tracers, spectra,
            {"bright": 1.0e-4, "faint": 2.0e-4 / 1.6}, "global", f.engine.resolution, None)
    ref = harmonic_covariance(*args, cross_noise={("bright", "faint"): 0.8 * 2e-5 / 2e-8})
    assert ref.shape == lik.covariance_full.shape == (24, 24)
    np.testing.assert_allclose(lik.covariance_full, ref, rtol=1e-10,
                               atol=1e-12 * np.abs(ref).max())
    disjoint = harmonic_covariance(*args)             # the shared noise is a visible term
    assert np.max(np.abs(disjoint - ref) / np.sqrt(np.outer(np.diag(ref), np.diag(ref)))) > 1e-3
    # the cross dipole correlates with the auto monopoles (the a_JM are shared): a real block
    assert np.abs(ref[:3, 9:12]).max() > 1e-3 * np.sqrt(ref[0, 0] * ref[9, 9])
    mask = lik.mask
    assert mask.sum() == 20                                  # 4 ℓ of the cross lose one bin
    np.testing.assert_array_equal(lik.covariance, lik.covariance_full[np.ix_(mask, mask)])
    with warnings.catch_warnings():        # the command line, from the disk cache
        warnings.simplefilter("ignore")
        assert main(["check", _write(tmp_path, HARM)]) == 0
    assert "harmonic" in capsys.readouterr().out
    files = os.listdir(tmp_path / "cache" / "ergofit")
    assert sum(n.startswith("curved-cov-") for n in files) == 1


def test_spectra_on_their_own_k_bins(tmp_path):
    """A data file whose cross spectrum has fewer k bins (the autos' last two): the covariance
    equals the rows and columns of those bins in the common-bin covariance (same Gauss nodes
    and J_max: the library's own-bins path, in the data vector's order)."""
    raw = copy.deepcopy(HARM)
    raw["spectra"][1].pop("k_max")
    raw["data"]["mock"]["truth"] = {"fnl": 0.0}      # the fiducial f_NL of a data file
    common = _build(raw)
    sv = common.data_full
    p = sv.parts[1]
    parts = list(sv.parts)
    parts[1] = DataVector(p.ells, p.edges[1:], p.k_eff[1:], p.n_modes[1:], p.values[:, 1:])
    SpectraVector(sv.tracers, sv.pairs, parts).save(tmp_path / "d.txt")
    raw["data"] = {"file": "d.txt"}
    own = _build(raw, tmp_path)
    keep = np.r_[0:6, 7:9, 10:12, 13:15, 16:18, 18:24]
    assert own.covariance_full.shape == (20, 20)
    np.testing.assert_allclose(own.covariance_full,
                               common.covariance_full[np.ix_(keep, keep)], rtol=1e-10,
                               atol=1e-13 * np.abs(common.covariance_full).max())


def _write(tmp_path, raw):
    path = tmp_path / "two.yaml"
    path.write_text(yaml.safe_dump(dict(raw, output={"folder": os.fspath(tmp_path / "out")}),
                                   sort_keys=False))
    return os.fspath(path)


def test_masked_sky_refused_in_one_line(tmp_path, capsys):
    words = "full sky only"
    raw = copy.deepcopy(HARM)
    raw["survey"]["geometry"].update(shape="cap", fsky=0.5)
    path = _write(tmp_path, raw)
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    assert words in str(exc.value) and "\n" not in str(exc.value)
    assert main(["check", path]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "covariance.kind: harmonic" in err[0]


@pytest.mark.slow
def test_two_tracer_harmonic_run_end_to_end(tmp_path):
    """``ergofit run`` of the small two-tracer config with the harmonic covariance (600 steps of
    24 walkers, ~15 s): exit 0 and a summary whose f_NL interval holds the mock truth (10) of
    this noise-free mock within 3σ."""
    import json
    raw = dict(copy.deepcopy(HARM), sampling={"walkers": 24, "max_steps": 600,
                                              "check_every": 200, "seed": 3, "progress": False})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["run", _write(tmp_path, raw)]) == 0
    with open(tmp_path / "out" / "summary.json") as fh:
        fnl = json.load(fh)["parameters"]["fnl"]
    assert abs(fnl["mean"] - 10.0) < 3 * fnl["std"]
