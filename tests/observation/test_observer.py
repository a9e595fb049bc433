"""The observer term (likelihood.observation.observer) against outside references.

Each check names its source: the Hoffman & Ribak (1991) construction simulated on a mesh with the
mock machinery of likelihood.simulate.mocks (an independent FFT estimator), scipy quadrature of the
defining integrals, the plane-wave expansion, closed forms of the primordial potential variance and
of the top-hat transform, and the plain-volume limit of the shared design.
"""
import math
import os
import warnings

import numpy as np
import pytest
import yaml
from scipy import integrate, stats
from scipy.special import spherical_jn

from likelihood.numerics.mesh import Mesh
from likelihood.observation.estimator import measure_multipoles, window_mask
from likelihood.simulate import fields
from likelihood.theory import tracer as tr
from likelihood.theory.cosmology import Cosmology
from likelihood.errors import ErgofitError
from likelihood.observation.matrix import KBins, theory_k_grid
from likelihood.observation.observer import (K_IR_DEFAULT, ObserverMeshWarning, ObserverTerm, _Radial,
                                 constraint_kernel, cross_correlation, sigma_c, sigma_c_table,
                                 smoothing_filter)
from likelihood.observation.window import CapShellWindow, ShellWindow, SphereWindow

ALL = ("rsd", "fnl", "doppler", "potential")


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology.from_preset("planck2018")


@pytest.fixture(scope="module")
def kgrid():
    return theory_k_grid()


def full_kernel(cosmo, z, k, **tracer):
    t = tr.Tracer(**{"b1": 2.0, "fnl": 10.0, "b_e": 0.5, "s": 0.2, **tracer})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        return tr.kernel(cosmo, z, k, t, effects=ALL)


def mode_average(func, edges):
    """∫ k² f dk / ∫ k² dk per bin by scipy.integrate.quad (continuous-shell mode average)."""
    return np.array([integrate.quad(lambda x: x * x * func(x), a, b, epsrel=1e-11)[0]
                     / ((b ** 3 - a ** 3) / 3.0) for a, b in zip(edges[:-1], edges[1:])])


# ---------------------------------------------------------------------------------------------
# the constraint field and its variance
# ---------------------------------------------------------------------------------------------
def test_potential_variance_against_primordial_spectrum(cosmo):
    # Poisson equation with the matter-era normalisation Phi(k, z=0) = -(3/5) T(k) D_md(0) R(k)
    # (Dodelson 2003, Modern Cosmology, ch. 7; quoted from memory), so
    # sigma_Phi^2 = int dln k (9/25) D_md(0)^2 T^2 A_s (k/k_pivot)^(n_s-1), by scipy quad.
    d0 = float(cosmo.growth_factor(0.0, norm="matter"))
    kp = cosmo.k_pivot / cosmo.h

    def integrand(u):
        k = math.exp(u)
        return 0.36 * d0 ** 2 * float(cosmo.transfer(k)) ** 2 * cosmo.A_s * (k / kp) ** (cosmo.n_s - 1)

    want = integrate.quad(integrand, math.log(K_IR_DEFAULT), math.log(200.0), limit=400,
                          epsrel=1e-10)[0]
    for z in (0.0, 1.3):   # the value is taken today whatever the redshift of the galaxies
        assert sigma_c(cosmo, z) ** 2 == pytest.approx(want, rel=1e-7)


def test_potential_variance_grows_logarithmically_in_the_infrared(cosmo):
    # For k << k_eq, T = 1 and Delta^2_Phi = (9/25) D_md(0)^2 A_s (k/k_p)^(n_s-1) (as above), so
    # sigma^2(k1) - sigma^2(k2) = (9/25) D_md^2 A_s [(k2/k_p)^(n_s-1) - (k1/k_p)^(n_s-1)]/(n_s-1)
    # (closed form; -> ln(k2/k1) for n_s -> 1).
    d0 = float(cosmo.growth_factor(0.0, norm="matter"))
    kp = cosmo.k_pivot / cosmo.h
    k1, k2 = 1e-6, 1e-5
    ns = cosmo.n_s
    want = 0.36 * d0 ** 2 * cosmo.A_s * ((k2 / kp) ** (ns - 1) - (k1 / kp) ** (ns - 1)) / (ns - 1)
    got = sigma_c(cosmo, 0.0, k_ir=k1) ** 2 - sigma_c(cosmo, 0.0, k_ir=k2) ** 2
    assert got == pytest.approx(want, rel=1e-6)
    table = sigma_c_table(cosmo, 0.0, k_ir=(1e-4, 1e-3), smoothing=(None, 100.0))
    assert table.shape == (2, 2)
    assert np.all(table[0] > table[1])            # lower cut-off, larger variance
    assert table[0, 1] < table[0, 0]               # smoothing removes a little


