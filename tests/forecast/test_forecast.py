"""Tests of likelihood.forecast.bias: Fisher matrices, biases from neglected effects, scans, MCMC check.

Each check names the outside source of its reference value.
"""
from __future__ import annotations

import argparse
import csv
import json
import math
import os
import warnings

import numpy as np
import pytest
from scipy import integrate, optimize

from likelihood.cli.commands import cmd_forecast
from likelihood import forecast as fc
from likelihood.config import load_config, validate
from likelihood.errors import ConfigError, ErgofitError
from likelihood.model import build
from likelihood.sampling import SamplerSettings

HERE = os.path.dirname(os.path.abspath(__file__))
DEMO = os.path.join(HERE, os.pardir, os.pardir, "configs", "fnl_bias.yaml")

# A periodic box (no window, no integral constraint): fast to build, exact mode counting.
BOX = """\
run: box
survey:
  redshift: {z}
  nbar: {nbar}
  geometry: {{shape: box, volume: {volume}}}
tracer: {{b1: 2.0, fnl: 0.0, b_e: {b_e}, s: 0.0}}
effects: {{doppler: {doppler}, potential: {potential}, fnl: {fnl_on}}}
data:
  mock: {{noise: false, k_min: 0.002, k_max: {k_max}, n_bins: {n_bins}}}
  ells: {ells}
parameters:
{parameters}
sampling: {{walkers: 16, max_steps: 4000, check_every: 500, seed: 3, progress: false}}
forecast:
{forecast}
"""
PARAMS_B1_FNL = """\
  b1: {flat: [0.5, 6.0], scale: 0.01}
  fnl: {flat: [-300, 300], scale: 1.0}"""


def write_box(tmp_path, name="box.yaml", z=1.0, nbar="1.0e-2", volume="1.0e+11", b_e=3.0,
              doppler="true", potential="true", fnl_on="true", k_max=0.03, n_bins=8, ells="[0]",
              parameters=PARAMS_B1_FNL, forecast="  neglect: [doppler, potential]"):
    path = tmp_path / name
    path.write_text(BOX.format(z=z, nbar=nbar, volume=volume, b_e=b_e, doppler=doppler,
                               potential=potential, fnl_on=fnl_on, k_max=k_max, n_bins=n_bins,
                               ells=ells, parameters=parameters, forecast=forecast))
    return str(path)


@pytest.fixture(autouse=True)
def _quiet():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


# --------------------------------------------------------------------------------------------
# Fisher matrix against exact references
# --------------------------------------------------------------------------------------------

def _toy():
    rng = np.random.default_rng(42)
    n, p = 6, 2
    A = rng.normal(size=(n, p))
    c0 = rng.normal(size=n)
    M = rng.normal(size=(n, n))
    C = M @ M.T + n * np.eye(n)
    return A, c0, C


