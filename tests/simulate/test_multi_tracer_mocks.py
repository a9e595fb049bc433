"""Two Poisson-sampled populations from one Gaussian field (likelihood.simulate.mocks.
multi_tracer_mocks), measured with the FFT estimator: mean against the model (per-mode
expectation computed here by enumerating the mesh's wavevectors, not through the module's code),
scatter against the analytic multi-tracer Gaussian covariance (likelihood.covariance; its own
checks: Grieb et al. 2016 eq. 15 and a Monte Carlo, tests/covariance/).

Periodic box, no window, a far observer (plane-parallel limit: the kernel model is exact there
up to the binning)."""
import math
import warnings

import numpy as np
import pytest

from likelihood.covariance import multi_tracer_covariance
from likelihood.errors import ErgofitError
from likelihood.numerics.mesh import Mesh
from likelihood.observation.estimator import measure_multipoles, measure_spectra
from likelihood.simulate.mocks import MeshTracer, multi_tracer_mocks

SPECTRA = [(("A", "A"), (0, 2)), (("A", "B"), (0, 1, 2, 3)), (("B", "B"), (0, 2))]
K_CUT = 0.055


def pk_demo(k):
    """Smooth invented spectrum (turnover at k = 0.02 h/Mpc), (Mpc/h)^3: demo only."""
    k = np.asarray(k, float)
    return 1e4 * (k / 0.02) / (1.0 + (k / 0.02) ** 2.2)


def doppler(c):
    """An invented Doppler-like term B(k) = c (0.01 h/Mpc)/k, strong enough to see the dipole."""
    return lambda k: np.where(k > 0, c * 0.01 / np.maximum(k, 1e-12), 0.0)


TRACERS = {"A": dict(b=2.4, beta=1.2, f=0.8, nbar=2e-4),
           "B": dict(b=1.1, beta=-0.5, f=0.8, nbar=5e-4)}


def mesh_tracers():
    return {x: MeshTracer(t["b"], doppler(t["beta"]), t["f"], t["nbar"]) for x, t in TRACERS.items()}


def z_kernel(x, k, mu):
    t = TRACERS[x]
    return t["b"] + 1j * mu * t["beta"] * 0.01 / k + t["f"] * mu ** 2


def expected_mean(mesh, edges):
    """(2ℓ+1) <[Z_X Z_Y^* P](k, μ) L_ℓ(μ)> over the full-grid modes of each bin, μ = k_z/k (the
    far observer sits at −z: n̂ = +ẑ); real part for even ℓ, imaginary part (Π_ℓ) for odd ℓ."""
    i = np.fft.fftfreq(mesh.n, 1.0 / mesh.n)
    I, J, L = np.meshgrid(i, i, i, indexing="ij")
    kv = np.stack([I.ravel(), J.ravel(), L.ravel()], 1) * mesh.k_fundamental
    k = np.linalg.norm(kv, axis=1)
    out = []
    for (x, y), ells in SPECTRA:
        for ell in ells:
            leg = np.polynomial.legendre.Legendre.basis(ell)
            vals = []
            for lo, hi in zip(edges[:-1], edges[1:]):
                s = (k >= lo) & (k < hi) & (k > 0)
                mu = kv[s, 2] / k[s]
                p = z_kernel(x, k[s], mu) * np.conj(z_kernel(y, k[s], mu)) * pk_demo(k[s])
                part = p.imag if ell % 2 else p.real
                vals.append((2 * ell + 1) * np.mean(part * leg(mu)))
            out.append(vals)
    return np.concatenate(out)


def analytic_cov(mocks):
    k = mocks.k_eff

    def pkmu(x, y, mu):
        return (z_kernel(x, k[:, None], mu[None, :]) * np.conj(z_kernel(y, k[:, None], mu[None, :]))
                * pk_demo(k)[:, None])
    noise = {(x, x): 1 / t["nbar"] for x, t in TRACERS.items()}
    return multi_tracer_covariance(mocks.n_modes, SPECTRA, pkmu, noise)


def run(n_mesh, n_mocks, seed):
    mesh = Mesh(n_mesh, 1600.0, observer=(0.0, 0.0, -1e7), dtype="float32")
    edges = mesh.k_fundamental * np.array([1.5, 3.5, 5.5, 7.5, 9.5, 11.5])
    with warnings.catch_warnings():
        warnings.simplefilter("error")      # no clipping warning: 1 + Δ > 0 in > 99.9 % of cells
        mocks = multi_tracer_mocks(mesh, pk_demo, mesh_tracers(), SPECTRA, edges, n_mocks,
                                   seed=seed, k_cut=K_CUT)
    return mesh, edges, mocks


def chi2_of_mean(mocks, model, cov):
    d = mocks.mean - model
    n = mocks.vectors.shape[0]
    return float(d @ np.linalg.solve(cov / n, d)), d.size


