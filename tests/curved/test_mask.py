"""Checks of the angular masks of the curved-sky estimator (likelihood.curved.mask)."""
import warnings

import numpy as np
import pytest
from scipy.special import eval_legendre

from likelihood.curved import ResolutionWarning, TracerCoefficients
from likelihood.curved.estimator import (EstimatorResolution, Shell, multipole_templates,
                                         wigner3j_zero_sq)
from likelihood.curved.mask import (FULL_SKY, Cap, HealpixMask, constrained_coupling,
                                    coupled_spectra, coupling_matrix, masked_multipoles,
                                    masked_templates, separability, SeparabilityWarning,
                                    wigner3j_zero_sq_table)
from likelihood.errors import ConfigError, DataError
from likelihood.observation.window import CapShellWindow
from likelihood.theory.cosmology import Cosmology


@pytest.fixture(scope="module")
def cosmo():
    return Cosmology.from_preset("planck2018")


EDGES = np.linspace(0.005, 0.04, 8)


# --- the sphere: an independent route by direct quadrature over the cap -----------------------

def cap_nodes(f_sky, n_theta=16, n_phi=32):
    """Directions and weights inside the cap cos θ ≥ 1 − 2 f_sky: Gauss–Legendre in cos θ,
    uniform in φ (exact for band-limited integrands of degree < 2 n_theta, < n_phi in φ)."""
    c = 1.0 - 2.0 * f_sky
    t, u = np.polynomial.legendre.leggauss(n_theta)
    x = 0.5 * (1 - c) * t + 0.5 * (1 + c)
    phi = 2 * np.pi * np.arange(n_phi) / n_phi
    X, P = np.meshgrid(x, phi, indexing="ij")
    s = np.sqrt(1 - X ** 2)
    n = np.stack([s * np.cos(P), s * np.sin(P), X], axis=-1).reshape(-1, 3)
    w = np.repeat(0.5 * (1 - c) * u, n_phi) * (2 * np.pi / n_phi)
    return n, w


def legendre(n_max, mu):
    """L_0..L_n_max(mu) from scipy (reference library)."""
    return np.array([eval_legendre(n, mu) for n in range(n_max + 1)])


def test_wigner_table():
    """The vectorised (l1 l2 l3; 0 0 0)² against sympy's exact Wigner 3j symbols (reference
    library; Racah formula) and the integer closed form of the engine, to 1e-12."""
    from sympy.physics.wigner import wigner_3j
    for l1, l2, l3 in [(0, 0, 0), (1, 1, 2), (2, 3, 5), (4, 6, 4), (10, 7, 5), (20, 30, 12)]:
        ref = float(wigner_3j(l1, l2, l3, 0, 0, 0)) ** 2
        assert abs(wigner3j_zero_sq_table(l1, l2, l3) - ref) <= 1e-12 * max(ref, 1e-300)
    a = np.array([300, 500, 700])
    b = np.array([250, 480, 650])
    c = np.array([150, 400, 820])
    ours = wigner3j_zero_sq_table(a, b, c)
    ref = [wigner3j_zero_sq(int(x), int(y), int(z)) for x, y, z in zip(a, b, c)]
    np.testing.assert_allclose(ours, ref, rtol=1e-10)
    assert wigner3j_zero_sq_table(3, 4, 8) == 0 and wigner3j_zero_sq_table(2, 2, 1) == 0


def test_cap_power_against_healpy():
    """W_K of the analytic polar cap against healpy.anafast of the same cap pixelised on a
    HEALPix map (reference library; Górski et al. 2005), with the map's pixel-sum sky fraction:
    agreement to 0.5 % of W_0 at nside 128 for K ≤ 40 (the pixel edges of the map move the cap
    boundary by ~1/nside; measured 2.6e-3 at nside 512, 5.2e-3 at 256 with the nominal f_sky)."""
    hp = pytest.importorskip("healpy")
    nside = 128
    theta, _ = hp.pix2ang(nside, np.arange(12 * nside ** 2))
    m = (np.cos(theta) >= 0.5).astype(float)            # f_sky = 0.25
    hm = HealpixMask(m)
    cap = Cap(hm.area / (4 * np.pi))
    w_cap, w_map = cap.power(40), hm.power(40)
    assert np.max(np.abs(w_map - w_cap)) < 5e-3 * w_cap[0]
    assert abs(hm.area / (4 * np.pi) - 0.25) < 2 / nside


