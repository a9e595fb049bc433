"""The command line end to end: check, theory, simulate, and bad input (exit code 2, one line)."""
import json
import os
import subprocess
import sys

import numpy as np
import pytest

from likelihood.cli import main


def test_check_prints_model(write_config, capsys):
    assert main(["check", write_config()]) == 0
    out = capsys.readouterr().out
    assert "config OK" in out and "fnl" in out and "24 points" in out


@pytest.mark.parametrize("over,needle", [
    ({"survey": {"redshfit": 1.0}}, "did you mean 'redshift'"),
    ({"parameters": {"b1": {"flat": [2.0, 1.0]}}}, "lower must be below upper"),
    ({"parameters": {"b1": {"flat": [0.5, 1.0], "start": 3.0}}}, "outside its prior"),
    ({"data": {"file": "missing.txt", "mock": None}}, "not found"),
    ({"survey": {"nbar": -1.0}}, "survey.nbar: must be > 0"),
    ({"effects": {"rsd": "yes"}}, "expected true or false"),
])
def test_bad_config_exit_2_one_line(write_config, capsys, over, needle):
    assert main(["check", write_config(over)]) == 2
    err = capsys.readouterr().err.strip()
    assert needle in err and len(err.splitlines()) == 1


def test_bad_yaml_and_missing_file(tmp_path, capsys):
    p = tmp_path / "broken.yaml"
    p.write_text("survey: [1, 2\n")
    assert main(["check", str(p)]) == 2
    assert "not valid YAML" in capsys.readouterr().err
    assert main(["check", str(tmp_path / "nope.yaml")]) == 2
    assert "config file not found" in capsys.readouterr().err


def test_theory_writes_table_and_plot(write_config, tmp_path, capsys):
    out = tmp_path / "th" / "theory.txt"
    assert main(["theory", write_config(), "--out", str(out.parent)]) == 0
    text = capsys.readouterr().out
    assert "effective f_NL" in text
    table = np.loadtxt(out)
    assert table.shape[1] == 1 + 3 * 3 and np.all(np.isfinite(table))
    assert (tmp_path / "th" / "theory.png").stat().st_size > 10000
    # adding f_NL > 0 with b1 > p raises the large-scale monopole (Dalal et al. 2008 sign)
    assert main(["theory", write_config({"tracer": {"fnl": 20.0}}, "f.yaml"), "--out", str(out.parent)]) == 0
    t2 = np.loadtxt(out)
    assert t2[0, 4] > t2[0, 1]


SMALL_SURVEY = {"survey": {"redshift": 1.0, "geometry": {"shape": "sphere", "radius": 500.0,
                                                         "r_min": None, "r_max": None}},
                "data": {"mock": {"k_min": 0.012, "k_max": 0.08, "n_bins": 6}}}


def test_simulate_validate_is_a_real_test(tmp_path, write_config, capsys):
    """--validate compares the mocks with the model they were made from, using their own scatter
    (Hotelling's T², Hotelling 1931): it passes on mocks of the model and fails (p tiny) on
    mocks made with another b1 (issue 15, item 4). 30 mocks for 12 data points, of the continuous
    field (--no-poisson: the Hotelling test itself, without shot noise or clipping)."""
    from likelihood.config.schema import load_config
    from likelihood.data import DataVector
    from likelihood.simulate.survey import choose_mesh, validation_model
    from likelihood.simulate.validation import validate
    from likelihood.model import build

    cfg = write_config(SMALL_SURVEY)
    out = tmp_path / "mocks"
    assert main(["simulate", cfg, "--n", "30", "--out", str(out), "--validate", "--no-poisson"]) == 0
    assert len(list(out.glob("mock_*.txt"))) == 30
    assert (out / "covariance.txt").exists() and (out / "validation.png").exists()
    text = capsys.readouterr().out
    assert "using the scatter of the 30 mocks" in text and "no shot noise" in text
    res = json.loads((out / "validation.json").read_text())
    assert res["n_mocks"] == 30 and res["dof_total"] == 12
    assert res["p_value_total"] > 1e-3, res
    # the model has no noise term: noise-free mocks are compared with noise-free theory
    lik = build(load_config(cfg))
    mesh = choose_mesh(lik)
    model, vlik, k_ir = validation_model(load_config(cfg), mesh, poisson=False)
    assert k_ir == pytest.approx(2 * np.pi / mesh.box, rel=1e-12)
    assert vlik.sn_sub == 0.0
    # mocks of another model (b1 = 2.4 instead of 2.0) fail the same validation
    other = write_config(dict(SMALL_SURVEY, tracer={"b1": 2.4}), "other.yaml")
    out2 = tmp_path / "other"
    assert main(["simulate", other, "--n", "30", "--out", str(out2), "--no-poisson"]) == 0
    mocks = [DataVector.load(f) for f in sorted(out2.glob("mock_*.txt"))]
    bad = validate(mocks, model)
    assert bad["p_value_total"] < 1e-6, bad