def test_fisher_equals_posterior_covariance_of_linear_gaussian_toy():
    """Linear model μ = Aθ + c with Gaussian noise C and flat priors: the posterior is exactly
    Gaussian with covariance F⁻¹ = (AᵀC⁻¹A)⁻¹ (Tegmark, Taylor & Heavens 1997, ApJ 480, 22,
    Sec. 2; common practice). Reference: the posterior moments by brute-force integration of
    exp(−χ²/2) on a grid (scipy/numpy quadrature), independent of any matrix inversion. The bias
    formula must give the posterior mean for data shifted by δ (exact for a linear model)."""
    A, c0, C = _toy()
    L = np.linalg.cholesky(C)
    theta0 = {"a": 0.7, "b": -1.3}

    def model(p):
        return A @ np.array([p["a"], p["b"]]) + c0

    D, infos = [], []
    for name in ("a", "b"):
        d, info = fc.derivative(model, theta0, name, 0.3, L)
        D.append(d)
        infos.append(info)
    np.testing.assert_allclose(np.array(D), A.T, rtol=1e-10, atol=1e-12)
    assert all(i["stable"] for i in infos)
    F = fc.fisher_from_derivatives(np.array(D), L, ["a", "b"], fiducial=[0.7, -1.3])

    delta = np.array([0.5, -0.2, 0.1, 0.3, -0.4, 0.2])
    data = model(theta0) + delta
    Cinv = np.linalg.inv(C)
    s = np.sqrt(np.diag(np.linalg.inv(A.T @ Cinv @ A)))  # only sets the grid extent
    ga = np.linspace(0.7 - 12 * s[0], 0.7 + 12 * s[0], 1201)
    gb = np.linspace(-1.3 - 12 * s[1], -1.3 + 12 * s[1], 1201)
    TA, TB = np.meshgrid(ga, gb, indexing="ij")
    mu = TA[..., None] * A[:, 0] + TB[..., None] * A[:, 1] + c0
    r = data - mu
    chi2 = np.einsum("...i,ij,...j->...", r, Cinv, r)
    w = np.exp(-0.5 * (chi2 - chi2.min()))
    norm = integrate.trapezoid(integrate.trapezoid(w, gb, axis=1), ga)
    mom = lambda f: integrate.trapezoid(integrate.trapezoid(w * f, gb, axis=1), ga) / norm  # noqa
    ma, mb = mom(TA), mom(TB)
    cov_grid = np.array([[mom((TA - ma) ** 2), mom((TA - ma) * (TB - mb))],
                         [mom((TA - ma) * (TB - mb)), mom((TB - mb) ** 2)]])
    np.testing.assert_allclose(F.covariance, cov_grid, rtol=1e-5)
    np.testing.assert_allclose(F.fiducial + F.bias(delta), [ma, mb], rtol=0, atol=1e-5 * s.max())
    # a model error inside the span of the derivatives is absorbed completely; its χ² is
    # vᵀ AᵀC⁻¹A v (direct evaluation)
    v = np.array([0.3, -0.8])
    total, left = F.chi2_of(A @ v)
    assert total == pytest.approx(v @ A.T @ Cinv @ A @ v, rel=1e-12)
    assert left < 1e-20 * total
    np.testing.assert_allclose(F.bias(A @ v), v, rtol=1e-12)


def test_derivative_exact_for_quadratic_and_richardson_for_smooth_model():
    """Central differences are exact for polynomials of degree ≤ 2, and the halving +
    Richardson scheme reaches step_rtol on a smooth non-polynomial model (common practice;
    reference derivative: the analytic one of exp and sin)."""
    v = np.array([1.0, -2.0, 0.5])
    L = np.eye(3)
    d, info = fc.derivative(lambda p: (p["x"] ** 2 - 3 * p["x"]) * v, {"x": 1.7}, "x", 5.0, L)
    np.testing.assert_allclose(d, (2 * 1.7 - 3) * v, rtol=1e-12)
    assert info["stable"] and info["step"] == 2.5
    d, info = fc.derivative(lambda p: np.array([np.exp(p["x"]), np.sin(p["x"]), p["x"] ** 4]),
                            {"x": 0.4}, "x", 0.5, L, rtol=1e-6)
    np.testing.assert_allclose(d, [np.exp(0.4), np.cos(0.4), 4 * 0.4 ** 3], rtol=1e-6)
    assert info["stable"]


