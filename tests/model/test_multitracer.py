"""Several tracers in one fit: the multi-tracer likelihood against the single-tracer one, the
fast path against the direct path, the cross dipole against the plane-parallel Doppler formula,
and injection-recovery on a noiseless two-tracer data vector."""
import copy
import warnings

import numpy as np
import pytest
from scipy import optimize

from likelihood.config import validate
from likelihood.data import save_covariance
from likelihood.model import build
from likelihood.model.multitracer import MultiLikelihood
from likelihood.theory import tracer as tr

SHELL = {"shape": "shell", "r_min": 1937.0, "r_max": 3144.0}

SINGLE = {
    "run": "one", "survey": {"redshift": 1.2, "nbar": 3.0e-4, "geometry": SHELL},
    "tracer": {"b1": 1.8, "fnl": 0.0, "p": 1.0, "b_e": 1.5, "s": 0.25},
    "effects": {"observer": False},
    "data": {"mock": {"seed": 3, "noise": True, "truth": {"fnl": 5.0}, "k_min": 0.004, "k_max": 0.05,
                      "n_bins": 10}, "ells": [0, 2]},
    "parameters": {"b1": {"flat": [0.5, 5]}, "fnl": {"flat": [-200, 200]},
                   "shot_noise": {"flat": [0, 3]}, "b_e": {"flat": [-5, 5]}},
}

TWO = {
    "run": "two", "survey": {"redshift": 1.2, "geometry": SHELL},
    "tracers": [{"name": "bright", "nbar": 1.0e-4, "b1": 2.4, "b_e": 1.0, "s": 0.4},
                {"name": "faint", "nbar": 2.0e-4, "b1": 1.5, "b_e": 1.75, "s": 0.175}],
    "spectra": [{"pair": ["bright", "bright"], "ells": [0, 2]},
                {"pair": ["bright", "faint"], "ells": [0, 1, 2, 3], "shared_nbar": 2.0e-5},
                {"pair": ["faint", "faint"], "ells": [0, 2], "k_min": 0.006}],
    "effects": {"observer": False},
    "data": {"mock": {"seed": 1, "noise": False, "truth": {"fnl": 10.0}, "k_min": 0.004,
                      "k_max": 0.05, "n_bins": 10}},
    "parameters": {"fnl": {"flat": [-200, 200]}, "b1_bright": {"flat": [0.5, 5]},
                   "b1_faint": {"flat": [0.5, 5]}, "shot_noise_bright": {"flat": [0, 3]},
                   "shot_noise_faint": {"flat": [0, 3]}, "shot_noise_bright_faint": {"flat": [0, 3]},
                   "b_e_faint": {"flat": [-5, 5]}, "s_bright": {"flat": [-2, 2]}},
}