def test_cap_power_parseval_and_full_sky():
    """Σ_K (2K+1) W_K = ∫ M² dΩ = 4π f_sky (Parseval, common practice) converging like 1/K for
    the sharp edge; W_0 = 4π f_sky² (m_00 = Ω_M/√(4π)); full sky W_K = 4π δ_K0."""
    cap = Cap(0.3)
    w = cap.power(4000)
    total = np.sum((2 * np.arange(w.size) + 1) * w)
    assert abs(total / (4 * np.pi * 0.3) - 1) < 2e-3
    assert abs(w[0] - 4 * np.pi * 0.09) < 1e-12
    np.testing.assert_allclose(FULL_SKY.power(10), [4 * np.pi] + [0.0] * 10, atol=1e-14)


def test_coupling_against_direct_sphere_quadrature():
    """∫∫ dΩ1 dΩ2 M1 M2 L_J(n̂1·n̂2) L_L(n̂1·n̂2) = 16π² M_JL/(2L+1) (docs/curved_mask.md §2,
    the pseudo-spectrum coupling of Hivon et al. 2002, eq. A31), the left side by direct
    quadrature over a cap of f_sky = 0.3 (no harmonics), J, L ≤ 10, to 1e-11 of its largest
    entry; and M is the identity on the full sky."""
    f = 0.3
    n, w = cap_nodes(f)
    leg = legendre(10, np.clip(n @ n.T, -1, 1))
    direct = np.einsum("a,b,jab,lab->jl", w, w, leg, leg)
    M = coupling_matrix(Cap(f).power(20), 10, 10)
    ours = 16 * np.pi ** 2 * M / (2 * np.arange(11) + 1)[None, :]
    assert np.max(np.abs(ours - direct)) < 1e-11 * np.abs(direct).max()
    np.testing.assert_allclose(coupling_matrix(FULL_SKY.power(30), 12, 15),
                               np.eye(13, 16), atol=1e-13)


@pytest.mark.parametrize("ic", ["none", "radial", "global"])
def test_integral_constraints_against_direct_sphere_quadrature(ic):
    """The integral-constrained angular spectra C̃_J of a masked field (docs/curved_mask.md §4)
    against the definition evaluated by direct quadrature, on two distances r1, r2 with
    weights v and a band-limited cross spectrum C_L^{AB}(r_i, r_j) (L ≤ 8): the field
    Δ(r_i n̂) − C with C the M-weighted angular mean at each distance (radial) or the
    v-weighted mean of those (global, C = ∫ w M Δ d³x/∫ w M d³x), then ∫∫ dΩ1 dΩ2 M1 M2 L_J(n̂1·n̂2) <Δ'Δ'> = 4π C̃_J. Agreement
    to 1e-10 for J ≤ 8 on a cap of f_sky = 0.2 (an independent numerical route: no harmonic
    coefficients of the mask)."""
    f, lmax = 0.2, 8
    n, w = cap_nodes(f)
    area = w.sum()
    mu = np.clip(n @ n.T, -1, 1)
    leg = legendre(2 * lmax, mu)
    rng = np.random.default_rng(3)
    c_l = rng.normal(size=(lmax + 1, 2, 2)) / (1 + np.arange(lmax + 1))[:, None, None] ** 2
    v = np.array([0.35, 0.65])          # C_L^{AB}(r_i, r_j): a cross spectrum, not symmetric
    xi = np.einsum("l,lij,lab->iajb", (2 * np.arange(lmax + 1) + 1) / (4 * np.pi), c_l,
                   leg[: lmax + 1])                       # <Δ^A(r_i n_a) Δ^B(r_j n_b)>
    mean_b = np.einsum("iajb,b->iaj", xi, w) / area       # <Δ^A(r_i n_a) ā^B(r_j)>
    mean_a = np.einsum("iajb,a->ijb", xi, w) / area       # <ā^A(r_i) Δ^B(r_j n_b)>
    mean_ab = np.einsum("iaj,a->ij", mean_b, w) / area    # <ā^A(r_i) ā^B(r_j)>
    if ic == "none":
        cov = xi
    elif ic == "radial":
        cov = xi - mean_b[:, :, :, None] - mean_a[:, None] + mean_ab[:, None, :, None]
    else:
        d_a = mean_b @ v                                  # <Δ^A(r_i n_a) C^B>
        d_b = np.einsum("k,kjb->jb", v, mean_a)           # <C^A Δ^B(r_j n_b)>
        cov = xi - d_a[:, :, None, None] - d_b[None, None] + v @ mean_ab @ v
    direct = np.einsum("a,b,jab,iakb->jik", w, w, leg[: lmax + 1], cov) / (4 * np.pi)
    ops = constrained_coupling(Cap(f), Cap(f).power(2 * lmax), lmax, lmax, ic)
    ours = coupled_spectra(c_l, ops, v, ic)
    assert np.max(np.abs(ours - direct)) < 1e-10 * np.abs(direct).max()


