"""Tracer kernel (likelihood/tracer.py) against independent routes and published formulas."""
import math
import warnings

import numpy as np
import pytest
from astropy import constants
from numpy.polynomial import legendre as npleg
from scipy import integrate
from scipy.special import eval_legendre

from likelihood.theory.cosmology import Cosmology
from likelihood.errors import ErgofitError
from likelihood.theory.tracer import (DELTA_C, EFFECTS, PROJECTION_TERMS, Kernel, PlaneParallelWarning,
                               Tracer, cross_multipoles, effective_fnl, fnl_alpha, gamma1,
                               gamma2, kernel, legendre_moment, multipoles, pair_multipoles,
                               symmetric_pair_multipoles)

pytestmark = pytest.mark.filterwarnings("ignore::likelihood.theory.tracer.PlaneParallelWarning")


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology.from_preset("planck2018")


# ----------------------------------------------------------------------------------------------
# gamma1, gamma2: closed form vs a term-by-term assembly of the linear number counts
# ----------------------------------------------------------------------------------------------
def _assembled_delta(cosmo, z, k, mu, b1, b_e, Q):
    """Delta_g / delta_m assembled term by term from the local part of the linear number counts
    in Newtonian gauge, BEFORE any simplification (docs/projection.md, eq. 5.1; the same terms
    as Challinor & Lewis 2011, eq. 31, Bonvin & Durrer 2011, eq. 35, and Di Dio et al. 2013,
    eq. 2.8, with evolution and magnification bias):

      Delta = delta_N + b_e dz - 3 Phi + v_r - 2 dz/(chi H) - (1/H) d(dz)/dchi - (H'/H^2) dz
              + (Phi + Psi) - 2Q [dz (1 - 1/(chi H)) - Phi],
      dz = -Psi + v_r (local part of the redshift perturbation),
      d(dz)/dchi = d_r v_r - v_r' - d_r Psi + Psi' - (Psi' + Phi')   (last: ISW integral).

    The perturbations are built from the comoving-gauge delta_m with the linear equations only:
    theta = -f H delta (continuity), v = -i k theta / k^2, Poisson k^2 Phi = -(3/2) Om(z) H^2 delta,
    Phi = Psi, the time derivatives from the growth equation D'' + H D' = (3/2) Om H^2 D, and
    delta_N = b1 delta + (b_e - 3) H theta / k^2 (gauge shift of a population with
    d ln nbar/d eta = (b_e - 3) H). Fourier convention e^{+ik.x}: d_r -> i k mu.
    """
    H = float(cosmo.conformal_hubble(z))
    ratio = float(cosmo.conformal_hubble_ratio(z))   # H'/H^2
    om = float(cosmo.Omega_m(z))
    f = float(cosmo.growth_rate(z))
    chi = float(cosmo.comoving_distance(z))
    delta = 1.0
    theta = -f * H * delta                           # div v
    v_r = -1j * k * mu * theta / k**2                # n.v with v = -i k theta / k^2
    phi = -1.5 * om * H**2 * delta / k**2            # Poisson
    psi = phi
    # time derivatives (prime = d/d eta). D' = f H D; D'' = -H D' + (3/2) om H^2 D (growth eq.)
    dlnD = f * H
    d2D_over_D = -H * dlnD + 1.5 * om * H**2
    # v ∝ D' = f H D: v'/v = D''/D'
    v_r_prime = v_r * d2D_over_D / dlnD
    # Phi ∝ Om(z) H^2 D ∝ D / a: Phi'/Phi = D'/D - H
    phi_prime = phi * (dlnD - H)
    psi_prime = phi_prime
    dr = 1j * k * mu                                 # d/dr along n_hat
    dz = -psi + v_r
    ddz_dchi = dr * v_r - v_r_prime - dr * psi + psi_prime - (psi_prime + phi_prime)
    delta_n = b1 * delta + (b_e - 3.0) * H * theta / k**2
    terms = {
        "density": delta_n,
        "evolution": b_e * dz,
        "volume_metric": -3.0 * phi + v_r,
        "radial_distance": -2.0 * dz / (chi * H),
        "redshift_derivative": -ddz_dchi / H - ratio * dz,
        "shapiro_derivative": phi + psi,
        "magnification": -2.0 * Q * (dz * (1.0 - 1.0 / (chi * H)) - phi),
    }
    return sum(terms.values())