def test_fisher_of_kaiser_monopole_matches_mode_counting(tmp_path):
    """Box, Kaiser RSD only, monopole, one parameter b1: σ(b1)⁻² = Σ_i (∂P0_i/∂b1)² / Var_i with
    P0 = (b1² + 2 b1 f/3 + f²/5) P_m (Kaiser 1987, eq. 3.10 averaged over μ), ∂P0/∂b1 =
    2 (b1 + f/3) P_m, Var_i = (2/N_i) ∫₀¹ [(b1 + f μ²)² P_m(k_i) + 1/n̄]² dμ (Feldman, Kaiser &
    Peacock 1994 mode counting) and N_i = V (k₂³ − k₁³)/(6π²) modes (k and −k counted).
    The μ integral is done by scipy quad, N_i from the bin edges."""
    path = write_box(tmp_path, doppler="false", potential="false", fnl_on="false", nbar="3.0e-4",
                     ells="[0]", parameters="  b1: {flat: [0.5, 6.0], scale: 0.01}",
                     forecast="  neglect: []")
    lik = build(path)
    F = fc.likelihood_fisher(lik)
    b1, f = 2.0, float(lik.cosmo.growth_rate(1.0))
    kaiser0 = b1 ** 2 + 2 * b1 * f / 3 + f ** 2 / 5
    pm_bin = lik.model_vector({}) / kaiser0          # mode-averaged P_m of each bin
    edges = lik.data_full.edges
    n_modes = 1.0e11 * (edges[1:] ** 3 - edges[:-1] ** 3) / (6 * np.pi ** 2)
    k_eff = lik.data_full.k_eff
    pm_keff = lik.cosmo.power(k_eff, 1.0)
    var = np.array([2.0 / n * integrate.quad(lambda m: ((b1 + f * m * m) ** 2 * p + 1 / 3e-4) ** 2,
                                             0, 1, epsabs=0, epsrel=1e-12)[0]
                    for n, p in zip(n_modes, pm_keff)])
    sigma = np.sum((2 * (b1 + f / 3) * pm_bin) ** 2 / var) ** -0.5
    assert F.errors[0] == pytest.approx(sigma, rel=1e-8)
    assert F.conditional_errors[0] == pytest.approx(sigma, rel=1e-8)


def test_sigma_fnl_scales_as_inverse_sqrt_volume(tmp_path):
    """At fixed k bins, in a box without window and with a large n̄ (sample-variance dominated),
    every mode count scales with V, so σ ∝ V^(−1/2) (common practice: Tegmark 1997 mode
    counting). Four times the volume must halve σ(f_NL) and σ(b1)."""
    s = []
    for vol in ("1.0e+11", "4.0e+11"):
        path = write_box(tmp_path, name=f"v{vol}.yaml", volume=vol, nbar="1.0", forecast="  neglect: []")
        s.append(fc.bias_forecast(path).fisher.errors)
    np.testing.assert_allclose(s[1] / s[0], 0.5, rtol=1e-9)


# --------------------------------------------------------------------------------------------
# Bias
# --------------------------------------------------------------------------------------------

def test_zero_bias_when_truth_equals_analysis(tmp_path):
    """Nothing neglected: the truth and analysis models coincide and Δθ = 0 (common practice)."""
    res = fc.bias_forecast(write_box(tmp_path, forecast="  neglect: []"))
    assert np.all(np.abs(res.delta_over_sigma) < 1e-10)
    assert res.chi2_total < 1e-20


def test_bias_recovers_an_injected_parameter_shift(tmp_path):
    """Data made with θ_fid + ε e_j: the shift formula returns ε e_j; exactly for the shot-noise
    amplitude (the model is linear in it), to O(ε²) for b1 (common practice: the formula is the
    Gauss–Newton step of the χ² minimisation)."""
    path = write_box(tmp_path, ells="[0, 2]", parameters=PARAMS_B1_FNL + "\n  shot_noise: {flat: [0, 3], scale: 0.05}",
                     nbar="3.0e-4", forecast="  neglect: []")
    lik = build(path)
    F = fc.likelihood_fisher(lik)
    base = lik.model_vector({})
    eps = 0.01
    d = F.bias(lik.model_vector({"shot_noise": 1.0 + eps}) - base)
    np.testing.assert_allclose(d, [0.0, 0.0, eps], atol=1e-10 * eps)
    d = F.bias(lik.model_vector({"b1": 2.0 + 1e-4}) - base)
    np.testing.assert_allclose(d / 1e-4, [1.0, 0.0, 0.0], atol=1e-3)


