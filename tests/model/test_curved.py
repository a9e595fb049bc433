"""The curved-sky forward model (engine.kind: curved_sky): configuration, fast path against the
direct engine run, the disk cache of its templates, and the isotropic limit against the
plane-parallel window convolution."""
import os
import warnings

import numpy as np
import pytest

from likelihood.config import load_config
from likelihood.errors import ConfigError
from likelihood.model import build
from likelihood.model.curved import CurvedForwardModel

# small k range and coarse grids keep each engine run well under a second
CURVED = {"engine": {"kind": "curved_sky", "resolution": {"k_nodes": 2, "q_range": 1.5}},
          "data": {"mock": {"k_min": 0.004, "k_max": 0.016, "n_bins": 3}}}
FREE_BE_S = {"parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0},
                            "fnl": {"flat": [-50, 50], "start": 1.0},
                            "b_e": {"flat": [-5, 5], "start": 0.5},
                            "s": {"flat": [-1, 2], "start": 0.2},
                            "shot_noise": {"flat": [0, 3], "start": 1.0}}}


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", os.fspath(tmp_path / "cache"))


def _curved(write_config, *extra):
    from tests.conftest import merge
    over = CURVED
    for e in extra:
        over = merge(over, e)           # a "parameters" block replaces the base one
    return write_config(over)


