"""Forecast bias from neglecting the observer terms of a curved-sky truth model
(forecast.neglect: observer_motion, observer_potential)."""
import warnings

import numpy as np
from scipy.optimize import minimize

from likelihood.config import load_config
from likelihood.config.variants import analysis_config
from likelihood.forecast.bias import bias_forecast
from tests.conftest import merge
from tests.forecast.test_curved_neglect import CURVED, _cache_in_tmp  # noqa: F401 (fixture)

TRUTH = merge(CURVED, {"effects": {"integral_constraint": "global",
                                   "observer_motion": "conditioned", "observer_potential": True},
                       "observer": {"speed": 369.82},
                       "data": {"mock": {"k_min": 0.002, "n_bins": 6}}})


def test_neglected_observer_terms(write_config):
    """The analysis without the observer terms drops them and the conditioning speed; its
    first-order f_NL bias (Knox, Scoccimarro & Dodelson 1998) equals the shift of the χ²
    minimum of that analysis fitted to the noiseless truth to 10 % (as
    tests/forecast/test_curved_neglect.py), and the plane-parallel analysis of the same truth
    is a valid config."""
    cfg = load_config(write_config(TRUTH))
    ana_cfg = analysis_config(cfg, ["observer_motion", "observer_potential"])
    assert not ana_cfg["effects"].get("observer_motion")
    assert "speed" not in ana_cfg["observer"]
    pp = analysis_config(cfg, ["plane_parallel"])
    assert "engine" not in pp.raw and "observer_motion" not in pp["effects"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = bias_forecast(cfg, neglect=["observer_motion", "observer_potential"],
                            parameters=["b1", "fnl"])
        from likelihood.model import build
        ana = build(res.analysis_config)
    L_inv = np.linalg.inv(ana.chol)

    def chi2(th):
        w = L_inv @ (res.mu_truth - ana.model_vector({"b1": th[0], "fnl": th[1]}, direct=False))
        return float(w @ w)
    start = np.array([ana.fiducial["b1"], ana.fiducial["fnl"]])
    best = minimize(chi2, start, method="Nelder-Mead",
                    options={"xatol": 1e-8, "fatol": 1e-14, "maxiter": 4000}).x
    shift = best - start
    assert np.all(np.abs(res.delta - shift) <= 0.1 * np.abs(shift) + 1e-3 * res.fisher.errors)
    assert res.value("delta") != 0.0