def test_bias_is_linear_in_a_small_systematic_and_matches_exact_best_fit(tmp_path):
    """Inject ε × (projection-term signal) into noiseless data; the exact best fit of the
    analysis model (scipy.optimize.minimize of χ²) moves by ε Δθ₁ + O(ε²) (common practice):
    the relative difference between the Fisher shift and the exact one shrinks ∝ ε."""
    path = write_box(tmp_path, ells="[0, 2]", nbar="3.0e-4")
    res = fc.bias_forecast(path)
    alik = build(res.analysis_config)
    sysvec = res.mu_truth - res.mu_analysis
    F = res.fisher
    L = alik.chol

    def best_fit(data):
        def chi2(t):
            r = np.linalg.solve(L, data - alik.model_vector({"b1": t[0], "fnl": t[1]}, direct=False))
            return r @ r
        out = optimize.minimize(chi2, F.fiducial, method="Nelder-Mead",
                                options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 20000})
        return out.x - F.fiducial

    errs = []
    for eps in (20.0, 10.0, 5.0):
        fisher_shift = F.bias(eps * sysvec)
        np.testing.assert_allclose(fisher_shift, eps * res.delta, rtol=1e-12)
        exact = best_fit(res.mu_analysis + eps * sysvec)
        errs.append(abs(exact[1] - fisher_shift[1]) / abs(fisher_shift[1]))
    assert errs[-1] < 0.1
    assert errs[0] / errs[1] == pytest.approx(2.0, rel=0.25)
    assert errs[1] / errs[2] == pytest.approx(2.0, rel=0.25)


def test_effective_fnl_of_neglected_terms_and_bias_sign(tmp_path):
    """When only the projection terms are neglected and f_NL is the parameter that can absorb a
    k⁻² excess, the f_NL shift has the sign and roughly the size of the f_NL they mimic at k → 0
    (effective f_NL: the leading k⁻² term of the monopole, Bruni et al. 2012, PRD 85, 041301 —
    cited from memory). Tolerance 30%: the two differ by the k⁻¹/k⁻⁴ terms and b1 absorbing part."""
    res = fc.bias_forecast(write_box(tmp_path, ells="[0, 2]", nbar="3.0e-4"))
    dfnl = res.value("delta")
    assert res.fnl_eff_neglected == res.fnl_eff_projection
    assert dfnl == pytest.approx(res.fnl_eff_neglected, rel=0.3)


OBS = """\
run: obs
survey:
  redshift: 1.0
  nbar: 3.0e-4
  geometry: {{shape: sphere, radius: 2000}}
tracer: {{b1: 2.0, fnl: 0.0, b_e: 0.0, s: 0.2}}
effects: {{observer: true, doppler: false, potential: false}}
observer: {{field: density, smoothing: 20.0, nu_true: {nu}}}
data:
  mock: {{noise: false, k_min: 0.003, k_max: 0.03, n_bins: 8}}
  ells: [0, 2]
parameters:
  b1: {{flat: [0.5, 6], scale: 0.01}}
  fnl: {{flat: [-100, 100], scale: 0.5}}
{extra}forecast: {{neglect: [{neglect}]}}
"""


def test_neglected_observer_term_bias_scales_as_nu_squared_minus_one(tmp_path):
    """Hoffman & Ribak (1991) conditioning: the expected multipoles given the observer's value
    shift by (ν² − 1) E[m] (design document, observer section), so neglecting the observer term
    gives no bias at ν = 1 and a bias ∝ ν² − 1 otherwise: Δ(ν=3)/Δ(ν=2) = 8/3."""
    pytest.importorskip("likelihood.observation.observer")
    deltas = {}
    for nu in (1.0, 2.0, 3.0):
        p = tmp_path / f"obs{nu}.yaml"
        p.write_text(OBS.format(nu=nu, extra="", neglect="observer"))
        deltas[nu] = fc.bias_forecast(str(p)).delta
    assert np.all(deltas[1.0] == 0.0)
    assert np.any(deltas[2.0] != 0.0)
    np.testing.assert_allclose(deltas[3.0] / deltas[2.0], 8.0 / 3.0, rtol=1e-8)


