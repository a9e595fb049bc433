"""`ergofit run` with the windows of a curved-sky run that come from files: an n(z) table or a
random catalogue as the radial selection, the randoms' angular mask; and bad input refused by
the command line in one line with exit code 2, nothing written."""
import json
import os

import numpy as np
import pytest
import yaml

from likelihood.cli import main
from likelihood.config import load_config

from test_run_curved import CURVED_SMALL  # noqa: E402  (the curved run of the next file)

CURVED = dict(CURVED_SMALL, sampling=dict(CURVED_SMALL["sampling"], max_steps=600))


def combine(base, over):
    """``base`` with the mappings of ``over`` merged in (None values kept: they remove a key
    when write_config merges the result into the base config)."""
    out = dict(base)
    for key, val in over.items():
        out[key] = combine(out[key], val) if isinstance(val, dict) and isinstance(
            out.get(key), dict) else val
    return out


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", os.fspath(tmp_path / "cache"))


def assert_refused(path, tmp_path, capsys, *words):
    """`ergofit run` exits with code 2 and one line holding ``words`` (besides warnings, e.g.
    the linear-theory one above k = 0.1 h/Mpc); no output folder."""
    assert main(["run", path, "--out", str(tmp_path / "run")]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines()
           if "Warning: " not in line]
    assert len(err) == 1 and ": error: " in err[0] and all(w in err[0] for w in words), err
    assert not (tmp_path / "run").exists()


def write_table(path, rows, header="# columns: z nbar"):
    with open(path, "w") as fh:
        fh.write(header + "\n")
        for row in rows:
            fh.write(" ".join(f"{v!r}" for v in row) + "\n")


def nz_rows(z_lo=0.75, z_hi=1.65):
    """An invented n(z) (Gaussian in z about 1.2, peak 3e-4 (h/Mpc)³)."""
    z = np.linspace(z_lo, z_hi, 19)
    return np.column_stack([z, 3e-4 * np.exp(-0.5 * ((z - 1.2) / 0.35) ** 2)]).tolist()


def test_run_with_nz_table(write_config, tmp_path):
    """`ergofit run` with an n(z) table and FKP weights: a noiseless mock of that model with
    f_NL = 10 is recovered (posterior mean within 0.3 σ: a noiseless data vector peaks at the
    truth; common practice), the table is copied into inputs/ and the copied config keeps the
    config hash; editing the table changes the hash and the template cache key."""
    write_table(tmp_path / "nz.txt", nz_rows())
    path = write_config(dict(CURVED, survey={"geometry": {"selection": "nz.txt",
                                                          "fkp_p0": 1.0e4}}))
    out = tmp_path / "run"
    assert main(["run", path, "--out", str(out), "--quiet"]) == 0
    f = json.loads((out / "summary.json").read_text())["parameters"]["fnl"]
    assert abs(f["mean"] - 10.0) < 0.3 * f["std"]
    copied = yaml.safe_load((out / "config.yaml").read_text())
    assert copied["survey"]["geometry"]["selection"] == os.path.join("inputs", "nz.txt")
    assert load_config(str(out / "config.yaml")).hash == load_config(path).hash
    before = load_config(path).hash
    cached = sorted((tmp_path / "cache").rglob("curved-templates-*.npz"))
    write_table(tmp_path / "nz.txt", nz_rows()[:-1] + [[1.65, 1e-5]])
    assert load_config(path).hash != before
    assert main(["check", path]) == 0          # new templates, not the cached ones
    assert len(sorted((tmp_path / "cache").rglob("curved-templates-*.npz"))) == len(cached) + 1


def cap_shell_randoms(seed, n):
    """(positions, r, φ) of n randoms uniform in volume in the cap Dec > 30 deg (cos θ > 0.5)
    of the shell 1950–3140 Mpc/h."""
    rng = np.random.default_rng(seed)
    r = np.cbrt(rng.uniform(1950.0 ** 3, 3140.0 ** 3, n))
    mu = rng.uniform(0.5, 1.0, n)
    ph = rng.uniform(0, 2 * np.pi, n)
    s = np.sqrt(1 - mu ** 2)
    return r[:, None] * np.column_stack([s * np.cos(ph), s * np.sin(ph), mu]), r, ph


def test_run_with_randoms_window(write_config, tmp_path):
    """shape: randoms with the curved engine: 4000 randoms uniform in volume in the cap
    Dec > 30 deg of the shell 1950–3140 Mpc/h give the radial selection and the angular mask
    (nside 8); `ergofit check` describes both and `ergofit run` recovers f_NL = 10 from a
    noiseless mock within 0.3 σ."""
    pytest.importorskip("healpy")
    pos, _, _ = cap_shell_randoms(3, 4000)
    np.savez(tmp_path / "randoms.npz", positions=pos)
    geo = {"shape": "randoms", "randoms": "randoms.npz", "nside": 8,
           "r_min": None, "r_max": None}
    path = write_config(dict(CURVED, survey={"geometry": geo},
                             engine=dict(CURVED["engine"], mask_tolerance=0.05)))
    assert main(["check", path]) == 0
    out = tmp_path / "run"
    assert main(["run", path, "--out", str(out), "--quiet"]) == 0
    f = json.loads((out / "summary.json").read_text())["parameters"]["fnl"]
    assert abs(f["mean"] - 10.0) < 0.3 * f["std"]
    assert (out / "inputs" / "randoms.npz").stat().st_size > 0


BAD_TABLES = [
    ([], "is empty"),
    ([[0.7, 3e-4], [1.7, -1e-5]], "negative nbar"),
    ([[0.7, 3e-4], [1.7, float("nan")]], "NaN or inf"),
    ([[0.7, 0.0], [1.7, 0.0]], "zero everywhere"),
    ([[1.0, 3e-4], [1.3, 3e-4]], "needs z ="),
    ([[0.7, 3e-4, 1.0], [1.7, 3e-4, 1.0]], "expected 2")]