def test_white_noise_through_the_coupling():
    """A white spectrum (C_L the same at every L, as Poisson noise) through the coupling:
    Σ_L M_JL = Σ_K (2K+1) W_K/4π = f_sky for every J (the pseudo-spectrum of white noise is
    f_sky times it; Hivon et al. 2002), and with the radial IC Σ_L coup_JL = f_sky − 2 Σ_L X_JL/
    ((2J+1)Ω_M) + W_J ∫M²/Ω_M², the closed form the shot-noise template uses (Σ_L X_JL =
    ∫M² M_J = (2J+1) W_J for a binary mask). Summed to L = 1000 on a cap of f_sky = 0.25: the
    sharp edge's 1/L power tail leaves 1.4e-4 (none) and 1.7e-4 (radial); tolerance 3e-4."""
    cap, l_big = Cap(0.25), 1000
    w = cap.power(l_big + 20)
    y = cap.square_power(10) / cap.area
    ws = w[:11] * cap.m2 / cap.area ** 2
    for ic, pred in (("none", np.full(11, 0.25)), ("radial", 0.25 - 2 * y + ws)):
        coup = constrained_coupling(cap, w, 10, l_big, ic)[0]
        assert np.max(np.abs(coup.sum(axis=1) - pred)) < 3e-4


# --- the masked estimator ---------------------------------------------------------------------

@pytest.mark.parametrize("ic", ["none", "radial", "global"])
def test_full_sky_mask_equals_full_sky_engine(cosmo, ic):
    """With M = 1 the masked expectation is the full-sky engine's (M_JL = δ_JL): every pair
    template, even and odd ℓ of a cross spectrum and the shot noise, to 1e-8 of P̂_0
    (measured 4e-15)."""
    shell = Shell(1000.0, 2000.0, nbar=3e-4)
    edges = EDGES[::2]
    ta = TracerCoefficients(b=1.5, b_e=0.5, s=0.2)
    tb = TracerCoefficients(b=lambda z: 2.0 + 0.3 * z, b_e=-1.0, s=0.1)
    terms = ("density", "rsd", "doppler")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        ref = multipole_templates(cosmo, shell, edges, ta, terms, ells=(0, 1, 2), ic=ic)
        ours = masked_templates(cosmo, shell, FULL_SKY, edges, ta, terms, ells=(0, 1, 2), ic=ic)
        ref_x = multipole_templates(cosmo, shell, edges, ta, terms, tb, terms, ells=(0, 1, 3),
                                    ic=ic, combine_pieces=True).combine({})
        ours_x = masked_multipoles(cosmo, shell, FULL_SKY, edges, ta, terms, tb, terms,
                                   ells=(0, 1, 3), ic=ic)
    scale = np.abs(ref.combine({})[0]).max()
    for p in ref.pairs:
        assert np.max(np.abs(ref.pairs[p] - ours.pairs[p])) < 1e-8 * scale
    assert np.max(np.abs(ref.noise - ours.noise)) < 1e-8 * np.abs(ref.noise).max()
    assert np.max(np.abs(ref_x - ours_x)) < 1e-8 * np.abs(ref_x[0]).max()
    assert np.abs(ref_x[1]).max() > 1e-3 * np.abs(ref_x[0]).max()     # the dipole is there


