"""The likelihood: fast template path against the direct recomputation, vectorisation, priors,
mock generation and bad input."""
import warnings

import numpy as np
import pytest

from likelihood.theory import tracer as tr
from likelihood.errors import ConfigError, DataError
from likelihood.model import build

warnings.simplefilter("ignore", tr.PlaneParallelWarning)


def _draws(lik, n, rng):
    lo, hi = lik.prior_bounds.T
    width = np.where(np.isfinite(hi - lo), 0.2 * (hi - lo), 0.5)
    return lik.start + (rng.random((n, lik.start.size)) - 0.5) * np.minimum(width, 5 * lik.start_scale + 1)


@pytest.mark.parametrize("over", [
    {},                                                               # shell window + global IC
    {"effects": {"integral_constraint": "none"}},
    {"survey": {"geometry": {"shape": "box", "volume": 8.0e9, "r_min": None, "r_max": None}}},
    {"parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0}, "fnl": {"flat": [-50, 50], "start": 1.0},
                    "b_e": {"flat": [-5, 5], "start": 0.5}, "s": {"flat": [-1, 2], "start": 0.2},
                    "shot_noise": {"fixed": 1.3}}},
])
def test_fast_path_equals_direct_path(write_config, over):
    """The template decomposition is exact: fast and direct agree to 1e-10 relative (issue 5)."""
    lik = build(write_config(over))
    rng = np.random.default_rng(0)
    for theta in _draws(lik, 6, rng):
        d = lik.theta_to_dict(theta)
        fast = lik.model_vector(d, direct=False)
        direct = lik.model_vector(d, direct=True)
        np.testing.assert_allclose(fast, direct, rtol=1e-10, atol=1e-10 * np.abs(direct).max())
        assert lik.log_likelihood(d) == pytest.approx(lik.log_likelihood_direct(d), rel=1e-10)


def test_log_prob_vectorised_and_prior(write_config):
    lik = build(write_config())
    rng = np.random.default_rng(1)
    th = _draws(lik, 7, rng)
    batch = lik.log_prob(th)
    single = np.array([lik.log_prob(t) for t in th])
    np.testing.assert_allclose(batch, single, rtol=1e-12)
    # Gaussian prior on shot_noise: N(1, 0.1) adds -0.5 ((x-1)/0.1)^2
    d = lik.theta_to_dict(th[0])
    assert single[0] == pytest.approx(lik.log_likelihood(d) - 0.5 * ((d["shot_noise"] - 1) / 0.1) ** 2)
    out = th[:3].copy()
    out[0, 0] = 7.0            # b1 above its flat prior
    out[1, 1] = np.nan         # NaN never leaks out
    out[2, 1] = -1e6
    assert np.all(lik.log_prob(out) == -np.inf)
    assert lik.log_prob(out[1]) == -np.inf


def test_noiseless_mock_is_the_model_at_truth(write_config):
    lik = build(write_config({"data": {"mock": {"noise": False}}}))
    truth = {"b1": 2.0, "fnl": 5.0, "shot_noise": 1.0}
    np.testing.assert_allclose(lik.data, lik.model_vector(truth), rtol=1e-12)
    # the fast path expands the quadratic form: round-off ~1e-15 of |d_w|^2 remains
    assert lik.log_likelihood(truth) == pytest.approx(0.0, abs=1e-12 * lik._dd)
    assert lik.log_likelihood({"b1": 2.0, "fnl": 6.0, "shot_noise": 1.0}) < 0