def test_simulate_poisson_by_default(tmp_path, write_config, capsys):
    """Default mocks are Poisson sampled (n̄ = 3e-4): their monopole keeps the model's mean (1/n̄
    subtracted as data.shot_noise_subtracted: true; the ~4 % of cells with 1 + Δ < 0 clipped
    after the first-order gain of likelihood.simulate.fields.clip_gain, Price 1958) and their
    variance exceeds that of the same fields without noise by about (1 + 1/(n̄ P_0))² =
    1.15–1.23 in these bins (FKP 1994; n̄P_0 = 9–14 here)."""
    from likelihood.data import DataVector

    small = dict(SMALL_SURVEY, data={"mock": {"k_min": 0.012, "k_max": 0.05, "n_bins": 6}})
    cfg = write_config(small)
    out, out_g = tmp_path / "poisson", tmp_path / "gauss"
    assert main(["simulate", cfg, "--n", "30", "--out", str(out), "--validate"]) == 0
    text = capsys.readouterr().out
    assert "Poisson sampled with n̄ = 0.0003" in text and "shot noise as in the mocks" in text
    res = json.loads((out / "validation.json").read_text())
    assert res["p_value"]["0"] > 1e-3, res
    assert main(["simulate", cfg, "--n", "30", "--out", str(out_g), "--no-poisson"]) == 0
    p0 = np.array([DataVector.load(f).values[0] for f in sorted(out.glob("mock_*.txt"))])
    g0 = np.array([DataVector.load(f).values[0] for f in sorted(out_g.glob("mock_*.txt"))])
    ratio = p0.var(0, ddof=1) / g0.var(0, ddof=1)
    assert 1.08 < ratio.mean() < 1.35, ratio
    assert abs(p0.mean() / g0.mean() - 1) < 0.02        # the clipping does not bias the power


def test_simulate_validate_says_when_too_few_mocks(tmp_path, write_config, capsys):
    out = tmp_path / "few"
    assert main(["simulate", write_config(SMALL_SURVEY), "--n", "4", "--out", str(out),
                 "--validate"]) == 0
    text = capsys.readouterr().out
    assert "validation: no test possible: 4 mocks" in text and "--n 13" in text
    assert "covariance.kind: mocks needs more than n_data + 2" in text
    assert not (out / "validation.json").exists()