@pytest.mark.parametrize("z", [0.05, 0.5, 1.3, 3.0])
@pytest.mark.parametrize("b_e,Q", [(0.0, 0.0), (-1.5, 0.7), (2.0, 1.0), (0.4, -0.3)])
def test_gammas_match_term_by_term_assembly(cosmo, z, b_e, Q):
    """Closed form (module) vs term-by-term assembly (this test): agree to 1e-10."""
    tr = Tracer(b1=1.7, b_e=b_e, s=Q / 2.5)
    k = np.array([3e-4, 2e-3, 0.02])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PlaneParallelWarning)
        zk = kernel(cosmo, z, k, tr, effects=("rsd", "doppler", "potential"))
    f = float(cosmo.growth_rate(z))
    for mu in (-0.9, -0.2, 0.35, 1.0):
        expected = _assembled_delta(cosmo, z, k, mu, tr.b1, b_e, Q)
        got = zk.A + 1j * mu * zk.B + zk.F * mu**2
        # compare the projection part (what is beyond b1 + f mu^2), relative to itself
        np.testing.assert_allclose(got - tr.b1 - f * mu**2, expected - tr.b1 - f * mu**2,
                                   rtol=1e-10, atol=0)
    # and the closed forms of the design (reference form) directly
    H = cosmo.conformal_hubble(z)
    ratio, om, chi = cosmo.conformal_hubble_ratio(z), cosmo.Omega_m(z), cosmo.comoving_distance(z)
    g1 = f * H * (b_e - 2 * Q - 2 * (1 - Q) / (chi * H) - ratio)
    g2 = H**2 * (f * (3 - b_e) + 1.5 * om * (2 + b_e - f - ratio - 4 * Q - 2 * (1 - Q) / (chi * H)))
    assert gamma1(cosmo, z, b_e, Q) == pytest.approx(g1, rel=1e-12)
    assert gamma2(cosmo, z, b_e, Q) == pytest.approx(g2, rel=1e-12, abs=1e-22)


def test_background_inputs_by_finite_differences(cosmo):
    """calH'/calH^2 = 1 + dlnH/dlna and f = dlnD/dlna by central differences of the cosmology's
    own H(z) and D(z) (definitions; common practice): the inputs of gamma1/gamma2 are consistent."""
    for z in (0.3, 1.0, 2.5):
        lna = -math.log1p(z)
        e = 1e-5
        zp, zm = math.exp(-(lna + e)) - 1, math.exp(-(lna - e)) - 1
        dlnH = (math.log(cosmo.hubble(zp)) - math.log(cosmo.hubble(zm))) / (2 * e)
        assert cosmo.conformal_hubble_ratio(z) == pytest.approx(1 + dlnH, rel=1e-7)
        dlnD = (math.log(cosmo.growth_factor(zp)) - math.log(cosmo.growth_factor(zm))) / (2 * e)
        assert cosmo.growth_rate(z) == pytest.approx(dlnD, rel=1e-7)


def test_pieces_add_up(cosmo):
    """The switchable pieces sum to the full coefficients (bookkeeping of PROJECTION_TERMS)."""
    z, b_e, Q = 0.8, 1.2, 0.4
    full = gamma2(cosmo, z, b_e, Q)
    parts = sum(gamma2(cosmo, z, b_e, Q, terms=[t]) for t in PROJECTION_TERMS)
    assert parts == pytest.approx(full, rel=1e-13)
    assert gamma2(cosmo, z, b_e, Q, terms=["doppler"]) == 0.0
    assert gamma1(cosmo, z, b_e, Q, terms=["potential"]) == 0.0
    # gauge piece alone: f (3 - b_e) calH^2 (docs/projection.md, eq. 4.3)
    assert gamma2(cosmo, z, b_e, Q, terms=["gauge"]) == pytest.approx(
        cosmo.growth_rate(z) * (3 - b_e) * cosmo.conformal_hubble(z) ** 2, rel=1e-13)