def test_density_variance_is_sigma8(cosmo):
    # sigma_8 definition (common practice): rms of the linear density today in a top-hat sphere
    # of 8 Mpc/h; cosmology.sigma8 is checked against scipy quad in test_cosmology.
    s = sigma_c(cosmo, 0.9, field="density", smoothing=8.0, k_ir=1e-6)
    assert s == pytest.approx(cosmo.sigma8, rel=1e-5)


def test_filters_closed_forms():
    # Top-hat 3(sin x - x cos x)/x^3 and Gaussian exp(-x^2/2) filters (common practice).
    x = np.array([1e-4, 0.5, 2.0, 10.0])
    np.testing.assert_allclose(smoothing_filter(x, "tophat")[1:],
                               3 * (np.sin(x[1:]) - x[1:] * np.cos(x[1:])) / x[1:] ** 3, rtol=1e-13)
    assert smoothing_filter(x, "tophat")[0] == pytest.approx(1.0 - 1e-8 / 10, rel=1e-14)
    np.testing.assert_allclose(smoothing_filter(x, "gaussian"), np.exp(-x * x / 2), rtol=1e-14)


def test_potential_kernel_is_poisson_today(cosmo):
    # Phi(k, 0) = -(3/2) Omega_m0 (H0/c)^2 delta_m(k, 0)/k^2 (Poisson, a = 1) with
    # delta_m(k, 0) = delta_m(k, z) D(0)/D(z); H0/c = 1/2997.92458 h/Mpc (c in km/s).
    k = np.array([1e-3, 1e-2])
    z = 0.8
    want = -1.5 * cosmo.Omega_m0 / 2997.92458 ** 2 / k ** 2 / float(cosmo.growth_factor(z))
    np.testing.assert_allclose(constraint_kernel(cosmo, z, k), want, rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# the cross-correlation xi_gc
# ---------------------------------------------------------------------------------------------
def test_angular_average_of_the_kernel():
    # Plane-wave expansion e^{ix mu} = sum (2l+1) i^l j_l(x) L_l(mu) (Abramowitz & Stegun 10.1.47,
    # from memory): (1/2) int dmu (A + i mu B + F mu^2) e^{ix mu}
    #   = (A + F/3) j0 - B j1 - (2F/3) j2, checked by direct complex quadrature.
    A, B, F = 1.7, -0.6, 0.9
    for x in (0.3, 2.0, 11.0):
        re = integrate.quad(lambda m: 0.5 * ((A + F * m * m) * math.cos(x * m)
                                             - B * m * math.sin(x * m)), -1, 1)[0]
        im = integrate.quad(lambda m: 0.5 * ((A + F * m * m) * math.sin(x * m)
                                             + B * m * math.cos(x * m)), -1, 1)[0]
        want = (A + F / 3) * spherical_jn(0, x) - B * spherical_jn(1, x) - 2 * F / 3 * spherical_jn(2, x)
        assert re == pytest.approx(want, abs=1e-12)
        assert abs(im) < 1e-12


@pytest.mark.parametrize("field,smoothing", [("potential", None), ("density", 20.0)])
def test_xi_gc_fftlog_against_quadrature(cosmo, kgrid, field, smoothing):
    # Eq. (2) of likelihood.observation.observer by direct quadrature (scipy.integrate.simpson on 2e5 points
    # in ln k, sharp IR cut at k_IR, upper end 10 h/Mpc like the grid), all effects on.
    z = 1.0
    kern = full_kernel(cosmo, z, kgrid)
    r, xi = cross_correlation(cosmo, z, kgrid, kern, field, smoothing)
    f = float(cosmo.growth_rate(z))
    g1 = tr.gamma1(cosmo, z, 0.5, 0.5)
    g2 = tr.gamma2(cosmo, z, 0.5, 0.5)

    u = np.linspace(math.log(K_IR_DEFAULT), math.log(10.0), 200001)
    k = np.exp(u)
    A = 2.0 + 10.0 * tr.fnl_alpha(cosmo, k, z) + g2 / k ** 2
    w = k ** 3 / (2 * np.pi ** 2) * constraint_kernel(cosmo, z, k, field, smoothing) * cosmo.power(k, z)

    from scipy.interpolate import CubicSpline
    spline = CubicSpline(np.log(r), xi)
    for rr in (20.0, 150.0, 1000.0):
        x = k * rr
        integrand = w * ((A + f / 3) * spherical_jn(0, x) - g1 / k * spherical_jn(1, x)
                         - 2 * f / 3 * spherical_jn(2, x))
        want = integrate.simpson(integrand, x=u)
        assert float(spline(math.log(rr))) == pytest.approx(want, rel=1e-4)


# ---------------------------------------------------------------------------------------------
# the estimator applied to the mean field
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("field,smoothing", [("potential", None), ("density", 20.0)])
def test_plain_volume_limit(cosmo, kgrid, field, smoothing):
    # Shared design (from Hoffman & Ribak 1991): in a plain volume V, no window, no RSD, the
    # correction is P_gc(k)^2/(sigma_c^2 V), P_gc = b1 C P; mode averages by scipy quad; the
    # quadrupole and sigma_c enter independently (sigma_c by scipy quad here).
    z, V, b1 = 1.0, 1e10, 2.0
    kern = tr.Kernel(A=np.full(kgrid.size, b1), B=np.zeros(kgrid.size), F=0.0)
    edges = np.linspace(0.002, 0.05, 9)
    ob = ObserverTerm(field=field, smoothing=smoothing, volume=V, bins=KBins.from_edges(edges),
                      ells=(0, 2), ic="none")
    sig2 = integrate.quad(lambda u: math.exp(3 * u) / (2 * np.pi ** 2) * constraint_kernel(
        cosmo, z, np.array([math.exp(u)]), field, smoothing)[0] ** 2 * cosmo.power(math.exp(u), z),
        math.log(K_IR_DEFAULT), math.log(200.0 if smoothing is None else 15.0), limit=500,
        epsrel=1e-10)[0]
    assert ob.sigma_c(cosmo, z) ** 2 == pytest.approx(sig2, rel=1e-7)
    want = mode_average(lambda k: (b1 * constraint_kernel(cosmo, z, np.array([k]), field, smoothing)[0]
                                   * cosmo.power(k, z)) ** 2 / (sig2 * V), edges)
    got = ob.correction(cosmo, z, kgrid, kern)
    np.testing.assert_allclose(got[:8], want, rtol=1e-5)


def test_large_sphere_approaches_plain_volume(cosmo, kgrid):
    # Same limit through the radial quadrature path: a sphere much larger than the range of m
    # (density smoothed on 20 Mpc/h), no mean subtraction, I2 = V_sphere.
    z = 1.0
    kern = tr.Kernel(A=np.full(kgrid.size, 2.0), B=np.zeros(kgrid.size), F=0.0)
    bins = KBins.from_edges(np.linspace(0.005, 0.05, 7))
    sph = ObserverTerm("density", 20.0, window=SphereWindow(3000.0), bins=bins, ells=(0,), ic="none")
    plain = ObserverTerm("density", 20.0, volume=sph.volume, bins=bins, ells=(0,), ic="none")
    np.testing.assert_allclose(sph.correction(cosmo, z, kgrid, kern),
                               plain.correction(cosmo, z, kgrid, kern), rtol=2e-3)


def test_radial_transform_of_a_constant():
    # Top-hat Fourier transform (common practice): int_0^R r^2 j0(kr) dr = R^2 j1(kR)/k; j2 by
    # scipy quad; with the mean subtracted a constant field gives exactly zero.
    R = 700.0
    bins = KBins.from_edges(np.linspace(0.003, 0.03, 5))
    r = np.geomspace(0.1, 1e5, 512)
    est = _Radial(SphereWindow(R), bins, (0, 2), "none")
    f = est.transforms(r, np.ones_like(r))
    np.testing.assert_allclose(f[0], R * R * spherical_jn(1, est.k * R) / est.k, rtol=1e-9,
                               atol=1e-9 * R ** 3)
    for kk, v in zip(est.k[::17], f[2][::17]):
        want = integrate.quad(lambda x: x * x * spherical_jn(2, kk * x), 0, R, limit=400)[0]
        assert v == pytest.approx(want, rel=1e-8, abs=1e-9 * R ** 3)
    est_ic = _Radial(SphereWindow(R), bins, (0, 2), "global")
    f_ic = est_ic.transforms(r, np.ones_like(r))
    assert np.max(np.abs(f_ic[0])) < 1e-12 * R ** 3


def lattice_modes(n, box, edges):
    """|k| and multiplicity of the rfft half-grid modes of an n^3 mesh of side box in [e0, e_last]
    (direct enumeration of the integer wavevectors)."""
    i = np.fft.fftfreq(n, 1.0 / n)
    l = np.arange(n // 2 + 1)
    I, J, L = np.meshgrid(i, i, l, indexing="ij")
    k = 2 * np.pi / box * np.sqrt(I ** 2 + J ** 2 + L ** 2).ravel()
    mult = np.where((L.ravel() == 0) | (L.ravel() == n // 2), 1.0, 2.0)
    sel = (k >= edges[0]) & (k <= edges[-1])
    return k[sel], mult[sel]


def test_radial_formula_against_mock_estimator(cosmo, kgrid):
    # Independent estimator: likelihood.simulate.mocks.measure_multipoles applied to m on a mesh (the
    # mock FFT estimator, end-point line of sight, data-estimated mean, lattice mode average).
    # Eq. (3) is averaged over the same lattice modes (enumerated here) to compare like with like;
    # the remaining difference is the mesh's cell size (a few per cent at the bins' top).
    z = 1.0
    kern = full_kernel(cosmo, z, kgrid)
    n, pad = 96, 2.0
    for window in (SphereWindow(500.0), ShellWindow(200.0, 500.0)):
        edges = np.arange(1.5, 9.0, 1.0) * np.pi / 500.0
        bins = KBins.from_edges(edges)
        kw = dict(window=window, bins=bins, ells=(0, 1, 2, 4), ic="global")
        radial = ObserverTerm(**kw)
        mesh = ObserverTerm(method="mesh", mesh_n=n, mesh_padding=pad, **kw)
        with pytest.warns(ObserverMeshWarning):
            got = mesh.correction(cosmo, z, kgrid, kern).reshape(4, -1)
        k, mult = lattice_modes(n, 2.0 * pad * window.r_max, edges)
        ku, inv = np.unique(k, return_inverse=True)
        e_u = radial.unbinned(cosmo, z, kgrid, kern, ku)[:, inv]
        b = np.clip(np.searchsorted(edges, k, side="right") - 1, 0, bins.n - 1)
        want = np.array([[np.sum((mult * e)[b == i]) / np.sum(mult[b == i]) for i in range(bins.n)]
                         for e in e_u])
        for ell, a, g in zip((0, 1, 2, 4), want, got):
            scale = np.max(np.abs(a))
            assert scale > 0
            np.testing.assert_array_less(np.abs(a - g), 0.03 * scale + 0.03 * np.abs(a),
                                         err_msg=f"{window!r} ell={ell}")
        # and the continuous-shell bins of correction() are the mode average of unbinned()
        cont = radial.correction(cosmo, z, kgrid, kern).reshape(4, -1)
        want_c = np.array([mode_average(lambda x: radial.unbinned(cosmo, z, kgrid, kern, [x])[j, 0],
                                        edges[:3]) for j in range(4)])
        np.testing.assert_allclose(cont[:, :2], want_c, rtol=1e-6, atol=1e-9 * np.abs(cont).max())


def random_basis(k, rng):
    """Five basis kernels like the likelihood's: constant (with RSD), b1, f_NL, b_e, s."""
    A = [rng.normal(size=1) * 1e-6 / k ** 2, np.ones_like(k), 3e-6 / k ** 2 * (1 + (k / 0.02) ** 2),
         rng.normal() * 1e-7 / k ** 2, rng.normal() * 1e-7 / k ** 2]
    B = [rng.normal() * 1e-3 / k, 0 * k, 0 * k, rng.normal() * 1e-3 / k, rng.normal() * 1e-3 / k]
    F = [0.85, 0.0, 0.0, 0.0, 0.0]
    return [tr.Kernel(A=a, B=b, F=f) for a, b, f in zip(A, B, F)]


@pytest.mark.parametrize("geometry", ["plain", "sphere", "shell", "shell-no-ic", "cap"])
def test_templates_reproduce_correction(cosmo, kgrid, geometry):
    # Bilinearity (eq. (3) is quadratic in m, m linear in the kernel): sum_rows x_a x_b row equals
    # correction(sum_a x_a kernel_a) to 1e-10 for random coefficient vectors.
    z = 1.0
    rng = np.random.default_rng(4)
    basis = random_basis(kgrid, rng)
    bins = KBins.from_edges(np.linspace(0.004, 0.03, 6))
    kw = dict(bins=bins, ells=(0, 1, 2))
    if geometry == "plain":
        ob = ObserverTerm(volume=3e9, ic="none", **kw)
    elif geometry == "sphere":
        ob = ObserverTerm(window=SphereWindow(800.0), **kw)
    elif geometry == "shell":
        ob = ObserverTerm(window=ShellWindow(300.0, 900.0), **kw)
    elif geometry == "shell-no-ic":
        ob = ObserverTerm(window=ShellWindow(300.0, 900.0), ic="none", **kw)
    else:
        ob = ObserverTerm(window=CapShellWindow(300.0, 600.0, 0.3), **kw)
        assert ob.method == "mesh"
    pairs = [(a, b) for a in range(5) for b in range(a, 5)]
    if ob.method == "mesh":
        with pytest.warns(ObserverMeshWarning, match="measured on a 32\\^3 mesh"):
            T = ob.templates(cosmo, z, kgrid, basis, pairs)
    else:
        T = ob.templates(cosmo, z, kgrid, basis, pairs)
    assert T.shape == (len(pairs), 3 * bins.n)
    for _ in range(3):
        x = rng.normal(size=5)
        kern = tr.Kernel(A=sum(xa * b.A for xa, b in zip(x, basis)),
                         B=sum(xa * b.B for xa, b in zip(x, basis)),
                         F=sum(xa * b.F for xa, b in zip(x, basis)))
        want = ob.correction(cosmo, z, kgrid, kern)
        got = sum(x[a] * x[b] * row for (a, b), row in zip(pairs, T))
        np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-10 * np.max(np.abs(want)))


# ---------------------------------------------------------------------------------------------
# Monte Carlo: Hoffman-Ribak constrained Gaussian fields measured like a survey
# ---------------------------------------------------------------------------------------------
def monte_carlo(cosmo, n, box, radius, n_real, field, ells, n_bins, seed0=0):
    """Mean of P(nu) - P(unconstrained) over common-seed realisations vs (nu^2 - 1) E[m].

    Fields: gaussian_field with P(k, z=1); tracer kernel on all effects applied with the local line
    of sight (observed_field); the constraint c(x_o) = nu sigma_c imposed by constrain_at_origin
    with sigma_c and xi from the mesh's own modes (Hoffman & Ribak 1991); measured with the
    sphere window and the data-estimated mean (measure_multipoles). Returns the differences, the
    theory on the same lattice (method "mesh", continuum m) and the continuum theory (radial).
    """
    z = 1.0
    mesh = Mesh(n, box)
    rs = 2.5 * mesh.cell
    pk = mesh.on_grid(lambda k: cosmo.power(k, z))
    kern_of = lambda k: full_kernel(cosmo, z, k, fnl=0.0)  # noqa: E731
    A = mesh.on_grid(lambda k: kern_of(k).A)
    B = mesh.on_grid(lambda k: kern_of(k).B)
    F = float(cosmo.growth_rate(z))
    if field == "density":
        ck = mesh.on_grid(lambda k: np.exp(-0.5 * (k * rs) ** 2))
    else:
        ck = mesh.on_grid(lambda k: -1.0 / k ** 2)
    window = SphereWindow(radius)
    mask = window_mask(mesh, window)
    edges = np.arange(1, n_bins + 2) * np.pi / radius
    sig = fields.constraint_sigma(mesh, pk, ck)
    nus = (0.0, 3.0)
    diffs = {nu: [] for nu in nus}
    for s in range(seed0, seed0 + n_real):
        dk = fields.gaussian_field(mesh, pk, s)
        p_std = measure_multipoles(mesh, fields.observed_field(mesh, dk, A, B, F), mask, edges,
                                       ells).flat
        for nu in nus:
            dc = fields.constrain_at_origin(mesh, dk, ck, nu * sig, pk)[0]
            diffs[nu].append(measure_multipoles(mesh, fields.observed_field(mesh, dc, A, B, F),
                                                    mask, edges, ells).flat - p_std)
    kth = theory_k_grid()
    kern = kern_of(kth)
    kw = dict(field=field, smoothing=rs if field == "density" else None, filter_kind="gaussian",
              k_ir=0.62 * mesh.k_fundamental,  # radius of a sphere of volume k_f^3
              window=window, bins=KBins.from_edges(edges), ells=ells, ic="global")
    on_mesh = ObserverTerm(method="mesh", mesh_n=n, mesh_padding=box / (2 * radius), **kw)
    continuum = ObserverTerm(**kw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ObserverMeshWarning)
        e_mesh = on_mesh.correction(cosmo, z, kth, kern)
    return ({nu: np.array(d) for nu, d in diffs.items()}, e_mesh,
            continuum.correction(cosmo, z, kth, kern))


def check_monte_carlo(diffs, e_mesh, e_cont, min_signal):
    report = {}
    for nu, d in diffs.items():
        n_real, p = d.shape
        mean = d.mean(0)
        cov = np.cov(d, rowvar=False) / n_real
        err = np.sqrt(np.diag(cov))
        # Hotelling T^2 with the sample covariance of the differences (Hotelling 1931)
        r = mean - (nu * nu - 1.0) * e_mesh
        t2 = float(r @ np.linalg.solve(cov, r))
        pval = stats.f.sf(t2 * (n_real - p) / (p * (n_real - 1)), p, n_real - p)
        # per-bin z-scores against the continuum theory
        zc = (mean - (nu * nu - 1.0) * e_cont) / err
        report[nu] = (t2, p, n_real, pval, float(np.sum(zc ** 2)))
        assert pval > 1e-3, (nu, t2, p, n_real)
        assert np.max(np.abs(zc)) < 4.5, (nu, zc)
        assert stats.chi2.sf(np.sum(zc ** 2), p) > 1e-3, (nu, np.sum(zc ** 2), p)
    # the effect is resolved, so the test has power
    assert np.max(np.abs(8.0 * e_cont) / np.sqrt(np.diag(np.cov(diffs[3.0], rowvar=False))
                                                 / diffs[3.0].shape[0])) > min_signal
    return report


def test_monte_carlo_constrained_fields_short(cosmo):
    # 40 realisations on a 64^3 mesh (L = 2000 Mpc/h), sphere R = 450 Mpc/h, ell = 0, 1, 2,
    # potential at the observer (the density is in the slow version).
    diffs, e_mesh, e_cont = monte_carlo(cosmo, 64, 2000.0, 450.0, 40, "potential", (0, 1, 2), 4)
    check_monte_carlo(diffs, e_mesh, e_cont, min_signal=4.0)


@pytest.mark.slow
@pytest.mark.parametrize("field", ["density", "potential"])
def test_monte_carlo_constrained_fields_long(cosmo, field):
    # 200 realisations on a 96^3 mesh (L = 3000 Mpc/h), sphere R = 675 Mpc/h, ell = 0, 1, 2, 4.
    diffs, e_mesh, e_cont = monte_carlo(cosmo, 96, 3000.0, 675.0, 200, field, (0, 1, 2, 4), 6,
                                        seed0=1000)
    rep = check_monte_carlo(diffs, e_mesh, e_cont, min_signal=10.0)
    print(field, rep)


# ---------------------------------------------------------------------------------------------
# size of the effect
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("window", [SphereWindow(100.0), SphereWindow(300.0), SphereWindow(1000.0),
                                    SphereWindow(3600.0), ShellWindow(1950.0, 3140.0)])
def test_correction_within_cosmic_variance(cosmo, kgrid, window):
    # Common practice: for a typical observer (|nu^2 - 1| <= 3, i.e. nu <= 2) the correction per
    # bin of width k_F = 2 pi/(2 r_max) stays below sigma_P = P0 sqrt(2/N_modes) above k_F
    # (b1 = 2, z = 1, all effects, potential field). It stays far below (a few per cent of
    # sigma_P) even for R = 100 Mpc/h: conditioning on one number moves the power by about one
    # mode's worth, ~1/N_modes, while sigma_P ~ sqrt(2/N_modes).
    z = 1.0
    kern = full_kernel(cosmo, z, kgrid, fnl=0.0)
    k_f = np.pi / window.r_max
    edges = k_f * np.arange(1, 25)
    edges = edges[edges < 0.2]
    bins = KBins.from_edges(edges, volume=window.volume)
    E = ObserverTerm(window=window, bins=bins, ells=(0, 2)).correction(cosmo, z, kgrid, kern)
    t = tr.Tracer(b1=2.0, b_e=0.5, s=0.2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", tr.PlaneParallelWarning)
        p0 = tr.multipoles(cosmo, z, bins.k_eff, t, effects=ALL, ells=(0,), shot_noise=False)[0]
    sig = p0 * np.sqrt(2.0 / bins.n_modes)
    ratio = 3.0 * np.abs(E.reshape(2, -1)) / sig
    assert np.all(ratio < 0.2)


def test_correction_vanishes_for_unit_nu(tmp_path):
    # <P|nu> = P_std + (nu^2 - 1) E (Hoffman & Ribak 1991 construction): nu = +-1 gives the
    # model without observer term exactly; other nu do not.
    paths = {}
    for on in (True, False):
        params = {k: v for k, v in BASE_CONFIG["parameters"].items() if on or k != "nu_obs"}
        cfg = dict(BASE_CONFIG, effects={"observer": on}, parameters=params,
                   output={"folder": str(tmp_path / f"o{on}")})
        paths[on] = tmp_path / f"c{on}.yaml"
        paths[on].write_text(yaml.safe_dump(cfg))
    from likelihood.model import build
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lon, loff = build(str(paths[True])), build(str(paths[False]))
    base = loff.model_vector({"b1": 2.1})
    for nu in (1.0, -1.0):
        np.testing.assert_allclose(lon.model_vector({"b1": 2.1, "nu_obs": nu}), base, rtol=1e-13)
    assert np.max(np.abs(lon.model_vector({"b1": 2.1, "nu_obs": 3.0}) - base)) > 0


BASE_CONFIG = {
    "run": "observer",
    "survey": {"redshift": 1.0, "nbar": 3.0e-4, "geometry": {"shape": "sphere", "radius": 1000.0}},
    "tracer": {"b1": 2.0, "fnl": 0.0, "b_e": 0.0, "s": 0.2},
    "observer": {"field": "potential", "nu_true": 2.0},
    "data": {"mock": {"seed": 3, "truth": {"fnl": 5.0}, "k_min": 0.004, "k_max": 0.05, "n_bins": 12},
             "ells": [0, 2]},
    "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.02},
                   "fnl": {"flat": [-200.0, 200.0], "start": 0.0, "scale": 2.0},
                   "b_e": {"flat": [-5.0, 5.0], "start": 0.0, "scale": 0.1},
                   "nu_obs": {"gauss": [0.0, 1.0], "start": 1.0},
                   "shot_noise": {"gauss": [1.0, 0.1], "start": 1.0}},
}


@pytest.mark.parametrize("geometry", [{"shape": "sphere", "radius": 1000.0},
                                      {"shape": "shell", "r_min": 1950.0, "r_max": 3140.0},
                                      {"shape": "box", "volume": 8e9}])
def test_likelihood_fast_path_equals_direct_with_observer(tmp_path, geometry):
    # The likelihood's template (fast) path must equal full recomputation (model.py contract).
    cfg = dict(BASE_CONFIG, effects={"observer": True},
               survey=dict(BASE_CONFIG["survey"], geometry=geometry),
               output={"folder": str(tmp_path / "out")})
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(cfg))
    from likelihood.model import build
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(str(path))
        assert lik.observer is not None
        for p in ({"b1": 2.1, "fnl": 10.0, "b_e": 0.3, "nu_obs": 2.5, "shot_noise": 1.05},
                  {"b1": 1.8, "fnl": -30.0, "b_e": -1.0, "nu_obs": 0.0, "shot_noise": 0.9}):
            assert lik.log_likelihood(p) == pytest.approx(lik.log_likelihood_direct(p), abs=1e-10)


# ---------------------------------------------------------------------------------------------
# bad input: one line naming the value and what is expected
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs,match", [
    (dict(field="velocity", volume=1e9, ic="none"), "field = 'velocity'.*potential, density"),
    (dict(smoothing=-3.0, volume=1e9, ic="none"), "smoothing = -3.0.*> 0"),
    (dict(smoothing=0.0, volume=1e9, ic="none"), "smoothing = 0.0.*> 0"),
    (dict(field="density", volume=1e9, ic="none"), "density' needs smoothing"),
    (dict(k_ir=0.01, k_min_data=0.005, volume=1e9, ic="none"), "IR cut-off above the data's k_min"),
    (dict(k_ir=-1.0, volume=1e9, ic="none"), "k_ir = -1.0"),
    (dict(filter_kind="box", volume=1e9, ic="none"), "filter_kind = 'box'"),
    (dict(volume=None, ic="none"), "volume = None"),
    (dict(volume=1e9, ic="global"), "ic = 'global' needs a window"),
    (dict(volume=1e9, ic="radial"), "ic = 'radial'"),
    (dict(window="sphere"), "expected an analytic geometry"),
    (dict(window=CapShellWindow(100.0, 200.0, 0.5), method="radial"), "spherically symmetric"),
    (dict(volume=1e9, ic="none", ells=(0, 9)), "ells"),
    (dict(volume=1e9, ic="none", bins=[0.1, 0.2]), "bins"),
])
def test_bad_input_one_line(kwargs, match):
    with pytest.raises(ErgofitError, match=match) as info:
        ObserverTerm(**kwargs)
    assert "\n" not in str(info.value)


