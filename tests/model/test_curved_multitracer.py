"""Several tracers through the curved-sky engine (model/curved_multitracer.py): the one-tracer
limit against the single-tracer curved likelihood, the fast path against direct engine runs, the
cross dipole of a distant narrow shell against the plane-parallel Doppler dipole, AB − BA odd
multipoles against the first-order wide-angle expansion, analytic marginalisation, bad input."""
import copy
import os
import warnings

import numpy as np
import pytest

from likelihood.config import validate
from likelihood.data import save_covariance
from likelihood.errors import ConfigError
from likelihood.model import build
from likelihood.model.curved import CurvedLikelihood
from likelihood.model.curved_multitracer import CurvedMultiForwardModel
from likelihood.model.multitracer import MultiLikelihood
from tests.curved.test_wide_angle_cross import expansion, shell_redshift
from tests.model.test_multitracer import check_analytic_marginalisation

SHELL = {"shape": "shell", "r_min": 1937.0, "r_max": 3144.0}
# small k range and coarse grids keep each engine run around a second (as tests/model/test_curved.py)
ENGINE = {"kind": "curved_sky", "resolution": {"k_nodes": 2, "q_range": 1.5}}
MOCK = {"seed": 1, "noise": True, "truth": {"fnl": 10.0}, "k_min": 0.004, "k_max": 0.016,
        "n_bins": 3}

TWO = {
    "run": "two", "survey": {"redshift": 1.2, "geometry": SHELL},
    "tracers": [{"name": "bright", "nbar": 1.0e-4, "b1": 2.4, "b_e": 1.0, "s": 0.4},
                {"name": "faint", "nbar": 2.0e-4, "b1": 1.5, "b_e": 1.75, "s": 0.175,
                 "bias_evolution": "inverse_growth"}],
    "spectra": [{"pair": ["bright", "bright"], "ells": [0, 2]},
                {"pair": ["bright", "faint"], "ells": [0, 1, 2, 3], "shared_nbar": 2.0e-5},
                {"pair": ["faint", "faint"], "ells": [0, 2]}],
    "engine": ENGINE,
    "effects": {"observer": True},
    "data": {"mock": dict(MOCK, noise=False)},
    "parameters": {"fnl": {"flat": [-200, 200]}, "nu_obs": {"gauss": [0, 1]},
                   "b1_bright": {"flat": [0.5, 5]}, "b1_faint": {"flat": [0.5, 5]},
                   "p_faint": {"flat": [0.5, 2.0]},
                   "shot_noise_bright": {"flat": [0, 3]}, "shot_noise_faint": {"flat": [0, 3]},
                   "shot_noise_bright_faint": {"flat": [0, 3]},
                   "b_e_faint": {"flat": [-5, 5]}, "s_bright": {"flat": [-2, 2]}},
}


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", os.fspath(tmp_path / "cache"))