# ----------------------------------------------------------------------------------------------
# Kaiser, Legendre algebra
# ----------------------------------------------------------------------------------------------
def test_kaiser_multipoles(cosmo):
    """Kaiser (1987, MNRAS 227, 1); Hamilton (1992, ApJ 385, L5); closed forms from memory:
    P0 = (b^2 + 2bf/3 + f^2/5) P, P2 = (4bf/3 + 4f^2/7) P, P4 = 8 f^2 P / 35."""
    z, b = 0.7, 1.8
    k = np.geomspace(0.01, 0.2, 7)
    out = multipoles(cosmo, z, k, Tracer(b1=b, fnl=5.0), effects=("rsd",), shot_noise=False)
    f, P = cosmo.growth_rate(z), cosmo.power(k, z)
    np.testing.assert_allclose(out[0], (b * b + 2 * b * f / 3 + f * f / 5) * P, rtol=1e-13)
    np.testing.assert_allclose(out[1], (4 * b * f / 3 + 4 * f * f / 7) * P, rtol=1e-13)
    np.testing.assert_allclose(out[2], 8 * f * f / 35 * P, rtol=1e-13)
    with_noise = multipoles(cosmo, z, k, Tracer(b1=b, nbar=2e-4), effects=("rsd",))
    np.testing.assert_allclose(with_noise[0] - out[0], 5000.0, rtol=1e-10)
    np.testing.assert_allclose(with_noise[1:], out[1:], rtol=1e-13)


def test_legendre_moment_against_numpy():
    """Closed-form (2l+1)/2 int mu^n L_l against numpy.polynomial.legendre.poly2leg."""
    for n in range(9):
        series = npleg.poly2leg([0] * n + [1])
        for ell in range(10):
            ref = series[ell] if ell < len(series) else 0.0
            assert legendre_moment(n, ell) == pytest.approx(ref, rel=1e-14, abs=1e-15)


def _brute_force(za, zb, pk, ells, n=24):
    """(2l+1)/2 int L_l Z_a Z_b^* P dmu by Gauss-Legendre quadrature (independent route)."""
    x, w = npleg.leggauss(n)
    za_mu = za.A[:, None] + 1j * x * za.B[:, None] + za.F * x**2
    zb_mu = zb.A[:, None] + 1j * x * zb.B[:, None] + zb.F * x**2
    prod = za_mu * np.conj(zb_mu) * pk[:, None]
    return np.array([(2 * l + 1) / 2 * (prod * eval_legendre(l, x)) @ w for l in ells])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_pair_multipoles_against_quadrature(seed):
    rng = np.random.default_rng(seed)
    nk = 11
    za = Kernel(A=rng.normal(2, 1, nk), B=rng.normal(0, 1, nk), F=rng.uniform(0, 1))
    zb = Kernel(A=rng.normal(1, 1, nk), B=rng.normal(0, 1, nk), F=rng.uniform(0, 1))
    pk = rng.uniform(1e3, 1e4, nk)
    ells = (0, 1, 2, 3, 4, 5, 6)
    ref = _brute_force(za, zb, pk, ells)
    got = pair_multipoles(za, zb, pk, ells)
    for i, ell in enumerate(ells):
        if ell % 2 == 0:
            np.testing.assert_allclose(ref[i].imag, 0, atol=1e-9 * abs(ref).max())
            np.testing.assert_allclose(got[i], ref[i].real, rtol=1e-11, atol=1e-9 * abs(ref).max())
        else:   # P_ell = i Pi_ell
            np.testing.assert_allclose(ref[i].real, 0, atol=1e-9 * abs(ref).max())
            np.testing.assert_allclose(got[i], ref[i].imag, rtol=1e-11, atol=1e-9 * abs(ref).max())
    assert np.abs(got[1]).max() > 0 and np.abs(got[3]).max() > 0
    np.testing.assert_array_equal(got[5:], 0.0)


