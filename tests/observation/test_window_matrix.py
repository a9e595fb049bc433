"""Observation operator: window convolution, integral constraint, binning, against outside values.

Sources named beside each check. The test spectra are invented smooth shapes (a turnover power
law with a few % wiggle, and Kaiser multipoles of it); no published table is used.
"""
import numpy as np
import pytest
from scipy import integrate
from scipy.special import spherical_jn

from likelihood.errors import ConfigError, DataError, ErgofitError
from likelihood.observation.matrix import (KBins, WindowMatrix, coupling_coefficients, theory_k_grid,
                                    wigner3j_zero_sq)
from likelihood.observation.window import SphereWindow

R = 1000.0
V = 4.0 * np.pi * R ** 3 / 3.0


def pk_shape(k):
    """Invented turnover spectrum with a 5 % wiggle and a Gaussian high-k cut (Mpc/h)^3."""
    return 2e4 * (k / 0.02) / (1 + (k / 0.02) ** 2) ** 1.5 * (1 + 0.05 * np.sin(k / 0.01)) \
        * np.exp(-(k / 1.5) ** 2)


@pytest.fixture(scope="module")
def grid():
    return theory_k_grid()


@pytest.fixture(scope="module")
def bins():
    return KBins.from_edges(np.linspace(0.002, 0.2, 21))


@pytest.fixture(scope="module")
def sphere_mats(grid, bins):
    sw = SphereWindow(R)
    m0 = WindowMatrix(grid, (0, 2, 4), bins, (0, 2, 4), sw, ic="none", cache=False)
    m1 = WindowMatrix(grid, (0, 2, 4), bins, (0, 2, 4), sw, ic="global", cache=False)
    return m0, m1


# -- Wigner 3j ----------------------------------------------------------------------------------
def test_wigner3j_against_sympy():
    """(l1 l2 l3; 000)² against sympy.physics.wigner.wigner_3j (general-purpose library)."""
    wigner_3j = pytest.importorskip("sympy.physics.wigner").wigner_3j
    for l1 in range(0, 7):
        for l2 in range(0, 7):
            for l3 in range(0, 13):
                ref = float(wigner_3j(l1, l2, l3, 0, 0, 0)) ** 2
                assert wigner3j_zero_sq(l1, l2, l3) == pytest.approx(ref, abs=1e-15, rel=1e-12)


def test_coupling_reproduces_legendre_product():
    """L_ℓ L_ℓ' = Σ_L (2L+1)(ℓ ℓ' L;000)² L_L (Adams–Neumann product formula), checked
    numerically: ∫ L_ℓ L_ℓ' L_L dμ = 2 (ℓ ℓ' L;000)²."""
    from numpy.polynomial import legendre as leg
    x, w = leg.leggauss(40)
    for l in (0, 1, 2, 3, 4):
        for lp in (0, 1, 2, 3, 4):
            c = coupling_coefficients(l, lp)          # (2ℓ+1)(ℓ ℓ' L;000)²
            for L in range(9):
                integral = np.sum(w * leg.legval(x, np.eye(9)[l]) * leg.legval(x, np.eye(9)[lp])
                                  * leg.legval(x, np.eye(9)[L]))
                assert c[L] == pytest.approx((2 * l + 1) * integral / 2, abs=1e-13)


# -- binning ------------------------------------------------------------------------------------
def test_kbins_effective_k_and_modes():
    """k_eff = ∫k³dk/∫k²dk and n_modes = V 4π∫k²dk/(2π)³ (common practice), exact integrals."""
    b = KBins.from_edges([0.01, 0.02, 0.05], volume=1e9)
    np.testing.assert_allclose(b.k_eff, [0.75 * (0.02 ** 4 - 0.01 ** 4) / (0.02 ** 3 - 0.01 ** 3),
                                         0.75 * (0.05 ** 4 - 0.02 ** 4) / (0.05 ** 3 - 0.02 ** 3)])
    np.testing.assert_allclose(b.n_modes, 1e9 * 4 * np.pi / 3 * np.array(
        [0.02 ** 3 - 0.01 ** 3, 0.05 ** 3 - 0.02 ** 3]) / (2 * np.pi) ** 3)