def test_mean_of_mocks_matches_model_small():
    # χ²/dof of the mean of 24 mocks (32³ mesh) against the per-mode model, with the analytic
    # covariance / n: within 1 ± 3√(2/dof) (common practice for a χ² with dof = 40).
    mesh, edges, mocks = run(32, 24, seed=11)
    model = expected_mean(mesh, edges)
    chi2, dof = chi2_of_mean(mocks, model, analytic_cov(mocks))
    assert abs(chi2 / dof - 1) < 3 * math.sqrt(2 / dof), chi2
    # the cross dipole is there (detected in the mean) and has the model's sign
    sl = mocks.index(("A", "B"), 1)
    assert np.all(np.sign(mocks.mean[sl][1:]) == np.sign(model[sl][1:]))
    assert mocks.max_clipped < 1e-3


def test_measure_spectra_equals_pairwise_estimator():
    # measure_spectra computes each transform once; it must equal measure_multipoles pair by pair.
    mesh = Mesh(16, 800.0, dtype="float64")
    rng = np.random.default_rng(5)
    fa = rng.poisson(3.0, (16,) * 3).astype(float)
    fb = rng.normal(size=(16,) * 3)
    edges = mesh.k_fundamental * np.array([1.0, 3.0, 5.0, 7.0])
    got = measure_spectra(mesh, {"A": fa, "B": fb}, [(("A", "A"), (0, 2)), (("A", "B"), (0, 1, 3)),
                                                      (("B", "A"), (0, 1))],
                          edges, nbar={"A": 3.0 / mesh.cell ** 3})
    aa = measure_multipoles(mesh, fa, None, edges, (0, 2), nbar=3.0 / mesh.cell ** 3)
    ab = measure_multipoles(mesh, fa, None, edges, (0, 1, 3), nbar=3.0 / mesh.cell ** 3, cross=fb)
    ba = measure_multipoles(mesh, fb, None, edges, (0, 1), cross=fa,
                            nbar_cross=3.0 / mesh.cell ** 3)
    np.testing.assert_allclose(got[("A", "A")].values, aa.values, rtol=1e-12)
    np.testing.assert_allclose(got[("A", "B")].values, ab.values, rtol=1e-12)
    np.testing.assert_allclose(got[("B", "A")].values, ba.values, rtol=1e-12)
    with pytest.raises(ErgofitError, match="no field"):
        measure_spectra(mesh, {"A": fa}, [(("A", "C"), (0,))], edges)


def test_mocks_reproducible_and_bad_input():
    mesh = Mesh(16, 1600.0, observer=(0.0, 0.0, -1e7), dtype="float32")
    edges = mesh.k_fundamental * np.array([1.5, 3.5, 5.5])
    a = multi_tracer_mocks(mesh, pk_demo, mesh_tracers(), SPECTRA, edges, 3, seed=4, k_cut=0.03)
    b = multi_tracer_mocks(mesh, pk_demo, mesh_tracers(), SPECTRA, edges, 2, seed=4, k_cut=0.03)
    np.testing.assert_array_equal(a.vectors[:2], b.vectors)   # mock i depends on (seed, i) only
    with pytest.raises(ErgofitError, match="not in tracers"):
        multi_tracer_mocks(mesh, pk_demo, {"A": MeshTracer(2.0)}, SPECTRA, edges, 1)
    with pytest.raises(ErgofitError, match="odd"):
        multi_tracer_mocks(mesh, pk_demo, mesh_tracers(), [(("A", "A"), (1,))], edges, 1)
    with pytest.raises(ErgofitError, match="n_mocks"):
        multi_tracer_mocks(mesh, pk_demo, mesh_tracers(), SPECTRA, edges, 0)


@pytest.mark.slow
def test_many_mocks_mean_and_covariance():
    # ≥ 50 mocks: mean against the model (χ²/dof within 1 ± 3√(2/dof)); 1500 mocks: the sample
    # covariance against likelihood.covariance.multi_tracer_covariance (with each population's
    # shot noise 1/n̄) to ≤ 10 % on the diagonal and in the auto–cross blocks at k ≥ 5 k_f
    # (bin-averaged ratio per block; every element within 4 MC standard errors).
    mesh, edges, mocks = run(32, 1500, seed=21)
    model = expected_mean(mesh, edges)
    cov = analytic_cov(mocks)
    first = mocks.vectors[:60]
    d = first.mean(axis=0) - model
    chi2 = float(d @ np.linalg.solve(cov / 60, d))
    assert abs(chi2 / d.size - 1) < 3 * math.sqrt(2 / d.size), chi2
    chi2_all, dof = chi2_of_mean(mocks, model, cov)
    assert abs(chi2_all / dof - 1) < 3 * math.sqrt(2 / dof), chi2_all
    mc = mocks.covariance().covariance
    n = mocks.vectors.shape[0]
    far = mocks.k_eff >= 5 * mesh.k_fundamental
    for (x, y), ells in SPECTRA:
        for ell in ells:
            s = mocks.index((x, y), ell)
            ratio = np.diag(mc)[s][far] / np.diag(cov)[s][far]
            assert abs(ratio.mean() - 1) < 0.10, ((x, y), ell, ratio)
            assert np.all(np.abs(ratio - 1) < 4 * math.sqrt(2 / (n - 1)) + 0.05), ((x, y), ell, ratio)
    # auto–cross blocks: Cov[P_ℓ^XX, P_ℓ'^AB] on the bin diagonal, normalised by the diagonals
    for auto in (("A", "A"), ("B", "B")):
        for la in (0, 2):
            for lc in (0, 1, 2, 3):
                sa, sc = mocks.index(auto, la), mocks.index(("A", "B"), lc)
                c_an = np.diag(cov[sa, sc])[far]
                c_mc = np.diag(mc[sa, sc])[far]
                norm = np.sqrt(np.diag(cov[sa, sa])[far] * np.diag(cov[sc, sc])[far])
                se = np.sqrt((norm ** 2 + c_an ** 2) / (n - 1)) / norm
                assert np.all(np.abs(c_mc - c_an) / norm < 4 * se + 0.02), (auto, la, lc)
                big = np.abs(c_an) / norm > 0.2          # ≤ 10 % where the correlation is large
                if np.any(big):
                    assert abs(np.mean(c_mc[big] / c_an[big]) - 1) < 0.10, (auto, la, lc)