def test_bad_call_arguments(cosmo, kgrid):
    ob = ObserverTerm(volume=1e9, ic="none")
    kern = tr.Kernel(A=np.ones(kgrid.size), B=np.zeros(kgrid.size), F=0.0)
    cases = [
        (lambda: ob.correction(cosmo, 1.0, kgrid, kern), "bins"),
        (lambda: ob.mean_field(cosmo, 1.0, kgrid, "kernel"), "Kernel"),
        (lambda: ob.mean_field(cosmo, 1.0, np.linspace(1e-4, 1, 100), kern), "log-spaced"),
        (lambda: ob.mean_field(cosmo, 1.0, np.geomspace(1e-3, 1, 100),
                               tr.Kernel(A=np.ones(100), B=np.zeros(100), F=0)), "below the first point"),
        (lambda: ob.mean_field(cosmo, -1.0, kgrid, kern), "redshift"),
        (lambda: ob.mean_field(cosmo, 1.0, kgrid, tr.Kernel(A=np.ones(7), B=np.zeros(7), F=0)),
         "do not match the k grid"),
        (lambda: ObserverTerm(volume=1e9, ic="none", bins=KBins.from_edges([0.01, 0.02]))
         .templates(cosmo, 1.0, kgrid, [kern], [(0, 1)]), "pair"),
    ]
    for call, match in cases:
        with pytest.raises(ErgofitError, match=match) as info:
            call()
        assert "\n" not in str(info.value)