def _build(raw, tmp_path=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return build(validate(copy.deepcopy(raw), src="test.yaml",
                              base_dir=str(tmp_path) if tmp_path else "."))


@pytest.fixture(scope="module")
def two():
    return _build(TWO)


@pytest.fixture(scope="module")
def two_obs():
    """Two tracers with the observer term on (potential at the observer, ν sampled)."""
    raw = copy.deepcopy(TWO)
    raw["effects"] = {"observer": True}
    raw["parameters"]["nu_obs"] = {"gauss": [0, 1]}
    raw["parameters"]["p_faint"] = {"flat": [0.5, 2.0]}      # p enters through f_NL (b1 − p)
    return _build(raw)


@pytest.mark.parametrize("observer", [False, True])
def test_one_tracer_reproduces_single_tracer_likelihood(tmp_path, observer):
    """One tracer through the multi-tracer path (a single-tracer data file and covariance read as
    the auto spectrum of that tracer) gives today's single-tracer log-likelihood to 1e-10, with
    and without the observer term."""
    base = copy.deepcopy(SINGLE)
    base["effects"] = {"observer": observer}
    if observer:
        base["parameters"]["nu_obs"] = {"gauss": [0, 1]}
    single = _build(base)
    single.data_full.save(tmp_path / "d.txt")
    save_covariance(tmp_path / "c.txt", single.covariance_full, single.data_full.ells,
                    single.data_full.n_bins)
    raw = copy.deepcopy(base)
    raw["data"] = {"file": "d.txt", "ells": [0, 2]}
    raw["covariance"] = {"kind": "file", "file": "c.txt"}
    ref = _build(raw, tmp_path)
    multi = {
        "run": "one", "survey": {"redshift": 1.2, "geometry": SHELL},
        "tracers": [{"name": "g", "nbar": 3.0e-4, "b1": 1.8, "b_e": 1.5, "s": 0.25}],
        "spectra": [{"pair": ["g", "g"], "ells": [0, 2]}], "effects": {"observer": observer},
        "data": {"file": "d.txt"}, "covariance": {"kind": "file", "file": "c.txt"},
        "parameters": {"b1_g": {"flat": [0.5, 5]}, "fnl": {"flat": [-200, 200]},
                       "shot_noise_g": {"flat": [0, 3]}, "b_e_g": {"flat": [-5, 5]}}}
    if observer:
        multi["parameters"]["nu_obs"] = {"gauss": [0, 1]}
    lik = _build(multi, tmp_path)
    assert isinstance(lik, MultiLikelihood)
    rng = np.random.default_rng(4)
    theta = np.column_stack([rng.uniform(1.5, 2.1, 6), rng.uniform(-30, 30, 6),
                             rng.uniform(0.8, 1.2, 6), rng.uniform(0, 3, 6)]
                            + ([rng.uniform(-2, 2, 6)] if observer else []))
    a, b = ref.log_prob(theta), lik.log_prob(theta)
    np.testing.assert_allclose(b, a, rtol=1e-10)
    for th in theta[:2]:
        assert lik.log_prob(th) == pytest.approx(ref.log_prob(th), rel=1e-10)
    j = ref.derived_names.index("b1_sigma8")
    np.testing.assert_allclose(lik.derived(theta)[:, 0], ref.derived(theta)[:, j], rtol=1e-12)
    assert lik.derived_names == ["b1_sigma8_g"]
    p = {"b1": 1.9, "fnl": 12.0, "shot_noise": 1.1, "b_e": 0.5}
    q = {"b1_g": 1.9, "fnl": 12.0, "shot_noise_g": 1.1, "b_e_g": 0.5}
    if observer:
        p["nu_obs"] = q["nu_obs"] = 1.7
    assert lik.log_likelihood_direct(q) == pytest.approx(ref.log_likelihood_direct(p), rel=1e-10)


@pytest.mark.parametrize("which", ["two", "two_obs"])
def test_fast_path_equals_direct_path_two_tracers(which, request):
    """Templates per pair of kernel pieces (autos symmetrised, cross all pairs, sampled b_e and s
    of one tracer each, shared noise of overlapping populations, the observer term of autos and
    of the cross spectrum) = direct recomputation, 1e-10."""
    two = request.getfixturevalue(which)
    rng = np.random.default_rng(0)
    for _ in range(3):
        p = {"fnl": rng.uniform(-50, 50), "b1_bright": rng.uniform(2, 3), "b1_faint": rng.uniform(1, 2),
             "shot_noise_bright": rng.uniform(0.5, 1.5), "shot_noise_faint": rng.uniform(0.5, 1.5),
             "shot_noise_bright_faint": rng.uniform(0.5, 1.5), "b_e_faint": rng.uniform(-2, 3),
             "s_bright": rng.uniform(-0.5, 1)}
        if "nu_obs" in two.parameter_names:
            p["nu_obs"] = rng.uniform(-2.5, 2.5)
            p["p_faint"] = rng.uniform(0.8, 1.6)
        fast, direct = two.model_vector(p, direct=False), two.model_vector(p, direct=True)
        assert np.max(np.abs(fast - direct)) < 1e-10 * np.max(np.abs(direct))
        assert two.log_likelihood(p) == pytest.approx(two.log_likelihood_direct(p), rel=1e-10)
        th = np.array([p[n] for n in two.parameter_names])
        assert two.log_prob(th) == pytest.approx(two.log_prob(th[None])[0], rel=1e-12)


def test_shared_noise_enters_the_cross_monopole_only(two):
    """Overlapping populations: the cross spectrum gets N_XY = n̄_XY/(n̄_X n̄_Y) times its amplitude
    in the monopole (white-noise response incl. the integral constraint), nothing otherwise."""
    base = two.model_vector({"shot_noise_bright_faint": 0.0})
    on = two.model_vector({"shot_noise_bright_faint": 1.0})
    sl = slice(int(two.forward.spectra[0].mask.sum()),
               int(two.forward.spectra[0].mask.sum() + two.forward.spectra[1].mask.sum()))
    diff = on - base
    assert np.all(diff[:sl.start] == 0) and np.all(diff[sl.stop:] == 0)
    n_b = two.forward.spectra[1].part.n_bins
    mono = diff[sl][:n_b]
    nxy = 2.0e-5 / (1.0e-4 * 2.0e-4)
    # the integral constraint removes a little of the white noise at the lowest k only
    assert mono[-1] == pytest.approx(nxy, rel=1e-3)


def test_cross_dipole_against_doppler_formula():
    """Plane-parallel Doppler dipole of a cross spectrum (periodic box, no window): with
    Z_X = b_X + iμγ_X/k + fμ² (McDonald 2009, JCAP 11, 026; Bonvin, Hui & Gaztañaga 2014, PRD 89,
    083535), Im Z_A Z_B^* = μ(γ_A b_B − b_A γ_B)/k + μ³ f(γ_A − γ_B)/k; with μ = L1 and
    μ³ = (3/5)L1 + (2/5)L3 (derived here) Π_1 = [γ_A b_B − b_A γ_B + (3/5) f (γ_A − γ_B)] P/k,
    Π_3 = (2/5) f (γ_A − γ_B) P/k, mode-averaged over each bin."""
    raw = copy.deepcopy(TWO)
    raw["survey"]["geometry"] = {"shape": "box", "volume": 1e11}
    raw["effects"] = {"observer": False, "fnl": False, "potential": False}
    raw["spectra"] = [{"pair": ["bright", "faint"], "ells": [1, 3]}]
    raw["covariance"] = {"kind": "gaussian"}
    raw["parameters"] = {"b1_bright": {"flat": [0.5, 5]}}
    raw["data"]["mock"]["truth"] = {}
    with pytest.raises(Exception, match="without the auto spectrum"):
        _build(raw)
    raw["spectra"] = [{"pair": ["bright", "bright"], "ells": [0]},
                      {"pair": ["bright", "faint"], "ells": [1, 3]},
                      {"pair": ["faint", "faint"], "ells": [0]}]
    lik = _build(raw)
    cos = lik.cosmo
    z, f = 1.2, cos.growth_rate(1.2)
    bA, bB = 2.4, 1.5
    gA = tr.gamma1(cos, z, 1.0, 2.5 * 0.4)
    gB = tr.gamma1(cos, z, 1.75, 2.5 * 0.175)
    part = lik.forward.spectra[1].part
    from likelihood.observation.matrix import KBins
    kf = np.geomspace(1e-3, 0.1, 4000)
    pk = cos.power(kf, z)
    pi1 = (gA * bB - bA * gB + 0.6 * f * (gA - gB)) * pk / kf
    pi3 = 0.4 * f * (gA - gB) * pk / kf
    bins = KBins(part.edges, part.k_eff, part.n_modes)
    ref = np.concatenate([bins.average(kf, pi1), bins.average(kf, pi3)])
    model = lik.model_vector({})
    n_b = part.n_bins
    got = model[n_b:n_b + 2 * n_b]
    np.testing.assert_allclose(got, ref, rtol=1e-4)
    assert np.all(ref[:n_b] != 0)


def test_injection_recovery_two_tracers(two):
    """Noiseless two-tracer data with f_NL = 10 (and the other parameters at their fiducial values):
    the posterior maximum recovers f_NL within 0.2σ, σ from the inverse Hessian (Laplace)."""
    names = two.parameter_names
    truth = np.array([{"fnl": 10.0}.get(n, two.fiducial[n]) for n in names], float)

    def nlp(x):
        return -two.log_prob(x)
    res = optimize.minimize(nlp, truth + 0.05 * np.abs(truth) + 0.01, method="Nelder-Mead",
                            options={"xatol": 1e-6, "fatol": 1e-9, "maxiter": 40000, "maxfev": 40000})
    res = optimize.minimize(nlp, res.x, method="BFGS")
    h = np.empty((len(names), len(names)))
    step = 1e-3 * np.maximum(np.abs(res.x), 1.0)
    for i in range(len(names)):
        for j in range(len(names)):
            e_i, e_j = np.eye(len(names))[i] * step[i], np.eye(len(names))[j] * step[j]
            h[i, j] = (nlp(res.x + e_i + e_j) - nlp(res.x + e_i - e_j) - nlp(res.x - e_i + e_j)
                       + nlp(res.x - e_i - e_j)) / (4 * step[i] * step[j])
    sigma = np.sqrt(np.diag(np.linalg.inv(h)))
    i = names.index("fnl")
    assert abs(res.x[i] - 10.0) < 0.2 * sigma[i], (res.x[i], sigma[i])
    assert two.log_prob(truth) == pytest.approx(0.0, abs=1e-6)     # χ² = 0 at the truth


@pytest.mark.parametrize("prior", ["gauss", "flat"])
def test_analytic_marginalisation_equals_numerical_integral(prior):
    """Shot-noise amplitudes marked ``analytic: true`` (Taylor & Kitching 2010, MNRAS 408, 865:
    Gaussian integral over linear parameters): the marginal log-likelihood difference between two
    points equals the log of the likelihood integrated over the amplitudes numerically (2-D
    trapezoid over a grid, the amplitudes sampled as ordinary parameters), to 1e-6."""
    check_analytic_marginalisation(TWO, prior, np.linspace(0.7, 1.3, 241))


def check_analytic_marginalisation(base, prior, grid, build=_build):
    """The two-tracer config ``base`` with both shot-noise amplitudes sampled (prior ``prior``)
    and marginalised analytically: the marginal ln L difference of two points against the
    numerical 2-D integral over the amplitudes on ``grid`` (1e-6); the batch path equals the
    single-point one."""
    spec = {"gauss": [1.0, 0.1]} if prior == "gauss" else {"flat": [-50.0, 50.0]}
    sampled = copy.deepcopy(base)
    sampled["spectra"][1].pop("shared_nbar")
    sampled["data"]["mock"]["noise"] = True
    pars = {"fnl": {"flat": [-200, 200]}, "b1_bright": {"flat": [0.5, 5]},
            "b1_faint": {"flat": [0.5, 5]}, "shot_noise_bright": dict(spec),
            "shot_noise_faint": dict(spec)}
    sampled["parameters"] = pars
    marg = copy.deepcopy(sampled)
    for n in ("shot_noise_bright", "shot_noise_faint"):
        marg["parameters"][n]["analytic"] = True
    ls, lm = build(sampled), build(marg)
    assert lm.parameter_names == ["fnl", "b1_bright", "b1_faint"] and lm.dof == ls.dof
    aa, bb = np.meshgrid(grid, grid, indexing="ij")

    def log_integral(th):
        pts = np.column_stack([np.tile(th, (aa.size, 1)), aa.ravel(), bb.ravel()])
        lp = ls.log_prob(pts).reshape(aa.shape)
        top = lp.max()
        inner = np.trapezoid(np.exp(lp - top), grid, axis=1)
        return top + np.log(np.trapezoid(inner, grid))

    t1, t2 = np.array([10.0, 2.4, 1.5]), np.array([-20.0, 2.38, 1.52])
    ref = log_integral(t1) - log_integral(t2)
    got = lm.log_prob(t1) - lm.log_prob(t2)
    assert got == pytest.approx(ref, abs=1e-6)
    np.testing.assert_allclose(lm.log_prob(np.stack([t1, t2])), [lm.log_prob(t1), lm.log_prob(t2)],
                               rtol=1e-9)


def test_samples_sum_of_independent_likelihoods(tmp_path):
    """Two independent samples (one with two tracers, one with one): the log-posterior of the
    run is the prior plus the sum of the log-likelihoods of the samples built on their own, to
    1e-12; each sample reads its own nuisance columns and the shared f_NL."""
    north = copy.deepcopy(TWO)
    south = {"survey": {"redshift": 0.6, "geometry": {"shape": "shell", "r_min": 1200.0, "r_max": 1900.0}},
             "tracers": [{"name": "lrg", "nbar": 3e-4, "b1": 2.0}],
             "spectra": [{"pair": ["lrg", "lrg"], "ells": [0, 2]}],
             "data": {"mock": {"seed": 5, "noise": True, "k_min": 0.004, "k_max": 0.05, "n_bins": 8}}}
    raw = {"run": "both", "effects": {"observer": False},
           "samples": [dict(name="north", **{k: north[k] for k in ("survey", "tracers", "spectra", "data")}),
                       dict(name="south", **south)],
           "parameters": dict(north["parameters"], b1_lrg={"flat": [0.5, 5]})}
    lik = _build(raw)
    alone_n = _build(north)
    alone_s = _build(dict(south, run="s", effects={"observer": False},
                          parameters={"fnl": {"flat": [-200, 200]}, "b1_lrg": {"flat": [0.5, 5]}}))
    rng = np.random.default_rng(7)
    theta = np.column_stack([rng.uniform(lo, hi, 5) for lo, hi in
                             [(-20, 20), (2.3, 2.5), (1.4, 1.6), (0.9, 1.1), (0.9, 1.1), (0.9, 1.1),
                              (1.0, 2.0), (0.0, 0.5), (1.9, 2.1)]])
    assert lik.parameter_names[-1] == "b1_lrg" and len(lik.parameter_names) == theta.shape[1]
    ref = alone_n.log_prob(theta[:, :8]) + alone_s.log_prob(theta[:, [0, 8]])
    np.testing.assert_allclose(lik.log_prob(theta), ref, rtol=1e-12)
    assert lik.log_prob(theta[0]) == pytest.approx(ref[0], rel=1e-12)
    assert lik.dof == alone_n.data.size + alone_s.data.size - 9
    assert len(lik.observables()["spectra"]) == 10 and lik.observables()["spectra"][-1] == "lrg"
    assert lik.observables()["samples"][-1] == "south"
    assert lik.derived_names == ["b1_sigma8_bright", "b1_sigma8_faint", "b1_sigma8_lrg"]
    d = lik.derived(theta)
    np.testing.assert_allclose(d[:, 2], alone_s.derived(theta[:, [0, 8]])[:, 0], rtol=1e-12)


@pytest.mark.slow
def test_analytic_marginalisation_matches_sampling_the_amplitudes():
    """The f_NL posterior with the shot-noise amplitudes marginalised analytically equals the one
    with them sampled (emcee, 48 walkers × 4000 steps each): means within 0.1σ, σ within 8 %."""
    import emcee
    sampled = copy.deepcopy(TWO)
    sampled["spectra"][1].pop("shared_nbar")
    sampled["data"]["mock"]["noise"] = True
    sampled["parameters"] = {"fnl": {"flat": [-200, 200]}, "b1_bright": {"flat": [0.5, 5]},
                             "b1_faint": {"flat": [0.5, 5]}, "shot_noise_bright": {"gauss": [1.0, 0.2]},
                             "shot_noise_faint": {"gauss": [1.0, 0.2]}}
    marg = copy.deepcopy(sampled)
    for n in ("shot_noise_bright", "shot_noise_faint"):
        marg["parameters"][n]["analytic"] = True
    out = []
    for raw in (sampled, marg):
        lik = _build(raw)
        rng = np.random.default_rng(11)
        p0 = lik.start + 1e-3 * rng.standard_normal((48, lik.start.size)) * np.maximum(lik.start, 1)
        s = emcee.EnsembleSampler(48, lik.start.size, lik.log_prob, vectorize=True,
                                  moves=[(emcee.moves.DEMove(), 0.8), (emcee.moves.DESnookerMove(), 0.2)])
        s.run_mcmc(p0, 4000, progress=False)
        f = s.get_chain(discard=1000, flat=True)[:, 0]
        out.append((f.mean(), f.std()))
    (m1, s1), (m2, s2) = out
    assert abs(m1 - m2) < 0.1 * s1 and abs(s2 / s1 - 1) < 0.08, out


def test_subset_of_a_file(tmp_path):
    """A config may fit some of a file's spectra (here the bright auto spectrum alone, or the two
    autos without the cross): data and covariance blocks are taken from the file, and the result
    equals a file written with those spectra only (log-likelihood to 1e-12)."""
    from likelihood.spectra import SpectraVector, save_spectra_covariance
    full = _build(dict(copy.deepcopy(TWO), covariance={"kind": "gaussian"}))
    sv = full.data_full
    sv.save(tmp_path / "all.txt")
    save_spectra_covariance(tmp_path / "all_cov.txt", full.covariance_full, sv)
    keep = [0, 2]
    sizes = np.cumsum([0] + sv.sizes)
    idx = np.concatenate([np.arange(sizes[i], sizes[i + 1]) for i in keep])
    sub = SpectraVector(sv.tracers, [sv.pairs[i] for i in keep], [sv.parts[i] for i in keep])
    sub.save(tmp_path / "autos.txt")
    save_spectra_covariance(tmp_path / "autos_cov.txt", full.covariance_full[np.ix_(idx, idx)], sub)
    raw = copy.deepcopy(TWO)
    raw["spectra"] = [raw["spectra"][0], raw["spectra"][2]]
    for key in ("shot_noise_bright_faint",):
        raw["parameters"].pop(key)
    a = _build(dict(raw, data={"file": "all.txt"}, covariance={"kind": "file", "file": "all_cov.txt"}),
               tmp_path)
    b = _build(dict(raw, data={"file": "autos.txt"}, covariance={"kind": "file", "file": "autos_cov.txt"}),
               tmp_path)
    th = np.array([[5.0, 2.3, 1.6, 1.0, 1.1, 0.2, 0.1], [-5.0, 2.5, 1.4, 0.9, 1.0, 1.0, 0.3]])
    np.testing.assert_allclose(a.log_prob(th), b.log_prob(th), rtol=1e-12)
    one = {"run": "b", "survey": TWO["survey"], "tracers": [TWO["tracers"][0]],
           "spectra": [{"pair": ["bright", "bright"], "ells": [0]}], "effects": {"observer": False},
           "data": {"file": "all.txt"}, "covariance": {"kind": "file", "file": "all_cov.txt"},
           "parameters": {"fnl": {"flat": [-200, 200]}, "b1_bright": {"flat": [0.5, 5]}}}
    assert np.isfinite(_build(one, tmp_path).log_prob(np.array([0.0, 2.4])))