def test_no_window_box_mock_matches_binned_multipoles(write_config):
    """No window: the operator is the mode average of the exact multipoles (checked against an
    independent fine trapezoid average of tracer.multipoles)."""
    over = {"survey": {"geometry": {"shape": "box", "volume": 8.0e9, "r_min": None, "r_max": None}},
            "data": {"mock": {"noise": False}}}
    lik = build(write_config(over))
    edges = lik.data_full.edges
    t = tr.Tracer(b1=2.0, fnl=5.0, nbar=3e-4, b_e=0.5, s=0.2)
    ref = []
    for ell_i in range(2):
        row = []
        for lo, hi in zip(edges[:-1], edges[1:]):
            k = np.linspace(lo, hi, 4001)
            p = tr.multipoles(lik.cosmo, 1.2, k, t, ells=(0, 2), shot_noise=False)[ell_i]
            row.append(np.trapezoid(k * k * p, k) / np.trapezoid(k * k, k))
        ref.append(row)
    np.testing.assert_allclose(lik.data, np.ravel(ref), rtol=2e-5)


def test_mock_covariance_hartlap_and_t(write_config, tmp_path):
    lik0 = build(write_config())
    rng = np.random.default_rng(5)
    L = np.linalg.cholesky(lik0.covariance)
    from likelihood.data import DataVector
    dv = lik0.data_full
    mdir = tmp_path / "mocks"
    mdir.mkdir()
    for i in range(60):
        v = dv.flat + L @ rng.standard_normal(dv.flat.size)
        DataVector(dv.ells, dv.edges, dv.k_eff, dv.n_modes, v.reshape(dv.values.shape)).save(mdir / f"m{i:02d}.txt")
    lik_h = build(write_config({"covariance": {"kind": "mocks", "mocks": "mocks/m*.txt"}}, "h.yaml"))
    lik_t = build(write_config({"covariance": {"kind": "mocks", "mocks": "mocks/m*.txt", "method": "t"}}, "t.yaml"))
    d = {"b1": 2.1, "fnl": 3.0, "shot_noise": 1.0}
    chi2 = lik_h.chi2(lik_h.start * 0 + [2.1, 3.0, 1.0])
    n_d = lik_h.data.size
    # Hartlap, Simon & Schneider (2007) eq. 17
    assert lik_h.log_likelihood(d) == pytest.approx(-0.5 * (60 - n_d - 2) / 59 * chi2, rel=1e-10)
    # Sellentin & Heavens (2016) eq. 6
    assert lik_t.log_likelihood(d) == pytest.approx(-30.0 * np.log1p(chi2 / 59.0), rel=1e-10)
    # Percival et al. (2014) eq. 18 reported in the model description
    assert lik_h.percival_m1 > 1.0 and "Percival m1" in lik_h.describe()


def test_bad_inputs(write_config, tmp_path):
    with pytest.raises(ConfigError, match="did you mean 'redshift'"):
        build(write_config({"survey": {"redshfit": 1.0}}))
    with pytest.raises(ConfigError, match="lower must be below upper"):
        build(write_config({"parameters": {"b1": {"flat": [3.0, 1.0]}}}))
    with pytest.raises(ConfigError, match="outside its prior"):
        build(write_config({"parameters": {"b1": {"flat": [0.5, 5.0], "start": 9.0}}}))
    with pytest.raises(ConfigError, match="did you mean 'fnl'"):
        build(write_config({"parameters": {"fnll": {"flat": [0, 1]}}}))
    with pytest.raises(ConfigError, match="not found"):
        build(write_config({"data": {"file": "nope.txt", "mock": None}}))
    lik = build(write_config())
    with pytest.raises(ConfigError, match="did you mean 'b1'"):
        lik.log_likelihood({"b2": 1.0})
    bad = tmp_path / "bad.txt"
    bad.write_text("# ergofit data vector\n# ells: 0\n0.01 0.02 0.015 10 nan\n")
    with pytest.raises(DataError, match="NaN"):
        build(write_config({"data": {"file": "bad.txt", "mock": None, "ells": [0]}}, "bad.yaml"))