def test_symmetric_pair_multipoles_against_quadrature():
    """All pairs at once: the μ quadrature of Z_a Z_b* + Z_b Z_a* (Z_a Z_a* on the diagonal) and
    the pairwise sums of pair_multipoles; odd multipoles cancel."""
    rng = np.random.default_rng(5)
    nk = 9
    kernels = [Kernel(A=rng.normal(1, 1, nk), B=rng.normal(0, 1, nk), F=rng.uniform(0, 1)),
               Kernel(A=rng.normal(2, 1, nk), B=np.zeros(nk), F=0.0),
               Kernel(A=rng.normal(0, 1, nk), B=rng.normal(0, 1, nk), F=rng.uniform(0, 1))]
    pk = rng.uniform(1e3, 1e4, nk)
    ells = (0, 1, 2, 3, 4)
    pairs = [(a, b) for a in range(3) for b in range(a, 3)]
    got = symmetric_pair_multipoles(kernels, pairs, pk, ells)
    assert got.shape == (len(pairs), len(ells), nk)
    for row, (a, b) in zip(got, pairs):
        ref = _brute_force(kernels[a], kernels[b], pk, ells)
        pw = pair_multipoles(kernels[a], kernels[b], pk, ells)
        if a != b:
            ref = ref + _brute_force(kernels[b], kernels[a], pk, ells)
            pw = pw + pair_multipoles(kernels[b], kernels[a], pk, ells)
        np.testing.assert_allclose(row, ref.real, rtol=1e-11, atol=1e-9 * abs(ref).max())
        np.testing.assert_allclose(row, pw, rtol=1e-14, atol=1e-14 * abs(pw).max())
        np.testing.assert_array_equal(row[[1, 3]], 0.0)


# ----------------------------------------------------------------------------------------------
# f_NL
# ----------------------------------------------------------------------------------------------
def _heath_growth(Om0, z):
    """D_md(a) = (5/2) Om0 E(a) int_0^a da' / (a' E(a'))^3, D -> a in matter domination
    (Heath 1977, MNRAS 179, 351; flat LCDM, no radiation), with E^2 = Om0 a^-3 + 1 - Om0."""
    a = 1 / (1 + z)
    E = lambda x: math.sqrt(Om0 / x**3 + 1 - Om0)
    val, _ = integrate.quad(lambda x: 1 / (x * E(x)) ** 3, 0, a, epsabs=0, epsrel=1e-12)
    return 2.5 * Om0 * E(a) * val


@pytest.mark.parametrize("z", [0.0, 0.6, 2.0])
def test_fnl_bias_dalal_amplitude(cosmo, z):
    """Delta_b = 3 f_NL (b - 1) delta_c Om0 H0^2 / (c^2 k^2 T(k) D(z)) (Dalal et al. 2008,
    PRD 77, 123514, eq. 9; D normalised to a in matter domination), built here from SI values
    (astropy c) and the Heath growth integral instead of the module's constants."""
    b, fnl = 2.3, 7.0
    k = np.geomspace(1e-3, 0.1, 6)
    c_kms = constants.c.to("km/s").value
    H0_over_c = 100.0 / c_kms                           # h/Mpc
    D = _heath_growth(cosmo.Omega_m0, z)
    ref = 3 * fnl * (b - 1) * 1.686 * cosmo.Omega_m0 * H0_over_c**2 / (k**2 * cosmo.transfer(k) * D)
    zk = kernel(cosmo, z, k, Tracer(b1=b, fnl=fnl), effects=("fnl",))
    np.testing.assert_allclose(zk.A - b, ref, rtol=1e-8)
    np.testing.assert_array_equal(zk.B, 0.0)
    assert zk.F == 0.0
    # p = 1.6 (Slosar et al. 2008): the response scales with b - p
    zk16 = kernel(cosmo, z, k, Tracer(b1=b, fnl=fnl, p=1.6), effects=("fnl",))
    np.testing.assert_allclose(zk16.A - b, ref * (b - 1.6) / (b - 1), rtol=1e-8)
    assert DELTA_C == 1.686