def test_observer_nuisance_at_zero_is_prior_only(tmp_path):
    """At ν = 0 the model depends on ν only through ν² (zero first derivative): the Fisher
    error of nu_obs is its N(0, 1) prior width (common practice), with a warning, not an error."""
    pytest.importorskip("likelihood.observation.observer")
    p = tmp_path / "obs0.yaml"
    p.write_text(OBS.format(nu=0.0, extra="  nu_obs: {gauss: [0, 1], start: 0.0}\n", neglect=""))
    res = fc.bias_forecast(str(p))
    assert res.fisher.errors[res.fisher.index("nu_obs")] == pytest.approx(1.0, rel=1e-12)
    assert any("nu_obs" in w and "prior width" in w for w in res.warnings)


# --------------------------------------------------------------------------------------------
# Config variants and scans
# --------------------------------------------------------------------------------------------

def test_config_round_trip_keeps_the_hash(tmp_path):
    """config_to_raw is the inverse of validate (same hash), including the demo config."""
    for path in (write_box(tmp_path), DEMO):
        cfg = load_config(path)
        again = validate(fc.config_to_raw(cfg), src=cfg.path, base_dir=cfg.base_dir)
        assert again.hash == cfg.hash


def test_analysis_config_switches_off_the_neglected_effects():
    cfg = load_config(DEMO)
    a = fc.analysis_config(cfg, ["doppler", "potential", "integral_constraint", "window"])
    e = a["effects"]
    assert (e["doppler"], e["potential"], e["integral_constraint"], e["window"]) == \
        (False, False, "none", False)
    assert e["rsd"] and e["fnl"]
    assert fc.analysis_config(cfg, []) is cfg


def test_redshift_scan_recentres_the_shell_at_the_comoving_distance():
    """Shell re-centred at χ(z): reference χ from astropy.cosmology.FlatLambdaCDM with the same
    Ω_m and H0 = 100 km/s/Mpc (distances in Mpc/h), no radiation (as the ergofit background)."""
    from astropy.cosmology import FlatLambdaCDM
    cfg = load_config(DEMO)
    om = build(cfg).cosmo.Omega_m0
    ref = FlatLambdaCDM(H0=100.0, Om0=om, Tcmb0=0.0)
    g0 = cfg["survey"]["geometry"]
    for z in (0.8, 2.7):
        c, notes = fc.scan_config(cfg, "redshift", z)
        g = c["survey"]["geometry"]
        chi = ref.comoving_distance(z).value
        assert 0.5 * (g["r_min"] + g["r_max"]) == pytest.approx(chi, rel=1e-6)
        assert g["r_max"] - g["r_min"] == pytest.approx(g0["r_max"] - g0["r_min"], rel=1e-12)
        c, notes = fc.scan_config(cfg, "redshift", z, redshift_geometry="fixed_volume")
        g = c["survey"]["geometry"]
        assert g["r_max"] ** 3 - g["r_min"] ** 3 == pytest.approx(g0["r_max"] ** 3 - g0["r_min"] ** 3,
                                                                  rel=1e-8)
        if z == 0.8:   # the demo's volume does not fit in a shell centred at chi(0.8)
            assert g["r_min"] == 0.0 and "would reach the observer" in notes[0]
        else:
            assert 0.5 * (g["r_min"] + g["r_max"]) == pytest.approx(chi, rel=1e-6)
        assert c["survey"]["redshift"] == z


def test_inverse_growth_bias_evolution():
    """b1(z) D(z) constant (common practice); reference growth: the Heath (1977) integral
    D ∝ E(z) ∫_z^∞ (1+z')/E³ dz' evaluated with scipy quad (ΛCDM, no radiation)."""
    cfg = load_config(DEMO)
    om = build(cfg).cosmo.Omega_m0
    E = lambda z: math.sqrt(om * (1 + z) ** 3 + 1 - om)  # noqa: E731
    D = lambda z: E(z) * integrate.quad(lambda x: (1 + x) / E(x) ** 3, z, np.inf,  # noqa: E731
                                        epsrel=1e-12)[0]
    c, _ = fc.scan_config(cfg, "redshift", 0.7, bias_evolution="inverse_growth")
    b1 = c["tracer"]["b1"]
    assert b1 == pytest.approx(2.4 * D(2.0) / D(0.7), rel=1e-6)
    assert c["data"]["mock"]["truth"]["b1"] == b1 and c["parameters"]["b1"]["start"] == b1


