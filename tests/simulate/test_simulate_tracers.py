"""`ergofit simulate` on a two-tracer config and the documented workflow after it: the labelled
mock files, their covariance, --validate, and a fit with covariance.kind: mocks (Hartlap factor
or t-likelihood; too few mocks refused)."""
import copy
import glob
import json
import os
import warnings

import numpy as np
import pytest
import yaml

from likelihood.cli import main
from likelihood.config import validate
from likelihood.errors import DataError
from likelihood.model import build
from likelihood.simulate.survey import multi_validation_model
from likelihood.simulate.validation import validate_spectra
from likelihood.spectra import SpectraVector, load_spectra_covariance

N_MOCKS = 40
TWO = {
    "run": "two-small",
    "survey": {"redshift": 1.0, "geometry": {"shape": "sphere", "radius": 500.0}},
    "tracers": [{"name": "bright", "nbar": 3.0e-4, "b1": 2.0, "b_e": 1.0, "s": 0.4},
                {"name": "faint", "nbar": 6.0e-4, "b1": 1.2}],
    "spectra": [{"pair": ["bright", "bright"], "ells": [0, 2]},
                {"pair": ["bright", "faint"], "ells": [0, 1, 2]},
                {"pair": ["faint", "faint"], "ells": [0, 2]}],
    "effects": {"observer": True},
    "observer": {"field": "potential", "nu_true": 1.5},
    "data": {"mock": {"k_min": 0.02, "k_max": 0.05, "n_bins": 3, "seed": 2}},
    "parameters": {"fnl": {"flat": [-200, 200]}, "b1_bright": {"flat": [0.5, 5]},
                   "b1_faint": {"flat": [0.5, 5]}},
    "sampling": {"walkers": 8, "max_steps": 60, "check_every": 30, "seed": 1, "progress": False},
}
N_DATA = 3 * (2 + 3 + 2)


def _write(folder, raw, name="two.yaml"):
    path = os.path.join(folder, name)
    with open(path, "w") as fh:
        yaml.safe_dump(raw, fh)
    return path


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    """40 Poisson-sampled two-tracer mocks of TWO with --validate (50³ mesh, ~10 s)."""
    folder = str(tmp_path_factory.mktemp("two"))
    cfg = _write(folder, TWO)
    out = os.path.join(folder, "mocks")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["simulate", cfg, "--n", str(N_MOCKS), "--out", out, "--validate"]) == 0
    files = sorted(glob.glob(os.path.join(out, "mock_*.txt")))
    return folder, cfg, out, files


def test_labelled_mock_files_and_their_covariance(simulated):
    folder, cfg, out, files = simulated
    assert len(files) == N_MOCKS and os.path.isfile(os.path.join(out, "validation.png"))
    vecs = [SpectraVector.load(f) for f in files]
    assert vecs[0].pairs == [("bright", "bright"), ("bright", "faint"), ("faint", "faint")]
    assert [p.ells for p in vecs[0].parts] == [(0, 2), (0, 1, 2), (0, 2)]
    assert vecs[0].flat.size == N_DATA and np.all(np.isfinite(vecs[0].flat))
    # covariance.txt is the unbiased sample covariance of the files (numpy.cov, recomputed here)
    x = np.array([v.flat for v in vecs])
    cov = load_spectra_covariance(os.path.join(out, "covariance.txt"), vecs[0])
    np.testing.assert_allclose(cov, np.cov(x, rowvar=False), rtol=1e-8,
                               atol=1e-10 * np.abs(cov).max())
    assert not np.allclose(x[0], x[1])                  # independent mocks