@pytest.mark.parametrize("extra", [
    {},                                                                   # global IC, constant b1
    {"engine": {"bias_evolution": "inverse_growth"}, "effects": {"integral_constraint": "radial"},
     **FREE_BE_S},
    {"engine": {"snapshot": True}, "effects": {"integral_constraint": "none"}},
    {"effects": {"observer": True}, "observer": {"nu_true": 1.5},                 # observer term
     "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0},
                    "fnl": {"flat": [-50, 50], "start": 1.0},
                    "nu_obs": {"gauss": [0, 1], "start": 1.0},
                    "shot_noise": {"flat": [0, 3], "start": 1.0}}},
    {"effects": {"observer_motion": "conditioned", "observer_potential": True,   # observer terms
                 "integral_constraint": "none"}, **FREE_BE_S},
    {"effects": {"observer_motion": True, "observer_potential": True, "observer": True},
     "observer": {"nu_true": 1.5},
     "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0},
                    "nu_obs": {"gauss": [0, 1], "start": 1.0},
                    "shot_noise": {"flat": [0, 3], "start": 1.0}}},
])
def test_fast_path_equals_direct_engine_run(write_config, extra):
    """Templates of the basis kernels (a quadratic form in the amplitudes) reproduce a direct run
    of the engine at the parameter values to 1e-10 (exact algebra: the kernel is affine in
    b1, f_NL-amplitudes, b_e and s; model/curved.py docstring)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(_curved(write_config, extra))
        rng = np.random.default_rng(2)
        for theta in lik.start + 0.2 * rng.standard_normal((1, lik.start.size)):
            d = lik.theta_to_dict(theta)
            fast = lik.model_vector(d, direct=False)
            direct = lik.model_vector(d, direct=True)
            np.testing.assert_allclose(fast, direct, rtol=0, atol=1e-10 * np.abs(direct).max())
            assert lik.log_likelihood(d) == pytest.approx(lik.log_likelihood_direct(d), rel=1e-10)
            assert lik.log_prob(theta) == pytest.approx(lik.log_prob(theta[None])[0], rel=1e-12)


def test_isotropic_limit_equals_plane_parallel_window_convolution(write_config):
    """Density only (no RSD, f_NL or projection terms), snapshot mode, no integral constraint:
    the power is isotropic, where the configuration-space window convolution of the
    plane-parallel route is exact (Wilson, Peacock, Taylor & de la Torre 2017), so the two
    engines must agree through the whole config → model chain: ≤ 1e-3 of P̂_0 (measured
    3e-4 for the engine alone, docs/curved_sky.md section 5)."""
    iso = {"effects": {"rsd": False, "fnl": False, "doppler": False, "potential": False,
                       "integral_constraint": "none"},
           "data": {"mock": {"noise": False, "k_min": 0.006, "k_max": 0.02, "n_bins": 4}}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        flat = build(write_config(iso, name="flat.yaml"))
        curved = build(_curved(write_config, iso, {"engine": {"snapshot": True}}))
    d = {"b1": 2.0, "shot_noise": 1.0}
    a, b = flat.model_vector(d), curved.model_vector(d)
    p0 = np.abs(a[:4]).max()
    assert np.max(np.abs(a - b)) / p0 < 1e-3
    assert np.max(np.abs(a - b)) / p0 > 1e-6     # two different computations


def test_templates_cached_on_disk(write_config, tmp_path):
    """Second build reads the templates from the cache; a setting that changes them (the held
    b_e) changes the key."""
    path = _curved(write_config)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first = build(path)
        files = os.listdir(tmp_path / "cache" / "ergofit")
        assert [f for f in files if f.startswith("curved-templates-")]
        second = build(path)
        np.testing.assert_array_equal(first._templates["M"], second._templates["M"])
        other = build(_curved(write_config, {"tracer": {"b_e": 1.0}}))
    fw: CurvedForwardModel = first.forward
    assert fw.cache_key(first.cosmo) != other.forward.cache_key(other.cosmo)
    assert len([f for f in os.listdir(tmp_path / "cache" / "ergofit")
                if f.startswith("curved-templates-")]) == 2


def test_curved_hash_unchanged_by_observer_terms_off(write_config):
    """Writing the observer terms off explicitly keeps a curved-sky config's hash (and so the
    run folders and chains of curved configs made before these terms existed)."""
    plain = load_config(write_config(CURVED, name="a.yaml"))
    explicit = load_config(write_config(dict(CURVED, effects={"observer_motion": False,
                                                              "observer_potential": False}),
                                        name="b.yaml"))
    assert plain.hash == explicit.hash
    assert "observer_motion" not in plain["effects"]


def test_plane_parallel_hash_unchanged_by_engine_section(write_config):
    """Writing the default engine explicitly keeps the plane-parallel config hash."""
    plain = load_config(write_config({}, name="a.yaml"))
    explicit = load_config(write_config({"engine": {"kind": "plane_parallel"},
                                         "effects": {"lensing": False}}, name="b.yaml"))
    assert plain.hash == explicit.hash
    assert "engine" not in plain.raw


@pytest.mark.parametrize("over, words", [
    ({"engine": {"kind": "curved_sky"}, "survey": {"geometry": {"shape": "sphere",
                                                                 "radius": 3000.0, "r_min": None,
                                                                 "r_max": None}}},
     "survey.geometry.shape"),
    ({"engine": {"kind": "curved_sky"}, "effects": {"observer": True,
                                                    "integral_constraint": "radial"},
      "survey": {"geometry": {"shape": "cap", "r_min": 1950.0, "r_max": 3140.0, "fsky": 0.5}}},
     "effects.observer"),
    ({"engine": {"kind": "curved_sky", "mask_tolerance": 1e-3}}, "engine.mask_tolerance"),
    ({"engine": {"kind": "curved_sky", "mask_tolerance": 0.5},
      "survey": {"geometry": {"shape": "cap", "r_min": 1950.0, "r_max": 3140.0, "fsky": 0.5}}},
     "mask_tolerance"),
    ({"survey": {"geometry": {"mask": "m.fits"}}}, "survey.geometry.mask"),
    ({"effects": {"integral_constraint": "radial"}}, "integral_constraint: radial"),
    ({"effects": {"lensing": True}}, "effects.lensing"),
    ({"engine": {"snapshot": True}}, "engine.snapshot"),
    ({"engine": {"kind": "curved_sky"}, "effects": {"observer": True,
                                                    "integral_constraint": "radial"}},
     "effects.observer"),
    ({"engine": {"kind": "curved_sky", "snapshot": True}, "effects": {"isw": True}}, "effects.isw"),
    ({"engine": {"kind": "curved_sky"}, "effects": {"window": False}}, "effects.window"),
    ({"engine": {"kind": "curved_sky", "resolution": {"q_rang": 2}}}, "q_rang"),
    ({"engine": {"kind": "curved_sky", "resolution": {"k_nodes": 2.5}}}, "k_nodes"),
    ({"engine": {"kind": "curved"}}, "engine.kind"),
    ({"effects": {"observer_motion": "averaged"}}, "effects.observer_motion"),
    ({"effects": {"observer_potential": True}}, "effects.observer_potential"),
    ({"observer": {"speed": 369.82}}, "observer.speed"),
    ({"engine": {"kind": "curved_sky"}, "effects": {"observer_motion": "conditioned"},
      "survey": {"geometry": {"shape": "cap", "r_min": 1950.0, "r_max": 3140.0, "fsky": 0.5}}},
     "effects.observer_motion"),
    ({"engine": {"kind": "curved_sky"}, "effects": {"observer_motion": "partly"}},
     "effects.observer_motion"),
    ({"engine": {"kind": "curved_sky", "snapshot": True},
      "effects": {"observer_potential": True}}, "effects.observer_potential"),
    ({"engine": {"kind": "curved_sky"}, "observer": {"speed": 369.82}}, "observer.speed"),
])
def test_bad_engine_settings_one_line(write_config, over, words):
    with pytest.raises(ConfigError) as exc:
        load_config(write_config(over))
    msg = str(exc.value)
    assert words in msg and "\n" not in msg


def test_observer_term_equals_plane_parallel_radial_path_in_snapshot_mode(write_config):
    """In snapshot mode with the local terms the curved-sky mean field is the plane-parallel
    kernel with the local line of sight x̂, so E_ℓ[m] must equal the exact radial path of
    likelihood.observation.observer.ObserverTerm (full-sky shell, global IC; Hoffman & Ribak
    1991 for the mean field), two independent computations (spherical Bessel J = 0 kernel and
    q quadrature against FFTLog ξ_gc): to 1e-3 of max |E| (measured 1.6e-5; 7e-5 at f_NL = 0,
    k to 0.02 on the demo shell)."""
    from likelihood.observation.matrix import theory_k_grid
    from likelihood.observation.observer import ObserverTerm
    from likelihood.observation.window import ShellWindow
    from likelihood.theory import tracer as tr
    over = {"engine": {"snapshot": True}, "effects": {"observer": True},
            "data": {"mock": {"k_min": 0.002, "k_max": 0.02, "n_bins": 6}}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(_curved(write_config, over))
        fw, cosmo = lik.forward, lik.cosmo
        vals = {k: np.atleast_1d(v) for k, v in lik.fiducial.items()}
        got = fw.observer.correction(cosmo, fw.tracer(cosmo, vals), fw.terms)
        geo = lik.config["survey"]["geometry"]
        win = ShellWindow(geo["r_min"], geo["r_max"])
        ref_term = ObserverTerm(field="potential", window=win, volume=win.volume,
                                bins=fw.operator.bins, ells=fw.ells, ic="global")
        kt = theory_k_grid()
        kern = tr.kernel(cosmo, fw.z, kt, tr.Tracer(b1=2.0, fnl=vals["fnl"][0], p=1.0,
                                                    nbar=fw.nbar, b_e=0.5, s=0.2),
                         effects=fw.effects)
        ref = ref_term.correction(cosmo, fw.z, kt, kern).reshape(got.shape)
    assert np.max(np.abs(got - ref)) < 1e-3 * np.abs(ref).max()


def _write_table(path, z, b1, b_e, s):
    rows = np.column_stack([z, b1, b_e, s])
    np.savetxt(path, rows, header="ergofit tracer table\ncolumns: z b1 b_e s", comments="# ")


def test_tracer_table_reproduces_inverse_growth_and_fast_path(write_config, tmp_path):
    """A table with b1 ∝ 1/D(z) and constant b_e, s gives the inverse_growth model (to the
    linear interpolation of a 0.005-step table: 1e-4 of P̂_0, measured 1.4e-7); with b_e(z), s(z)
    varying in the table and b_e sampled, fast path = direct engine run to 1e-10."""
    from likelihood.theory.cosmology import Cosmology
    c = Cosmology.from_preset("planck2018")
    z = np.arange(0.4, 1.6, 0.005)
    d = c.growth_factor(z) / c.growth_factor(1.2)
    _write_table(tmp_path / "tracer.txt", z, 2.0 / d, np.full(z.size, 0.5), np.full(z.size, 0.2))
    _write_table(tmp_path / "tracer2.txt", z, 2.0 / d, 0.5 + 1.5 * (z - 1.2), 0.2 + 0.3 * (z - 1.2))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = build(_curved(write_config, {"engine": {"bias_evolution": "inverse_growth"}}))
        tab = build(_curved(write_config, {"engine": {"tracer_table": "tracer.txt"}}))
        d = {"b1": 2.1, "fnl": 3.0, "shot_noise": 1.0}
        a, b = ref.model_vector(d, direct=False), tab.model_vector(d, direct=False)
        assert np.max(np.abs(a - b)) < 1e-4 * np.abs(a).max()
        lik = build(_curved(write_config, {"engine": {"tracer_table": "tracer2.txt"}},
                            FREE_BE_S))
        d = {"b1": 2.1, "fnl": 3.0, "b_e": 0.7, "s": 0.1, "shot_noise": 1.0}
        fast, direct = lik.model_vector(d, direct=False), lik.model_vector(d, direct=True)
        assert np.max(np.abs(fast - direct)) < 1e-10 * np.abs(direct).max()
        assert np.max(np.abs(fast - tab.model_vector({"b1": 2.1, "fnl": 3.0, "shot_noise": 1.0},
                                                     direct=False))) > 1e-4 * np.abs(fast).max()


@pytest.mark.parametrize("rows, words", [
    ("1.0 2.0 0.5 0.2\n1.1 2.1 0.5 0.2\n", "covers z"),          # too short a z range
    ("0.1 2.0 0.5 0.2\n0.1 2.1 0.5 0.2\n9.0 2.0 0.5 0.2\n", "increasing"),
    ("0.1 -2.0 0.5 0.2\n9.0 2.1 0.5 0.2\n", "b1 > 0"),
])
def test_bad_tracer_table_one_line(write_config, tmp_path, rows, words):
    from likelihood.errors import DataError
    (tmp_path / "bad.txt").write_text("# columns: z b1 b_e s\n" + rows)
    with pytest.raises(DataError) as exc:
        build(_curved(write_config, {"engine": {"tracer_table": "bad.txt"}}))
    assert words in str(exc.value) and "\n" not in str(exc.value)
    with pytest.raises(ConfigError, match="engine.bias_evolution"):
        load_config(_curved(write_config, {"engine": {"tracer_table": "bad.txt",
                                                      "bias_evolution": "constant"}}))


CAP = {"survey": {"geometry": {"shape": "cap", "r_min": 1950.0, "r_max": 3140.0, "fsky": 0.25}}}


@pytest.mark.parametrize("extra", [
    {},                                                                        # global IC
    pytest.param({"effects": {"integral_constraint": "radial"}, **FREE_BE_S},
                 marks=pytest.mark.slow),                      # (full-sky version: default)
    pytest.param({"effects": {"integral_constraint": "none"}, "engine": {"snapshot": True}},
                 marks=pytest.mark.slow),
    {"effects": {"observer": True}, "observer": {"nu_true": 1.5},                 # observer term
     "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0},
                    "fnl": {"flat": [-50, 50], "start": 1.0},
                    "nu_obs": {"gauss": [0, 1], "start": 1.0},
                    "shot_noise": {"flat": [0, 3], "start": 1.0}}},
    {"effects": {"observer_motion": "averaged", "observer_potential": True,       # observer terms
                 "integral_constraint": "none"}, **FREE_BE_S},
])
def test_cap_fast_path_equals_direct_engine_run(write_config, extra):
    """A polar cap (shape: cap, f_sky = 0.25): the masked basis templates (and the masked
    observer templates) reproduce a direct masked run of the engine at the parameter values to
    1e-10 (exact algebra, as on the full sky); the mode-count volume is the cap's."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(_curved(write_config, CAP, extra))
    d = lik.theta_to_dict(lik.start + 0.1)
    fast = lik.model_vector(d, direct=False)
    direct = lik.model_vector(d, direct=True)
    np.testing.assert_allclose(fast, direct, rtol=0, atol=1e-10 * np.abs(direct).max())
    assert "cap f_sky = 0.25" in lik.describe()
    assert lik.survey.volume == pytest.approx(0.25 * 4 * np.pi / 3 * (3140.0 ** 3 - 1950.0 ** 3))


