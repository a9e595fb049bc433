"""Data-vector/covariance I/O and the Gaussian covariance against independent values."""
import numpy as np
import pytest
from scipy import integrate
from scipy.special import eval_legendre

from likelihood.data import (DataVector, MockCovariance, check_covariance, covariance_from_mocks,
                             gaussian_covariance, load_covariance, save_covariance)
from likelihood.errors import DataError


def _dv(n=5, ells=(0, 2)):
    edges = np.linspace(0.002, 0.02, n + 1)
    k_eff = 0.5 * (edges[1:] + edges[:-1])
    vals = np.arange(len(ells) * n, dtype=float).reshape(len(ells), n) + 1.0
    return DataVector(ells, edges, k_eff, np.full(n, 100.0), vals, meta={"survey": "demo"})


@pytest.mark.parametrize("suffix", [".txt", ".npz"])
def test_roundtrip(tmp_path, suffix):
    dv = _dv()
    path = tmp_path / ("d" + suffix)
    dv.save(path)
    back = DataVector.load(path)
    assert back.ells == dv.ells
    np.testing.assert_allclose(back.values, dv.values, rtol=1e-12)
    np.testing.assert_allclose(back.edges, dv.edges, rtol=1e-12)
    assert back.meta["survey"] == "demo"


def test_mask_selects_ell_and_k():
    dv = _dv()
    m = dv.mask(ells=(2,), k_min=0.005, k_max=0.015)
    assert m.sum() == 3 and not m[:5].any()  # k_eff 0.0074, 0.011, 0.0146


def test_bad_data_rejected(tmp_path):
    dv = _dv()
    with pytest.raises(DataError, match="NaN"):
        DataVector(dv.ells, dv.edges, dv.k_eff, dv.n_modes, dv.values * np.nan)
    with pytest.raises(DataError, match="edges"):
        DataVector(dv.ells, dv.edges[::-1], dv.k_eff, dv.n_modes, dv.values)
    with pytest.raises(DataError, match="shape"):
        DataVector(dv.ells, dv.edges, dv.k_eff, dv.n_modes, dv.values[:, :3])
    p = tmp_path / "bad.txt"
    p.write_text("hello\n1 2 3\n")
    with pytest.raises(DataError, match="bad.txt"):
        DataVector.load(p)
    with pytest.raises(DataError, match="not found"):
        DataVector.load(tmp_path / "missing.txt")


def test_covariance_checks(tmp_path):
    with pytest.raises(DataError, match="positive definite"):
        check_covariance(np.array([[1.0, 2.0], [2.0, 1.0]]))
    with pytest.raises(DataError, match="symmetric"):
        check_covariance(np.array([[1.0, 0.5], [0.1, 1.0]]))
    with pytest.raises(DataError, match="data vector has 3"):
        check_covariance(np.eye(2), n=3)
    cov = np.diag([1.0, 2.0, 3.0, 4.0])
    save_covariance(tmp_path / "c.txt", cov, (0, 2), 2)
    back, ells = load_covariance(tmp_path / "c.txt")
    np.testing.assert_allclose(back, cov)
    assert ells == (0, 2)


def test_gaussian_covariance_fkp_monopole():
    # Feldman, Kaiser & Peacock (1994): Var[P_0] = 2 (P + N)^2 / N_modes without RSD.
    p, noise, nm = 3.0e4, 1.0e3, 250.0
    cov = gaussian_covariance([0.01], [[p]], noise, [nm], (0,))
    assert cov[0, 0] == pytest.approx(2 * (p + noise) ** 2 / nm, rel=1e-12)


def test_gaussian_covariance_kaiser_against_quadrature():
    # Grieb et al. (2016) eq. 15 evaluated by independent adaptive quadrature (scipy.integrate.quad).
    b, f, pm, noise, nm = 2.0, 0.8, 2.0e4, 5.0e2, 400.0
    coeffs = [[b * b * pm, 2 * b * f * pm, f * f * pm]]
    ells = (0, 2, 4)
    cov = gaussian_covariance([0.02], coeffs, noise, [nm], ells)
    for i, la in enumerate(ells):
        for j, lb in enumerate(ells):
            integ = integrate.quad(lambda mu: eval_legendre(la, mu) * eval_legendre(lb, mu)
                                   * ((b + f * mu * mu) ** 2 * pm + noise) ** 2, -1, 1)[0]
            ref = (2 * la + 1) * (2 * lb + 1) / nm * integ
            assert cov[i, j] == pytest.approx(ref, rel=1e-10)


def test_hartlap_and_percival_factors():
    mc = MockCovariance(np.eye(3), 1000)
    # Hartlap, Simon & Schneider (2007) eq. 17: (n_s - n_d - 2)/(n_s - 1)
    assert mc.hartlap(100) == pytest.approx(898.0 / 999.0, rel=1e-12)
    # Percival et al. (2014) eq. 18: m1 -> 1 when n_s -> infinity, > 1 for finite n_s
    assert MockCovariance(np.eye(3), 10**9).percival_m1(100, 3) == pytest.approx(1.0, abs=1e-6)
    assert mc.percival_m1(100, 3) > 1.0
    with pytest.raises(DataError, match="Hartlap"):
        MockCovariance(np.eye(3), 50).hartlap(100)


def test_covariance_from_mocks_matches_sample(tmp_path):
    rng = np.random.default_rng(3)
    base = _dv(n=4)
    xs = []
    for i in range(40):
        vals = base.values + rng.normal(size=base.values.shape)
        xs.append(vals.ravel())
        DataVector(base.ells, base.edges, base.k_eff, base.n_modes, vals).save(tmp_path / f"m{i:03d}.txt")
    mc, first = covariance_from_mocks(tmp_path / "m*.txt")
    np.testing.assert_allclose(mc.covariance, np.cov(np.array(xs), rowvar=False), rtol=1e-8)
    assert mc.n_mocks == 40