def test_validation_passes_for_the_model_and_fails_for_another(simulated):
    """The even multipoles of the mean of 40 mocks agree with the model they were made from
    (Hotelling's T² with the mocks' own scatter, Hotelling 1931: p > 1e-3 per spectrum and ℓ);
    the same mocks against the model of another bias (b1_bright 2.4 instead of 2.0) fail."""
    folder, cfg, out, files = simulated
    res = json.loads(open(os.path.join(out, "validation.json")).read())
    assert res["n_mocks"] == N_MOCKS and res["dof_total"] == N_DATA
    even = [k for k in res["blocks"] if not k.endswith("ell=1")]
    assert len(even) == 6
    for key in even:
        assert res["p_value"][key] > 1e-3, (key, res["p_value"])
    from likelihood.config.schema import load_config
    from likelihood.simulate.survey import choose_mesh
    other = copy.deepcopy(TWO)
    other["tracers"][0]["b1"] = 2.4
    ocfg = load_config(_write(folder, other, "other.yaml"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mesh = choose_mesh(build(load_config(cfg)))
        model, _, _ = multi_validation_model(ocfg, mesh)
    x = np.array([SpectraVector.load(f).flat for f in files])
    blocks = [("bright ell=0", slice(0, 3), None, "")]
    bad = validate_spectra(x, model, blocks)
    assert bad["p_value"]["bright ell=0"] < 1e-6, bad


def _fit_config(folder, pattern, **cov):
    raw = copy.deepcopy(TWO)
    raw["covariance"] = {"kind": "mocks", "mocks": pattern, **cov}
    raw["data"] = {"file": os.path.join("mocks", "mock_0000.txt")}
    return _write(folder, raw, "fit.yaml")


def test_fit_with_the_mock_covariance(simulated):
    """covariance: {kind: mocks} on the simulated files: the sample covariance, the Hartlap
    factor (n_s − n_d − 2)/(n_s − 1) (Hartlap, Simon & Schneider 2007, eq. 17) and, with
    method: t, the likelihood −(n_s/2) ln[1 + χ²/(n_s − 1)] (Sellentin & Heavens 2016, eq. 6)."""
    folder, cfg, out, files = simulated
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(_fit_config(folder, "mocks/mock_*.txt"))
    x = np.array([SpectraVector.load(f).flat for f in files])
    np.testing.assert_allclose(lik.covariance, np.cov(x, rowvar=False), rtol=1e-12)
    assert lik.n_mocks == N_MOCKS
    assert lik.precision_scale == pytest.approx((N_MOCKS - N_DATA - 2) / (N_MOCKS - 1), rel=1e-14)
    theta = np.array([{"fnl": 5.0, "b1_bright": 2.1, "b1_faint": 1.1}[n] for n in lik.parameter_names])
    chi2 = float(lik.chi2(theta))
    assert lik.log_prob(theta) == pytest.approx(-0.5 * lik.precision_scale * chi2, rel=1e-9)
    assert lik.log_prob(theta[None])[0] == pytest.approx(lik.log_prob(theta), rel=1e-9)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik_t = build(_fit_config(folder, "mocks/mock_*.txt", method="t"))
    expected = -0.5 * N_MOCKS * np.log1p(chi2 / (N_MOCKS - 1))
    assert lik_t.log_prob(theta) == pytest.approx(expected, rel=1e-9)
    assert lik_t.log_prob(theta[None])[0] == pytest.approx(expected, rel=1e-9)
    assert "40 mocks" in lik.describe()


def test_too_few_mocks_refused_with_the_number_needed(simulated, capsys):
    folder, cfg, out, files = simulated
    path = _fit_config(folder, "mocks/mock_00[0-1]*.txt")        # 20 mocks for 21 points
    with pytest.raises(DataError, match="20 mocks for 21 data points.*make at least 24"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            build(path)
    assert main(["check", path]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert "make at least 24" in err[-1]


def test_run_with_the_mock_covariance_end_to_end(simulated):
    """The documented workflow: simulate, then `ergofit run` with covariance.kind: mocks (a short
    chain: the run writes its outputs and reports the mock covariance in summary.json)."""
    folder, cfg, out, files = simulated
    path = _fit_config(folder, "mocks/mock_*.txt")
    run_dir = os.path.join(folder, "run")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["run", path, "--out", run_dir, "--quiet"]) == 0
    assert os.path.isfile(os.path.join(run_dir, "chain.h5"))
    assert len(glob.glob(os.path.join(run_dir, "inputs", "mocks", "mock_*.txt"))) == N_MOCKS
    summary = json.load(open(os.path.join(run_dir, "summary.json")))
    assert "fnl" in json.dumps(summary)