def test_console_script_entry_point(write_config):
    """`python -m likelihood.cli` behaves like the installed `ergofit` script."""
    r = subprocess.run([sys.executable, "-m", "likelihood.cli", "check",
                        write_config({"survey": {"redshift": -1.0}})],
                       capture_output=True, text=True, cwd=os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "redshift" in r.stderr


def test_window_command_from_randoms(tmp_path, capsys):
    """`ergofit window`: Q_0 of a uniform sphere from randoms against the two-sphere overlap
    fraction 1 − 3s/(4R) + s³/(16R³) (classical geometry)."""
    rng = np.random.default_rng(2)
    R = 400.0
    x = rng.uniform(-1, 1, (60000, 3))
    x = x[(x ** 2).sum(1) < 1][:6000] * R
    rfile = tmp_path / "randoms.txt"
    np.savetxt(rfile, x, header="columns: x y z", comments="# ")
    out = tmp_path / "win" / "window.txt"
    assert main(["window", str(rfile), "--out", str(out.parent)]) == 0
    from likelihood.observation.window import WindowMultipoles
    wm = WindowMultipoles.load(out)
    s = np.array([100.0, 300.0, 500.0])
    ref = 1 - 3 * s / (4 * R) + s ** 3 / (16 * R ** 3)
    np.testing.assert_allclose(wm(s, 0), ref, atol=0.03)
    assert (tmp_path / "win" / "window.png").exists()
    bad = tmp_path / "bad.txt"
    bad.write_text("# columns: x y z\n1 2 nan\n")
    assert main(["window", str(bad), "--out", str(out.parent)]) == 2
    assert "bad.txt" in capsys.readouterr().err


def test_help_version_and_examples(capsys):
    """Every sub-command's help has an example; --version prints the version (issue 15, item 17)."""
    import likelihood
    from likelihood.cli import make_parser
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0 and likelihood.__version__ in capsys.readouterr().out
    for cmd in ("run", "summarize", "forecast", "simulate", "window", "theory", "check"):
        with pytest.raises(SystemExit):
            make_parser().parse_args([cmd, "--help"])
        text = capsys.readouterr().out
        assert "example:" in text and f"ergofit {cmd}" in text, cmd
    for bad in (["run", "c.yaml", "--processes", "-3"], ["theory", "c.yaml", "--fnl", "1e300"]):
        with pytest.raises(SystemExit) as exc:
            main(bad)
        assert exc.value.code == 2 and "expected" in capsys.readouterr().err


def test_theory_of_several_tracers(write_config, tmp_path, capsys):
    """`ergofit theory` on a config with tracers: one tracer gives the single-tracer table's
    numbers (same kernel); the Newtonian cross monopole of two tracers is
    [b_A b_B + f (b_A + b_B)/3 + f²/5] P(k) (Kaiser 1987 RSD averaged over μ for two biases:
    common practice) and its Newtonian dipole vanishes."""
    from likelihood.config.schema import load_config
    from likelihood.model import factories
    single = write_config({"tracer": {"b1": 2.0, "fnl": 5.0, "b_e": 1.0, "s": 0.3},
                           "effects": {"observer": False}}, "single.yaml")
    raw = load_config(single).raw
    multi = {k: v for k, v in raw.items() if k not in ("tracer", "data", "covariance", "parameters")}
    multi["survey"] = {k: v for k, v in raw["survey"].items() if k != "nbar"}
    multi.update(tracers=[{"name": "g", "nbar": raw["survey"]["nbar"], "b1": 2.0, "b_e": 1.0, "s": 0.3},
                          {"name": "h", "nbar": 1e-4, "b1": 1.2}],
                 spectra=[{"pair": ["g", "g"], "ells": [0, 2]}, {"pair": ["g", "h"], "ells": [0, 1, 2]},
                          {"pair": ["h", "h"], "ells": [0, 2]}],
                 data={"mock": {"k_min": 0.005, "k_max": 0.05, "n_bins": 5}},
                 parameters={"fnl": {"flat": [-100, 100], "start": 5.0}, "b1_g": {"flat": [0.5, 5]}})
    import yaml
    mpath = tmp_path / "multi.yaml"
    mpath.write_text(yaml.safe_dump(multi))
    assert main(["theory", single, "--out", str(tmp_path / "one"), "--fnl", "5"]) == 0
    assert main(["theory", str(mpath), "--out", str(tmp_path / "two"), "--fnl", "5"]) == 0
    text = capsys.readouterr().out
    assert "Pi1 (Doppler dipole)" in text and (tmp_path / "two" / "theory_g_h.png").exists()
    one = np.loadtxt(tmp_path / "one" / "theory.txt")
    two = np.loadtxt(tmp_path / "two" / "theory.txt")
    np.testing.assert_allclose(two[:, :10], one, rtol=1e-12)
    k = two[:, 0]
    cfg = load_config(str(mpath))
    cosmo, z = factories.cosmology(cfg), cfg["survey"]["redshift"]
    f = cosmo.growth_rate(z)
    kaiser = (2.0 * 1.2 + f * (2.0 + 1.2) / 3 + f ** 2 / 5) * cosmo.power(k, z)
    np.testing.assert_allclose(two[:, 10], kaiser, rtol=1e-6)       # g x h newtonian P0
    # columns 10-24: g x h newtonian, + f_NL, + projection, each P0..P4 (Π1, Π3 for odd ℓ)
    assert np.all(two[:, 11] == 0) and np.all(two[:, 21] != 0)   # Π1: 0 Newtonian, ≠ 0 with Doppler
