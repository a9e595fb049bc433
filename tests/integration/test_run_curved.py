"""`ergofit run` end to end with the curved-sky engine (engine.kind: curved_sky): injection and
recovery on a noiseless mock of the curved model, and a bad curved config refused by the
command line with exit code 2 and one line."""
import json
import os

import pytest

from likelihood.cli import main

CURVED_SMALL = {
    "engine": {"kind": "curved_sky", "resolution": {"k_nodes": 2, "q_range": 1.5}},
    "effects": {"integral_constraint": "radial", "lensing": False, "isw": False,
                "time_delay": False},
    "data": {"mock": {"noise": False, "truth": {"fnl": 10.0}, "k_min": 0.004, "k_max": 0.02,
                      "n_bins": 4}},
    "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.01},
                   "fnl": {"flat": [-200.0, 200.0], "start": 8.0, "scale": 1.0}},
    "sampling": {"walkers": 16, "max_steps": 1500, "check_every": 100, "seed": 4,
                 "progress": False}}


@pytest.fixture(autouse=True)
def _cache_in_tmp(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CACHE_HOME", os.fspath(tmp_path / "cache"))


def test_curved_run_recovers_injected_fnl(write_config, tmp_path):
    """A noiseless mock of the curved-sky model with f_NL = 10 (radial integral constraint):
    the posterior mean lies within 0.2 σ of 10 (a noiseless data vector has its likelihood
    peak at the truth; common practice), and the run writes every output."""
    out = tmp_path / "run"
    assert main(["run", write_config(CURVED_SMALL), "--out", str(out), "--quiet"]) == 0
    summ = json.loads((out / "summary.json").read_text())
    f = summ["parameters"]["fnl"]
    assert abs(f["mean"] - 10.0) < 0.2 * f["std"]
    assert summ["chi2"] < 0.01          # best sample of the chain, next to the truth
    for name in ("chain.h5", "constraints.md", "triangle.png", "multipoles.png", "config.yaml"):
        assert (out / name).stat().st_size > 0
    assert main(["summarize", str(out)]) == 0


def test_curved_config_refused_in_one_line(write_config, tmp_path, capsys):
    bad = dict(CURVED_SMALL, survey={"geometry": {"shape": "sphere", "radius": 3000.0,
                                                  "r_min": None, "r_max": None}})
    bad_path = write_config(bad)
    assert main(["check", bad_path]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "survey.geometry.shape" in err[0]
    assert not (tmp_path / "out").exists()


LIGHT_CONE_SMALL = dict(CURVED_SMALL, survey={"redshift": 0.1, "nbar": 1e-3,
                                               "geometry": {"r_min": 150.0, "r_max": 450.0}},
                        data={"mock": {"k_min": 0.006, "k_max": 0.03, "n_bins": 4}})


def test_simulate_light_cone_validates_against_curved_model(write_config, tmp_path, capsys):
    """`ergofit simulate --validate` on a curved-sky config (not snapshot) makes light-cone
    mocks (growth, f and the projection coefficients at each cell's distance; the radial
    integral constraint of the config: each distance's mean removed from each mock) and
    compares them with the curved-sky model without the integrated terms (the mocks have
    none): Hotelling's test passes (30 mocks of the continuous field); the same mocks fail
    against the model of b1 = 2.4 instead of 2.0; and the snapshot config's mocks (same seed)
    differ from them."""
    import numpy as np

    from likelihood.config.schema import load_config
    from likelihood.data import DataVector
    from likelihood.simulate.survey import validation_model
    from likelihood.simulate.validation import validate

    path = write_config(LIGHT_CONE_SMALL)
    out = tmp_path / "m"
    assert main(["simulate", path, "--n", "30", "--validate", "--no-poisson",
                 "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "light cone" in text and "radial mean subtraction" in text
    res = json.loads((out / "validation.json").read_text())
    assert res["n_mocks"] == 30 and res["p_value_total"] > 1e-3, res
    mocks = [DataVector.load(f) for f in sorted(out.glob("mock_*.txt"))]
    other = load_config(write_config(dict(LIGHT_CONE_SMALL, tracer={"b1": 2.4}), "b.yaml"))
    from likelihood.simulate.survey import choose_mesh
    from likelihood.model import build
    mesh = choose_mesh(build(other))
    assert validate(mocks, validation_model(other, mesh, poisson=False)[0])["p_value_total"] < 1e-6
    snap = write_config(dict(LIGHT_CONE_SMALL, engine=dict(CURVED_SMALL["engine"], snapshot=True)),
                        "snap.yaml")
    assert main(["simulate", snap, "--n", "2", "--no-poisson", "--out", str(tmp_path / "s")]) == 0
    first = DataVector.load(str(tmp_path / "s" / "mock_0000.txt"))
    assert np.max(np.abs(first.values / mocks[0].values - 1)) > 1e-3


def test_curved_run_with_healpix_mask(write_config, tmp_path):
    """`ergofit run` and `ergofit check` with a HEALPix mask (nside 8, the northern cap
    Dec > +30 deg): a noiseless mock of the masked model with f_NL = 10 is recovered (posterior
    mean within 0.3 σ; common practice), the map is copied into the run folder's inputs/ and the
    copied config keeps the config hash (file contents hashed, not paths)."""
    hp = pytest.importorskip("healpy")
    import numpy as np
    import yaml

    from likelihood.config import load_config
    nside = 8
    theta, _ = hp.pix2ang(nside, np.arange(hp.nside2npix(nside)))
    hp.write_map(str(tmp_path / "north.fits"), (np.cos(theta) > 0.5).astype(float),
                 dtype=np.float64)
    over = dict(CURVED_SMALL, survey={"geometry": {"mask": "north.fits"}},
                sampling=dict(CURVED_SMALL["sampling"], max_steps=600))
    path = write_config(over)
    assert main(["check", path]) == 0
    out = tmp_path / "run"
    assert main(["run", path, "--out", str(out), "--quiet"]) == 0
    summ = json.loads((out / "summary.json").read_text())
    f = summ["parameters"]["fnl"]
    assert abs(f["mean"] - 10.0) < 0.3 * f["std"]
    copied = yaml.safe_load((out / "config.yaml").read_text())
    assert copied["survey"]["geometry"]["mask"] == os.path.join("inputs", "north.fits")
    assert (out / "inputs" / "north.fits").stat().st_size > 0
    assert load_config(str(out / "config.yaml")).hash == load_config(path).hash
    for cmd in ("simulate", "theory"):       # not meshed; no plane-parallel window to compare
        extra = ["--n", "2"] if cmd == "simulate" else []
        assert main([cmd, path, *extra, "--out", str(tmp_path / cmd)]) == 2
        assert not (tmp_path / cmd).exists()


@pytest.mark.parametrize("content, words", [(b"not a map", "not a readable HEALPix FITS map"),
                                            (None, "not found")])
def test_bad_mask_file_exit_2(write_config, tmp_path, capsys, content, words):
    """A mask file that is not a HEALPix map, or missing: exit code 2, one line naming it."""
    pytest.importorskip("healpy")
    if content is not None:
        (tmp_path / "bad.fits").write_bytes(content)
    path = write_config(dict(CURVED_SMALL, survey={"geometry": {"mask": "bad.fits"}}))
    assert main(["check", path]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bad.fits" in err[0] and words in err[0]
