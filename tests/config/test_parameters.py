"""Parameter parsing and priors (likelihood.config.parameters), without building a model.

Reference values: the log density of a Gaussian N(m, σ) up to its constant is −(x − m)²/(2σ²),
zero for a flat prior inside its bounds (definitions, common practice); the numbers below are
worked by hand from the config entries.
"""
import numpy as np
import pytest

from likelihood.config.parameters import DEFAULT_PRIORS, KNOWN, ParameterSet, Prior, parse_parameter
from likelihood.errors import ConfigError


def test_flat_and_gauss_entries():
    p, v = parse_parameter("b1", {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.01}, "c.yaml: parameters")
    assert v is None and (p.prior.kind, p.prior.lower, p.prior.upper) == ("flat", 0.5, 5.0)
    assert (p.start, p.scale) == (2.0, 0.01)
    g, _ = parse_parameter("shot_noise", {"gauss": [1.0, 0.1], "bounds": [0.0, 3.0]}, "w")
    assert (g.prior.mean, g.prior.sigma, g.prior.lower, g.prior.upper) == (1.0, 0.1, 0.0, 3.0)
    assert g.start == 1.0 and g.scale == pytest.approx(1e-3)     # default scale: 1% of sigma


def test_defaults_fixed_values_and_yaml_strings():
    p, _ = parse_parameter("fnl", {"flat": [-100, 300]}, "w")
    # the default start is the parameter's default value when inside the prior, the scale 1% of
    # the width
    assert p.start == KNOWN["fnl"].default and p.scale == pytest.approx(4.0)
    assert parse_parameter("b_e", {"fixed": 0.3}, "w") == (None, 0.3)
    assert parse_parameter("b_e", 0.3, "w") == (None, 0.3)
    p, _ = parse_parameter("b1", {"flat": ["5e-1", "5e0"]}, "w")    # YAML 1.1 exponent strings
    assert (p.prior.lower, p.prior.upper) == (0.5, 5.0)
    nu, _ = parse_parameter("nu_obs", {"start": 0.5}, "w")           # design: N(0, 1) by default
    assert DEFAULT_PRIORS["nu_obs"] == {"gauss": [0.0, 1.0]}
    assert (nu.prior.kind, nu.prior.mean, nu.prior.sigma, nu.start) == ("gauss", 0.0, 1.0, 0.5)


@pytest.mark.parametrize("name, spec, needle", [
    ("b2", {"flat": [0, 1]}, "did you mean 'b1'"),
    ("b1", {"flat": [3.0, 1.0]}, "lower must be below upper"),
    ("b1", {"flat": [0, 1], "gauss": [0, 1]}, "exactly one of fixed / flat / gauss"),
    ("b1", {"flat": [0, 1], "strat": 0.5}, "did you mean 'start'"),
    ("b1", {"flat": [0, "x"]}, "expected two numbers"),
    ("b1", {"gauss": [1.0, -1.0]}, "sigma must be > 0"),
    ("b1", {"flat": [0, 1], "scale": 0.0}, "must be > 0"),
    ("b1", {"fixed": float("nan")}, "expected a finite number"),
    ("b1", "wide", "expected a mapping"),
])
def test_bad_entries_name_the_key(name, spec, needle):
    with pytest.raises(ConfigError, match=needle) as exc:
        parse_parameter(name, spec, "c.yaml: parameters")
    assert "\n" not in str(exc.value)


def test_log_prior_values():
    flat, _ = parse_parameter("b1", {"flat": [0.5, 5.0]}, "w")
    gauss, _ = parse_parameter("shot_noise", {"gauss": [1.0, 0.1]}, "w")
    ps = ParameterSet([flat, gauss], {"b_e": 0.3})
    assert ps.names == ["b1", "shot_noise"] and ps.fixed == {"b_e": 0.3}
    theta = np.array([[2.0, 1.0], [2.0, 1.25], [6.0, 1.0], [np.nan, 1.0]])
    lp = ps.log_prior(theta)
    # -(x - m)^2 / (2 sigma^2): 0 at the mean, -(0.25/0.1)^2/2 = -3.125 at 1.25
    assert lp[0] == 0.0 and lp[1] == pytest.approx(-3.125, rel=1e-14)
    assert lp[2] == -np.inf and lp[3] == -np.inf            # outside the bounds, NaN: -inf
    assert Prior("gauss", 0.0, 2.0, 1.0, 0.5).log_pdf(1.5) == pytest.approx(-0.5)
    assert Prior("gauss", 0.0, 2.0, 1.0, 0.5).log_pdf(2.5) == -np.inf