@pytest.mark.parametrize("rows, words", BAD_TABLES)
def test_bad_nz_table_exit_2(write_config, tmp_path, capsys, rows, words):
    """n(z) tables that are empty, negative, non-finite, all zero, not covering the survey's
    redshifts (the shell 1950–3140 Mpc/h is z = 0.80–1.52) or of the wrong shape: exit code 2,
    one line naming the file, no output folder."""
    write_table(tmp_path / "nz.txt", rows)
    path = write_config(dict(CURVED, survey={"geometry": {"selection": "nz.txt"}}))
    assert_refused(path, tmp_path, capsys, "nz.txt", words)


@pytest.mark.parametrize("values, words", [
    (-1.0, "finite mask values >= 0"), (np.nan, "finite mask values >= 0"),
    (0.0, "not all zero")])
def test_bad_mask_values_exit_2(write_config, tmp_path, capsys, values, words):
    """A HEALPix mask with a negative or non-finite pixel, or all zero: exit code 2, one line
    naming the map, nothing written."""
    hp = pytest.importorskip("healpy")
    m = np.zeros(hp.nside2npix(4)) if values == 0.0 else np.ones(hp.nside2npix(4))
    m[5] = values
    hp.write_map(str(tmp_path / "m.fits"), m, dtype=np.float64)
    path = write_config(dict(CURVED, survey={"geometry": {"mask": "m.fits"}}))
    assert_refused(path, tmp_path, capsys, "m.fits", words)


@pytest.mark.parametrize("over, words", [
    ({"survey": {"geometry": {"r_max": 9800.0}}}, "beyond the cosmology's horizon"),
    ({"data": {"mock": {"k_max": 0.4}}}, "beyond what the curved-sky engine resolves"),
    ({"survey": {"geometry": {"shape": "cap", "fsky": 0.3}}, "data": {"mock": {"k_max": 0.16}}},
     "GB per pair"),
    ({"engine": None, "effects": {"integral_constraint": "global"},
      "survey": {"geometry": {"fkp_p0": 1e4}}}, "curved_sky only"),
    ({"survey": {"geometry": {"fkp_p0": 1e4}}}, "need a radial selection"),
    ({"survey": {"geometry": {"shape": "randoms", "randoms": "empty.txt", "r_min": None,
                              "r_max": None}}}, "empty")])
def test_bad_window_exit_2(write_config, tmp_path, capsys, over, words):
    """A radial selection beyond the horizon (Planck 2018: 9605 Mpc/h), a k range the engine
    cannot resolve, a curved-only key with the plane-parallel engine, an empty random
    catalogue: exit code 2, one line, nothing written."""
    pytest.importorskip("healpy")
    (tmp_path / "empty.txt").write_text("# columns: x y z\n")
    cfg = combine(CURVED, over)
    assert_refused(write_config(cfg), tmp_path, capsys, words)


def test_non_separable_randoms_warn(write_config, tmp_path, capsys):
    """Randoms whose depth differs across the sky (φ < π: shell 1950–3140 Mpc/h; φ > π: only
    its near half) are not w(r) M(n̂): `ergofit check` uses the separable approximation with
    a SeparabilityWarning giving the measured size (Pearson's χ² test of independence, Pearson
    1900; rms contingency, Pearson 1904)."""
    pytest.importorskip("healpy")
    pos, r, ph = cap_shell_randoms(8, 6000)
    np.savez(tmp_path / "randoms.npz", positions=pos[(ph < np.pi) | (r < 2600.0)])
    geo = {"shape": "randoms", "randoms": "randoms.npz", "nside": 8, "r_min": None,
           "r_max": None}
    path = write_config(dict(CURVED, survey={"geometry": geo},
                             engine=dict(CURVED["engine"], mask_tolerance=0.05)))
    assert main(["check", path]) == 0
    err = capsys.readouterr().err
    assert "SeparabilityWarning" in err and "rms departure" in err


@pytest.mark.parametrize("command", ["theory", "forecast"])
def test_plane_parallel_comparison_refused_with_selection(write_config, tmp_path, capsys,
                                                          command):
    """`ergofit theory` and the forecast's neglected plane-parallel approximation compare with
    a plane-parallel model, which has no n(z) window: refused in one line (exit 2), no file
    written, rather than a comparison that silently changes the window too. (`ergofit
    forecast` creates its output folder before it builds the models: an empty folder.)"""
    write_table(tmp_path / "nz.txt", nz_rows())
    path = write_config(dict(CURVED, survey={"geometry": {"selection": "nz.txt"}},
                             forecast={"neglect": ["plane_parallel"]}))
    assert main([command, path, "--out", str(tmp_path / "out")]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines()
           if "Warning: " not in line]
    assert len(err) == 1 and "survey.geometry.selection" in err[0], err
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


@pytest.mark.parametrize("name", ["demo_curved_nz.yaml", "demo_curved_randoms.yaml"])
def test_demo_configs_validate(name):
    """The demos of the radial selection and of the randoms' window validate and name input
    files that exist (their full runs: README, measured figures). The randoms' mask needs the
    optional healpy."""
    if name == "demo_curved_randoms.yaml":
        pytest.importorskip("healpy")
    root = os.path.join(os.path.dirname(__file__), os.pardir, os.pardir, "configs")
    cfg = load_config(os.path.join(root, name))
    assert cfg["engine"]["kind"] == "curved_sky"
    geo = cfg["survey"]["geometry"]
    assert os.path.isfile(cfg.resolve(geo.get("selection", geo.get("randoms", ""))))