def test_scan_on_a_process_pool_matches_serial(tmp_path):
    """Grid points are independent: a 2-process pool gives the same rows as the serial loop."""
    import multiprocessing
    path = write_box(tmp_path, ells="[0, 2]", nbar="3.0e-4",
                     forecast="  neglect: [doppler, potential]\n"
                              "  scan: {quantity: b_e, values: [-2.0, 0.0, 4.0]}")
    serial = fc.bias_scan(path)
    with multiprocessing.get_context("fork").Pool(2) as pool:
        par = fc.bias_scan(path, pool=pool)
    assert [r["b_e"] for r in serial.rows] == [-2.0, 0.0, 4.0]
    for a, b in zip(serial.rows, par.rows):
        assert a == pytest.approx(b, rel=1e-12)
    # V ∝ nothing here; sanity against the single-point forecast at the same b_e
    one = fc.bias_forecast(fc.scan_config(load_config(path), "b_e", 4.0)[0])
    assert serial.rows[2]["delta_fnl"] == pytest.approx(one.value("delta"), rel=1e-12)


def test_volume_scan_follows_inverse_sqrt_volume(tmp_path):
    """The scan machinery (box volume) reproduces σ ∝ V^(−1/2) (common practice)."""
    path = write_box(tmp_path, nbar="1.0", forecast="  neglect: []\n"
                     "  scan: {quantity: volume, range: [1.0e+10, 1.6e+11, 3], spacing: log}")
    rows = fc.bias_scan(path).rows
    v = np.array([r["volume"] for r in rows])
    s = np.array([r["sigma_fnl"] for r in rows])
    np.testing.assert_allclose(v, [1e10, 4e10, 1.6e11], rtol=1e-12)
    np.testing.assert_allclose(s * np.sqrt(v), s[0] * np.sqrt(v[0]), rtol=1e-9)


# --------------------------------------------------------------------------------------------
# End to end: outputs, command line, MCMC check
# --------------------------------------------------------------------------------------------

def _args(config, out, **kw):
    return argparse.Namespace(config=config, out=str(out), check_mcmc=kw.get("check_mcmc", False),
                              mpi=kw.get("mpi", False), processes=kw.get("processes", 0))


def test_forecast_cli_writes_consistent_outputs(tmp_path, capsys):
    path = write_box(tmp_path, ells="[0, 2]", nbar="3.0e-4",
                     forecast="  neglect: [doppler, potential]\n  threshold: 0.05\n"
                              "  scan: {quantity: redshift, values: [1.0, 2.0]}")
    out = tmp_path / "fc"
    assert cmd_forecast(_args(path, out)) == 0
    for name in ("fisher.json", "forecast.md", "ellipses.png", "scan.csv", "scan.md", "scan.png"):
        assert (out / name).stat().st_size > 0
    doc = json.loads((out / "fisher.json").read_text())
    res = fc.bias_forecast(path)
    assert doc["errors"]["fnl"] == pytest.approx(res.value("sigma"), rel=1e-12)
    assert doc["bias"]["delta"]["fnl"] == pytest.approx(res.value("delta"), rel=1e-12)
    cov = np.array(doc["parameter_covariance"])
    np.testing.assert_allclose(cov @ np.array(doc["fisher_matrix"]), np.eye(2), atol=1e-9)
    rows = list(csv.DictReader(open(out / "scan.csv")))
    assert [float(r["redshift"]) for r in rows] == [1.0, 2.0]
    assert float(rows[0]["sigma_fnl"]) == pytest.approx(res.value("sigma"), rel=1e-6)
    assert not list(out.glob(".*tmp"))      # no temporary file left behind
    printed = capsys.readouterr().out
    assert "fnl" in printed and "scan over redshift" in printed