def test_fnl_k2_slope(cosmo):
    """Delta_b ∝ k^-2 as k -> 0 where T -> 1 (Dalal et al. 2008)."""
    k = np.array([1e-5, 2e-5])
    a = fnl_alpha(cosmo, k, 1.0)
    assert math.log(a[1] / a[0]) / math.log(2.0) == pytest.approx(-2.0, abs=1e-5)


# ----------------------------------------------------------------------------------------------
# projection terms
# ----------------------------------------------------------------------------------------------
def test_potential_and_doppler_power_slopes(cosmo):
    """Pure potential term: P ∝ gamma2^2 k^-4 P_m ∝ k^(n_s - 4) at small k; pure Doppler term:
    P0 ∝ gamma1^2 k^-2 P_m / 3 ∝ k^(n_s - 2) (common practice: P_m ∝ k^n_s T^2, T -> 1)."""
    k = np.array([2e-5, 4e-5])
    ns = cosmo.params["n_s"]
    tr = Tracer(b1=0.0)
    p_pot = multipoles(cosmo, 1.0, k, tr, effects=("potential",), ells=(0,), shot_noise=False)[0]
    assert math.log(p_pot[1] / p_pot[0]) / math.log(2) == pytest.approx(ns - 4, abs=1e-3)
    p_dop = multipoles(cosmo, 1.0, k, tr, effects=("doppler",), ells=(0, 2), shot_noise=False)
    assert math.log(p_dop[0, 1] / p_dop[0, 0]) / math.log(2) == pytest.approx(ns - 2, abs=1e-3)
    # mu^2 term only: P2 / P0 = (2/3)/(1/3) = 2 (Legendre algebra)
    np.testing.assert_allclose(p_dop[1] / p_dop[0], 2.0, rtol=1e-12)


class _ScaledDistance:
    """Cosmology wrapper with chi(z) multiplied by a factor (to isolate the 1/(chi calH) terms)."""

    def __init__(self, base, factor):
        self._base, self._factor = base, factor

    def comoving_distance(self, z):
        return self._factor * self._base.comoving_distance(z)

    def __getattr__(self, name):
        return getattr(self._base, name)


def test_q_equal_one_removes_distance_terms(cosmo):
    """Q = 1: the 2(1 - Q)/(chi calH) pieces vanish (Challinor & Lewis 2011, the (2 - 5s)/(chi calH)
    factor with 5s = 2), so chi no longer enters; for Q = 0 it does."""
    other = _ScaledDistance(cosmo, 1.7)
    for z in (0.2, 1.0, 3.0):
        for b_e in (0.0, 1.3):
            assert gamma1(other, z, b_e, 1.0) == pytest.approx(gamma1(cosmo, z, b_e, 1.0), rel=1e-14)
            assert gamma2(other, z, b_e, 1.0) == pytest.approx(gamma2(cosmo, z, b_e, 1.0), rel=1e-14)
            assert gamma1(other, z, b_e, 0.0) != pytest.approx(gamma1(cosmo, z, b_e, 0.0), rel=1e-3)
            f, H = cosmo.growth_rate(z), cosmo.conformal_hubble(z)
            ratio = cosmo.conformal_hubble_ratio(z)
            assert gamma1(cosmo, z, b_e, 1.0) == pytest.approx(f * H * (b_e - 2 - ratio), rel=1e-13)