def test_theory_report_writes_observer_plot(tmp_path):
    # ergofit theory with effects.observer: PNG next to the table and sigma_c with its cut-offs.
    from likelihood.config import load_config
    from likelihood.report.theory import theory_report
    cfg = dict(BASE_CONFIG, effects={"observer": True}, output={"folder": str(tmp_path / "o")})
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(cfg))
    out = str(tmp_path / "theory.txt")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lines = theory_report(load_config(str(path)), out)
    png = tmp_path / "theory_observer.png"
    assert png.stat().st_size > 10000
    text = "\n".join(lines)
    assert "sigma_c = " in text and "k_IR = 0.0003336" in text and "2π/(2 r_max)" in text
    assert os.path.exists(out)


def test_cross_spectrum_observer_term(cosmo, kgrid):
    """Cross spectrum of two tracers (F_ℓ from X, F_0 from Y). Plain volume, A-only kernels: the
    monopole is the shared design's limit with P_Xc P_Yc in place of P_gc², i.e. b_X b_Y (C P)²/
    (σ_c² V) (Hoffman & Ribak 1991 construction; mode averages by scipy quad). Shell window with
    Doppler and RSD (radial path): X = Y gives the auto correction, and the cross templates are
    bilinear in the two kernels, odd ℓ included."""
    z, V = 1.0, 1e10
    edges = np.linspace(0.002, 0.05, 9)
    ob = ObserverTerm(field="potential", volume=V, bins=KBins.from_edges(edges), ells=(0,), ic="none")
    kx = tr.Kernel(A=np.full(kgrid.size, 2.4), B=np.zeros(kgrid.size), F=0.0)
    ky = tr.Kernel(A=np.full(kgrid.size, 1.3), B=np.zeros(kgrid.size), F=0.0)
    sig2 = ob.sigma_c(cosmo, z) ** 2
    want = mode_average(lambda k: 2.4 * 1.3 * (constraint_kernel(cosmo, z, np.array([k]), "potential",
                                                                 None)[0] * cosmo.power(k, z)) ** 2
                        / (sig2 * V), edges)
    np.testing.assert_allclose(ob.cross_correction(cosmo, z, kgrid, kx, ky), want, rtol=1e-5)

    bins = KBins.from_edges(np.linspace(0.004, 0.04, 5))
    sh = ObserverTerm(window=ShellWindow(1900.0, 3100.0), bins=bins, ells=(0, 1, 2, 3), ic="global")
    a = full_kernel(cosmo, z, kgrid, b1=2.4, b_e=1.0)
    b = full_kernel(cosmo, z, kgrid, b1=1.3, b_e=2.0, s=0.1)
    np.testing.assert_allclose(sh.cross_correction(cosmo, z, kgrid, a, a),
                               sh.correction(cosmo, z, kgrid, a), rtol=1e-12)
    ab = sh.cross_correction(cosmo, z, kgrid, a, b)
    assert np.max(np.abs(ab[4:8])) > 0                      # a dipole from the Doppler difference
    rows = sh.cross_templates(cosmo, z, kgrid, [a, b], [a, b])
    x, y = np.array([0.3, 0.7]), np.array([1.1, -0.4])

    def mix(w):
        return tr.Kernel(A=w[0] * a.A + w[1] * b.A, B=w[0] * a.B + w[1] * b.B, F=w[0] * a.F + w[1] * b.F)
    np.testing.assert_allclose(np.outer(x, y).ravel() @ rows,
                               sh.cross_correction(cosmo, z, kgrid, mix(x), mix(y)), rtol=1e-9,
                               atol=1e-9 * np.max(np.abs(rows)))