@pytest.mark.parametrize("n", [-3.0, -1.0, 1.0, 2.5])
def test_no_window_matrix_is_exact_mode_average_of_power_law(grid, n):
    """Without window the operator is the mode average; for P = k^n the exact bin value is
    3 (k2^{n+3} − k1^{n+3}) / ((n+3)(k2³ − k1³)), 3 ln(k2/k1)/(k2³ − k1³) for n = −3
    (elementary integrals)."""
    edges = np.array([1e-3, 2e-3, 5e-3, 0.011, 0.05, 0.1, 0.2])
    b = KBins.from_edges(edges)
    m = WindowMatrix(grid, (0, 2), b, (0, 2), None, cache=False)
    p = np.stack([grid ** n, 2 * grid ** n])
    a, c = edges[:-1], edges[1:]
    if n == -3.0:
        exact = 3 * np.log(c / a) / (c ** 3 - a ** 3)
    else:
        exact = 3 * (c ** (n + 3) - a ** (n + 3)) / ((n + 3) * (c ** 3 - a ** 3))
    np.testing.assert_allclose(m(p), np.concatenate([exact, 2 * exact]), rtol=2e-8)
    np.testing.assert_allclose(b.average(grid, grid ** n), exact, rtol=2e-8)


# -- window convolution -------------------------------------------------------------------------
def test_matrix_equals_direct_evaluation(sphere_mats, grid):
    """matrix · t equals the same operator evaluated without the matrix (to 1e-8)."""
    p = np.stack([pk_shape(grid), 0.4 * pk_shape(grid), 0.05 * pk_shape(grid)])
    for m in sphere_mats:
        d1, d2 = m(p), m.convolve_direct(p)
        assert np.max(np.abs(d1 - d2)) < 1e-8 * np.max(np.abs(d2))
        batch = m(np.stack([p, 2 * p]))
        np.testing.assert_allclose(batch[1], 2 * d1, rtol=1e-12)


def _tophat_power_integral(kmax):
    """H(q) = ∫_0^q q' [3 j1(q'R)/(q'R)]² dq' tabulated (top-hat transform, classical)."""
    x = np.linspace(0.0, kmax * R, 200001)
    xs = np.where(x > 0, x, 1.0)
    f = x * (3 * spherical_jn(1, xs) / xs) ** 2
    h = integrate.cumulative_trapezoid(f, x, initial=0.0) / R ** 2
    return lambda q: np.interp(q * R, x, h)


def _direct_convolution(kv, pk, H):
    """P̂(k) = ∫ d³k'/(2π)³ |W̃(k − k')|² P(k') / I₂ with W̃(q) = V 3 j1(qR)/(qR), I₂ = V,
    as a 2-D quadrature over (k', μ); the μ integral is done in q = |k − k'| (dμ = −q dq/(kk'))
    with the tabulated H."""
    a = max(kv - 60 / R, 1e-7)
    kp = np.concatenate([np.geomspace(1e-7, a, 1500)[:-1], np.linspace(a, kv + 60 / R, 30001),
                         np.geomspace(kv + 60 / R, 4.0, 3000)[1:]])
    g = kp * pk(kp) / kv * (H(kv + kp) - H(np.abs(kv - kp)))
    return V / (4 * np.pi ** 2) * integrate.trapezoid(g, kp)


