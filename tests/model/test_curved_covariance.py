"""covariance.kind: harmonic (the curved-sky Gaussian covariance of the estimator at the fiducial
parameters) through the config, the build and its disk cache; bad settings refused in one line."""
import os
import warnings

import numpy as np
import pytest

from likelihood.cli.commands import main
from likelihood.config import load_config
from likelihood.errors import ConfigError
from likelihood.model import build

CURVED = {"engine": {"kind": "curved_sky", "resolution": {"k_nodes": 2, "q_range": 1.5}},
          "data": {"mock": {"k_min": 0.004, "k_max": 0.016, "n_bins": 3}},
          "covariance": {"kind": "harmonic"}}


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", os.fspath(tmp_path / "cache"))


def test_harmonic_covariance_built_cached_and_fiducial(write_config, tmp_path):
    """The build uses the harmonic covariance (symmetric, positive definite) and the second
    build reads it from the disk cache. The fiducial f_NL (the mock truth, 5 in the base
    config) enters: at f_NL = 60 the scale-dependent bias adds power ∝ 1/k² at these k
    (Dalal et al. 2008), so the variance of the first bin grows, more than that of the last."""
    from tests.conftest import merge
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(write_config(CURVED))
        files = [f for f in os.listdir(tmp_path / "cache" / "ergofit")
                 if f.startswith("curved-cov-")]
        assert len(files) == 1
        again = build(write_config(CURVED))
        assert main(["check", write_config(CURVED)]) == 0       # the command line, from cache
        hot = build(write_config(merge(CURVED, {"data": {"mock": {"truth": {"fnl": 60.0}}}}),
                                 name="f.yaml"))
    cov = lik.covariance_full
    np.testing.assert_array_equal(cov, again.covariance_full)
    assert np.allclose(cov, cov.T, rtol=0, atol=1e-12 * np.abs(cov).max())
    assert np.linalg.eigvalsh(cov).min() > 0
    grow = np.diag(hot.covariance_full)[:3] / np.diag(cov)[:3]
    assert grow[0] > grow[-1] > 1.0


@pytest.mark.parametrize("over, words", [
    ({"covariance": {"kind": "harmonic"}}, "engine.kind: curved_sky"),
    (dict(CURVED, survey={"geometry": {"shape": "cap", "r_min": 1950.0, "r_max": 3140.0,
                                       "fsky": 0.5}}), "full sky only"),
])
def test_harmonic_covariance_refused_in_one_line(write_config, over, words, capsys):
    path = write_config(over)
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    msg = str(exc.value)
    assert "covariance.kind: harmonic" in msg and words in msg and "\n" not in msg
    assert main(["check", path]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and words in err[0]
