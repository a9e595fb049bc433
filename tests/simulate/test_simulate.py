"""Gaussian mocks and the FFT multipole estimator, against outside references.

Every check names its source. Mode averages are computed here by direct enumeration of the
mesh's integer wavevectors (not through the module's binning code).
"""
import math
import warnings

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import eval_legendre, gamma, hyp1f1, spherical_jn

from likelihood.data import DataVector, load_covariance
from likelihood.errors import ConfigError, ErgofitError
from likelihood.numerics.mesh import Mesh, to_fourier, to_real
from likelihood.observation.estimator import harmonic_terms, measure_multipoles, window_mask
from likelihood.simulate.fields import (ObserverConstraint, constrain_at_origin,
                                        constraint_mean_field, constraint_sigma, gaussian_field,
                                        observed_field, poisson_sample)
from likelihood.simulate.mocks import simulate_from_settings, simulate_mocks
from likelihood.simulate.validation import validate


def pk_test(k):
    """Smooth invented spectrum (turnover at k = 0.02 h/Mpc), (Mpc/h)^3: demo only."""
    k = np.asarray(k, float)
    return 2e4 * (k / 0.02) / (1.0 + (k / 0.02) ** 2.2)


def kaiser_ratio(x0, x2, b, f):
    """Measured P0/P2 over realisations with its jackknife error, and the Kaiser (1987) /
    Hamilton (1992) value (b² + 2bf/3 + f²/5)/(4bf/3 + 4f²/7)."""
    x0, x2 = np.array(x0), np.array(x2)
    n = x0.size
    jack = np.array([(x0.sum() - x0[i]) / (x2.sum() - x2[i]) for i in range(n)])
    err = math.sqrt((n - 1) / n * np.sum((jack - jack.mean()) ** 2))
    want = (b * b + 2 * b * f / 3 + f * f / 5) / (4 * b * f / 3 + 4 * f * f / 7)
    return x0.mean() / x2.mean(), err, want