@pytest.mark.parametrize("f_sky", [0.25, 0.5])
def test_cap_density_equals_window_convolution(cosmo, no_growth, wilson_reference, f_sky):
    """Isotropic power (density only, D = 1), no IC, a cap of the shell 1000–2000 Mpc/h: the
    masked curved-sky estimator equals the exact configuration-space convolution with the
    cap-shell window's Q_ℓ(s) (Wilson, Peacock, Taylor & de la Torre 2017;
    likelihood.observation.WindowMatrix with CapShellWindow, ic "none") to 1e-3 of P̂_0 in
    ℓ = 0 and 2 (measured ≤ 4.8e-4 and ≤ 5e-6 at f_sky = 0.25; the full-sky engine's q-tail
    level 3e-4 is common to both)."""
    c = no_growth(cosmo)
    shell = Shell(1000.0, 2000.0)
    t = masked_templates(c, shell, Cap(f_sky), EDGES, TracerCoefficients(b=1.0), ("density",),
                         ells=(0, 2))
    cur = t.pairs["density", "density"]
    ref = wilson_reference(c, EDGES, CapShellWindow(1000.0, 2000.0, f_sky))
    assert np.max(np.abs(cur[0] / ref[0] - 1)) < 1e-3
    assert np.max(np.abs(cur[1] - ref[1]) / ref[0]) < 1e-3
    assert np.abs(ref[1]).max() > 1e-2 * ref[0].max()      # the cap makes a real quadrupole


def test_mask_shot_noise_and_constraint(cosmo):
    """Shot noise of a masked shell without IC is exactly ∫ w² M²/n̄ d³x / I₂ = 1/n̄ in ℓ = 0
    (Poisson, common practice) and 0 in ℓ = 2. With an integral constraint the field's mean
    inside the mask is zero, so F(k) = ∫ w M Δ' e^{−ik·x} d³x ≈ −ik·∫ w M Δ' x d³x and P̂_0
    (signal and noise) vanish like k² as k → 0 (Taylor expansion, a limit): over bins of
    doubling k (kR ≲ 0.5 for the cap f_sky = 0.25 of 1000–2000 Mpc/h) the ratio is 4 to 5 %
    (measured 3.93 for the signal with the radial IC)."""
    shell = Shell(1000.0, 2000.0, nbar=2e-4)
    tr = TracerCoefficients(b=1.5)
    edges = np.array([0.0001, 0.0002, 0.0004])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        t0 = masked_templates(cosmo, shell, Cap(0.25), edges, tr, ("density",), ells=(0, 2))
        for ic in ("radial", "global"):
            t = masked_templates(cosmo, shell, Cap(0.25), edges, tr, ("density",), ells=(0, 2),
                                 ic=ic)
            sig = t.combine({}, noise=0.0)[0]
            assert abs(sig[1] / sig[0] / 4 - 1) < 0.05
            assert abs(t.noise[0, 1] / t.noise[0, 0] / 4 - 1) < 0.05
            assert sig[0] < 0.02 * t0.combine({}, noise=0.0)[0, 0]
    np.testing.assert_allclose(t0.noise[0], 1 / 2e-4, rtol=1e-12)
    np.testing.assert_allclose(t0.noise[1], 0.0, atol=1e-12 / 2e-4)


def test_bad_masks():
    """One-line errors naming the value and what is expected."""
    for f in (0.0, -0.1, 1.5, "x"):
        with pytest.raises(ConfigError, match="f_sky"):
            Cap(f)
    pytest.importorskip("healpy")
    with pytest.raises(DataError, match="HEALPix map"):
        HealpixMask(np.ones(100))
    bad = np.ones(12 * 4 ** 2)
    bad[3] = -1
    with pytest.raises(DataError, match=">= 0"):
        HealpixMask(bad)
    with pytest.raises(DataError, match="not all zero"):
        HealpixMask(np.zeros(12 * 4 ** 2))
    with pytest.raises(ConfigError, match="expected a Cap"):
        masked_templates(None, Shell(1000.0, 2000.0), 0.5, EDGES, TracerCoefficients())
    with pytest.raises(ConfigError, match="tolerance"):
        masked_templates(None, Shell(1000.0, 2000.0), Cap(0.5), EDGES,
                         TracerCoefficients(), tolerance=2.0)