def test_clip_gain_keeps_the_linear_response():
    # Stein's lemma (Stein 1981, Ann. Stat. 9, 1135): E[g(X) X] = σ² E[g'(X)] for X ~ N(0, σ²), so
    # with g = max(aX, −1) and a = clip_gain(σ) the Monte Carlo E[g X]/σ² must be 1; and for a
    # weakly correlated pair (ρ = 0.1) Cov[g(X), g(Y)] = ρσ² + O(ρ²) (Price 1958).
    from likelihood.simulate.fields import clip_gain
    rng = np.random.default_rng(3)
    for sigma in (0.3, 0.5, 0.8):
        a = clip_gain(sigma)
        x = sigma * rng.standard_normal(2_000_000)
        g = np.maximum(a * x, -1.0)
        assert np.mean(g * x) / sigma ** 2 == pytest.approx(1.0, abs=5e-3)
        if sigma >= 0.5:     # clipping alone (a = 1) loses > 1 % of the response
            assert np.mean(np.maximum(x, -1.0) * x) / sigma ** 2 < 0.99
        rho = 0.1
        y = rho * x + math.sqrt(1 - rho ** 2) * sigma * rng.standard_normal(x.size)
        h = np.maximum(a * y, -1.0)
        cov = np.mean((g - g.mean()) * (h - h.mean()))
        assert cov / (rho * sigma ** 2) == pytest.approx(1.0, abs=0.03)
    assert clip_gain(0.05) == 1.0


def test_simulate_tracers_one_tracer_equals_single_tracer_mocks():
    # simulate_tracers builds its kernels with likelihood.theory.tracer.kernel like
    # simulate_from_settings; with one tracer and the same seed the numbers must be identical
    # (same random streams, measure_spectra = measure_multipoles), Poisson sampling included.
    from likelihood.simulate.mocks import simulate_from_settings, simulate_tracers
    from likelihood.theory.cosmology import Cosmology
    from likelihood.theory.tracer import Tracer
    cosmo = Cosmology.from_preset()
    mesh = Mesh(16, 3000.0, dtype="float32")
    edges = mesh.k_fundamental * np.array([1.5, 3.5, 5.5, 7.5])
    t = Tracer(b1=1.8, nbar=2e-4, b_e=1.0, s=0.3, name="g")
    eff = ("rsd", "fnl", "doppler", "potential")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one, _ = simulate_from_settings(cosmo, 1.2, t, eff, mesh, None, edges, (0, 2), 3, 7,
                                        nbar=t.nbar)
        many = simulate_tracers(cosmo, 1.2, {"g": t}, eff, mesh, [(("g", "g"), (0, 2))], edges, 3, 7)
        two = simulate_tracers(cosmo, 1.2, {"g": t, "h": Tracer(b1=1.1, nbar=5e-4, name="h")}, eff,
                               mesh, [(("g", "g"), (0,)), (("g", "h"), (0, 1)), (("h", "h"), (0,))],
                               edges, 2, 7)
    np.testing.assert_allclose(many.vectors, np.array([m.flat for m in one]), rtol=1e-10)
    # the same with the observer's constrained potential and the shot noise kept in the monopole
    obs = {"field": "potential", "nu_true": 1.5}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one_c, _ = simulate_from_settings(cosmo, 1.2, t, eff, mesh, None, edges, (0, 2), 2, 7,
                                          nbar=t.nbar, observer=obs, subtract_shot_noise=False)
        many_c = simulate_tracers(cosmo, 1.2, {"g": t}, eff, mesh, [(("g", "g"), (0, 2))], edges,
                                  2, 7, observer=obs, subtract_shot_noise=False)
    np.testing.assert_allclose(many_c.vectors, np.array([m.flat for m in one_c]), rtol=1e-10)
    assert not np.allclose(many_c.vectors, many.vectors[:2])
    assert two.vectors.shape == (2, 4 * 3) and np.all(np.isfinite(two.vectors))
    with pytest.raises(ErgofitError, match="Tracer"):
        simulate_tracers(cosmo, 1.2, {"g": 2.0}, eff, mesh, [(("g", "g"), (0,))], edges, 1)
