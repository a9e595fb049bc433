"""Multi-tracer Fisher information (likelihood.forecast.multitracer) against outside values:
the single-tracer multipole Fisher built on the Gaussian covariance of likelihood.data
(Grieb et al. 2016, eq. 15), the closed form derived from the two-tracer setup of McDonald &
Seljak 2009 (JCAP 10, 007), and the noise-free limit of Seljak 2009 (PRL 102, 021302)."""
import warnings

import numpy as np
import pytest

from likelihood.data import gaussian_covariance
from likelihood.errors import ErgofitError
from likelihood.forecast.multitracer import (bias_split_gain, mode_counts, multi_tracer_bias,
                                             multi_tracer_fisher)
from likelihood.theory.cosmology import Cosmology
from likelihood.theory.tracer import Tracer, fnl_alpha, multipoles

Z_EFF = 1.0
EDGES = np.linspace(0.003, 0.05, 13)
K = 0.5 * (EDGES[1:] + EDGES[:-1])


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology.from_preset()     # Planck 2018 table (see likelihood.theory.cosmology)


@pytest.fixture(autouse=True)
def _quiet():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


def test_mode_counts_shell():
    # 4π k² Δk V/(2π)³ for a thin shell (common practice): k = 0.1, Δk = 1e-4, V = 1e9.
    nm = mode_counts(1e9, [0.1 - 5e-5, 0.1 + 5e-5])
    assert nm[0] == pytest.approx(4 * np.pi * 0.01 * 1e-4 * 1e9 / (2 * np.pi) ** 3, rel=1e-6)


@pytest.mark.parametrize("effects, ells", [(("fnl",), (0,)), (("fnl", "rsd"), (0, 2, 4, 6, 8, 10, 12))])
def test_one_tracer_equals_multipole_fisher(cosmo, effects, ells):
    # Single-tracer Fisher Dᵀ Cov⁻¹ D of the multipoles with the Gaussian covariance of
    # likelihood.data.gaussian_covariance (Grieb et al. 2016, eq. 15), derivatives by central
    # differences of likelihood.theory.tracer.multipoles (exact: the model is quadratic).
    # Without RSD the monopole holds all the information; with RSD the multipoles up to ℓ = 12
    # converge to the μ-resolved field information (per-mode ½ (∂P/(P+N))², TTH 1997).
    nbar, b1 = 3e-4, 2.0
    nm = mode_counts(5e9, EDGES)
    got = multi_tracer_fisher(cosmo, Z_EFF, K, nm, [Tracer(b1=b1, nbar=nbar, name="G")], effects)
    derivs = []
    for name, h in (("fnl", 1.0), ("b1", 1e-2)):
        def model(s):
            kw = {"b1": b1 + (s * h if name == "b1" else 0), "fnl": s * h if name == "fnl" else 0}
            return multipoles(cosmo, Z_EFF, K, Tracer(nbar=nbar, **kw), effects,
                              ells=[l for l in ells if l <= 4])
        d = np.zeros((len(ells), K.size))
        d[:min(len(ells), 3)] = (model(1) - model(-1)) / (2 * h)
        derivs.append(d.ravel())
    D = np.array(derivs)
    pm = cosmo.power(K, Z_EFF)
    f = cosmo.growth_rate(Z_EFF) if "rsd" in effects else 0.0
    cov = gaussian_covariance(K, np.stack([b1 ** 2 * pm, 2 * b1 * f * pm, f * f * pm], 1),
                              1 / nbar, nm, ells)
    ref = D @ np.linalg.solve(cov, D.T)
    np.testing.assert_allclose(got.matrix, ref, rtol=1e-7)


BOX = {"survey": {"redshift": 1.2, "nbar": 3e-4,
                  "geometry": {"shape": "box", "volume": 5e10, "r_min": None, "r_max": None}},
       "effects": {"observer": False, "integral_constraint": "none"},
       "data": {"mock": {"truth": {"fnl": 0.0}, "k_min": 0.003, "k_max": 0.05, "n_bins": 96},
                "ells": [0, 2, 4]},
       "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.02},
                      "fnl": {"flat": [-200.0, 200.0], "start": 0.0, "scale": 2.0},
                      "shot_noise": {"fixed": 1.0}}}