def test_cap_isotropic_limit_equals_plane_parallel_window_convolution(write_config):
    """Density only, snapshot mode, no integral constraint, the cap f_sky = 0.25 of the shell:
    isotropic power, where the configuration-space convolution with the plane-parallel
    route's CapShellWindow is exact (Wilson, Peacock, Taylor & de la Torre 2017), so the
    masked curved model through config → model equals it to ≤ 1e-3 of P̂_0 in ℓ = 0 and 2
    (measured 3.5e-4 and 2.6e-6: the full-sky engine's q-tail level)."""
    iso = {"effects": {"rsd": False, "fnl": False, "doppler": False, "potential": False,
                       "integral_constraint": "none"},
           "data": {"mock": {"noise": False, "k_min": 0.006, "k_max": 0.02, "n_bins": 4}}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        flat = build(write_config(merge_all(CAP, iso), name="flat.yaml"))
        curved = build(_curved(write_config, CAP, iso, {"engine": {"snapshot": True}}))
    d = {"b1": 2.0, "shot_noise": 1.0}
    a, b = flat.model_vector(d), curved.model_vector(d)
    p0 = np.abs(a[:4]).max()
    assert np.max(np.abs(a - b)) / p0 < 1e-3
    assert np.max(np.abs(a - b)) / p0 > 1e-6              # two different computations
    assert np.abs(a[4:]).max() > 1e-2 * p0                 # the cap makes a real quadrupole


def merge_all(*overs):
    from tests.conftest import merge
    out = {}
    for o in overs:
        out = merge(out, o)
    return out


def test_mask_in_cache_key_hash_and_run_folder(write_config, tmp_path):
    """The template cache key changes with the cap's f_sky and with the band-limit tolerance;
    a HEALPix map is hashed by content in the config hash (the same map under another name
    keeps the hash, an edited map changes it), gives the mode-count volume f_sky V_shell,
    and is refused without healpy in one line naming the extra."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = build(_curved(write_config, CAP))
        keys = {a.forward.cache_key(a.cosmo)}
        for over in ({"survey": {"geometry": {"fsky": 0.3}}},
                     {"engine": {"mask_tolerance": 1e-3}}):
            b = build(write_config(merge_all(CURVED, CAP, over), name="b.yaml"))
            keys.add(b.forward.cache_key(b.cosmo))
    assert len(keys) == 3
    hp = pytest.importorskip("healpy")
    nside = 8
    theta, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)))
    m = (np.cos(theta) > 0.5).astype(float)                 # Dec > +30 deg: f_sky = 0.25
    hp.write_map(str(tmp_path / "m1.fits"), m, dtype=np.float64)
    hp.write_map(str(tmp_path / "m2.fits"), m, dtype=np.float64)
    m[0] = 0.0
    hp.write_map(str(tmp_path / "m3.fits"), m, dtype=np.float64)
    hashes = [load_config(write_config(merge_all(CURVED, {"survey": {"geometry": {
        "mask": f"m{i}.fits"}}}), name=f"h{i}.yaml")).hash for i in (1, 2, 3)]
    assert hashes[0] == hashes[1] != hashes[2]
    from likelihood.model import factories
    srv = factories.survey(load_config(write_config(merge_all(CURVED, {"survey": {"geometry": {
        "mask": "m1.fits"}}}), name="h1.yaml")))
    f_pix = np.mean(hp.read_map(str(tmp_path / "m1.fits")))
    assert srv.volume == pytest.approx(f_pix * 4 * np.pi / 3 * (3140.0 ** 3 - 1950.0 ** 3),
                                       rel=1e-12)
    assert srv.window is None


def test_map_refused_without_healpy(write_config, tmp_path, monkeypatch):
    """Without healpy a config naming a map fails in one line naming the optional extra."""
    import builtins
    real = builtins.__import__

    def no_healpy(name, *args, **kw):
        if name == "healpy":
            raise ImportError("no healpy")
        return real(name, *args, **kw)
    (tmp_path / "m.fits").write_bytes(b"x")
    monkeypatch.setattr(builtins, "__import__", no_healpy)
    with pytest.raises(ConfigError) as exc:
        load_config(write_config(merge_all(CURVED, {"survey": {"geometry": {"mask": "m.fits"}}})))
    msg = str(exc.value)
    assert "ergofit[healpix]" in msg and "survey.geometry.mask" in msg and "\n" not in msg