def test_healpix_mask_estimator_and_warning(cosmo):
    """A HEALPix cap (nside 64; healpy as the reference library) against the analytic cap at
    the map's sky fraction: the triple integrals X_JL = ∫ M M_J M_L dΩ of the constraint terms
    (pixel sums of healpy.alm2map maps) to 1e-3 of their largest (measured 5e-5) and ∫M²M_J;
    in the estimator with the radial IC, the multipoles to 2e-3 of P̂_0 (pixel edges); and the
    mask known only to K = 3 nside − 1 = 191, below the J_max + L_top the estimator couples,
    raises a ResolutionWarning."""
    hp = pytest.importorskip("healpy")
    nside = 64
    theta, _ = hp.pix2ang(nside, np.arange(12 * nside ** 2))
    hm = HealpixMask((np.cos(theta) >= 0.0).astype(float), source="cap.fits")
    cap = Cap(hm.area / (4 * np.pi))
    x_map, x_cap = hm.triple(12, 12), cap.triple(12, 12)
    assert np.max(np.abs(x_map - x_cap)) < 1e-3 * np.abs(x_cap).max()
    assert np.max(np.abs(hm.square_power(12) - cap.power(12))) < 1e-3 * cap.power(0)[0]
    shell = Shell(1000.0, 2000.0)
    edges = EDGES[::3]
    with pytest.warns(ResolutionWarning, match="known to K = 191"):
        ours = masked_multipoles(cosmo, shell, hm, edges, TracerCoefficients(b=1.5),
                                 ("density",), ells=(0, 2), ic="radial")
    ref = masked_multipoles(cosmo, shell, cap, edges, TracerCoefficients(b=1.5), ("density",),
                            ells=(0, 2), ic="radial")
    assert np.max(np.abs(ours - ref)) < 2e-3 * np.abs(ref[0]).max()