def test_one_tracer_bias_reproduces_the_bias_forecast_of_a_config(write_config):
    # The existing single-tracer bias forecast (likelihood.forecast.bias_forecast: Fisher of the
    # analysis model and Δθ = F⁻¹ Dᵀ C⁻¹ (μ_truth − μ_analysis), Huterer et al. 2006 eq. 4) on a
    # periodic box with the Doppler and potential terms neglected, against multi_tracer_bias with
    # one tracer on the same bins: agreement 0.02 % with 96 bins (0.2 % with 24; measured).
    from likelihood.forecast import bias_forecast
    import likelihood
    path = write_config(dict(BOX, tracer={"b1": 2.0, "fnl": 0.0, "b_e": 1.0, "s": 0.3},
                             forecast={"neglect": ["doppler", "potential"],
                                       "parameters": ["fnl", "b1"]}))
    ref = bias_forecast(path)
    lik = likelihood.build(path)
    dv = lik.data_full
    shift, fisher = multi_tracer_bias(lik.cosmo, lik.z, dv.k_eff, dv.n_modes,
                                      [Tracer(b1=2.0, nbar=3e-4, b_e=1.0, s=0.3, name="g")],
                                      ("rsd", "fnl", "doppler", "potential"), ["doppler", "potential"])
    assert shift["fnl"] == pytest.approx(ref.delta[0], rel=2e-3)
    assert shift["b1_g"] == pytest.approx(ref.delta[1], rel=2e-3)
    assert fisher.sigma() == pytest.approx(ref.fisher.errors[0], rel=5e-3)
    with pytest.raises(ErgofitError, match="not among the truth effects"):
        multi_tracer_bias(lik.cosmo, lik.z, dv.k_eff, dv.n_modes, [Tracer(name="g")],
                          ("rsd", "fnl"), ["doppler"])


def test_one_tracer_reproduces_the_forecast_of_a_config(write_config):
    # The existing single-tracer forecast (likelihood.forecast.likelihood_fisher on a built config:
    # periodic box, no integral constraint, Kaiser + f_NL, multipoles 0, 2, 4 with the Gaussian
    # covariance) against multi_tracer_fisher on the same k_eff and mode counts. The config's model
    # is averaged over each bin, this module evaluates at k_eff: with 96 narrow bins the two agree
    # to 0.1 % (1.3 % with 24 bins, measured).
    import likelihood
    from likelihood.forecast import likelihood_fisher
    path = write_config(dict(BOX, tracer={"b1": 2.0, "fnl": 0.0, "b_e": 0.0, "s": 0.0},
                             effects={"observer": False, "doppler": False, "potential": False,
                                      "integral_constraint": "none"}))
    lik = likelihood.build(path)
    ref = likelihood_fisher(lik, names=["fnl", "b1"])
    dv = lik.data_full
    got = multi_tracer_fisher(lik.cosmo, lik.z, dv.k_eff, dv.n_modes,
                              [Tracer(b1=2.0, nbar=3e-4, name="g")], ("fnl", "rsd"))
    np.testing.assert_allclose(got.matrix, ref.matrix, rtol=5e-3)
    assert got.sigma("fnl") == pytest.approx(ref.errors[0], rel=5e-3)


def test_two_tracers_closed_form_at_finite_noise(cosmo):
    # Closed form from the setup of McDonald & Seljak 2009 (δ_X = Z_X δ_m + ε_X, white noise
    # 1/n̄_X, real kernels Z_X = b_X + f_NL (b_X − p) α(k) + fμ²), derived with
    # Sherman–Morrison (docs/multi_tracer.md): with <a, c> = Σ_X n̄_X a_X c_X and
    # X = P <Z, Z>, the information of one mode (k and −k counted separately) is
    #   F_ij = P² [ <Z, Z> <u_i, u_j> / (1 + X) + <Z, u_i> <Z, u_j> (1 − X) / (1 + X)² ],
    # u_i = ∂Z/∂θ_i; for f_NL alone with two tracers it reads
    #   F = P² n̄_A n̄_B (u_A Z_B − u_B Z_A)² / (1 + X) + 2 P² <Z, u>² / (1 + X)².
    # Checked per (k, μ) to ≤ 1 % (in practice to rounding).
    trs = [Tracer(b1=2.6, nbar=2e-4, fnl=5.0, name="A"), Tracer(b1=1.3, nbar=9e-4, fnl=5.0, name="B")]
    eff = ("fnl", "rsd")
    fm = multi_tracer_fisher(cosmo, Z_EFF, K, np.ones_like(K), trs, eff)
    mu = fm.mu[None, :]
    pm = cosmo.power(K, Z_EFF)[:, None]
    al = fnl_alpha(cosmo, K, Z_EFF)[:, None]
    f = cosmo.growth_rate(Z_EFF)
    n = [t.nbar for t in trs]
    Z = [t.b1 + t.fnl * (t.b1 - t.p) * al + f * mu ** 2 for t in trs]
    u = {"fnl": [(t.b1 - t.p) * al + 0 * mu for t in trs],
         "b1_A": [1 + trs[0].fnl * al + 0 * mu, 0 * mu], "b1_B": [0 * mu, 1 + trs[1].fnl * al + 0 * mu]}
    dot = lambda a, c: n[0] * a[0] * c[0] + n[1] * a[1] * c[1]
    X = pm * dot(Z, Z)
    for i, pi in enumerate(fm.names):
        for j, pj in enumerate(fm.names):
            ref = pm ** 2 * (dot(Z, Z) * dot(u[pi], u[pj]) / (1 + X)
                             + dot(Z, u[pi]) * dot(Z, u[pj]) * (1 - X) / (1 + X) ** 2)
            np.testing.assert_allclose(fm.per_mode[..., i, j], ref, rtol=1e-2)
            np.testing.assert_allclose(fm.per_mode[..., i, j], ref, rtol=1e-8)
    uf = u["fnl"]
    ratio_form = (pm ** 2 * n[0] * n[1] * (uf[0] * Z[1] - uf[1] * Z[0]) ** 2 / (1 + X)
                  + 2 * pm ** 2 * dot(Z, uf) ** 2 / (1 + X) ** 2)
    np.testing.assert_allclose(fm.per_mode[..., 0, 0], ratio_form, rtol=1e-8)