def test_gammas_real_finite(cosmo):
    z = np.concatenate([np.geomspace(1e-3, 0.1, 10), np.linspace(0.1, 5.0, 50)])
    for b_e, Q in ((0, 0), (2.5, 1.4), (-1, -0.5)):
        g1, g2 = gamma1(cosmo, z, b_e, Q), gamma2(cosmo, z, b_e, Q)
        assert g1.shape == z.shape and g2.shape == z.shape
        assert g1.dtype == float and g2.dtype == float
        assert np.all(np.isfinite(g1)) and np.all(np.isfinite(g2))
    # low-z limit: the Doppler term is dominated by -2 f/chi (1/(chi calH) -> infinity)
    z0 = 1e-3
    assert gamma1(cosmo, z0) == pytest.approx(-2 * cosmo.growth_rate(z0) / cosmo.comoving_distance(z0),
                                              rel=5e-3)


def test_cross_dipole_and_auto_odd(cosmo):
    k = np.geomspace(2e-3, 0.05, 8)
    ta, tb = Tracer(b1=1.5, b_e=0.0, name="a"), Tracer(b1=1.5, b_e=2.0, name="b")
    ab = cross_multipoles(cosmo, 1.0, k, ta, tb)
    ba = cross_multipoles(cosmo, 1.0, k, tb, ta)
    assert np.all(np.abs(ab[1]) > 0) and np.all(np.abs(ab[3]) > 0)
    np.testing.assert_allclose(ba[1], -ab[1], rtol=1e-14)
    np.testing.assert_allclose(ba[3], -ab[3], rtol=1e-14)
    np.testing.assert_allclose(ba[[0, 2, 4]], ab[[0, 2, 4]], rtol=1e-14)
    # same b1, Doppler + RSD only: Pi_1 = (gamma1_a - gamma1_b)(b1 + 3f/5) P / k (Legendre
    # algebra of i mu (B_a - B_b)(b1 + f mu^2)); gamma1_a - gamma1_b = f calH (b_e,a - b_e,b)
    f, H = cosmo.growth_rate(1.0), cosmo.conformal_hubble(1.0)
    ref = f * H * (0.0 - 2.0) * (1.5 + 0.6 * f) * cosmo.power(k, 1.0) / k
    dop = cross_multipoles(cosmo, 1.0, k, ta, tb, effects=("rsd", "doppler"), ells=(1,))
    np.testing.assert_allclose(dop[0], ref, rtol=1e-12)
    # no Doppler term: no dipole
    nodop = cross_multipoles(cosmo, 1.0, k, ta, tb, effects=("rsd", "potential"))
    np.testing.assert_array_equal(nodop[[1, 3]], 0.0)
    auto = multipoles(cosmo, 1.0, k, Tracer(b1=1.2, b_e=1.0, s=0.3, fnl=3), ells=(0, 1, 2, 3, 4))
    np.testing.assert_array_equal(auto[[1, 3]], 0.0)


# ----------------------------------------------------------------------------------------------
# effective f_NL
# ----------------------------------------------------------------------------------------------
def _k2_coefficient(cosmo, z, tracer, effects):
    """c2 in P0/P_m = c0 + c2 k^-2 + c4 k^-4 from three small k (exact for a quartic in 1/k)."""
    k = np.array([1e-4, 2e-4, 4e-4])
    ratio = multipoles(cosmo, z, k, tracer, effects, ells=(0,), shot_noise=False)[0] / cosmo.power(k, z)
    design = np.stack([np.ones_like(k), k**-2, k**-4], axis=1)
    return np.linalg.solve(design, ratio)[1]


@pytest.mark.parametrize("z,b1,b_e,s", [(1.0, 2.0, 0.0, 0.0), (0.5, 1.5, 1.0, 0.4),
                                        (2.5, 3.0, -1.0, 0.1)])