def test_mcmc_check_agrees_with_fisher_small_case(tmp_path):
    """Noiseless truth mock analysed without the projection terms: the MCMC posterior mean shift
    equals the Fisher shift within 0.2 σ and the width within 15% for a near-Gaussian posterior
    (common practice: the Fisher matrix is the Laplace approximation of the posterior)."""
    path = write_box(tmp_path, z=1.5, volume="2.0e+12", nbar="3.0e-4", b_e=4.0, ells="[0, 2]")
    res = fc.bias_forecast(path)
    assert 0.3 < abs(res.value("ratio")) < 3        # a shift worth checking
    chk = fc.mcmc_check(res, str(tmp_path / "mc"),
                        SamplerSettings(n_walkers=16, max_steps=3000, check_every=500,
                                        seed=1, progress=False))
    e = chk["parameters"]["fnl"]
    assert abs(e["shift_difference_over_sigma"]) < 0.2
    assert e["width_ratio"] == pytest.approx(1.0, abs=0.15)
    assert chk["agree"]


def test_demo_fisher_width_matches_mcmc_short():
    """Demo survey (window, integral constraint, projection terms): Fisher σ(f_NL) vs the width
    of a short MCMC run on the noiseless truth mock, within 15% (common practice)."""
    res = fc.bias_forecast(DEMO)
    import tempfile
    with tempfile.TemporaryDirectory() as d:
        chk = fc.mcmc_check(res, d, SamplerSettings(n_walkers=24, max_steps=1500, check_every=500,
                                                    seed=2, progress=False))
    for name in ("fnl", "b1"):
        assert chk["parameters"][name]["width_ratio"] == pytest.approx(1.0, abs=0.15)
    assert abs(chk["parameters"]["fnl"]["shift_difference_over_sigma"]) < 0.2


@pytest.mark.slow
def test_demo_fisher_matches_converged_mcmc(tmp_path):
    """Longer version: converged chain, width within 15% and shift within 0.2 σ for every
    parameter (common practice)."""
    res = fc.bias_forecast(DEMO)
    chk = fc.mcmc_check(res, str(tmp_path / "mc"),
                        SamplerSettings(n_walkers=32, max_steps=40000, check_every=500, seed=9,
                                        progress=False))
    assert chk["converged"]
    for e in chk["parameters"].values():
        assert e["width_ratio"] == pytest.approx(1.0, abs=0.15)
        assert abs(e["shift_difference_over_sigma"]) < 0.2


@pytest.mark.slow
def test_demo_config_runs_and_flags_high_redshift(tmp_path):
    """The demo's redshift scan: σ(f_NL) falls with z and the projection-term shift passes 0.5 σ
    somewhere on the grid (the demo's purpose); finishes in well under a minute."""
    import time
    t0 = time.time()
    res = fc.run_forecast(DEMO, str(tmp_path / "demo"))
    assert time.time() - t0 < 60
    rows = res["scan"].rows
    s = [r["sigma_fnl"] for r in rows]
    assert all(a > b for a, b in zip(s, s[1:]))
    assert res["scan"].exceeding()


# --------------------------------------------------------------------------------------------
# Bad input: one-line errors
# --------------------------------------------------------------------------------------------

def _one_line(exc):
    msg = str(exc.value)
    assert "\n" not in msg and msg
    return msg


@pytest.mark.parametrize("scan, words", [
    ("{quantity: nu_obs, values: [0.5, 1.0]}", ["nu_obs", "cannot be scanned"]),
    ("{quantity: redshfit, values: [1.0]}", ["redshfit", "did you mean 'redshift'"]),
    ("{quantity: b1, values: []}", ["grid is empty"]),
    ("{quantity: b1, range: [1.0, 2.0, 0]}", ["grid is empty"]),
    ("{quantity: nbar, values: [1.0e-3, -1.0]}", ["nbar must be > 0"]),
    ("{quantity: b1}", ["exactly one of"]),
])
def test_bad_scan_sections(tmp_path, scan, words):
    path = write_box(tmp_path, forecast=f"  scan: {scan}")
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    msg = _one_line(exc)
    assert "forecast.scan" in msg and all(w in msg for w in words)


