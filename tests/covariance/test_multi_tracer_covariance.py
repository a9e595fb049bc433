"""Checks of likelihood.covariance.multi_tracer_covariance against outside values:
the single-tracer Gaussian covariance (Grieb et al. 2016, eq. 15, as coded in likelihood.data),
a Monte Carlo of Gaussian complex modes (independent numerical check) and the closed forms for
isotropic spectra (FKP 1994; the 2×2 Gaussian covariance, common practice)."""
import numpy as np
import pytest

from likelihood.covariance import multi_tracer_covariance
from likelihood.data import gaussian_covariance
from likelihood.errors import ErgofitError


def _kernel_model(pm, bias, beta, f):
    """P_XY(k_i, μ) = Z_X Z_Y^* P_m(k_i), Z_X = b_X + iμβ_X + fμ² (a Kaiser + Doppler-like
    kernel: P_XY(−μ) = P_XY(μ)^*, P_YX = P_XY^*)."""
    pm = np.asarray(pm, float)

    def z(x, mu):
        return bias[x] + 1j * mu * beta[x] + f * mu ** 2

    def pkmu(x, y, mu):
        return pm[:, None] * (z(x, mu) * np.conj(z(y, mu)))[None, :]
    return pkmu, z


def test_one_tracer_equals_single_tracer_form():
    # likelihood.data.gaussian_covariance (Grieb et al. 2016, eq. 15) for Kaiser spectra.
    b, f, noise = 1.8, 0.75, 800.0
    pm = np.array([4.0e4, 2.5e4, 1.5e4])
    nm = np.array([120.0, 340.0, 610.0])
    pkmu, _ = _kernel_model(pm, {"G": b}, {"G": 0.0}, f)
    coeffs = np.stack([b * b * pm, 2 * b * f * pm, f * f * pm], axis=1)
    ells = (0, 2, 4)
    ref = gaussian_covariance(np.zeros(3), coeffs, noise, nm, ells)
    got = multi_tracer_covariance(nm, [(("G", "G"), ells)], pkmu, {("G", "G"): noise})
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12 * np.abs(ref).max())


def test_isotropic_monopole_and_dipole_limits():
    # Isotropic spectra, monopoles (common practice; e.g. White, Song & Percival 2009, MNRAS 397,
    # 1348, from memory; FKP 1994 for the autos), with N counting k and -k:
    # Var[P_AA] = 2 C_AA²/N, Var[P_AB] = (C_AA C_BB + C_AB²)/N, Cov[P_AA, P_BB] = 2 C_AB²/N,
    # Cov[P_AA, P_AB] = 2 C_AA C_AB/N. Cross dipole Π_1 = Im P_1 (derivation in docs/multi_tracer.md):
    # Var = 3 (C_AA C_BB − C_AB²)/N, zero for perfectly correlated fields.
    paa, pbb, pab, na, nb = 3.0e4, 1.2e4, 1.5e4, 2.0e3, 5.0e3
    nm = 500.0
    spec = {("A", "A"): paa, ("B", "B"): pbb, ("A", "B"): pab, ("B", "A"): pab}

    def pkmu(x, y, mu):
        return np.full((1, mu.size), spec[(x, y)], complex)
    cov = multi_tracer_covariance([nm], [(("A", "A"), (0,)), (("A", "B"), (0, 1)),
                                         (("B", "B"), (0,))], pkmu,
                                  {("A", "A"): na, ("B", "B"): nb})
    caa, cbb, cab = paa + na, pbb + nb, pab
    assert cov[0, 0] == pytest.approx(2 * caa ** 2 / nm, rel=1e-12)
    assert cov[1, 1] == pytest.approx((caa * cbb + cab ** 2) / nm, rel=1e-12)
    assert cov[2, 2] == pytest.approx(3 * (caa * cbb - cab ** 2) / nm, rel=1e-12)
    assert cov[3, 3] == pytest.approx(2 * cbb ** 2 / nm, rel=1e-12)
    assert cov[0, 3] == pytest.approx(2 * cab ** 2 / nm, rel=1e-12)
    assert cov[0, 1] == pytest.approx(2 * caa * cab / nm, rel=1e-12)
    assert cov[1, 2] == pytest.approx(0.0, abs=1e-12 * cov[1, 1])   # isotropic: no μ-odd part
    # a shared-noise cross term adds to C_AB
    cov2 = multi_tracer_covariance([nm], [(("A", "B"), (0,))], pkmu,
                                   {("A", "A"): na, ("B", "B"): nb, ("A", "B"): 300.0})
    assert cov2[0, 0] == pytest.approx((caa * cbb + (cab + 300.0) ** 2) / nm, rel=1e-12)


