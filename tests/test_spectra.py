"""Multi-tracer data vectors: text and .npz round trips, single-tracer files read as one auto
spectrum, bad files refused with one line; the two-tracer Gaussian covariance (likelihood.covariance) against
the single-tracer form and the closed-form dipole variance."""
import numpy as np
import pytest

from likelihood.covariance import multi_tracer_covariance
from likelihood.data import DataVector, gaussian_covariance
from likelihood.errors import DataError
from likelihood.spectra import (SpectraVector, load_spectra, load_spectra_covariance,
                                save_spectra_covariance)


def _vector():
    rng = np.random.default_rng(2)
    e1, e2 = np.linspace(0.002, 0.05, 6), np.linspace(0.004, 0.04, 4)
    mid = lambda e: 0.5 * (e[1:] + e[:-1])
    parts = [DataVector((0, 2), e1, mid(e1), np.arange(1, 6) * 10.0, rng.normal(size=(2, 5))),
             DataVector((0, 1, 2, 3), e2, mid(e2), np.arange(1, 4) * 7.0, rng.normal(size=(4, 3))),
             DataVector((0,), e1, mid(e1), np.arange(1, 6) * 10.0, rng.normal(size=(1, 5)))]
    return SpectraVector(("bright", "faint"), [("bright", "bright"), ("bright", "faint"),
                                                ("faint", "faint")], parts, {"note": "x"})


@pytest.mark.parametrize("name", ["d.txt", "d.npz"])
def test_round_trip(tmp_path, name):
    sv = _vector()
    sv.save(tmp_path / name)
    back = load_spectra(tmp_path / name)
    assert back.tracers == sv.tracers and back.pairs == sv.pairs and back.meta == {"note": "x"}
    for a, b in zip(sv.parts, back.parts):
        assert a.ells == b.ells
        np.testing.assert_allclose(b.values, a.values, rtol=1e-9)
        np.testing.assert_allclose(b.edges, a.edges, rtol=1e-9)
    np.testing.assert_allclose(back.flat, sv.flat, rtol=1e-9)
    cov = np.diag(np.arange(1.0, sv.flat.size + 1))
    save_spectra_covariance(tmp_path / ("c" + name[1:]), cov, sv)
    np.testing.assert_allclose(load_spectra_covariance(tmp_path / ("c" + name[1:]), back), cov)


def test_single_tracer_file_is_one_auto_spectrum(tmp_path):
    dv = _vector().parts[0]
    dv.save(tmp_path / "s.txt")
    sv = load_spectra(tmp_path / "s.txt", "g")
    assert sv.pairs == [("g", "g")] and sv.tracers == ("g",)
    np.testing.assert_allclose(sv.flat, dv.flat, rtol=1e-9)
    with pytest.raises(DataError, match="single-tracer data vector"):
        load_spectra(tmp_path / "s.txt")


@pytest.mark.parametrize("edit,words", [
    (lambda t: t.replace("# spectrum: faint faint | ells: 0\n", ""), "not announced"),
    (lambda t: t.replace("# tracers: bright faint", "# tracers: bright dim"), "names tracer 'faint'"),
    (lambda t: t.replace("faint faint | ells: 0", "faint faint | ells: 0 1"), "odd multipoles"),
    (lambda t: t.replace("faint faint | ells: 0", "faint faint | ells: 0 2"), "has no rows"),
])
def test_bad_files(tmp_path, edit, words):
    _vector().save(tmp_path / "d.txt")
    text = (tmp_path / "d.txt").read_text()
    (tmp_path / "d.txt").write_text(edit(text))
    with pytest.raises(DataError, match=words) as err:
        load_spectra(tmp_path / "d.txt")
    assert "\n" not in str(err.value)


def test_covariance_spectra_must_match(tmp_path):
    sv = _vector()
    save_spectra_covariance(tmp_path / "c.txt", np.eye(sv.flat.size), sv)
    other = SpectraVector(sv.tracers, sv.pairs[:2] + [("faint", "faint")],
                          sv.parts[:2] + [DataVector((2,), sv.parts[2].edges, sv.parts[2].k_eff,
                                                     sv.parts[2].n_modes, np.zeros((1, 5)))])
    with pytest.raises(DataError, match="differ from the data"):
        load_spectra_covariance(tmp_path / "c.txt", other)


def test_multi_tracer_covariance_one_tracer_equals_single_tracer_form():
    """One tracer: the multi-tracer Gaussian covariance is the single-tracer form
    (Grieb et al. 2016, eq. 15; likelihood.data.gaussian_covariance)."""
    k = np.linspace(0.01, 0.1, 5)
    pk = 1e4 * (k / 0.05) ** -1.5
    b, f, nbar = 2.0, 0.8, 3e-4
    n_modes = 1e3 * k ** 2 / k[0] ** 2

    def pkmu(x, y, mu):
        return ((b + f * mu[None, :] ** 2) ** 2) * pk[:, None]
    got = multi_tracer_covariance(n_modes, [(("g", "g"), (0, 2, 4))], pkmu, {("g", "g"): 1 / nbar})
    ref = gaussian_covariance(k, np.column_stack([b * b * pk, 2 * b * f * pk, f * f * pk]), 1 / nbar,
                              n_modes, (0, 2, 4))
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12 * ref.max())


def test_multi_tracer_covariance_cross_dipole_variance_closed_form():
    """Two tracers with kernels Z_A = b_A + iμγ_A, Z_B = b_B + iμγ_B (no RSD, no noise): from
    Isserlis' theorem (derived here; common practice for Gaussian fields)
    Var Π_1 = (9/N) ½∫ μ² [P_AA P_BB − Re P_AB²] dμ, integrated exactly as a polynomial in μ
    (numpy.polynomial), independently of the quadrature in the covariance."""
    k = np.array([0.02])
    P = 1e4
    bA, bB, gA, gB = 2.0, 1.2, 0.5, -0.3

    def z(x, mu):
        return (bA + 1j * mu * gA) if x == "A" else (bB + 1j * mu * gB)

    def pkmu(x, y, mu):
        return (z(x, mu[None, :]) * np.conj(z(y, mu[None, :]))) * P
    n = 100.0
    cov = multi_tracer_covariance(np.array([n]), [(("A", "B"), (1,))], pkmu, {})
    # P_AA P_BB − Re P_AB² as a polynomial in μ, times μ², integrated on [-1, 1] / 2
    from numpy.polynomial import polynomial as Pl
    paa = np.array([bA ** 2, 0, gA ** 2])
    pbb = np.array([bB ** 2, 0, gB ** 2])
    re_pab = np.array([bA * bB, 0, gA * gB])             # Re Z_A Z_B^* = b_A b_B + μ² γ_A γ_B
    im_pab = np.array([0, gA * bB - bA * gB])            # Im Z_A Z_B^* = μ (γ_A b_B − b_A γ_B)
    re_sq = Pl.polysub(Pl.polymul(re_pab, re_pab), Pl.polymul(im_pab, im_pab))
    integrand = Pl.polymul([0, 0, 1], Pl.polysub(Pl.polymul(paa, pbb), re_sq))
    anti = Pl.polyint(integrand)
    ref = 9.0 / n * 0.5 * (Pl.polyval(1, anti) - Pl.polyval(-1, anti)) * P ** 2
    assert cov[0, 0] == pytest.approx(ref, rel=1e-12)