def _build(raw, tmp_path=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return build(validate(copy.deepcopy(raw), src="test.yaml",
                              base_dir=str(tmp_path) if tmp_path else "."))


@pytest.mark.parametrize("variant", ["global", "radial", "observer_evolving", "table"])
def test_one_tracer_equals_single_tracer_curved_likelihood(tmp_path, variant):
    """One tracer through the multi-tracer curved path (the single-tracer data file and covariance
    read as the auto spectrum of that tracer) gives the single-tracer curved log-likelihood to
    1e-10 (batch and single point, direct path too): global and radial IC with constant bias;
    observer term with b1 ∝ 1/D(z) and b_e sampled; b1, b_e, s from a tracer table (the
    engine's ``tracer_table`` against the tracer entry's)."""
    obs = variant == "observer_evolving"
    evolution = ({"bias_evolution": "inverse_growth"} if obs else
                 {"tracer_table": "t.txt"} if variant == "table" else {})
    if variant == "table":        # invented redshift dependence over the shell (z 0.8-1.6)
        z = np.linspace(0.7, 1.7, 6)
        np.savetxt(tmp_path / "t.txt", np.column_stack([z, 1.0 + 0.6 * z, 1.0 + 0.5 * z,
                                                        0.2 + 0.1 * z]),
                   header="columns: z b1 b_e s")
    single = {"run": "one", "survey": {"redshift": 1.2, "nbar": 3.0e-4, "geometry": SHELL},
              "tracer": {"b1": 1.8, "fnl": 0.0, "p": 1.0, "b_e": 1.5, "s": 0.25},
              "engine": dict(ENGINE, **evolution),
              "effects": {"observer": obs, "integral_constraint": "radial" if variant == "radial"
                          else "global"},
              "data": {"mock": MOCK, "ells": [0, 2]},
              "parameters": {"b1": {"flat": [0.5, 5]}, "fnl": {"flat": [-200, 200]},
                             "shot_noise": {"flat": [0, 3]}}}
    if obs:
        single["parameters"].update(b_e={"flat": [-5, 5]}, nu_obs={"gauss": [0, 1]})
    made = _build(single, tmp_path)
    assert isinstance(made, CurvedLikelihood)
    made.data_full.save(tmp_path / "d.txt")
    save_covariance(tmp_path / "c.txt", made.covariance_full, made.data_full.ells,
                    made.data_full.n_bins)
    ref_raw = copy.deepcopy(single)
    ref_raw["data"] = {"file": "d.txt", "ells": [0, 2]}
    ref_raw["covariance"] = {"kind": "file", "file": "c.txt"}
    ref = _build(ref_raw, tmp_path)
    multi = {"run": "one", "survey": {"redshift": 1.2, "geometry": SHELL},
             "tracers": [{"name": "g", "nbar": 3.0e-4, "b1": 1.8, "b_e": 1.5, "s": 0.25,
                          **({"tracer_table": "t.txt"} if variant == "table" else {})}],
             "spectra": [{"pair": ["g", "g"], "ells": [0, 2]}],
             "engine": ENGINE if variant == "table" else ref_raw["engine"],
             "effects": single["effects"],
             "data": {"file": "d.txt"}, "covariance": {"kind": "file", "file": "c.txt"},
             "parameters": {"b1_g": {"flat": [0.5, 5]}, "fnl": {"flat": [-200, 200]},
                            "shot_noise_g": {"flat": [0, 3]}}}
    if obs:
        multi["parameters"].update(b_e_g={"flat": [-5, 5]}, nu_obs={"gauss": [0, 1]})
    lik = _build(multi, tmp_path)
    assert isinstance(lik, MultiLikelihood) and isinstance(lik.forward, CurvedMultiForwardModel)
    assert lik.forward.bases["g"].evolution == {"observer_evolving": "inverse_growth",
                                                 "table": "table"}.get(variant, "constant")
    rng = np.random.default_rng(4)
    theta = np.column_stack([rng.uniform(1.5, 2.1, 5), rng.uniform(-30, 30, 5),
                             rng.uniform(0.8, 1.2, 5)]
                            + ([rng.uniform(-2, 2, 5), rng.uniform(-2, 2, 5)] if obs else []))
    np.testing.assert_allclose(lik.log_prob(theta), ref.log_prob(theta), rtol=1e-10)
    for th in theta[:2]:
        assert lik.log_prob(th) == pytest.approx(ref.log_prob(th), rel=1e-10)
    p = {"b1": 1.9, "fnl": 12.0, "shot_noise": 1.1}
    if obs:
        p.update(b_e=0.5, nu_obs=1.7)
    q = {(k if k in ("fnl", "nu_obs") else f"{k}_g"): v for k, v in p.items()}
    assert lik.log_likelihood_direct(q) == pytest.approx(ref.log_likelihood_direct(p), rel=1e-10)


@pytest.mark.parametrize("sky", ["full", pytest.param("cap", marks=pytest.mark.slow)])
def test_fast_path_equals_direct_engine_runs(sky):
    """Templates per pair of basis kernels of each spectrum (autos a ≤ b, the cross every pair;
    sampled b_e, s of one tracer each, p of the faint one; constant bias for one tracer and
    b1 ∝ 1/D for the other; shared noise of overlapping populations; observer term of autos and
    of the cross) = direct engine runs at the parameter values, 1e-10 (exact algebra: each
    kernel is affine in its amplitudes). Full sky; slow: a polar cap (the masked engine)."""
    raw = copy.deepcopy(TWO)
    if sky == "cap":
        raw["survey"]["geometry"] = dict(SHELL, shape="cap", fsky=0.3)
    lik = _build(raw)
    assert [b.evolution for b in lik.forward.bases.values()] == ["constant", "inverse_growth"]
    rng = np.random.default_rng(0)
    for _ in range(1):
        p = {"fnl": rng.uniform(-50, 50), "nu_obs": rng.uniform(-2.5, 2.5),
             "b1_bright": rng.uniform(2, 3), "b1_faint": rng.uniform(1, 2),
             "p_faint": rng.uniform(0.8, 1.6), "shot_noise_bright": rng.uniform(0.5, 1.5),
             "shot_noise_faint": rng.uniform(0.5, 1.5),
             "shot_noise_bright_faint": rng.uniform(0.5, 1.5), "b_e_faint": rng.uniform(-2, 3),
             "s_bright": rng.uniform(-0.5, 1)}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fast, direct = lik.model_vector(p, direct=False), lik.model_vector(p, direct=True)
            assert np.max(np.abs(fast - direct)) < 1e-10 * np.max(np.abs(direct))
            assert lik.log_likelihood(p) == pytest.approx(lik.log_likelihood_direct(p), rel=1e-10)
        th = np.array([p[n] for n in lik.parameter_names])
        assert lik.log_prob(th) == pytest.approx(lik.log_prob(th[None])[0], rel=1e-12)
        vals = dict(lik.forward.held, **p)
        np.testing.assert_allclose(lik.forward.x_point(vals), lik.forward.coefficients(
            {k: np.atleast_1d(v) for k, v in vals.items()})[0], rtol=1e-15)
    # the shared noise n̄_XY/(n̄_X n̄_Y) enters the cross spectrum only, flat in the monopole away
    # from the lowest k (where the integral constraint removes some of it)
    diff = (lik.model_vector({"shot_noise_bright_faint": 1.0}, direct=False)
            - lik.model_vector({"shot_noise_bright_faint": 0.0}, direct=False))
    n_aa = int(lik.forward.spectra[0].mask.sum())
    n_ab = int(lik.forward.spectra[1].mask.sum())
    assert np.all(diff[:n_aa] == 0) and np.all(diff[n_aa + n_ab:] == 0)
    n_b = lik.forward.spectra[1].part.n_bins
    assert diff[n_aa + n_b - 1] == pytest.approx(2.0e-5 / (1.0e-4 * 2.0e-4), rel=2e-3)


def test_templates_cached_on_disk(monkeypatch):
    """A second build reads every spectrum's templates from the disk cache (the engine's basis
    templates are not recomputed), a cross spectrum without shot noise included, and gives the
    same template rows."""
    import likelihood.model.curved as curved
    raw = copy.deepcopy(TWO)
    raw["spectra"][1].pop("shared_nbar")
    raw["effects"] = {"observer": False}
    raw["parameters"].pop("shot_noise_bright_faint")
    raw["parameters"].pop("nu_obs")
    first = _build(raw)
    calls = []
    engine = curved.multipole_templates

    def spy(*args, **kw):
        calls.append(kw.get("combine_pieces"))
        return engine(*args, **kw)
    monkeypatch.setattr(curved, "multipole_templates", spy)
    second = _build(raw)
    assert False not in calls            # only direct runs (the data.mock), no basis templates
    assert calls                         # the spy saw the direct runs
    np.testing.assert_array_equal(first._templates["M"], second._templates["M"])


def _doppler_dipole(engine, r1, r2, z):
    """Cross dipole and octupole of the Doppler term alone (model with the doppler piece minus
    without), snapshot mode at z, no integral constraint: (2, n_bins)."""
    raw = copy.deepcopy(TWO)
    raw["survey"] = {"redshift": z, "geometry": {"shape": "shell", "r_min": r1, "r_max": r2}}
    for t in raw["tracers"]:
        t.pop("bias_evolution", None)
    raw["spectra"] = [{"pair": ["bright", "bright"], "ells": [0]},
                      {"pair": ["bright", "faint"], "ells": [1, 3]},
                      {"pair": ["faint", "faint"], "ells": [0]}]
    raw["data"] = {"mock": {"noise": False, "k_min": 0.016, "k_max": 0.032, "n_bins": 2}}
    raw["parameters"] = {"b1_bright": {"flat": [0.5, 5]}}
    raw["cosmology"] = {"preset": "planck2018", "transfer": "eh98_nowiggle"}
    if engine == "curved":
        raw["engine"] = {"kind": "curved_sky", "snapshot": True,
                         "resolution": {"q_range": 1.5, "k_nodes": 3}}
    else:
        raw.pop("engine")
    out = []
    for doppler in (True, False):
        raw["effects"] = {"observer": False, "fnl": False, "potential": False, "doppler": doppler,
                          "integral_constraint": "none"}
        lik = _build(raw)
        out.append(lik.model_vector({}, direct=False)[2:6].reshape(2, 2))
    return out[0] - out[1], lik


@pytest.mark.parametrize("r1, r2", [(3000.0, 3200.0),
                                    pytest.param(6000.0, 6400.0, marks=pytest.mark.slow)])
def test_cross_doppler_dipole_of_a_distant_shell_tends_to_plane_parallel(r1, r2):
    """A distant narrow shell (3000–3200 Mpc/h, kχ = 50–100; slow: 6000–6400, kχ = 100–200;
    snapshot mode): the Doppler part of the cross dipole and octupole from the curved-sky
    engine tends to the plane-parallel one
    (Π_1 = [γ_A b_B − b_A γ_B + (3/5) f (γ_A − γ_B)] P/k, Π_3 = (2/5) f (γ_A − γ_B) P/k: McDonald
    2009; Bonvin, Hui & Gaztañaga 2014; checked against that formula in a box by
    tests/model/test_multitracer.py::test_cross_dipole_against_doppler_formula), convolved with
    the same shell window (Wilson et al. 2017). The Kaiser wide-angle dipole cancels in the
    difference; what is left is the wide-angle correction of the Doppler term, O(1/(kχ)):
    measured (curved/flat − 1)·kχ = 0.01–0.02 in ℓ = 1 and 0.23–0.33 in ℓ = 3 on both shells
    (so the residual halves as χ doubles); bounded here by 0.5/(kχ)."""
    from likelihood.theory.cosmology import Cosmology
    z, _ = shell_redshift(Cosmology.from_preset("planck2018", transfer="eh98_nowiggle"), r1, r2)
    curved, lik = _doppler_dipole("curved", r1, r2, round(z, 4))
    flat, _ = _doppler_dipole("plane_parallel", r1, r2, round(z, 4))
    k = lik.forward.spectra[1].part.k_eff
    rel = np.abs(curved / flat - 1.0)
    print(f"Doppler dipole, shell {r1:g}-{r2:g}: curved/plane-parallel - 1 =",
          (curved / flat - 1).ravel(), "k chi", k * 0.5 * (r1 + r2))
    assert np.all(np.sign(curved) == np.sign(flat))
    assert np.all(rel < 0.5 / (k * 0.5 * (r1 + r2))), rel


@pytest.mark.parametrize("r1, r2", [(2500.0, 3500.0),
                                    pytest.param(5000.0, 6000.0, marks=pytest.mark.slow)])
def test_ab_minus_ba_odd_multipoles_against_wide_angle_expansion(r1, r2):
    """Kaiser cross spectra [A, B] and [B, A] of the multi-tracer curved model (shell 6000–7000
    Mpc/h, snapshot): Π_ℓ^AB − Π_ℓ^BA = −(4 f (b_A − b_B)/(5 k⟨x⟩)) P × (n + 3) for ℓ = 1,
    × (2 − n) for ℓ = 3 (first-order wide-angle expansion, docs/wide_angle.md; the method of
    Castorina & White 2018, MNRAS 476, 4403, and Beutler, Castorina & Zhang 2019, JCAP 03, 040).
    As in tests/curved/test_wide_angle_cross.py the shell's sharp edges lower the engine by
    (1.0–1.4)/(kΔr): the residual is positive and below 2/(kΔr)."""
    from likelihood.theory.cosmology import Cosmology
    cosmo = Cosmology.from_preset("planck2018", transfer="eh98_nowiggle")
    z, inv_x = shell_redshift(cosmo, r1, r2)
    edges = np.array([0.016, 0.024, 0.032])
    raw = {"run": "wa", "cosmology": {"preset": "planck2018", "transfer": "eh98_nowiggle"},
           "survey": {"redshift": round(z, 5), "geometry": {"shape": "shell", "r_min": r1,
                                                              "r_max": r2}},
           "tracers": [{"name": "A", "nbar": 1e-3, "b1": 2.5}, {"name": "B", "nbar": 1e-3,
                                                                  "b1": 1.0}],
           "engine": {"kind": "curved_sky", "snapshot": True, "resolution": {"q_range": 1.5}},
           "effects": {"observer": False, "fnl": False, "doppler": False, "potential": False,
                       "integral_constraint": "none"},
           "data": {"mock": {"noise": False, "k_min": 0.016, "k_max": 0.032, "n_bins": 2}},
           "parameters": {"b1_A": {"flat": [0.5, 5]}}}
    got = []
    for pair in (["A", "B"], ["B", "A"]):
        raw["spectra"] = [{"pair": ["A", "A"], "ells": [0]}, {"pair": pair, "ells": [1, 3]},
                          {"pair": ["B", "B"], "ells": [0]}]
        got.append(_build(raw).model_vector({}, direct=False)[2:6].reshape(2, 2))
    engine = got[0] - got[1]
    ref = expansion(cosmo, round(z, 5), inv_x, edges, 2.5, 1.0)
    k_dr = 0.5 * (edges[:-1] + edges[1:]) * (r2 - r1)
    ratio = engine / ref
    assert np.all(ref < 0)
    print("AB - BA against the expansion: ratio", ratio.ravel(), "(1 - ratio) k dr",
          ((1 - ratio) * k_dr).ravel())
    assert np.all(1 - ratio > 0) and np.all((1 - ratio) * k_dr < 2.0), ratio


@pytest.mark.parametrize("prior", ["gauss", pytest.param("flat", marks=pytest.mark.slow)])
def test_analytic_marginalisation_on_the_curved_sky(prior):
    """Shot-noise amplitudes marked ``analytic: true`` (Taylor & Kitching 2010, MNRAS 408, 865,
    eqs. 8-10) through the curved-sky templates: the marginal log-likelihood difference of two
    points equals the log of the likelihood integrated numerically over the amplitudes (2-D
    trapezoid; the amplitudes sampled as ordinary parameters), to 1e-6."""
    base = copy.deepcopy(TWO)
    base["effects"] = {"observer": False}
    check_analytic_marginalisation(base, prior, np.linspace(0.4, 1.6, 241), _build)


@pytest.mark.parametrize("change, words", [
    ({"engine": None}, "tracers[1].bias_evolution: the redshift dependence"),
    ({"tracers": [{"name": "bright", "nbar": 1e-4, "b1": 2.4, "bias_evolution": "fast"}]},
     "tracers[0].bias_evolution: expected one of"),
    ({"tracers": [{"name": "bright", "nbar": 1e-4, "b1": 2.4, "bias_evolution": "constant",
                   "tracer_table": "t.txt"}]}, "not both"),
    ({"tracers": [{"name": "bright", "nbar": 1e-4, "b1": 2.4, "tracer_table": "none.txt"}]},
     "tracers[0].tracer_table: file 'none.txt' not found"),
])
def test_bad_tracer_evolution(change, words):
    raw = copy.deepcopy(TWO)
    for k, v in change.items():
        if v is None:
            raw.pop(k)
        elif k == "tracers":
            raw["tracers"] = v + raw["tracers"][1:]
        else:
            raw[k] = v
    with pytest.raises(ConfigError) as err:
        validate(raw, src="test.yaml", base_dir=".")
    assert words in str(err.value) and "\n" not in str(err.value)