def test_sphere_monopole_against_direct_3d_convolution(sphere_mats, grid):
    """Convolved monopole of an isotropic P(k) in a sphere vs the classical 3-D convolution with
    the top-hat window |W̃|² (e.g. Peacock & Nicholson 1991), to 0.5 % (we reach ~3e-4)."""
    m0, _ = sphere_mats
    H = _tophat_power_integral(4.5)
    p = np.stack([pk_shape(grid), 0 * grid, 0 * grid])
    ph = m0.convolve_unbinned(p)[0]
    for kv in (0.001, 0.002, 0.005, 0.01, 0.03, 0.1, 0.2):
        ref = _direct_convolution(kv, pk_shape, H)
        assert np.interp(kv, grid, ph) == pytest.approx(ref, rel=2e-3), kv
    # the end-point line of sight gives the sphere a quadrupole window (Q_2 ≠ 0): an isotropic
    # spectrum acquires a small, nonzero P̂_2 (sign of Q_2 < 0 at small s)
    ph2 = m0.convolve_unbinned(p)[1]
    assert np.all(np.isfinite(ph2)) and np.max(np.abs(ph2[(grid > 2e-3) & (grid < 0.2)])) > 0


def _xi_brute(pk_l, ell, s):
    """ξ_ℓ(s) = i^ℓ ∫ k² dk/(2π²) P_ℓ j_ℓ(ks) by trapezoid on a dense linear k grid (scipy)."""
    k = np.linspace(1e-6, 4.5, 9001)
    out = np.empty(s.size)
    pk = pk_l(k) * k * k / (2 * np.pi ** 2)
    for i in range(0, s.size, 50):
        out[i:i + 50] = integrate.trapezoid(pk * spherical_jn(ell, np.outer(s[i:i + 50], k)), k,
                                            axis=1)
    return (-1) ** (ell // 2) * out


def test_anisotropic_convolution_against_brute_force_quadrature(grid, bins):
    """Kaiser multipoles (Kaiser 1987: P_0 = (b²+2bf/3+f²/5)P, P_2 = (4bf/3+4f²/7)P,
    P_4 = 8f²/35 P) convolved with the sphere: FFTLog pipeline vs an independent brute-force
    chain (ξ_ℓ' by trapezoid on linear k, Wilson et al. 2017 eq. for ξ̂_ℓ, P̂_ℓ by trapezoid on
    linear s) to 0.5 % (0.5 % of P̂_0 for P̂_2, P̂_4)."""
    r_s = 500.0
    m0 = WindowMatrix(grid, (0, 2, 4), bins, (0, 2, 4), SphereWindow(r_s), cache=False)
    b, f = 2.0, 0.8
    coef = [b * b + 2 * b * f / 3 + f * f / 5, 4 * b * f / 3 + 4 * f * f / 7, 8 * f * f / 35]
    p = np.stack([c * pk_shape(grid) for c in coef])
    ph = m0.convolve_unbinned(p)
    s = np.linspace(0.25, 2 * r_s, 1000)
    xi = [_xi_brute(lambda k, c=c: c * pk_shape(k), l, s) for c, l in zip(coef, (0, 2, 4))]
    Q = SphereWindow(r_s).multipoles(s).Q
    for o, l in enumerate((0, 2, 4)):
        xh = sum(coupling_coefficients(l, lp) @ Q * xi[i] for i, lp in enumerate((0, 2, 4)))
        for kv in (0.003, 0.01, 0.05, 0.15):
            ref = 4 * np.pi * (-1) ** (l // 2) * integrate.trapezoid(
                s * s * xh * spherical_jn(l, kv * s), s)
            scale = abs(np.interp(kv, grid, ph[0]))
            assert abs(np.interp(kv, grid, ph[o]) - ref) < 5e-3 * scale, (l, kv)


def test_global_ic_sphere_matches_peacock_nicholson(sphere_mats, grid):
    """Global IC for a sphere: correction = P̂_conv(0) |W̃(k)|²/|W̃(0)|², |W̃(k)|/|W̃(0)| =
    3 j1(kR)/(kR) (Peacock & Nicholson 1991), with P̂_conv(0) = V/(2π²) ∫k² [3j1/(kR)]² P dk."""
    m0, m1 = sphere_mats
    p = np.stack([pk_shape(grid), 0 * grid, 0 * grid])
    corr = m0.convolve_unbinned(p)[0] - m1.convolve_unbinned(p)[0]
    kq = np.linspace(1e-7, 4.0, 400001)
    x = kq * R
    p0 = V / (2 * np.pi ** 2) * integrate.trapezoid(kq ** 2 * (3 * spherical_jn(1, x) / x) ** 2
                                                    * pk_shape(kq), kq)
    for kv in (2e-4, 0.001, 0.002, 0.003, 0.004, 0.007, 0.01, 0.02):
        ref = p0 * (3 * spherical_jn(1, kv * R) / (kv * R)) ** 2
        got = np.interp(kv, grid, corr)
        # 0.5 % of the correction, or 1e-4 of P̂_conv(0) near the zeros of j1
        assert abs(got - ref) < max(5e-3 * abs(ref), 1e-4 * p0), kv


def test_result_independent_of_grid(bins):
    """Halving/doubling the grid density and the log-range changes the data vector by < 1e-3
    (FFTLog convergence; project requirement)."""
    sw = SphereWindow(R).multipoles()
    out = []
    for kmin, kmax, n in [(1e-6, 10, 1024), (1e-6, 10, 2048), (1e-6, 10, 512),
                          (1e-6 / 2, 20, 1024 + 97), (2e-6, 5, 1024 - 97)]:
        k = theory_k_grid(kmin, kmax, n)
        m = WindowMatrix(k, (0, 2), bins, (0, 2), sw, ic="global", cache=False)
        out.append(m.convolve_direct(np.stack([pk_shape(k), 0.5 * pk_shape(k)])))
    ref = out[0]
    scale = np.abs(ref[:bins.n]).max()
    for o in out[1:]:
        assert np.max(np.abs(o - ref)) < 1e-3 * scale


def test_cache_roundtrip(tmp_path, grid, bins):
    """The matrix is stored once under a hash of its inputs and read back identically."""
    sw = SphereWindow(R)
    m1 = WindowMatrix(grid, (0, 2), bins, (0, 2), sw, ic="global", cache_dir=tmp_path)
    assert not list(tmp_path.glob("*.npz"))       # built lazily, on first use
    m1.matrix
    files = list(tmp_path.glob("window-matrix-*.npz"))
    assert len(files) == 1
    m2 = WindowMatrix(grid, (0, 2), bins, (0, 2), sw, ic="global", cache_dir=tmp_path)
    np.testing.assert_array_equal(m1.matrix, m2.matrix)
    m3 = WindowMatrix(grid, (0, 2), bins, (0, 2), sw, ic="none", cache_dir=tmp_path)
    m3.matrix
    assert m3.cache_key() != m1.cache_key() and len(list(tmp_path.glob("*.npz"))) == 2


# -- bad input ----------------------------------------------------------------------------------
def test_bad_input_errors(grid, bins):
    sw = SphereWindow(R)
    with pytest.raises(DataError, match="outside the range"):
        WindowMatrix(grid, (0,), KBins.from_edges([1e-5, 1e-3]), (0,), sw, cache=False)
    with pytest.raises(DataError, match="outside the range"):
        WindowMatrix(theory_k_grid(1e-6, 1.0, 512), (0,), KBins.from_edges([0.1, 0.2]), (0,),
                     sw, cache=False)
    with pytest.raises(ConfigError, match="radial"):
        WindowMatrix(grid, (0,), bins, (0,), sw, ic="radial", cache=False)
    with pytest.raises(ConfigError, match="needs a window"):
        WindowMatrix(grid, (0,), bins, (0,), None, ic="global", cache=False)
    with pytest.raises(ConfigError, match="not in ells_theory"):
        WindowMatrix(grid, (0,), bins, (0, 2), None, cache=False)
    with pytest.raises(ErgofitError, match="log-spaced"):
        WindowMatrix(np.linspace(1e-4, 1, 500), (0,), bins, (0,), sw, cache=False)
    m = WindowMatrix(grid, (0, 2), bins, (0,), None, cache=False)
    with pytest.raises(ErgofitError, match="expected"):
        m(np.ones((3, grid.size)))
    with pytest.raises(DataError, match="increasing"):
        KBins.from_edges([0.1, 0.05])


def test_odd_multipole_large_window_limit(grid):
    """Cross-spectrum dipole (real Π_1, P_1 = iΠ_1): for a window much larger than the scales
    probed the convolved dipole tends to Π_1 itself (ξ̂_1 = ξ_1 (Q_0 + 2Q_2/5) → ξ_1 as
    Q → δ_L0; Wilson et al. 2017 coupling), to 1 % at k ≥ 0.05 h/Mpc for R = 3000 Mpc/h."""
    b = KBins.from_edges(np.linspace(0.05, 0.2, 7))
    m = WindowMatrix(grid, (0, 1), b, (1,), SphereWindow(3000.0), cache=False)
    pi1 = 0.1 * pk_shape(grid)
    got = m(np.stack([0 * grid, pi1]))
    np.testing.assert_allclose(got, b.average(grid, pi1), rtol=1e-2)
    # the monopole leaks into the dipole through the end-point Q_1 (wide-angle-like term)
    leak = m(np.stack([pk_shape(grid), 0 * grid]))
    assert np.all(np.isfinite(leak)) and np.max(np.abs(leak)) > 0


def _red_theory(k, fnl):
    """Kaiser + f_NL + projection multipoles (ℓ = 0, 2, 4): a spectrum rising as k^(n_s - 3..4)."""
    import warnings as _w
    from likelihood.theory import tracer as tr
    from likelihood.theory.cosmology import Cosmology
    cos = Cosmology.from_preset("planck2018")
    with _w.catch_warnings():
        _w.simplefilter("ignore")
        return tr.multipoles(cos, 1.0, k, tr.Tracer(b1=2.0, fnl=fnl), ells=(0, 2, 4), shot_noise=False)


@pytest.mark.parametrize("fnl", [-50.0, 100.0])
def test_default_grid_converged_for_red_spectra(fnl):
    """With f_NL ≠ 0 the theory rises steeply at small k; the default grid must still be converged:
    a 10x wider upper range and a 2x denser grid change the data vector by < 1e-3 (FFTLog
    convergence; a grid ending at k = 10 h/Mpc was off by 1-3 % here)."""
    bins = KBins.from_edges(np.geomspace(0.0015, 0.05, 16))
    out = []
    for kmin, kmax, n in [(1e-6, 1e3, 1316), (1e-6, 1e4, 1462), (1e-6, 1e3, 2631)]:
        k = theory_k_grid(kmin, kmax, n)
        m = WindowMatrix(k, (0, 2, 4), bins, (0, 2), SphereWindow(1000.0), ic="global", cache=False)
        out.append(m.convolve_direct(_red_theory(k, fnl)))
    assert theory_k_grid().size == 1316
    scale = np.abs(out[0][:bins.n]).max()
    for o in out[1:]:
        assert np.max(np.abs(o - out[0])) < 1e-3 * scale


@pytest.mark.slow
def test_red_spectrum_against_direct_quadrature():
    """f_NL = 100 Kaiser+projection spectrum in a sphere (R = 1000 Mpc/h, global IC): the FFTLog
    operator on the default grid against brute-force quadrature of the Wilson et al. (2017)
    convolution (ξ_ℓ by Simpson in ln k, the 3j coupling, P̂_ℓ by Simpson in s), < 0.1 %."""
    from scipy.integrate import simpson
    from scipy.special import spherical_jn
    from likelihood.observation.matrix import coupling_coefficients
    R = 1000.0
    kout = np.array([0.0015, 0.003, 0.006, 0.012])
    k = theory_k_grid()
    op = WindowMatrix(k, (0, 2, 4), KBins.from_edges(np.geomspace(0.0012, 0.05, 40)), (0, 2),
                      window=SphereWindow(R), ic="global", cache=False)
    un = op.convolve_unbinned(_red_theory(k, 100.0))
    Q = SphereWindow(R).multipoles().evaluate(s := np.linspace(1e-3, 2 * R, 20001))
    kk = np.geomspace(1e-6, 4.0, 120000)
    pk = _red_theory(kk, 100.0) * np.exp(-kk ** 2)
    xi = {}
    for i, l in enumerate((0, 2, 4)):
        vals = [simpson(kk ** 3 / (2 * np.pi ** 2) * pk[i] * spherical_jn(l, np.outer(c, kk)),
                        x=np.log(kk), axis=1) for c in np.array_split(s, 40)]
        xi[l] = (1j ** l).real * np.concatenate(vals)
    sign = {0: 1, 2: -1}

    def ph(lo, f, kq):
        return sign[lo] * 4 * np.pi * simpson(s ** 2 * f * spherical_jn(lo, kq * s), x=s)

    xh0 = sum(coupling_coefficients(0, lp) @ Q * xi[lp] for lp in (0, 2, 4))
    p00, w200 = 4 * np.pi * simpson(s ** 2 * xh0, x=s), 4 * np.pi * simpson(s ** 2 * Q[0], x=s)
    for j, lo in enumerate((0, 2)):
        xh = sum(coupling_coefficients(lo, lp) @ Q * xi[lp] for lp in (0, 2, 4))
        ref = np.array([ph(lo, xh, kq) - p00 * ph(lo, Q[lo], kq) / w200 for kq in kout])
        got = np.interp(np.log(kout), np.log(k), un[j])
        np.testing.assert_allclose(got, ref, rtol=1e-3)


def test_odd_multipoles_of_a_cross_spectrum_against_brute_force_quadrature(grid, bins):
    """Cross-spectrum theory with odd multipoles (real Π_ℓ, P_ℓ = iΠ_ℓ) convolved with the sphere:
    FFTLog pipeline vs an independent brute-force chain for the odd outputs ℓ = 1, 3 (ξ_ℓ = i^ℓ
    ∫k²dk/(2π²) P_ℓ j_ℓ, i.e. i^{ℓ+1} ∫ Π_ℓ j_ℓ for odd ℓ; ξ̂_ℓ = Σ (2ℓ+1)(ℓ ℓ' L; 0 0 0)² ξ_ℓ' Q_L
    of Wilson et al. 2017, which holds for any ℓ; Π̂_ℓ = (−i)^{ℓ+1} 4π ∫ s² ds ξ̂_ℓ j_ℓ), even
    theory multipoles included (they reach odd outputs through the odd Q_L of the end-point line of
    sight), to 0.5 % of max |Π̂_1|."""
    r_s = 500.0
    ells_in = (0, 1, 2, 3, 4)
    m = WindowMatrix(grid, ells_in, bins, (1, 3), SphereWindow(r_s), cache=False)
    coef = [3.0, 0.8, 1.5, -0.3, 0.1]           # invented amplitudes per theory multipole
    p = np.stack([c * pk_shape(grid) for c in coef])
    ph = m.convolve_unbinned(p)
    s = np.linspace(0.25, 2 * r_s, 1000)
    Q = SphereWindow(r_s).multipoles(s).Q
    xi = []
    for c, l in zip(coef, ells_in):
        phase = (1j ** (l + 1)).real if l % 2 else (1j ** l).real
        xi.append(phase * (-1) ** (l // 2) * _xi_brute(lambda k, c=c: c * pk_shape(k), l, s))
    scale = np.max(np.abs(ph[0][(grid > 0.003) & (grid < 0.15)]))
    for o, l in enumerate((1, 3)):
        xh = sum(coupling_coefficients(l, lp) @ Q * xi[i] for i, lp in enumerate(ells_in))
        back = ((-1j) ** (l + 1)).real
        for kv in (0.003, 0.01, 0.05, 0.15):
            ref = back * 4 * np.pi * integrate.trapezoid(s * s * xh * spherical_jn(l, kv * s), s)
            assert abs(np.interp(kv, grid, ph[o]) - ref) < 5e-3 * scale, (l, kv)
    # the binned matrix is the same operator
    np.testing.assert_allclose(m(p), m.convolve_direct(p), rtol=1e-8, atol=1e-8 * scale)