def test_effective_fnl_matches_k2_term(cosmo, z, b1, b_e, s):
    tr = Tracer(b1=b1, b_e=b_e, s=s)
    fe = effective_fnl(cosmo, z, tr)
    c_proj = _k2_coefficient(cosmo, z, tr, ("rsd", "doppler", "potential"))
    c_fnl = _k2_coefficient(cosmo, z, Tracer(b1=b1, b_e=b_e, s=s, fnl=fe), ("rsd", "fnl"))
    assert c_fnl == pytest.approx(c_proj, rel=1e-3)
    assert abs(fe) > 1e-3   # the projection terms do mimic a non-zero f_NL


def test_effective_fnl_bad(cosmo):
    with pytest.raises(ErgofitError, match="b1 = p"):
        effective_fnl(cosmo, 1.0, Tracer(b1=1.0))
    assert effective_fnl(cosmo, 1.0, Tracer(), effects=("rsd", "fnl")) == 0.0


# ----------------------------------------------------------------------------------------------
# warnings and bad input
# ----------------------------------------------------------------------------------------------
def test_plane_parallel_warning(cosmo):
    with pytest.warns(PlaneParallelWarning, match="k chi"):
        kernel(cosmo, 1.0, [1e-3, 1e-2], Tracer())
    with warnings.catch_warnings():
        warnings.simplefilter("error", PlaneParallelWarning)
        kernel(cosmo, 1.0, [1e-2, 1e-1], Tracer())          # k chi = 23 > 10
        kernel(cosmo, 1.0, [1e-4], Tracer(), effects=("rsd", "fnl"))   # no projection terms


@pytest.mark.parametrize("call,match", [
    (lambda c: kernel(c, 1.0, [0.01, 0.0], Tracer()), "k must be finite and > 0"),
    (lambda c: kernel(c, 1.0, [-0.01], Tracer()), "k must be finite and > 0"),
    (lambda c: multipoles(c, 1.0, [np.nan], Tracer()), "k must be finite"),
    (lambda c: kernel(c, -0.5, [0.01], Tracer()), "redshift z"),
    (lambda c: gamma1(c, [0.5, -1.0]), "redshift z"),
    (lambda c: kernel(c, 0.0, [0.01], Tracer()), "z must be > 0 for the projection"),
    (lambda c: kernel(c, 1.0, [0.01], Tracer(), effects=("rsd", "lensing")), "unknown effect 'lensing'"),
    (lambda c: gamma2(c, 1.0, terms=["rsd"]), "projection terms"),
    (lambda c: multipoles(c, 1.0, [0.01], Tracer(), ells=(0, -2)), "ells"),
    (lambda c: pair_multipoles(Kernel(np.ones(3), np.zeros(3), 0.5), Kernel(1.0, 0.0, 0.5),
                               np.ones(4)), "do not match"),
    (lambda c: kernel(c, 1.0, [0.01], {"b1": 2}), "Tracer"),
])
def test_bad_input(cosmo, call, match):
    with pytest.raises(ErgofitError, match=match):
        call(cosmo)


@pytest.mark.parametrize("field,value,match", [
    ("nbar", 0.0, "nbar must be > 0"), ("nbar", -1e-3, "nbar must be > 0"),
    ("p", 0.0, "p must be > 0"), ("b1", float("nan"), "b1 must be finite"),
    ("s", "x", "s must be a real number"), ("b_e", float("inf"), "b_e must be finite"),
    ("name", "", "name"),
])
def test_bad_tracer(field, value, match):
    with pytest.raises(ErgofitError, match=match):
        Tracer(**{field: value})


def test_tracer_properties_and_effect_names():
    t = Tracer(s=0.4, nbar=5e-4)
    assert t.Q == pytest.approx(1.0) and t.shot_noise == pytest.approx(2000.0)
    assert set(PROJECTION_TERMS) <= set(EFFECTS) and {"rsd", "fnl", "doppler", "potential"} <= set(EFFECTS)
    with pytest.raises(ErgofitError, match="valid effects are"):
        kernel(None, 1.0, [0.1], t, effects="bogus")