def modes(mesh):
    """Integer-wavevector enumeration of the rfft half grid: k vectors, |k|, multiplicity."""
    i = np.fft.fftfreq(mesh.n, 1.0 / mesh.n)
    l = np.arange(mesh.n // 2 + 1)
    I, J, L = np.meshgrid(i, i, l, indexing="ij")
    kvec = np.stack([I.ravel(), J.ravel(), L.ravel()], 1) * mesh.k_fundamental
    mult = np.where((L.ravel() == 0) | (L.ravel() == mesh.n // 2), 1.0, 2.0)
    return kvec, np.linalg.norm(kvec, axis=1), mult


def bin_average(mesh, edges, values_of_mode):
    """Average over the full-grid modes of each bin [lo, hi) of a function of (kvec, |k|)."""
    kvec, k, mult = modes(mesh)
    out = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        s = (k >= lo) & (k < hi) & (k > 0)
        out.append(np.sum(mult[s] * values_of_mode(kvec[s], k[s])) / mult[s].sum())
    return np.array(out)


# ------------------------------------------------------------------------------------------
# Legendre addition theorem used by the estimator
# ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("ell", range(7))
def test_harmonic_terms_addition_theorem(ell):
    # DLMF 14.18.1 (addition theorem, quoted from memory): sum_t c_t G_t(u) G_t(v) = L_ell(u.v);
    # reference values from scipy.special.eval_legendre.
    rng = np.random.default_rng(ell)
    u = rng.normal(size=(3, 500))
    v = rng.normal(size=(3, 500))
    u /= np.linalg.norm(u, axis=0)
    v /= np.linalg.norm(v, axis=0)
    terms_u = list(harmonic_terms(ell, *u))
    terms_v = list(harmonic_terms(ell, *v))
    assert len(terms_u) == 2 * ell + 1
    total = sum(c * gu * gv for (c, gu), (_, gv) in zip(terms_u, terms_v))
    np.testing.assert_allclose(total, eval_legendre(ell, np.sum(u * v, 0)), atol=1e-12)


# ------------------------------------------------------------------------------------------
# Gaussian field statistics in a periodic box
# ------------------------------------------------------------------------------------------

def test_periodic_monopole_mean_and_variance():
    # Feldman, Kaiser & Peacock (1994): <P_hat> = P averaged over the bin's modes and
    # Var(P_hat_0) = 2 P^2 / N_k with N_k the modes counted with k and -k separately.
    mesh = Mesh(32, 400.0)
    edges = np.linspace(0.03, 0.24, 8)
    nreal = 80
    est = np.array([measure_multipoles(mesh, to_real(mesh, gaussian_field(mesh, pk_test, s)),
                                       None, edges, (0,)).values[0] for s in range(nreal)])
    p_avg = bin_average(mesh, edges, lambda kv, k: pk_test(k))
    p2_avg = bin_average(mesh, edges, lambda kv, k: pk_test(k) ** 2)
    dv = measure_multipoles(mesh, np.zeros((32,) * 3), None, edges, (0,), subtract_mean=False)
    n_k = dv.n_modes
    var_pred = 2.0 * p2_avg / n_k
    z = (est.mean(0) - p_avg) / np.sqrt(var_pred / nreal)
    assert np.all(np.abs(z) < 4.0), z
    ratio = est.var(0, ddof=1) / var_pred
    # each sample variance has relative error sqrt(2/(nreal-1)) ~ 0.16; the mean of 7 bins ~ 0.06
    assert abs(ratio.mean() - 1.0) < 0.2, ratio
    # n_modes itself: a thin shell holds V 4 pi k^2 dk / (2 pi)^3 modes (common practice)
    shell = mesh.volume * 4 * np.pi / 3 * (edges[1:] ** 3 - edges[:-1] ** 3) / (2 * np.pi) ** 3
    np.testing.assert_allclose(n_k, shell, rtol=0.1)


def test_fixed_amplitude_field_has_exact_power():
    # Angulo & Pontzen (2016): |delta_k|^2 = V P(k) for every mode of a "fixed" field.
    mesh = Mesh(16, 300.0)
    dk = gaussian_field(mesh, pk_test, 3, fixed_amplitude=True)
    _, k, _ = modes(mesh)
    got = np.abs(dk.ravel()) ** 2 / mesh.volume
    want = np.where(k > 0, pk_test(np.where(k > 0, k, 1.0)), 0.0)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-9)


# ------------------------------------------------------------------------------------------
# Observed field with the local line of sight
# ------------------------------------------------------------------------------------------

def test_observed_field_plane_wave_local_los():
    # Derivation (docstring of observed_field): for delta = cos(k.x), n_i n_j d_i d_j Lap^-1
    # gives (k^.n^)^2 cos(k.x) and n_i d_i (-Lap)^-1/2 gives -(k^.n^) sin(k.x).
    mesh = Mesh(16, 100.0)
    x, y, z = np.broadcast_arrays(*mesh.positions())
    kv = mesh.k_fundamental * np.array([1.0, -2.0, 3.0])
    phase = kv[0] * x + kv[1] * y + kv[2] * z
    dk = to_fourier(mesh, np.cos(phase))
    r = np.sqrt(x * x + y * y + z * z)
    with np.errstate(invalid="ignore", divide="ignore"):
        mu = np.where(r > 0, (kv[0] * x + kv[1] * y + kv[2] * z) / (r * np.linalg.norm(kv)), 0.0)
    A, B, F = 1.3, 0.4, 0.7
    got = observed_field(mesh, dk, A, B, F)
    want = A * np.cos(phase) - B * mu * np.sin(phase) + F * mu ** 2 * np.cos(phase)
    np.testing.assert_allclose(got, want, atol=1e-12)


def test_observed_field_distant_observer_matches_fourier_kernel():
    # Shared design kernel Delta_g(k, mu) = [A + i mu B + F mu^2] delta with mu = k^.n^ and n^
    # from observer to source: an observer far below the box (n^ = +z) is plane parallel.
    mesh = Mesh(16, 200.0, observer=(0.0, 0.0, -1e9))
    dk = gaussian_field(mesh, pk_test, 5)
    kx, ky, kz = mesh.kvectors()
    k = mesh.kmag()
    with np.errstate(invalid="ignore", divide="ignore"):
        mu = np.where(k > 0, kz / k, 0.0)
    B = lambda q: 30.0 * 0.01 / q  # noqa: E731  (a Doppler-like gamma1/k)
    want = to_real(mesh, (2.0 + 1j * mu * mesh.on_grid(B) + 0.8 * mu ** 2) * dk)
    got = observed_field(mesh, dk, 2.0, B, 0.8)
    np.testing.assert_allclose(got, want, atol=1e-6 * np.abs(want).max())


def test_kaiser_limit_distant_observer():
    # Kaiser (1987); Hamilton (1992): P0/P2 = (b^2 + 2bf/3 + f^2/5)/(4bf/3 + 4f^2/7).
    b, f = 2.0, 0.7
    mesh = Mesh(64, 800.0, observer=(0.0, 0.0, -1e7))
    edges = np.linspace(0.06, 0.24, 7)
    x0, x2 = [], []
    for s in range(20):
        dv = measure_multipoles(mesh, observed_field(mesh, gaussian_field(mesh, pk_test, s), b,
                                                     None, f), None, edges, (0, 2))
        x0.append(dv.values[0].sum())
        x2.append(dv.values[1].sum())
    ratio, err, want = kaiser_ratio(x0, x2, b, f)
    assert abs(ratio - want) < 3.5 * err, (ratio, want, err)
    assert err < 0.03 * want


@pytest.mark.slow
def test_kaiser_limit_local_los_far_shell():
    # Kaiser (1987); Hamilton (1992) with the local line of sight: a shell 450-950 Mpc/h around
    # the observer, k >= 0.1 h/Mpc, so wide-angle terms (1/(k r))^2 ~ 1e-4 are negligible; the
    # shell's window leaks ~1% of P0 into P2 here, inside the 3.5 sigma allowance (~1.7%).
    b, f = 2.0, 0.7
    mesh = Mesh(128, 2000.0)
    r = mesh.radius()
    W = ((r > 450.0) & (r < 950.0)).astype(float)
    edges = np.linspace(0.1, 0.19, 4)
    x0, x2 = [], []
    for s in range(16):
        g = observed_field(mesh, gaussian_field(mesh, pk_test, s), b, None, f)
        dv = measure_multipoles(mesh, g, W, edges, (0, 2))
        x0.append(dv.values[0].sum())
        x2.append(dv.values[1].sum())
    ratio, err, want = kaiser_ratio(x0, x2, b, f)
    assert abs(ratio - want) < 3.5 * err, (ratio, want, err)


# ------------------------------------------------------------------------------------------
# Estimator on a deterministic field with analytic multipoles
# ------------------------------------------------------------------------------------------

def _radial_integral(ell, k, s, n=4):
    """int_0^inf r^2 (r/s)^n e^{-r^2/2s^2} j_ell(kr) dr, Gradshteyn & Ryzhik 6.631.1:
    int t^{mu-1} e^{-p^2 t^2} J_nu(at) dt = Gamma((nu+mu)/2) (a/2p)^nu / (2 p^mu Gamma(nu+1))
    1F1((nu+mu)/2; nu+1; -a^2/4p^2), with j_ell(x) = sqrt(pi/2x) J_{ell+1/2}(x)."""
    a = 1.0 / (2 * s * s)
    mu, nu = n + 2.5, ell + 0.5
    val = (np.sqrt(np.pi / (2 * k)) * gamma((nu + mu) / 2) * (k / (2 * np.sqrt(a))) ** nu
           / (2 * a ** (mu / 2) * gamma(nu + 1)) * hyp1f1((nu + mu) / 2, nu + 1, -k * k / (4 * a)))
    return val / s ** n


def test_radial_integral_formula_against_quadrature():
    # the closed form above against scipy.integrate.quad (independent numerical integral)
    s = 25.0
    for ell in range(5):
        for k in (0.02, 0.07, 0.15):
            q = integrate.quad(lambda r: r * r * (r / s) ** 4 * np.exp(-r * r / (2 * s * s))
                               * spherical_jn(ell, k * r), 0, 400, limit=400)[0]
            assert _radial_integral(ell, k, s) == pytest.approx(q, rel=1e-7, abs=1e-6)


def test_estimator_on_radial_field_matches_analytic_multipoles():
    # For F(x) = f(r) around the observer, the plane-wave expansion
    # e^{-ik.x} = sum_L (-i)^L (2L+1) j_L(kr) L_L(k^.x^) gives F_ell(k) = (-i)^ell 4 pi I_ell(k),
    # I_ell = int r^2 f j_ell dr, so P_ell = (2ell+1)/V F_ell F_0^* = (2ell+1)(4pi)^2 I_0 I_ell
    # (-i)^ell / V (real part for even ell; imaginary part Pi_ell for odd ell). Derivation;
    # plane-wave expansion: Abramowitz & Stegun 10.1.47 (quoted from memory).
    mesh = Mesh(64, 400.0)
    s = 25.0
    r = mesh.radius()
    field = (r / s) ** 4 * np.exp(-r * r / (2 * s * s))
    ells = (0, 1, 2, 3, 4)
    edges = np.linspace(0.005, 0.2, 14)
    dv = measure_multipoles(mesh, field, None, edges, ells, subtract_mean=False)
    for j, ell in enumerate(ells):
        phase = ((-1j) ** ell).imag if ell % 2 else ((-1j) ** ell).real
        want = bin_average(mesh, edges, lambda kv, k: (2 * ell + 1) / mesh.volume * (4 * np.pi) ** 2
                           * _radial_integral(0, k, s) * _radial_integral(ell, k, s) * phase)
        np.testing.assert_allclose(dv.values[j], want, rtol=1e-6, atol=1e-6 * np.abs(want).max())


def test_estimator_on_window_matches_window_module_multipoles():
    # Cross-module convention check (odd ell included): for F = W with W = 1 inside a sphere,
    # <F_ell F_0^*>_angles (2ell+1)/I2 = (-i)^ell 4 pi int s^2 j_ell(ks) Q_ell(s) ds, with Q_ell of
    # likelihood.observation.window (s = x1 - x2, line of sight x1^). Derivation: the k-direction average of
    # e^{-ik.s} L_ell(k^.x1^) is (-i)^ell j_ell(ks) L_ell(s^.x1^) (addition theorem).
    window = pytest.importorskip("likelihood.observation.window")
    from scipy.integrate import simpson

    R = 100.0
    mesh = Mesh(64, 400.0)
    sphere = window.SphereWindow(R)
    W = window_mask(mesh, sphere, subsample=2)  # cell fractions: closer to the continuous ball
    edges = np.linspace(0.01, 0.12, 12)
    ells = (0, 1, 2, 3, 4)
    dv = measure_multipoles(mesh, W, None, edges, ells, subtract_mean=False)
    Q = sphere.multipoles(np.linspace(0.0, 2 * R, 4001))
    kg = np.linspace(0.005, 0.13, 300)
    for j, ell in enumerate(ells):
        ph = ((-1j) ** ell).imag if ell % 2 else ((-1j) ** ell).real
        tab = [ph * 4 * np.pi * simpson(Q.s ** 2 * spherical_jn(ell, k * Q.s) * Q.Q[ell], x=Q.s)
               for k in kg]
        want = bin_average(mesh, edges, lambda kv, k: np.interp(k, kg, tab))
        got = dv.values[j] * mesh.volume / sphere.volume
        np.testing.assert_allclose(got, want, atol=0.015 * np.abs(want).max())


def test_cross_spectrum_dipole_sign_matches_tracer_convention():
    # likelihood.theory.tracer.pair_multipoles: P_ab(k, mu) from <Delta_a Delta_b^*>, odd ell stored as
    # Pi_ell with P_ell = i Pi_ell (McDonald 2009 dipole from the Doppler term). Distant observer.
    from likelihood.theory.tracer import Kernel, pair_multipoles

    mesh = Mesh(32, 1000.0, observer=(0.0, 0.0, -1e8))
    edges = np.linspace(0.01, 0.09, 5)
    Ba = lambda k: 0.08 / k  # noqa: E731
    Bb = lambda k: -0.03 / k  # noqa: E731
    est = []
    for s in range(10):
        dk = gaussian_field(mesh, pk_test, s)
        ga = observed_field(mesh, dk, 2.0, Ba, 0.7)
        gb = observed_field(mesh, dk, 1.2, Bb, 0.7)
        est.append(measure_multipoles(mesh, ga, None, edges, (0, 1, 2, 3), cross=gb).values)
    est = np.array(est)

    def model(j):
        def f(kv, k):
            za = Kernel(A=np.full(k.shape, 2.0), B=Ba(k), F=0.7)
            zb = Kernel(A=np.full(k.shape, 1.2), B=Bb(k), F=0.7)
            return pair_multipoles(za, zb, pk_test(k), (0, 1, 2, 3))[j]
        return bin_average(mesh, edges, f)

    for j in range(4):
        want = model(j)
        z = (est[:, j].mean(0) - want) / (est[:, j].std(0, ddof=1) / math.sqrt(est.shape[0]))
        assert np.all(np.abs(z) < 4.0), (j, z)
    assert np.all(model(1) > 0) and np.all(est[:, 1].mean(0) > 0)  # the sign is resolved


# ------------------------------------------------------------------------------------------
# Window, integral constraint, shot noise
# ------------------------------------------------------------------------------------------

def test_integral_constraint_white_noise_in_sphere():
    # Peacock & Nicholson (1991) global integral constraint, for white noise P_w in a 0/1 window:
    # F = W(D - D_bar) gives <|F(k)|^2> = P_w [I2 - |W~(k)|^2 / int W], i.e.
    # <P_hat_0> = P_w [1 - |W~(k)|^2/V_W^2]. W~ by direct summation over the window's cells.
    mesh = Mesh(32, 400.0)
    mask = (mesh.radius() < 180.0).astype(float)
    kf = mesh.k_fundamental
    edges = np.array([0.9, 1.1, 1.5, 1.8]) * kf  # shells |k| = kf, sqrt2 kf, sqrt3 kf
    pw = 1e4
    nreal = 500
    with_ic, without = [], []
    for s in range(nreal):
        d = to_real(mesh, gaussian_field(mesh, pw, s))
        with_ic.append(measure_multipoles(mesh, d, mask, edges, (0,)).values[0])
        without.append(measure_multipoles(mesh, d, mask, edges, (0,), subtract_mean=False).values[0])
    with_ic, without = np.array(with_ic), np.array(without)
    x, y, z = (a.ravel() for a in np.broadcast_arrays(*mesh.positions()))
    inside = mask.ravel() > 0
    pos = np.stack([x[inside], y[inside], z[inside]], 1)
    pred = bin_average(mesh, edges, lambda kv, k: 1.0 - np.abs(np.exp(-1j * kv @ pos.T).sum(1)) ** 2
                       / inside.sum() ** 2)
    assert pred[0] < 0.9  # the test has power: a >10% suppression at k = k_f
    err = with_ic.std(0, ddof=1) / math.sqrt(nreal)
    z_ic = (with_ic.mean(0) / pw - pred) / (err / pw)
    assert np.all(np.abs(z_ic) < 4.0), z_ic
    z_true = (without.mean(0) - pw) / (without.std(0, ddof=1) / math.sqrt(nreal))
    assert np.all(np.abs(z_true) < 4.0), z_true


def test_poisson_shot_noise_subtraction():
    # Feldman, Kaiser & Peacock (1994): Poisson sampling adds 1/nbar to the monopole (unit
    # weights); after subtraction the mean matches the underlying field's spectrum.
    mesh = Mesh(32, 400.0)
    edges = np.linspace(0.05, 0.24, 6)
    nbar = 2e-3
    pk_small = lambda k: 0.1 * pk_test(k)  # noqa: E731  keeps 1 + Delta > 0 in the cells
    mask = (mesh.radius() < 190.0).astype(float)
    diff, shots = [], []
    for s in range(12):
        d = to_real(mesh, gaussian_field(mesh, pk_small, s))
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # no clipping of 1 + Delta < 0 here
            counts = poisson_sample(mesh, d, nbar, mask, seed=1000 + s)
        dv_g = measure_multipoles(mesh, counts, mask, edges, (0, 2), nbar=nbar)
        dv_d = measure_multipoles(mesh, d, mask, edges, (0, 2))
        diff.append(dv_g.values - dv_d.values)
        shots.append(float(dv_g.meta["shot_noise"]))
    diff = np.array(diff)
    assert np.mean(shots) == pytest.approx(1.0 / nbar, rel=0.01)
    # noise of the difference per bin: ~ sqrt(2/N_modes) (1/nbar) (1 + 2 P nbar)^(1/2) per mock
    err = diff.std(0, ddof=1) / math.sqrt(diff.shape[0])
    z = diff.mean(0) / err
    assert np.all(np.abs(z) < 4.5), z
    assert np.all(np.abs(diff.mean(0)[0]) < 0.25 / nbar)


def test_window_mask_from_geometry_and_box_limit():
    class Ball:  # stand-in geometry with the window module's interface (contains)
        def __init__(self, radius):
            self.radius = radius

        def contains(self, x, y, z):
            return x * x + y * y + z * z < self.radius ** 2

    mesh = Mesh(16, 200.0)
    w = window_mask(mesh, Ball(80.0))
    assert w.sum() == np.sum(mesh.radius() < 80.0)
    # fraction-of-cell sampling converges to the ball volume 4/3 pi R^3 (geometry)
    w4 = window_mask(mesh, Ball(80.0), subsample=4)
    assert w4.sum() * mesh.cell ** 3 == pytest.approx(4 / 3 * np.pi * 80.0 ** 3, rel=0.01)
    with pytest.raises(ErgofitError, match="box must contain the window"):
        window_mask(mesh, Ball(120.0))


# ------------------------------------------------------------------------------------------
# Hoffman–Ribak constrained fields
# ------------------------------------------------------------------------------------------

def test_constraint_imposed_exactly():
    # Hoffman & Ribak (1991): the constrained realisation takes the required value at x_o.
    mesh = Mesh(32, 500.0)
    c = ObserverConstraint.potential(2.5)
    dk = gaussian_field(mesh, pk_test, 11)
    sig = constraint_sigma(mesh, pk_test, c.kernel)
    new, sig2, before = constrain_at_origin(mesh, dk, c.kernel, 2.5 * sig, pk_test)
    assert sig2 == pytest.approx(sig, rel=1e-14)
    cfield = to_real(mesh, mesh.on_grid(c.kernel) * new)
    node = mesh.observer_node()
    assert node == (16, 16, 16)
    assert cfield[node] == pytest.approx(2.5 * sig, rel=1e-10)
    assert to_real(mesh, mesh.on_grid(c.kernel) * dk)[node] == pytest.approx(before, rel=1e-10)


def test_constraint_correlation_against_gaussian_integral():
    # For P = A exp(-k^2 R^2) and K = 1: xi(r) = A (4 pi R^2)^(-3/2) exp(-r^2 / 4R^2)
    # (Fourier transform of a Gaussian); the mesh sum equals it up to periodic images
    # (e^-44 here) and aliasing (e^-56).
    amp, R = 1e5, 15.0
    mesh = Mesh(64, 400.0)
    p = lambda k: amp * np.exp(-(k * R) ** 2)  # noqa: E731
    # The mesh has no k = 0 mode (delta_0 = 0): its term P(0)/V = A/V is missing from the sum.
    m, sig = constraint_mean_field(mesh, p, lambda k: np.ones_like(k))
    xi0 = amp * (4 * np.pi * R * R) ** -1.5
    assert sig ** 2 == pytest.approx(xi0 - amp / mesh.volume, rel=1e-9)
    r = mesh.radius()
    np.testing.assert_allclose(m * sig, xi0 * np.exp(-r * r / (4 * R * R)) - amp / mesh.volume,
                               atol=1e-9 * xi0)


def test_constrained_ensemble_mean_and_variance():
    # Hoffman & Ribak (1991): delta' has mean xi_dc c/sigma_c^2 and variance
    # xi(0) - xi_dc^2/sigma_c^2 (Gaussian conditioning); and, for unconstrained fields, the
    # regression of delta(x) on c(x_o) has slope xi_dc/sigma_c^2 (same theorem, sampled).
    mesh = Mesh(16, 200.0)
    kern = ObserverConstraint.density(0.0, 20.0).kernel
    m, sig = constraint_mean_field(mesh, pk_test, kern)
    xi0 = np.sum(mesh.rfft_weights() * mesh.on_grid(pk_test)) / mesh.volume
    cond_var = xi0 - m ** 2
    node = mesh.observer_node()
    nu = 1.7
    nreal = 400
    reals, regress_d, regress_c = [], [], []
    kgrid = mesh.on_grid(kern)
    for s in range(nreal):
        dk = gaussian_field(mesh, pk_test, s)
        regress_d.append(to_real(mesh, dk))
        regress_c.append(to_real(mesh, kgrid * dk)[node])
        reals.append(to_real(mesh, constrain_at_origin(mesh, dk, kern, nu * sig, pk_test)[0]))
    reals = np.array(reals)
    good = cond_var > 1e-6 * xi0
    z = (reals.mean(0) - nu * m)[good] / np.sqrt(cond_var[good] / nreal)
    assert abs(np.sqrt(np.mean(z ** 2)) - 1.0) < 0.1
    assert np.max(np.abs(z)) < 5.0
    ratio = reals.var(0, ddof=1)[good] / cond_var[good]
    assert abs(ratio.mean() - 1.0) < 0.02
    c = np.array(regress_c)
    d = np.array(regress_d).reshape(nreal, -1)
    slope = (c - c.mean()) @ (d - d.mean(0)) / np.sum((c - c.mean()) ** 2)
    corr_err = np.sqrt(xi0 / np.sum(c ** 2))  # standard error of a regression slope
    zs = (slope - (m * sig / sig ** 2).ravel()) / corr_err
    assert np.sqrt(np.mean(zs ** 2)) < 1.2


def test_observer_term_plain_volume_formula():
    # Shared design: in a plain volume with no window the observer term E_0[m] is
    # P_gc(k)^2/(sigma_c^2 V) (here P_gc = K P, the mesh's own sigma_c).
    mesh = Mesh(32, 1000.0)
    kern = ObserverConstraint.potential(1.0).kernel
    m, sig = constraint_mean_field(mesh, pk_test, kern)
    edges = np.linspace(0.5, 15.5, 9) * mesh.k_fundamental
    dv = measure_multipoles(mesh, m, None, edges, (0,), subtract_mean=False)
    want = bin_average(mesh, edges, lambda kv, k: (kern(k) * pk_test(k)) ** 2 / (sig ** 2 * mesh.volume))
    np.testing.assert_allclose(dv.values[0], want, rtol=1e-9)
    sig_direct = math.sqrt(bin_average(mesh, [1e-9, 10.0], lambda kv, k: kern(k) ** 2 * pk_test(k))[0]
                           * (mesh.n ** 3 - 1) / mesh.volume)
    assert sig == pytest.approx(sig_direct, rel=1e-10)


def test_constrained_mocks_shift_the_power_by_nu_squared():
    # <P_hat | nu> = P_std + (nu^2 - 1) E[m] (shared design, from Hoffman & Ribak 1991): with
    # common random numbers the difference of nu = 2 and nu = 0 mocks averages to 4 E[m].
    mesh = Mesh(32, 1000.0)
    edges = np.array([0.5, 1.5, 2.5, 3.5]) * mesh.k_fundamental
    c2, c0 = ObserverConstraint.potential(2.0), ObserverConstraint.potential(0.0)
    args = (mesh, pk_test, 1.0, None, 0.0, None, edges, (0,), 40, 7)
    m2, _ = simulate_mocks(*args, constraint=c2, subtract_mean=False)
    m0, _ = simulate_mocks(*args, constraint=c0, subtract_mean=False)
    diff = np.array([a.values[0] - b.values[0] for a, b in zip(m2, m0)])
    m, sig = constraint_mean_field(mesh, pk_test, c2.kernel)
    em = measure_multipoles(mesh, m, None, edges, (0,), subtract_mean=False).values[0]
    err = diff.std(0, ddof=1) / math.sqrt(diff.shape[0])
    assert 4.0 * em[0] > 5 * err[0]  # the effect is resolved
    np.testing.assert_array_less(np.abs(diff.mean(0) - 4.0 * em), 4.0 * err)


@pytest.mark.slow
def test_mocks_in_a_shell_match_the_window_convolved_theory():
    # End to end: local-LOS mocks in a shell (with the data-estimated mean) against the Kaiser
    # multipoles (Kaiser 1987; Hamilton 1992) convolved by likelihood.observation.matrix.WindowMatrix
    # (Wilson et al. 2017 convolution, global integral constraint). Not modelled by that theory:
    # wide-angle terms (order s/r; they dominate the small hexadecapole at low k and reach ~5% in
    # the quadrupole at the lowest k) and the node-sampled window (~0.5% in the monopole); the
    # allowances below are set by these, the checks catch normalisation, sign and IC errors.
    observation = pytest.importorskip("likelihood.observation.matrix")
    window = pytest.importorskip("likelihood.observation.window")
    b, f = 2.0, 0.7
    mesh = Mesh(64, 1600.0)
    shell = window.ShellWindow(300.0, 700.0)
    edges = np.linspace(0.01, 0.1, 10)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # box < 2x survey diameter: known, bins are k >> k_f
        mocks, _ = simulate_mocks(mesh, pk_test, b, None, f, shell, edges, (0, 2, 4), 100, 1)
    kt = observation.theory_k_grid()
    p = pk_test(kt)
    theory = np.array([(b * b + 2 * b * f / 3 + f * f / 5) * p, (4 * b * f / 3 + 4 * f * f / 7) * p,
                       8 * f * f / 35 * p])
    wm = observation.WindowMatrix(kt, (0, 2, 4), observation.KBins.from_edges(edges), (0, 2, 4),
                                  window=shell, ic="global", cache=False)
    model = wm(theory).reshape(3, -1)
    vals = np.array([m.values for m in mocks])
    mean, err = vals.mean(0), vals.std(0, ddof=1) / math.sqrt(len(mocks))
    assert np.all(np.abs(mean[0] - model[0]) < 4 * err[0] + 0.01 * np.abs(model[0]))
    assert np.all(np.abs(mean[1] - model[1]) < 4 * err[1] + 0.05 * np.abs(model[1]))
    assert np.all(np.abs(mean[2] - model[2]) < 4 * err[2] + 0.1 * np.abs(model[0]))


# ------------------------------------------------------------------------------------------
# Mock sets, files, validation
# ------------------------------------------------------------------------------------------

def test_validate_pvalues_are_uniform_under_the_null(tmp_path):
    # Hotelling (1931): with the covariance estimated from the same mocks, T^2 (N-p)/(p(N-1))
    # ~ F(p, N-p); so p-values are uniform when the model is true (KS test, scipy.stats).
    rng = np.random.default_rng(0)
    edges = np.array([0.01, 0.02, 0.03, 0.04])
    model = np.array([[3.0, 2.0, 1.0], [0.5, 0.4, 0.3]])
    L = np.array([[1, 0, 0, 0, 0, 0], [0.5, 1, 0, 0, 0, 0], [0, 0.3, 1, 0, 0, 0],
                  [0.2, 0, 0, 1, 0, 0], [0, 0, 0.1, 0.4, 1, 0], [0, 0, 0, 0, 0.2, 1]]) * 0.1
    pv, pv_known = [], []
    for _ in range(300):
        x = model.ravel() + rng.normal(size=(15, 6)) @ L.T
        mocks = [DataVector((0, 2), edges, [0.015, 0.025, 0.035], [10, 20, 30], v.reshape(2, 3))
                 for v in x]
        pv.append(validate(mocks, model)["p_value_total"])
        pv_known.append(validate(mocks, model, covariance=L @ L.T)["p_value_total"])
    assert stats.kstest(pv, "uniform").pvalue > 0.01
    assert stats.kstest(pv_known, "uniform").pvalue > 0.01
    shifted = validate(mocks, model + 0.3, plot=tmp_path / "residuals.png")
    assert shifted["p_value_total"] < 1e-3
    assert (tmp_path / "residuals.png").stat().st_size > 1000
    with pytest.raises(ErgofitError, match=r"model has shape \(3,\)"):
        validate(mocks, [1.0, 2.0, 3.0])


def test_simulate_from_settings_writes_loadable_files(tmp_path):
    from likelihood.theory.cosmology import Cosmology
    from likelihood.theory.tracer import Tracer, multipoles

    cosmo = Cosmology.from_preset("planck2018")
    tracer = Tracer(b1=1.8, nbar=5e-4)
    mesh = Mesh(32, 2000.0, observer=(0.0, 0.0, -1e7))
    edges = np.linspace(0.008, 0.048, 6)
    mocks, cov = simulate_from_settings(cosmo, 1.0, tracer, ("rsd",), mesh, None, edges, (0, 2),
                                        16, 3, nbar=tracer.nbar, out_dir=tmp_path)
    files = sorted(tmp_path.glob("mock_*.txt"))
    assert len(files) == 16
    back = DataVector.load(files[3])
    np.testing.assert_allclose(back.values, mocks[3].values, rtol=1e-9)
    c, ells = load_covariance(tmp_path / "covariance.txt")
    assert ells == (0, 2) and c.shape == (10, 10)
    # plane-parallel theory of the tracer module (Kaiser; Hamilton 1992), averaged over the
    # modes of each bin, agrees with the mock mean (Hotelling test, validate())
    want = np.array([bin_average(mesh, edges, lambda kv, k, j=j:
                                 multipoles(cosmo, 1.0, k, tracer, ("rsd",), (0, 2),
                                            shot_noise=False)[j]) for j in range(2)])
    res = validate(mocks, want, covariance=cov)
    assert res["p_value_total"] > 1e-3, res


# ------------------------------------------------------------------------------------------
# Bad input
# ------------------------------------------------------------------------------------------

def test_mesh_too_coarse_for_kmax():
    mesh = Mesh(16, 400.0)  # k_N = 0.126 h/Mpc
    with pytest.raises(ErgofitError, match=r"exceeds the mesh Nyquist.*use n >= 26"):
        measure_multipoles(mesh, np.zeros((16,) * 3), None, [0.02, 0.2])


def test_box_too_small_for_window():
    mesh = Mesh(16, 200.0)
    mask = (mesh.radius() < 150.0).astype(float)
    with pytest.raises(ErgofitError, match=r"box must contain the window: use L > "):
        measure_multipoles(mesh, np.zeros((16,) * 3), mask, [0.05, 0.1])


@pytest.mark.parametrize("kwargs, match", [
    (dict(n=15, box=100.0), "even integer"),
    (dict(n=16, box=-1.0), "positive length"),
    (dict(n=16, box=100.0, observer=(0, 0)), "three finite"),
    (dict(n=16, box=100.0, dtype="int8"), "float32"),
])
def test_bad_mesh(kwargs, match):
    with pytest.raises(ErgofitError, match=match):
        Mesh(**kwargs)


def test_bad_inputs_give_one_line_errors():
    mesh = Mesh(16, 200.0)
    z = np.zeros((16,) * 3)
    cases = [
        (lambda: measure_multipoles(mesh, z, None, [0.05, 0.1], ells=(0, -2)), "ells"),
        (lambda: measure_multipoles(mesh, z, None, [0.1, 0.05]), "strictly increasing"),
        (lambda: measure_multipoles(mesh, z[:8], None, [0.05, 0.1]), "shape"),
        (lambda: measure_multipoles(mesh, z, None, [0.001, 0.002]), "no Fourier mode"),
        (lambda: gaussian_field(mesh, lambda k: -k, 0), "non-negative"),
        (lambda: gaussian_field(mesh, lambda k: k[:3], 0), "one value per k"),
        (lambda: observed_field(mesh, gaussian_field(mesh, 1.0, 0), 1.0, None, "f"), "growth"),
        (lambda: poisson_sample(mesh, z, -1.0), "nbar"),
        (lambda: measure_multipoles(mesh, z - 1.0, None, [0.05, 0.1], nbar=1e-3), "counts"),
        (lambda: constrain_at_origin(Mesh(16, 200.0, observer=(3.0, 0, 0)),
                                     np.zeros((16, 16, 9), complex), lambda k: 1 / k ** 2, 1.0,
                                     pk_test), "mesh node"),
        (lambda: simulate_mocks(mesh, pk_test, 1.0, None, 0.0, None, [0.05, 0.1], (0,), 0, 1),
         "n_mocks"),
    ]
    for fn, match in cases:
        with pytest.raises(ErgofitError, match=match) as info:
            fn()
        assert "\n" not in str(info.value)


def test_poisson_clipping_warns():
    mesh = Mesh(16, 200.0)
    d = np.full((16,) * 3, -2.0)
    d[::2] = 0.5
    with pytest.warns(UserWarning, match=r"50\.00% of the cells inside the window, clipped"):
        counts = poisson_sample(mesh, d, 1e-3, seed=0)
    assert np.all(counts[1::2] == 0)


def test_observer_settings_errors():
    mesh = Mesh(16, 200.0)
    for obs, match in [({"field": "density", "nu_true": 1.0}, "smoothing"),
                       ({"field": "velocity", "nu_true": 1.0}, "potential"),
                       ({"nu": 1.0}, "unknown key")]:
        with pytest.raises(ConfigError, match=match):
            simulate_from_settings(None, 1.0, None, (), mesh, None, [0.05, 0.1], (0,), 2, 0,
                                   observer=obs)