def test_yaml_exponent_strings_and_fixed_values_win(write_config):
    """'1e-3'-style numbers (strings to YAML 1.1) are accepted; a fixed b_e different from the
    mock truth is used by both the fast and the direct path."""
    over = {"survey": {"nbar": "3e-4"},
            "data": {"mock": {"truth": {"fnl": 5.0, "b_e": 1.0}}},
            "parameters": {"b1": {"flat": ["5e-1", 5.0], "start": 2.0}, "fnl": {"flat": [-50, 50]},
                           "b_e": {"fixed": 0.3}}}
    lik = build(write_config(over))
    assert lik.nbar == pytest.approx(3e-4) and lik.prior_bounds[0, 0] == 0.5
    d = {"b1": 2.05, "fnl": 2.0}
    assert lik.log_likelihood(d) == pytest.approx(lik.log_likelihood_direct(d), rel=1e-10)


def test_nu_obs_default_prior_and_percival_report(write_config):
    """nu_obs listed without a prior gets N(0, 1) (design); the observer term is switched on."""
    over = {"effects": {"observer": True},
            "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0}, "nu_obs": {"start": 0.5}}}
    lik = build(write_config(over))
    p = lik.params.free[1]
    assert p.prior.kind == "gauss" and p.prior.mean == 0.0 and p.prior.sigma == 1.0
    d = {"b1": 2.0, "nu_obs": 0.5}
    assert lik.log_prob(np.array([2.0, 0.5])) == pytest.approx(lik.log_likelihood(d) - 0.125, rel=1e-12)


def test_shot_noise_with_integral_constraint_matches_poisson_mocks(write_config):
    """Pure Poisson noise in a sphere, mean estimated from the data, flat 1/n̄ subtracted from the
    monopole: the FFT estimator (Bianchi et al. 2015 / Scoccimarro 2015 form, validated against
    FKP 1994 in test_simulate) measures (1/n̄)[resp_ℓ(k) − δ_ℓ0], with resp including the
    integral constraint −W²_ℓ(k)/W²_0(0) (Peacock & Nicholson 1991). The model must agree."""
    from likelihood.numerics.mesh import Mesh
    from likelihood.observation.estimator import measure_multipoles, window_mask
    from likelihood.simulate.fields import poisson_sample
    from likelihood.observation.window import SphereWindow
    R, nbar = 300.0, 2e-4
    over = {"survey": {"nbar": nbar, "geometry": {"shape": "sphere", "radius": R, "r_min": None,
                                                   "r_max": None}},
            "tracer": {"b1": 1.0, "fnl": 0.0, "b_e": 0.0, "s": 0.0},
            "effects": {"rsd": False, "fnl": False, "doppler": False, "potential": False},
            "data": {"mock": {"noise": False, "k_min": 0.006, "k_max": 0.05, "n_bins": 8}},
            "parameters": {"b1": {"flat": [-1.0, 2.0], "start": 0.0}}}
    lik = build(write_config(over))
    model = lik.model_vector({"b1": 0.0, "shot_noise": 1.0}).reshape(2, -1)   # no signal at b1 = 0
    mesh = Mesh(48, 4.2 * R)
    mask = window_mask(mesh, SphereWindow(R))
    zero = np.zeros((mesh.n,) * 3)
    vals = np.array([measure_multipoles(mesh, poisson_sample(mesh, zero, nbar, mask, seed=s), mask,
                                        lik.data_full.edges, (0, 2), nbar=nbar).values
                     for s in range(160)])
    mean, err = vals.mean(0), vals.std(0, ddof=1) / np.sqrt(len(vals))
    z = (mean - model) / err
    assert np.all(np.abs(z) < 4.5), z
    # the integral-constraint part is resolved: the first monopole bin is clearly below zero
    assert model[0, 0] < -4 * err[0, 0] and mean[0, 0] < -2 * err[0, 0]


def test_pickles_as_its_config(write_config):
    """Pools send the likelihood to workers: it pickles to its config (kB, not the matrices) and
    the worker's rebuilt copy gives identical values."""
    import pickle
    lik = build(write_config())
    blob = pickle.dumps(lik)
    assert len(blob) < 20000
    other = pickle.loads(blob)
    th = lik.start + 0.01
    assert other.log_prob(th) == lik.log_prob(th)


@pytest.mark.parametrize("name, value", [("b_e", 1e3), ("s", 5.0), ("h", 0.7),
                                         ("omega_c", 0.13), ("sigma8", 0.9)])
def test_parameter_that_cannot_vary_is_refused(write_config, name, value):
    """A value the fast path would fold away (fixed b_e, s) or that fixes the templates'
    cosmology is refused by name, by every evaluation path, never silently dropped (issue 15)."""
    lik = build(write_config())
    for call in (lik.log_likelihood, lik.log_likelihood_direct, lik.model_vector):
        with pytest.raises(ConfigError, match=f"'{name}' = .* cannot be varied"):
            call({name: value})
    # the value the likelihood holds is accepted and changes nothing
    held = lik._fixed_floats[name]
    assert lik.log_likelihood({name: held}) == lik.log_likelihood({})


def test_sampled_b_e_is_honoured_by_both_paths(write_config):
    """Once b_e is sampled both paths vary it and agree (fast = direct to 1e-10, model.py contract)."""
    lik = build(write_config({"parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0},
                                             "b_e": {"flat": [-2e3, 2e3], "start": 0.5}}}))
    d = {"b1": 2.0, "b_e": 1e3}
    assert lik.log_likelihood(d) == pytest.approx(lik.log_likelihood_direct(d), rel=1e-10)
    assert lik.log_likelihood(d) < lik.log_likelihood({"b1": 2.0, "b_e": 0.5}) - 1e3


