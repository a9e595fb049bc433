"""Window multipoles: analytic geometries and random catalogues against independent values."""
import time

import numpy as np
import pytest
from scipy import integrate
from scipy.special import eval_legendre

from likelihood.errors import ConfigError, DataError
from likelihood.observation.randoms import load_randoms, radec_to_cartesian, window_from_randoms
from likelihood.observation.window import CapShellWindow, ShellWindow, SphereWindow, WindowMultipoles

R = 1000.0


def _mc_definition(contains, r_max, s, ells, n=400_000, seed=0):
    """Monte Carlo of the definition Q_ℓ(s) = (2ℓ+1)/(4π I₂) ∫dΩ_s ∫d³x₁ W(x₁)W(x₁−s) L_ℓ(ŝ·x̂₁)
    for W = 1 inside: (2ℓ+1) E[1(x₂ inside) L_ℓ(μ)] over x₁ uniform inside, ŝ isotropic.
    Returns values and standard errors (plain numpy; independent of the library code)."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(-r_max, r_max, size=(3 * n, 3))
    x = x[contains(*x.T)][:n]
    u = rng.normal(size=x.shape)
    u /= np.linalg.norm(u, axis=1)[:, None]
    mu = np.einsum("ij,ij->i", u, x) / np.linalg.norm(x, axis=1)
    ins = contains(*(x - s * u).T)
    vals, errs = [], []
    for l in ells:
        f = (2 * l + 1) * ins * eval_legendre(l, mu)
        vals.append(f.mean())
        errs.append(f.std() / np.sqrt(f.size))
    return np.array(vals), np.array(errs)


def test_sphere_monopole_is_overlap_volume():
    """Q_0(s) = 1 − 3s/(4R) + s³/(16R³) for s < 2R (overlap of two spheres, classical)."""
    wm = SphereWindow(R).multipoles()
    s = wm.s
    ref = np.where(s < 2 * R, 1 - 0.75 * s / R + s ** 3 / (16 * R ** 3), 0.0)
    np.testing.assert_allclose(wm.Q[0], ref, atol=1e-12)
    assert SphereWindow(R).volume == pytest.approx(4 / 3 * np.pi * R ** 3)


def test_sphere_higher_multipoles_by_other_integration_order():
    """Q_ℓ of the sphere, ℓ = 0..8, against scipy.integrate.quad of the μ-first ordering:
    Q_ℓ = (2ℓ+1)/2 ∫ dμ L_ℓ(μ) [min(R, r₊)³ − max(0, r₋)³]₊ / R³,
    r± = sμ ± sqrt(R² − s²(1 − μ²)) (ball |x₁| < R and |x₁ − s ẑ| < R along a ray)."""
    s_vals = np.array([10.0, 300.0, 999.0, 1000.0, 1400.0, 1990.0])
    wm = SphereWindow(R).multipoles(s_vals)

    def integrand(mu, s, l):
        disc = R * R - s * s * (1 - mu * mu)
        if disc < 0:
            return 0.0
        hi = min(R, s * mu + np.sqrt(disc))
        lo = max(0.0, s * mu - np.sqrt(disc))
        return eval_legendre(l, mu) * max(hi ** 3 - lo ** 3, 0.0) / R ** 3

    for j, s in enumerate(s_vals):
        pts = [s / (2 * R)] + ([np.sqrt(1 - R * R / (s * s))] if s > R else [])
        for l in range(9):
            ref = (2 * l + 1) / 2 * integrate.quad(integrand, -1, 1, args=(s, l), points=pts,
                                                   limit=200, epsabs=1e-13)[0]
            assert wm.Q[l, j] == pytest.approx(ref, abs=1e-9), (s, l)


def test_sphere_endpoint_los_multipoles_are_not_zero():
    """End-point line of sight: Q_1 ≈ +3s/(2R), Q_2 ≈ −15s/(16R) for s ≪ R (boundary-layer
    expansion derived in likelihood/window.py), and Q_2 at finite s against a Monte Carlo of the
    definition."""
    s = np.array([0.5, 1.0])
    wm = SphereWindow(R).multipoles(s)
    np.testing.assert_allclose(wm.Q[1] * R / s, 1.5, rtol=2e-3)
    np.testing.assert_allclose(wm.Q[2] * R / s, -15 / 16, rtol=2e-3)
    sph = SphereWindow(R)
    for sv in (300.0, 1200.0):
        val, err = _mc_definition(sph.contains, R, sv, (0, 1, 2, 4), n=300_000, seed=int(sv))
        q = sph.multipoles(np.array([sv])).Q[[0, 1, 2, 4], 0]
        assert np.all(np.abs(q - val) < 4.5 * err + 1e-12), (sv, q, val, err)
        assert abs(q[2]) > 10 * err[2]          # Q_2 clearly nonzero


def test_shell_against_monte_carlo_and_sphere_limit():
    """Shell (inclusion–exclusion of balls) against a Monte Carlo of the definition; r_min → 0
    reproduces the sphere."""
    sh = ShellWindow(400.0, R)
    for sv in (200.0, 900.0):
        val, err = _mc_definition(sh.contains, R, sv, (0, 1, 2), n=300_000, seed=3)
        q = sh.multipoles(np.array([sv])).Q[:3, 0]
        assert np.all(np.abs(q - val) < 4.5 * err), (sv, q, val, err)
    s = np.linspace(0, 2 * R, 101)
    np.testing.assert_allclose(ShellWindow(1e-3, R).multipoles(s).Q,
                               SphereWindow(R).multipoles(s).Q, atol=1e-9)


def test_cap_shell():
    """Cap shell: fsky = 1 equals the shell; fsky = 0.3 against a Monte Carlo of the definition;
    small-s slope of Q_0 equals −S/(4V) with S the surface area (isotropised set covariogram,
    Matheron 1975, 'Random Sets and Integral Geometry'; recalled from memory, exact for the
    sphere: −3/(4R))."""
    s = np.linspace(0, 2 * R, 9)
    np.testing.assert_allclose(CapShellWindow(300.0, R, 1.0).multipoles(s).Q,
                               ShellWindow(300.0, R).multipoles(s).Q, atol=1e-12)
    cap = CapShellWindow(300.0, R, 0.3)
    for sv in (150.0, 700.0):
        val, err = _mc_definition(cap.contains, R, sv, (0, 1, 2), n=300_000, seed=5)
        q = cap.multipoles(np.array([sv])).Q[:3, 0]
        assert np.all(np.abs(q - val) < 4.5 * err + 5e-4), (sv, q, val, err)
    ct = 1 - 2 * cap.fsky
    st = np.sqrt(1 - ct * ct)
    area = cap.fsky * 4 * np.pi * (R ** 2 + 300.0 ** 2) + np.pi * st * (R ** 2 - 300.0 ** 2)
    q0 = cap.multipoles(np.array([0.5, 1.0])).Q[0]
    assert (1 - q0[1]) / 1.0 == pytest.approx(area / (4 * cap.volume), rel=2e-3)


def _uniform_ball(n, seed):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(n, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    return u * R * rng.random(n)[:, None] ** (1 / 3)


def _bin_average(s_edges_lo, s_edges_hi, ell):
    """Volume-weighted bin average of the analytic sphere Q_ℓ."""
    out = []
    for a, b in zip(s_edges_lo, s_edges_hi):
        s = np.linspace(a, b, 41)
        q = SphereWindow(R).multipoles(s).Q[ell]
        out.append(integrate.trapezoid(q * s * s, s) / integrate.trapezoid(s * s, s))
    return np.array(out)


def _check_randoms_against_sphere(wm, ells=(0, 1, 2), nsig=4.0):
    n_s = wm.s.size - 1
    ds = float(wm.meta["s_max"]) / n_s
    lo, hi = np.arange(n_s) * ds, np.arange(1, n_s + 1) * ds
    for l in ells:
        ref = _bin_average(lo, hi, l)
        pull = (wm.Q[l, 1:] - ref) / wm.err[l, 1:]
        assert np.max(np.abs(pull)) < nsig, (l, np.round(pull, 2))


def test_sphere_from_randoms_small():
    """4000 randoms of a sphere, every pair: Q_0, Q_1, Q_2 within 4 jackknife errors of the
    analytic (classical overlap) values averaged over each bin."""
    wm = window_from_randoms(_uniform_ball(4000, 1), s_max=2 * R, n_s=40, method="all")
    _check_randoms_against_sphere(wm)
    assert wm.Q[0, 0] == 1.0 and wm.s[0] == 0.0


@pytest.mark.slow
def test_sphere_from_a_million_randoms():
    """10^6 randoms, subsample method: within 4 jackknife errors; < 60 s (project target)."""
    pos = _uniform_ball(1_000_000, 2)
    t0 = time.perf_counter()
    wm = window_from_randoms(pos, s_max=2 * R, n_s=100)
    assert time.perf_counter() - t0 < 60
    _check_randoms_against_sphere(wm, ells=(0, 1, 2, 4))
    assert np.median(wm.err[0, 1:90]) < 2e-3 and np.max(wm.err[0, 3:90]) < 5e-3


def test_weights_equivalent_to_duplicated_points():
    """A weight 2 on every point of one half equals listing those points twice (pair counts
    with w_i w_j)."""
    pos = _uniform_ball(1500, 4)
    w = np.ones(1500)
    w[:750] = 2.0
    a = window_from_randoms(pos, w, s_max=2 * R, n_s=16, method="all")
    dup = np.concatenate([pos, pos[:750] + 1e-9])
    b = window_from_randoms(dup, None, s_max=2 * R, n_s=16, method="all")
    # duplicated points add self-pairs at s ≈ 0 (bin 0) only; compare from bin 1 on
    np.testing.assert_allclose(a.Q[:, 2:] / a.Q[0, 2], b.Q[:, 2:] / b.Q[0, 2], atol=1e-10)


def test_save_load_plot(tmp_path):
    wm = SphereWindow(R).multipoles(np.linspace(0, 2 * R, 50))
    for name in ("w.txt", "w.npz"):
        wm.save(tmp_path / name)
        back = WindowMultipoles.load(tmp_path / name)
        np.testing.assert_allclose(back.Q, wm.Q, atol=1e-10)
        np.testing.assert_allclose(back(np.array([10.0, 5000.0]), 0), wm(np.array([10.0, 5000.0]), 0))
    assert wm(3000.0, 0) == 0.0  # beyond the table
    wm.plot(tmp_path / "q.png")
    assert (tmp_path / "q.png").read_bytes()[:4] == b"\x89PNG"
    (tmp_path / "bad.txt").write_text("# something else\n1 2 3\n")
    with pytest.raises(DataError, match="bad.txt"):
        WindowMultipoles.load(tmp_path / "bad.txt")


def test_radec_against_astropy():
    """Conversion against astropy (SkyCoord with comoving distances from astropy.cosmology with
    H0 = 100, i.e. Mpc/h)."""
    from astropy import units as u
    from astropy.coordinates import SkyCoord
    from astropy.cosmology import FlatLambdaCDM
    cosmo = FlatLambdaCDM(H0=100, Om0=0.31)

    class Chi:  # the interface ergofit expects: comoving_distance(z) in Mpc/h
        def comoving_distance(self, z):
            return cosmo.comoving_distance(z).value

    ra, dec, z = np.array([0.0, 45.0, 200.0]), np.array([-30.0, 10.0, 80.0]), np.array([0.1, 0.5, 1.2])
    pos = radec_to_cartesian(ra, dec, z, Chi())
    ref = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, distance=cosmo.comoving_distance(z))
    np.testing.assert_allclose(pos, np.column_stack([ref.cartesian.x.value, ref.cartesian.y.value,
                                                     ref.cartesian.z.value]), rtol=1e-12)


def test_load_randoms_formats_and_errors(tmp_path):
    pos = _uniform_ball(1200, 6)
    p = tmp_path / "r.txt"
    np.savetxt(p, np.column_stack([pos, np.ones(1200)]), header="columns: x y z w")
    got, w = load_randoms(p)
    np.testing.assert_allclose(got, pos)
    np.savez(tmp_path / "r.npz", positions=pos)
    np.testing.assert_allclose(load_randoms(tmp_path / "r.npz")[0], pos)
    with pytest.raises(DataError, match="not found"):
        load_randoms(tmp_path / "missing.txt")
    (tmp_path / "bin.npz").write_bytes(b"\x00\x01garbage")
    with pytest.raises(DataError, match="bin.npz: cannot read"):
        load_randoms(tmp_path / "bin.npz")
    (tmp_path / "empty.txt").write_text("# columns: x y z\n")
    with pytest.raises(DataError, match="empty.txt.*empty"):
        load_randoms(tmp_path / "empty.txt")
    (tmp_path / "nohead.txt").write_text("1 2 3\n")
    with pytest.raises(DataError, match="columns:"):
        load_randoms(tmp_path / "nohead.txt")
    bad = np.column_stack([pos, np.ones(1200)])
    bad[5, 1] = np.nan
    np.savetxt(tmp_path / "nan.txt", bad, header="columns: x y z w")
    with pytest.raises(DataError, match="nan.txt.*NaN"):
        load_randoms(tmp_path / "nan.txt")
    np.savetxt(tmp_path / "sky.txt", np.array([[10.0, 5.0, 0.3]] * 3),
               header="columns: ra dec redshift")
    with pytest.raises(DataError, match="cosmology"):
        load_randoms(tmp_path / "sky.txt")
    # 'z' is the Cartesian coordinate; the old sky header 'ra dec z' is ambiguous (issue 15, 20)
    np.savetxt(tmp_path / "oldsky.txt", np.array([[10.0, 5.0, 0.3]] * 3), header="columns: ra dec z")
    with pytest.raises(DataError, match="oldsky.txt: column 'z' beside ra/dec is ambiguous.*redshift"):
        load_randoms(tmp_path / "oldsky.txt")
    with pytest.raises(DataError, match="only 20 randoms"):
        window_from_randoms(pos[:20], name="r.txt")
    with pytest.raises(DataError, match="too few randoms"):
        window_from_randoms(pos, s_max=2 * R, n_s=2000, method="all", name="r.txt")
    with pytest.raises(ConfigError, match="fsky"):
        CapShellWindow(100, 200, 1.5)