def test_fsky_scan_needs_a_cap_geometry(tmp_path):
    path = write_box(tmp_path, forecast="  scan: {quantity: fsky, values: [0.3]}")
    with pytest.raises(ErgofitError) as exc:
        fc.bias_scan(path)
    assert "fsky needs a shell or cap geometry" in _one_line(exc)


def test_singular_fisher_names_the_degenerate_parameters(tmp_path):
    """Without the Doppler term, b_e and s enter only through γ2 (linearly), so their
    derivatives are proportional (design document's γ2 formula): F is singular."""
    params = PARAMS_B1_FNL + ("\n  b_e: {flat: [-10, 10], scale: 0.1}"
                              "\n  s: {flat: [-2, 2], scale: 0.05}")
    path = write_box(tmp_path, doppler="false", parameters=params, ells="[0, 2]",
                     forecast="  neglect: []")
    with pytest.raises(ErgofitError) as exc:
        fc.bias_forecast(path)
    msg = _one_line(exc)
    assert "singular" in msg and "are degenerate" in msg
    assert "parameters s, b_e are" in msg or "parameters b_e, s are" in msg
    # a prior lifts the degeneracy; the data say nothing about s once b_e is free, so its
    # marginalised error is the prior width (common practice)
    res = fc.bias_forecast(path, priors={"s": 0.1})
    assert res.fisher.errors[res.fisher.index("s")] == pytest.approx(0.1, rel=1e-4)


def test_neglecting_a_sampled_parameters_effect_is_a_clear_error(tmp_path):
    path = write_box(tmp_path, forecast="  neglect: [fnl]")
    with pytest.raises(ErgofitError) as exc:
        fc.bias_forecast(path)
    assert "does not depend on 'fnl'" in _one_line(exc)


def test_forecast_parameters_must_be_sampled(tmp_path):
    path = write_box(tmp_path, forecast="  parameters: [b1, fnl, s]")
    with pytest.raises(ConfigError) as exc:
        fc.bias_forecast(path)
    assert "'s' is not sampled" in _one_line(exc)


def test_mpi_outside_mpiexec_is_a_clear_error(tmp_path):
    """--mpi without the optional extra, or outside mpiexec (one rank): one-line error."""
    with pytest.raises(ErgofitError) as exc:
        cmd_forecast(_args(write_box(tmp_path), tmp_path / "o", mpi=True))
    assert "--mpi" in _one_line(exc)


@pytest.mark.slow
@pytest.mark.mpi
def test_scan_over_mpi_ranks_matches_serial(tmp_path):
    """The scan spread over 2 MPI ranks (schwimmbad MPIPool) gives the serial numbers."""
    import shutil
    import subprocess
    import sys
    pytest.importorskip("schwimmbad")
    pytest.importorskip("mpi4py")
    if shutil.which("mpiexec") is None:
        pytest.skip("no mpiexec")
    path = write_box(tmp_path, ells="[0, 2]", nbar="3.0e-4",
                     forecast="  neglect: [doppler, potential]\n"
                              "  scan: {quantity: b_e, values: [-2.0, 4.0]}")
    out = tmp_path / "mpi"
    proc = subprocess.run(["mpiexec", "-n", "2", sys.executable, "-m", "likelihood.cli", "forecast",
                           path, "--out", str(out), "--mpi"], capture_output=True, text=True,
                          timeout=300, cwd=os.path.join(HERE, os.pardir, os.pardir))
    assert proc.returncode == 0, proc.stderr
    rows = list(csv.DictReader(open(out / "scan.csv")))
    serial = fc.bias_scan(path).rows
    for r, s in zip(rows, serial):
        assert float(r["delta_fnl"]) == pytest.approx(s["delta_fnl"], rel=1e-6)


def test_command_line_exit_code_2_on_bad_input(tmp_path, capsys):
    from likelihood.cli import main
    path = write_box(tmp_path, forecast="  neglect: [dopler]")
    assert main(["forecast", path, "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "dopler" in err[0] and "doppler" in err[0]