def test_fnl_and_nu_refused_when_their_effect_is_off(write_config):
    lik = build(write_config({"effects": {"fnl": False},
                              "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0}}}))
    with pytest.raises(ConfigError, match="effects.fnl is off"):
        lik.log_likelihood({"fnl": 10.0})
    with pytest.raises(ConfigError, match="effects.observer is off"):
        lik.log_likelihood({"nu_obs": 2.0})


def test_cosmology_varying_fast_path_equals_direct_path(write_config):
    """With h and ω_c sampled the fast path rebuilds its templates per point (observer term on,
    shell window, global integral constraint): it equals the direct recomputation to 1e-8 at
    points away from the fiducial cosmology (issue 16), and the cosmology really enters."""
    lik = build(write_config({
        "effects": {"observer": True},
        "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0},
                       "fnl": {"flat": [-200.0, 200.0], "start": 0.0},
                       "nu_obs": {"gauss": [0.0, 1.0], "start": 1.0},
                       "shot_noise": {"gauss": [1.0, 0.1], "start": 1.0},
                       "h": {"flat": [0.6, 0.75], "start": 0.6736},
                       "omega_c": {"flat": [0.08, 0.16], "start": 0.12}}}))
    assert lik.cosmo_free == ["h", "omega_c"] and lik.observer is not None
    fid = lik.model_vector({"b1": 2.2, "fnl": 20.0, "nu_obs": 1.7, "shot_noise": 1.1})
    for d in ({"h": 0.70, "omega_c": 0.105, "b1": 2.2, "fnl": 20.0, "nu_obs": 1.7, "shot_noise": 1.1},
              {"h": 0.62, "omega_c": 0.145, "b1": 1.6, "fnl": -60.0, "nu_obs": -2.4, "shot_noise": 0.9}):
        fast = lik.model_vector(d, direct=False)
        direct = lik.model_vector(d, direct=True)
        np.testing.assert_allclose(fast, direct, rtol=1e-8, atol=1e-8 * np.abs(direct).max())
        assert lik.log_likelihood(d) == pytest.approx(lik.log_likelihood_direct(d), rel=1e-8)
        theta = np.array([d[n] for n in lik.parameter_names])
        assert lik.log_prob(theta) == pytest.approx(
            lik.log_likelihood_direct(d) + float(lik.params.log_prior(theta[None])[0]), rel=1e-8)
    assert np.max(np.abs(lik.model_vector(d) - fid) / np.abs(fid)) > 1e-2