def _mc_vectors(rng, n_real, pm, m_half, bias, beta, f, noise, specs):
    """Data vectors of ``n_real`` realisations of Gaussian complex modes.

    Per bin: m modes in the half space with μ_j = (j + ½)/m (their partners −k have −μ_j and
    δ(−k) = δ(k)^*); δ_X = Z_X(μ) g + n_X with <|g|²> = P_m, <|n_X|²> = N_X (independent);
    R_ℓ = (2ℓ+1)/(2m) Σ_{k, −k} δ_X δ_Y^* L_ℓ(μ) taken real (Π_ℓ = Im for odd ℓ).
    """
    out = []
    fields = []
    for pmi, m in zip(pm, m_half):
        mu = (np.arange(m) + 0.5) / m
        cn = lambda var: np.sqrt(var / 2) * (rng.standard_normal((n_real, m))
                                             + 1j * rng.standard_normal((n_real, m)))
        g = cn(pmi)
        d = {x: (bias[x] + 1j * mu * beta[x] + f * mu ** 2) * g + cn(noise[x]) for x in bias}
        fields.append((mu, d))
    for (x, y), ells in specs:
        for ell in ells:
            leg = np.polynomial.legendre.Legendre.basis(ell)
            for mu, d in fields:
                z = d[x] * np.conj(d[y])
                part = z.imag if ell % 2 else z.real
                # pair (k, −k): z L(μ) + z^* L(−μ) = 2 Re z L (even) or 2i Im z L (odd)
                out.append((2 * ell + 1) * np.mean(part * leg(mu), axis=1))
    return np.array(out).T


def test_against_monte_carlo_of_gaussian_modes():
    # Independent numerical check: sample covariance of 6000 realisations of two correlated
    # Gaussian fields with a Doppler-like imaginary cross term (odd ℓ of the cross included).
    rng = np.random.default_rng(2024)
    bias, beta, f = {"A": 2.2, "B": 1.1}, {"A": 0.9, "B": -0.4}, 0.7
    noise = {"A": 0.6, "B": 1.5}
    pm = np.array([1.0, 0.6])
    m_half = np.array([40, 70])
    specs = [(("A", "A"), (0, 2)), (("A", "B"), (0, 1, 2, 3)), (("B", "B"), (0, 2))]
    n_real = 6000
    x = _mc_vectors(rng, n_real, pm, m_half, bias, beta, f, noise, specs)
    mc = np.cov(x, rowvar=False)
    pkmu, _ = _kernel_model(pm, bias, beta, f)
    cov = multi_tracer_covariance(2 * m_half, specs, pkmu,
                                  {("A", "A"): noise["A"], ("B", "B"): noise["B"]})
    # standard error of a sample covariance element (Gaussian approximation):
    # sqrt((C_aa C_bb + C_ab²)/(n − 1))
    d = np.diag(cov)
    se = np.sqrt((np.outer(d, d) + cov ** 2) / (n_real - 1))
    z = (mc - cov) / se
    assert np.max(np.abs(z)) < 4.5, np.unravel_index(np.argmax(np.abs(z)), z.shape)
    # the diagonal to a few per cent (MC error sqrt(2/6000) = 1.8 %)
    np.testing.assert_allclose(np.diag(mc), d, rtol=4 * np.sqrt(2 / n_real))
    # the blocks are not trivially zero: the auto-cross and dipole-monopole couplings are there
    assert np.abs(cov[0, 4]) > 0.3 * np.sqrt(cov[0, 0] * cov[4, 4])
    assert np.abs(cov[6, 4]) > 0.05 * np.sqrt(cov[6, 6] * cov[4, 4])   # Π_1 with P_0 of the cross


@pytest.mark.parametrize("spectra, noise, msg", [
    ([(("A", "A"), (0, 1))], {}, "odd"),
    ([(("A", "B"), (0,)), (("A", "B"), (2,))], {}, "twice"),
    ([(("A", "A"), (0,))], {("A", "C"): 1.0}, "not among"),
    ([(("A", "A"), (0,))], {("A", "A"): -1.0}, ">= 0"),
    ([("AA", (0,), 3)], {}, "expected"),
])
def test_bad_input_one_line(spectra, noise, msg):
    pkmu = lambda x, y, mu: np.ones((2, mu.size), complex)
    with pytest.raises(ErgofitError, match=msg) as exc:
        multi_tracer_covariance([10.0, 20.0], spectra, pkmu, noise)
    assert "\n" not in str(exc.value)


def test_bad_callable_rejected():
    with pytest.raises(ErgofitError, match="shape"):
        multi_tracer_covariance([10.0], [(("A", "A"), (0,))],
                                lambda x, y, mu: np.ones((3, mu.size)), {})
    with pytest.raises(ErgofitError, match="conj"):   # violates P(−μ) = P(μ)^*
        multi_tracer_covariance([10.0], [(("A", "B"), (0, 1))],
                                lambda x, y, mu: (1.0 + mu)[None, :] + 0j, {})
