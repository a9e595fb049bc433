"""FFTLog spherical Hankel transforms against analytic transforms of Gaussians.

Reference: ∫_0^∞ x^{ν+1} e^{−αx²} J_ν(βx) dx = β^ν/(2α)^{ν+1} e^{−β²/(4α)}
(Gradshteyn & Ryzhik, Table of Integrals, 6.631.4). With j_ℓ(x) = sqrt(π/(2x)) J_{ℓ+1/2}(x):
∫ k^{ℓ+2} e^{−ak²} j_ℓ(ks) dk = sqrt(π/2) s^ℓ (2a)^{−ℓ−3/2} e^{−s²/(4a)}.
"""
import numpy as np
import pytest

from likelihood.errors import ErgofitError
from likelihood.numerics.hankel import FFTLogPlan, ell_sign, pk_from_xi, xi_from_pk


def _gauss_transform(x_out, ell, a):
    return np.sqrt(np.pi / 2) * x_out ** ell * (2 * a) ** (-ell - 1.5) * np.exp(-x_out ** 2 / (4 * a))


@pytest.mark.parametrize("ell", [0, 1, 2, 3, 4])
def test_xi_of_gaussian(ell):
    """P_ℓ = k^ℓ e^{−k²} → ξ_ℓ = phase/(2π²) · G&R 6.631.4 (odd ℓ: input Π_ℓ, phase i^{ℓ+1})."""
    k = np.geomspace(1e-5, 1e2, 2048)
    s, xi = xi_from_pk(k, k ** ell * np.exp(-k ** 2), ell)
    ref = ell_sign(ell) * _gauss_transform(s, ell, 1.0) / (2 * np.pi ** 2)
    m = (s > 0.05) & (s < 20)
    assert np.max(np.abs(xi - ref)[m]) < 1e-5 * np.max(np.abs(ref))


@pytest.mark.parametrize("ell", [0, 2, 4])
def test_pk_of_gaussian(ell):
    """ξ_ℓ = s^ℓ e^{−0.01 s²} → P_ℓ = 4π (−i)^ℓ · G&R 6.631.4."""
    s = np.geomspace(1e-3, 1e4, 2048)
    k, pk = pk_from_xi(s, s ** ell * np.exp(-0.01 * s ** 2), ell)
    ref = ell_sign(ell) * 4 * np.pi * _gauss_transform(k, ell, 0.01)
    m = (k > 1e-2) & (k < 1)
    assert np.max(np.abs(pk - ref)[m]) < 1e-5 * np.max(np.abs(ref))


@pytest.mark.parametrize("ell", [0, 1, 2, 3])
def test_plan_against_gaussian_and_xi_from_pk(ell):
    """FFTLogPlan (coefficients once, rows at once) gives G&R 6.631.4 like xi_from_pk, and the
    same numbers as xi_from_pk (scipy.fft.fht) to round-off, on a grid size with a large prime."""
    k = np.geomspace(1e-5, 1e2, 1316)                      # 1316 = 4 · 7 · 47
    rows = np.array([k ** ell * np.exp(-k ** 2), 3.0 * k ** ell * np.exp(-2.0 * k ** 2)])
    plan = FFTLogPlan(k, ell)
    xi = plan(rows)
    for row, a, scale in ((0, 1.0, 1.0), (1, 2.0, 3.0)):
        s, ref_fht = xi_from_pk(k, rows[row], ell)
        np.testing.assert_array_equal(s, plan.s)
        assert np.max(np.abs(xi[row] - ref_fht)) < 1e-12 * np.max(np.abs(ref_fht))
        ref = scale * ell_sign(ell) * _gauss_transform(s, ell, a) / (2 * np.pi ** 2)
        m = (s > 0.05) & (s < 20)
        assert np.max(np.abs(xi[row] - ref)[m]) < 1e-5 * np.max(np.abs(ref))


def test_signs_follow_the_i_power_convention():
    """i^ℓ: ξ_2 of a positive P_2 is negative; odd ℓ with P = iΠ: ξ_1 = −H[Π], ξ_3 = +H[Π]."""
    assert [ell_sign(l) for l in range(6)] == [1, -1, -1, 1, 1, -1]


def test_round_trip_is_exact_on_the_same_grid():
    """With the same offset, pk_from_xi inverts xi_from_pk on the original k grid."""
    k = np.geomspace(1e-5, 10, 1024)
    p = k / (1 + (k / 0.02) ** 3)
    for ell in (0, 1, 2, 4):
        s, xi = xi_from_pk(k, p, ell)
        k2, p2 = pk_from_xi(s, xi, ell)
        np.testing.assert_allclose(k2, k, rtol=1e-12)
        assert np.max(np.abs(p2 - p)) < 1e-7 * p.max()


def test_bad_grids():
    with pytest.raises(ErgofitError, match="log-spaced"):
        xi_from_pk(np.linspace(0.01, 1, 64), np.ones(64), 0)
    with pytest.raises(ErgofitError, match="points"):
        xi_from_pk(np.geomspace(0.01, 1, 64), np.ones(63), 0)
    with pytest.raises(ErgofitError, match="non-negative integer"):
        pk_from_xi(np.geomspace(1, 100, 64), np.ones(64), -1)