def test_resolution_doubling_short(cosmo):
    """Doubling the radial nodes and raising q_max (and with it the orders L the mask's edges
    couple) by 4/3 move the masked multipoles by < 1e-3 of P̂_0, the engine's accuracy goal
    (measured 3.1e-4, the full-sky engine's q-tail level; short version of the slow test)."""
    shell = Shell(1000.0, 2000.0)
    edges = EDGES[::3]
    args = (cosmo, shell, Cap(0.25), edges, TracerCoefficients(b=1.5), ("density", "rsd"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        base = masked_multipoles(*args, ells=(0, 2))
        fine = masked_multipoles(*args, ells=(0, 2),
                                 resolution=EstimatorResolution(q_range=4 / 3, r_density=2.0))
    assert np.max(np.abs(fine - base)) < 1e-3 * np.abs(base[0]).max()


@pytest.mark.slow
@pytest.mark.parametrize("change, tol", [(dict(j_factor=2.0), 3e-4), (dict(q_density=2.0), 3e-4),
                                         (dict(k_nodes=8), 3e-4), (dict(q_range=4.0 / 3.0), 5e-4)])
def test_resolution_doubling(cosmo, change, tol):
    """Every resolution choice doubled (J_max, q density, k nodes) moves the masked multipoles
    (cap f_sky = 0.25, shell 1000–2000 Mpc/h, radial IC, density + RSD + Doppler) by < 3e-4 of
    P̂_0, the full-sky engine's stated tolerance (measured: J_max 4e-16, q density 5e-9, k nodes
    5e-5). q_max × 4/3 (which also raises the orders L the mask's edges couple) moves P̂_0 by
    3.1e-4 against 2.5e-4 on the full sky (measured; the sharp radial edges' 1/(q − k) tail, to
    which the angular edges add a quarter): < 5e-4."""
    shell = Shell(1000.0, 2000.0)
    edges = EDGES[::2]
    args = (cosmo, shell, Cap(0.25), edges, TracerCoefficients(b=1.5, b_e=0.5),
            ("density", "rsd", "doppler"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        base = masked_multipoles(*args, ells=(0, 1, 2), ic="radial")
        fine = masked_multipoles(*args, ells=(0, 1, 2), ic="radial",
                                 resolution=EstimatorResolution(**change))
    assert np.max(np.abs(fine - base)) < tol * np.abs(base[0]).max()


def test_masked_j_max_warning(cosmo):
    """J_max below the order k_max r_max needs (j_factor 0.5) raises a ResolutionWarning
    naming the remedy, as the full-sky engine does."""
    with pytest.warns(ResolutionWarning, match="raise j_factor"):
        masked_multipoles(cosmo, Shell(1000.0, 2000.0), Cap(0.5), EDGES[:3],
                          TracerCoefficients(b=1.5), ("density",), ells=(0,),
                          resolution=EstimatorResolution(j_factor=0.5))


def test_healpix_mask_from_file(tmp_path):
    """A HEALPix FITS file (written by healpy, the reference library) reads back to the same
    mask; a missing file, a file that is not FITS and a map with negative values give one-line
    errors naming the file."""
    hp = pytest.importorskip("healpy")
    nside = 16
    theta, _ = hp.pix2ang(nside, np.arange(12 * nside ** 2))
    m = (np.cos(theta) >= 0.0).astype(float)
    path = tmp_path / "cap.fits"
    hp.write_map(str(path), hp.reorder(m, r2n=True), nest=True, dtype=np.float64)  # NESTED
    hm = HealpixMask.from_file(str(path))
    ref = HealpixMask(m)
    np.testing.assert_allclose(hm.power(30), ref.power(30), rtol=1e-12, atol=1e-14)
    assert hm.area == pytest.approx(ref.area, rel=1e-12) and hm.m2 == pytest.approx(ref.m2)
    with pytest.raises(DataError, match="not found"):
        HealpixMask.from_file(str(tmp_path / "none.fits"))
    bad = tmp_path / "bad.fits"
    bad.write_text("not a map")
    with pytest.raises(DataError, match="bad.fits: not a readable HEALPix"):
        HealpixMask.from_file(str(bad))
    neg = tmp_path / "neg.fits"
    hp.write_map(str(neg), m - 0.5, dtype=np.float64)
    with pytest.raises(DataError, match="neg.fits: expected finite mask values >= 0"):
        HealpixMask.from_file(str(neg))


def _cap_shell_randoms(rng, n, f_sky, r1, r2):
    """Uniform randoms in the volume of a cap of f_sky between r1 and r2 (Mpc/h)."""
    r = rng.uniform(r1 ** 3, r2 ** 3, n) ** (1 / 3)
    mu = rng.uniform(1 - 2 * f_sky, 1, n)
    phi = rng.uniform(0, 2 * np.pi, n)
    s = np.sqrt(1 - mu * mu)
    return np.stack([r * s * np.cos(phi), r * s * np.sin(phi), r * mu], axis=1)


def test_separability_of_randoms():
    """Pearson's χ² test of independence (Pearson 1900) on the randoms' counts in sky patches ×
    distance bins: uniform randoms in a cap shell pass (p > 1e-3, no warning, rms departure 0);
    a density p_p p_b (1 + ε s_p t_b) with s = ±1 on the two halves x ≷ 0 and t = ±1 below and
    above the median distance has root mean square contingency ε exactly (Pearson 1904): the
    measure returns 0.0499 for ε = 0.05 (tolerance 0.01, the Poisson scatter of 4e5 randoms is
    ~3e-3), with a SeparabilityWarning naming the catalogue. Bad input: one line."""
    rng = np.random.default_rng(1)
    with warnings.catch_warnings():
        warnings.simplefilter("error", SeparabilityWarning)
        out = separability(_cap_shell_randoms(rng, 200000, 0.25, 1000.0, 2000.0))
    assert out["p_value"] > 1e-3 and out["rms_departure"] < 0.01
    assert abs(out["chi2"] / out["dof"] - 1) < 5 * np.sqrt(2 / out["dof"])
    y = _cap_shell_randoms(rng, 400000, 0.25, 1000.0, 2000.0)
    r = np.linalg.norm(y, axis=1)
    s, t = np.sign(y[:, 0]), np.where(r < np.median(r), 1.0, -1.0)
    keep = rng.uniform(0, 1, r.size) < (1 + 0.05 * s * t) / 1.05
    with pytest.warns(SeparabilityWarning, match="deep.fits: not separable"):
        out = separability(y[keep], source="deep.fits")
    assert abs(out["rms_departure"] - 0.05) < 0.01
    with pytest.raises(DataError, match="cat.fits: expected finite"):
        separability(np.ones((10, 3)), source="cat.fits")
    with pytest.raises(DataError, match="at the observer"):
        separability(np.zeros((200, 3)))



def test_masked_basis_templates(cosmo):
    """The masked path takes the BasisKernel templates of the curved forward model: with
    M = 1 they equal the full-sky engine's basis templates (M_JL = δ_JL, Hivon et al. 2002
    eq. A31 at W_K = 4π δ_K0) to 1e-10 of P̂_0, and with a cap the pair templates combined at
    amplitudes x equal the direct masked run of the tracer at those values (a bilinear form,
    fast = direct) to 1e-10."""
    from likelihood.curved.estimator import BasisKernel
    shell = Shell(1000.0, 2000.0, nbar=3e-4)
    edges = EDGES[::2]
    terms = ("rsd", "doppler")
    basis = [BasisKernel("1", ((1.0, TracerCoefficients(0.0, b_e=0.5, s=0.0), terms),)),
             BasisKernel("b1", ((1.0, TracerCoefficients(1.0), ("density",)),)),
             BasisKernel("s", ((1.0, TracerCoefficients(0.0, s=1.0), ("doppler",)),
                               (-1.0, TracerCoefficients(0.0), ("doppler",))))]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        for ic in ("none", "global"):
            ref = multipole_templates(cosmo, shell, edges, basis, ells=(0, 2), ic=ic)
            ours = masked_templates(cosmo, shell, FULL_SKY, edges, basis, ells=(0, 2), ic=ic)
            scale = np.abs(ref.combine({})[0]).max()
            assert set(ours.pairs) == set(ref.pairs) and len(ref.pairs) == 6
            for p in ref.pairs:
                assert np.max(np.abs(ref.pairs[p] - ours.pairs[p])) < 1e-10 * scale
        x = {"1": 1.0, "b1": 1.7, "s": 0.3}
        fast = masked_templates(cosmo, shell, Cap(0.25), edges, basis, ells=(0, 2),
                                ic="radial").combine(x, noise=1.0)
        direct = masked_multipoles(cosmo, shell, Cap(0.25), edges,
                                   TracerCoefficients(1.7, b_e=0.5, s=0.3),
                                   ("density",) + terms, ells=(0, 2), ic="radial")
    assert np.max(np.abs(fast - direct)) < 1e-10 * np.abs(direct[0]).max()
    assert np.abs(fast[1]).max() > 1e-2 * np.abs(fast[0]).max()


def test_masked_radial_field(cosmo):
    """A deterministic field isotropic about the observer (two profiles, as the observer
    term's mean field): with M = 1 the masked estimator equals the full-sky one
    (radial_field_templates: F_ℓ = 4π(−i)^ℓ ∫ r² w m_IC j_ℓ dr, exact) to 1e-10 for each IC;
    with a cap and no IC it equals a direct quadrature of the estimator over the cap
    (F_ℓ(k) = ∫ d³x M m(r) L_ℓ(k̂·x̂) e^{−ik·x}, averaged over k̂ by Gauss–Legendre × uniform φ
    points, P̂_ℓ = (2ℓ+1)/I₂ ⟨F_ℓ F_0*⟩; an independent route) to 1e-6 of P̂_0; with the radial
    IC (each distance's mean inside the mask removed) it vanishes exactly (a limit)."""
    from likelihood.curved.estimator import radial_field_templates, resolution_grids
    from likelihood.curved.mask import masked_radial_field_templates
    shell = Shell(1000.0, 2000.0)
    edges = np.array([0.003, 0.006, 0.009])
    res = EstimatorResolution(k_nodes=4)
    _, _, (r, wr), _ = resolution_grids(shell, edges, res)
    prof = np.array([np.exp(-r / 800.0), (r / 1500.0) ** 2])
    scale = np.abs(radial_field_templates(shell, edges, ["a"], prof[:1], (0,), "none",
                                          res)["a", "a"]).max()
    for ic in ("none", "global", "radial"):      # radial: exactly zero on the full sky
        ref = radial_field_templates(shell, edges, ["a", "b"], prof, (0, 2), ic, res)
        ours = masked_radial_field_templates(shell, FULL_SKY, edges, ["a", "b"], prof, (0, 2),
                                             ic, res)
        for p in ref:
            assert np.max(np.abs(ref[p] - ours[p])) < 1e-10 * scale
    # cross spectra (the fields of tracer B carry F_0; every pair, odd ℓ as Π_ℓ): masked with
    # M = 1 equals full sky, and the symmetrised auto templates are T_ab + T_ba of the cross
    # ones (T_aa = T_aa): F_ℓ[a] F_0[b] + F_ℓ[b] F_0[a] by definition
    for ic in ("none", "global"):
        two = dict(names_b=["a", "b"], profiles_b=prof)
        cross = radial_field_templates(shell, edges, ["a", "b"], prof, (0, 1, 2), ic, res, **two)
        ours = masked_radial_field_templates(shell, FULL_SKY, edges, ["a", "b"], prof, (0, 1, 2),
                                             ic, res, **two)
        auto = radial_field_templates(shell, edges, ["a", "b"], prof, (0, 1, 2), ic, res)
        assert sorted(cross) == [("a", "a"), ("a", "b"), ("b", "a"), ("b", "b")]
        for p in cross:
            assert np.max(np.abs(cross[p] - ours[p])) < 1e-10 * scale
        assert np.max(np.abs(auto["a", "b"] - cross["a", "b"] - cross["b", "a"])) < 1e-12 * scale
        assert np.max(np.abs(auto["a", "a"] - cross["a", "a"])) < 1e-12 * scale
        assert np.max(np.abs(cross["a", "b"][1] - cross["b", "a"][1])) > 1e-3 * scale
    # direct quadrature over the cap f_sky = 0.25 for the single profile m = exp(−r/800)
    f_sky = 0.25
    kc = 0.5 * (edges[0] + edges[1])
    _, _, (rr, wrr), (kk, wkk) = resolution_grids(shell, edges[:2],
                                                  EstimatorResolution(k_nodes=1))
    assert np.isclose(kk[0], kc)      # one k node: the bin average is wkk × the value there
    mm = np.exp(-rr / 800.0)
    got = masked_radial_field_templates(shell, Cap(f_sky), edges[:2], ["a"], mm[None], (0, 2),
                                        "none", EstimatorResolution(k_nodes=1))["a", "a"][:, 0]
    n_dir, w_dir = cap_nodes(f_sky, 48, 96)
    kd, kw = cap_nodes(1.0, 24, 48)                     # directions of k over the sphere
    x = rr[:, None, None] * n_dir[None, :, :]          # (r, dir, 3)
    wx = (wrr * rr ** 2 * mm)[:, None] * w_dir[None, :]
    i2 = np.sum(wrr * rr ** 2) * 4 * np.pi * f_sky
    out = np.zeros(2)
    for khat, wk_ in zip(kd, kw):
        mu = n_dir @ khat
        ph = np.exp(-1j * kc * (x @ khat))
        F0 = np.sum(wx * ph)
        F2 = np.sum(wx * ph * legendre(2, mu)[2][None, :])
        out += wk_ / (4 * np.pi) * np.array([(F0 * np.conj(F0)).real, (F2 * np.conj(F0)).real])
    out *= np.array([1.0, 5.0]) / i2 * wkk[0, 0]
    assert np.max(np.abs(got - out)) < 1e-6 * abs(out[0])
    assert abs(out[1]) > 1e-2 * abs(out[0])
    # the radial IC removes each distance's mean inside the mask: an isotropic field vanishes
    zero = masked_radial_field_templates(shell, Cap(f_sky), edges, ["a"], prof[:1], (0, 2),
                                         "radial", res)["a", "a"]
    assert np.abs(zero).max() < 1e-10 * scale