def test_noise_free_limit_seljak(cosmo):
    # Seljak 2009 (PRL 102, 021302): with n̄ → ∞ one tracer's σ(f_NL) saturates at the
    # cosmic-variance limit, per mode ½ (∂ ln P/∂f_NL)² = 2 ((b − p) α / b)² (no RSD), while two
    # tracers of different bias measure the scale-dependent bias ratio without cosmic variance:
    # σ(f_NL) keeps falling, as n̄^(-1/2) once the ratio term dominates.
    nm = mode_counts(5e9, EDGES)
    eff = ("fnl",)
    al = fnl_alpha(cosmo, K, Z_EFF)
    b, p = 2.0, 1.0
    sigma_cv = 1 / np.sqrt(np.sum(nm * 2 * ((b - p) * al / b) ** 2))
    s1, s2 = [], []
    nbars = [1e-3, 1e-1, 1e1, 1e3]
    for nb in nbars:
        one = multi_tracer_fisher(cosmo, Z_EFF, K, nm, [Tracer(b1=b, nbar=nb)], eff, parameters=["fnl"])
        two = multi_tracer_fisher(cosmo, Z_EFF, K, nm, [Tracer(b1=2.5, nbar=nb / 2, name="A"),
                                                        Tracer(b1=1.5, nbar=nb / 2, name="B")],
                                  eff, parameters=["fnl"])
        s1.append(one.sigma())
        s2.append(two.sigma())
    s1, s2 = np.array(s1), np.array(s2)
    assert s1[-1] == pytest.approx(sigma_cv, rel=1e-3)
    assert np.all(s1 >= sigma_cv * (1 - 1e-9))
    assert s1[-2] / s1[-1] < 1.01                      # saturated
    assert s2[-1] / s2[-2] == pytest.approx(0.1, rel=0.02)   # ∝ n̄^(-1/2)
    assert s2[-1] < 0.02 * sigma_cv                    # far below the one-tracer limit
    # marginalising over the biases keeps the picture
    two_m = multi_tracer_fisher(cosmo, Z_EFF, K, nm, [Tracer(b1=2.5, nbar=5e2, name="A"),
                                                      Tracer(b1=1.5, nbar=5e2, name="B")], eff)
    one_m = multi_tracer_fisher(cosmo, Z_EFF, K, nm, [Tracer(b1=b, nbar=1e3)], eff)
    assert two_m.sigma() < 0.1 * one_m.sigma()


def test_bias_split_scan(cosmo):
    # An equal split into two identical populations carries exactly the information of the union
    # (the summed field is a sufficient statistic: common practice), so the gain is 1 with the
    # biases fixed; a bias split gains more the larger the split and the denser the sample.
    nm = mode_counts(5e9, EDGES)
    res = bias_split_gain(cosmo, Z_EFF, K, nm, 2.0, [0.0, 0.5, 1.5], [3e-4, 3e-3, 3e-2],
                          effects=("fnl", "rsd"), marginalise_bias=False)
    np.testing.assert_allclose(res["gain"][0], 1.0, rtol=1e-9)
    assert np.all(np.diff(res["gain"][1:], axis=0) > 0)
    assert np.all(np.diff(res["gain"][1:], axis=1) > 0)
    marg = bias_split_gain(cosmo, Z_EFF, K, nm, 2.0, [1.5], [3e-2], effects=("fnl", "rsd"))
    assert marg["gain"][0, 0] > 1.0


def test_bad_input(cosmo):
    t = Tracer(name="A")
    with pytest.raises(ErgofitError, match="distinct"):
        multi_tracer_fisher(cosmo, Z_EFF, K, np.ones_like(K), [t, t])
    with pytest.raises(ErgofitError, match="shared"):
        multi_tracer_fisher(cosmo, Z_EFF, K, np.ones_like(K),
                            [t, Tracer(fnl=3.0, name="B")])
    with pytest.raises(ErgofitError, match="expected some of"):
        multi_tracer_fisher(cosmo, Z_EFF, K, np.ones_like(K), [t], parameters=["b1_Z"])
    with pytest.raises(ErgofitError, match="n_modes"):
        multi_tracer_fisher(cosmo, Z_EFF, K, np.ones(3), [t])
