"""Misuse: malformed inputs end with exit code 2, one line naming the key and what is expected,
and nothing written (issue 15). Table-driven: (change to the demo config, sub-command, words of
the message). The demo config is the shipped configs/demo.yaml with its data files."""
import copy
import os
import shutil

import numpy as np
import pytest
import yaml

from likelihood.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEMO = os.path.join(ROOT, "configs")
with open(os.path.join(DEMO, "demo.yaml")) as fh:
    BASE = yaml.safe_load(fh)


def _set(path, value):
    def change(cfg):
        d = cfg
        for key in path[:-1]:
            d = d.setdefault(key, {})
        if value is _DROP:
            d.pop(path[-1], None)
        else:
            d[path[-1]] = value
    return change


_DROP = object()

CASES = [
    # (id, change, command, words expected in the message)
    ("huge-seed", _set(["sampling", "seed"], 1208925819614629174706176), "run", "sampling.seed"),
    ("r_max-huge", _set(["survey", "geometry", "r_max"], 1.0e30), "check", "survey.geometry.r_max"),
    ("r_max-1e5", _set(["survey", "geometry", "r_max"], 1.0e5), "run", "must be <= 10000"),
    ("radius-1e6", _set(["survey", "geometry"], {"shape": "sphere", "radius": 1e6}), "check",
     "survey.geometry.radius"),
    ("box-volume", _set(["survey", "geometry"], {"shape": "box", "volume": 1e20}), "check",
     "survey.geometry.volume"),
    ("run-escape", _set(["run"], "../../escaped"), "run", "plain name"),
    ("run-absolute", _set(["run"], "/abs/dir"), "run", "plain name"),
    ("run-empty", _set(["run"], None), "run", "plain name"),
    ("walkers-odd", _set(["sampling", "walkers"], 33), "run", "sampling.walkers"),
    ("walkers-few", _set(["sampling", "walkers"], 3), "run", "sampling.walkers"),
    ("fixed-nan", _set(["parameters", "shot_noise"], float("nan")), "check",
     "parameters.shot_noise: expected a finite fixed value"),
    ("fixed-nan-mapping", _set(["parameters", "shot_noise"], {"fixed": float("nan")}), "check",
     "parameters.shot_noise.fixed"),
    ("gauss-inf", _set(["parameters", "fnl"], {"gauss": [0, float("inf")]}), "check",
     "parameters.fnl.gauss: expected two finite numbers"),
    ("tracer-b_e-inf", _set(["tracer", "b_e"], float("inf")), "check", "tracer.b_e"),
    ("mock-bins", _set(["data"], {"mock": {"n_bins": 10**7}, "ells": [0, 2]}), "check",
     "data.mock.n_bins"),
    ("max-steps", _set(["sampling", "max_steps"], 10**12), "run", "sampling.max_steps"),
    # old spellings of renamed parameters (issue 15, item 20): one line naming the new name
    ("old-omega_cdm", _set(["cosmology", "overrides"], {"omega_cdm": 0.12}), "check",
     "cosmology.overrides: unknown key 'omega_cdm' (renamed: write 'omega_c'"),
    ("old-ln10As", _set(["parameters", "ln10As"], {"flat": [2.5, 3.5]}), "check",
     "unknown parameter 'ln10As' (renamed: write 'ln_1e10_As'"),
    ("analytic-one-tracer", _set(["parameters", "shot_noise"], {"flat": [0, 3], "analytic": True}),
     "check", "analytic marginalisation needs the tracers section"),
    ("old-truth-omega_cdm", _set(["data"], {"mock": {"truth": {"omega_cdm": 0.13}}, "ells": [0, 2]}),
     "check", "data.mock.truth: unknown parameter 'omega_cdm' (renamed: write 'omega_c'"),
    # a precomputed window table (issue 15, item 19)
    ("window-file-missing", _set(["survey", "geometry"], {"shape": "window", "file": "nope.txt"}),
     "check", "survey.geometry.file"),
    ("window-with-observer", _set(["survey", "geometry"], {"shape": "window", "file": "demo_data.txt"}),
     "check", "effects.observer needs an analytic geometry"),
    ("window-not-a-table", lambda c: (_set(["survey", "geometry"], {"shape": "window",
                                                                    "file": "demo_data.txt"})(c),
                                      _set(["effects", "observer"], False)(c),
                                      c["parameters"].pop("nu_obs")),
     "run", "not a window multipole table"),
]


@pytest.fixture
def demo_copy(tmp_path):
    for name in ("demo_data.txt", "demo_cov.txt"):
        shutil.copy(os.path.join(DEMO, name), tmp_path / name)
    return tmp_path


def _write(folder, cfg, name="c.yaml"):
    path = folder / name
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return str(path)


def _check_refused(base, case, folder, capsys, monkeypatch):
    """Apply the case's change to ``base``, run the command in ``folder``: exit code 2, one line
    with the expected words, nothing written."""
    _, change, command, words = case
    cfg = copy.deepcopy(base)
    change(cfg)
    monkeypatch.chdir(folder)
    before = sorted(os.listdir(folder))
    path = _write(folder, cfg)
    cmd, *options = command.split()
    code = main([cmd, path, *options])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len([l for l in err if "error:" in l]) == 1 and words in err[-1], err
    assert sorted(os.listdir(folder)) == sorted(before + ["c.yaml"])   # nothing written


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_malformed_input_exits_2_with_one_line(case, demo_copy, capsys, monkeypatch):
    _check_refused(BASE, case, demo_copy, capsys, monkeypatch)


def test_duplicate_yaml_key_refused(demo_copy, capsys):
    text = (open(os.path.join(DEMO, "demo.yaml")).read()
            + "\nsampling: {walkers: 16}\n")            # a second top-level 'sampling'
    path = demo_copy / "dup.yaml"
    path.write_text(text)
    assert main(["check", str(path)]) == 2
    assert "key 'sampling' is given twice" in capsys.readouterr().err


def test_log_prob_never_nan_and_checks_shape():
    """log_prob/log_likelihood return -inf, never NaN, for overflowing or non-finite values;
    a theta of the wrong length is one clear error (issue 15, item 12)."""
    import warnings
    import likelihood
    from likelihood.errors import ErgofitError
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = likelihood.build(os.path.join(DEMO, "demo.yaml"))
    for p in ({"b1": 1e154}, {"nu_obs": 1e80}, {"fnl": float("nan")}):
        assert lik.log_likelihood(p) == -np.inf
    one = np.array([1.8, 0.0, 1.0, 1.0])
    assert np.isfinite(lik.log_prob(one)) and lik.log_prob(one) == lik.log_prob(one[None])[0]
    bad = np.array([[1.8, np.inf, 1.0, 1.0], [1.8, np.nan, 1.0, 1.0], [1e300, 0, 1, 1]])
    assert np.all(lik.log_prob(bad) == -np.inf)
    with pytest.raises(ErgofitError, match=r"theta of shape \(3,\)"):
        lik.log_prob(one[:3])


SMALL = {"run": "small", "survey": {"redshift": 1.0, "nbar": 3.0e-4,
                                    "geometry": {"shape": "sphere", "radius": 500.0}},
         "tracer": {"b1": 2.0, "fnl": 0.0, "b_e": 0.5, "s": 0.2},
         "effects": {"observer": False},
         "data": {"mock": {"seed": 3, "k_min": 0.012, "k_max": 0.08, "n_bins": 6}, "ells": [0, 2]},
         "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.02}}}


def test_mock_covariance_workflow_as_documented(tmp_path, capsys, monkeypatch):
    """The README workflow (issue 15, item 3): `ergofit simulate CONFIG --n N` writes
    mock_0000.txt ... and covariance.txt into <output folder>/mocks; a config with
    covariance: {kind: mocks, mocks: .../mock_*.txt} then builds. Too few mocks (n_mocks <= n_data
    + 2, Hartlap, Simon & Schneider 2007) is one line with the number needed and exit 2; the
    looser glob *.txt skips the covariance file by its header. Small mesh: a 500 Mpc/h sphere."""
    import likelihood
    monkeypatch.chdir(tmp_path)
    _write(tmp_path, SMALL, "small.yaml")
    assert main(["simulate", "small.yaml", "--n", "14"]) == 0
    folder = tmp_path / "chains" / "small" / "mocks"
    assert len(list(folder.glob("mock_*.txt"))) == 14 and (folder / "covariance.txt").exists()
    for glob_ in ("../chains/small/mocks/mock_*.txt", "../chains/small/mocks/*.txt"):
        cfg = copy.deepcopy(SMALL)
        cfg["run"] = "small-mockcov"
        cfg["covariance"] = {"kind": "mocks", "mocks": glob_}
        (tmp_path / "cfgs").mkdir(exist_ok=True)
        path = _write(tmp_path / "cfgs", cfg, "mockcov.yaml")
        capsys.readouterr()
        assert main(["check", path]) == 2          # 14 mocks for 12 data points
        err = capsys.readouterr().err.strip().splitlines()
        assert len([l for l in err if "error:" in l]) == 1, err
        assert "14 mocks for 12 data points" in err[-1] and "more than n_data + 2 = 14" in err[-1] \
            and "--n 15" in err[-1] and glob_ in err[-1], err
    assert main(["simulate", "small.yaml", "--n", "20"]) == 0     # the fix the message names
    assert main(["check", path]) == 0
    lik = likelihood.build(path)
    assert lik.n_mocks == 20                          # covariance.txt not counted as a mock
    assert lik.precision_scale == pytest.approx((20 - 12 - 2) / (20 - 1), rel=1e-12)


# --- several tracers: the two-tracer demo config (configs/multi_demo.yaml) with its data files ---
with open(os.path.join(DEMO, "multi_demo.yaml")) as fh:
    MULTI = yaml.safe_load(fh)


def _spectrum(i, key, value):
    def change(cfg):
        cfg["spectra"][i][key] = value
    return change


def _rename_tracer(cfg):
    cfg["tracers"][1]["name"] = "dim"
    for s in cfg["spectra"]:
        s["pair"] = ["dim" if t == "faint" else t for t in s["pair"]]
    for key in list(cfg["parameters"]):
        if key.endswith("_faint"):
            cfg["parameters"][key.replace("_faint", "_dim")] = cfg["parameters"].pop(key)


def _drop_auto(cfg):
    cfg["spectra"] = cfg["spectra"][:2]
    cfg["covariance"] = {"kind": "gaussian"}


def _as_samples(second_name, second_tracers):
    """The two-tracer demo as sample 'north' plus a copy 'second_name' whose tracers are renamed
    by ``second_tracers`` (a dict old -> new)."""
    def change(cfg):
        keys = ("survey", "tracers", "spectra", "data", "covariance")
        one = {k: cfg.pop(k) for k in keys}
        two = copy.deepcopy(one)
        for t in two["tracers"]:
            t["name"] = second_tracers.get(t["name"], t["name"])
        for sp in two["spectra"]:
            sp["pair"] = [second_tracers.get(x, x) for x in sp["pair"]]
        cfg["samples"] = [dict(name="north", **one), dict(name=second_name, **two)]
    return change


def _south_mock(cfg):
    """The second sample of :func:`_as_samples` on its own mock data (its tracers differ from
    those of the demo's data file)."""
    cfg["samples"][1].update(data={"mock": {"k_min": 0.004, "k_max": 0.05, "n_bins": 8}},
                             covariance={"kind": "gaussian"})


MULTI_CASES = [
    ("unknown-tracer", _spectrum(1, "pair", ["bright", "faynt"]), "check",
     "spectra[1].pair: unknown tracer 'faynt' (did you mean 'faint'?)"),
    ("odd-ell-auto", _spectrum(0, "ells", [0, 1, 2]), "check",
     "spectra[0].ells: odd multipoles [1] in an auto spectrum"),
    ("same-name", lambda c: c["tracers"][1].update(name="bright"), "check",
     "tracers: two tracers are named 'bright'"),
    ("header-tracers", _rename_tracer, "check",
     "the config's tracers ['dim'] are not in the file (its tracers: ['bright', 'faint'])"),
    ("header-ells", _spectrum(1, "ells", [0, 1, 2, 3, 4]), "check",
     "spectrum bright x faint: the config asks for ells [4]"),
    ("header-order", _spectrum(1, "pair", ["faint", "bright"]), "check",
     "write the config pair in that order, [bright, faint]"),
    ("cross-without-auto", _drop_auto, "check", "cross spectrum bright x faint without the auto "
     "spectrum of faint"),
    ("spectrum-twice", lambda c: c["spectra"].append({"pair": ["faint", "bright"]}), "check",
     "spectrum faint x bright is listed twice"),
    ("tracer-and-tracers", lambda c: c.update(tracer={"b1": 2.0}), "check",
     "tracer: not allowed together with tracers"),
    ("per-tracer-typo", lambda c: c["parameters"].update(b1_brite={"flat": [0, 3]}), "check",
     "unknown parameter 'b1_brite' (did you mean 'b1_bright'?)"),
    ("name-underscore", lambda c: c["tracers"][0].update(name="very_bright"), "check",
     "tracers[0].name: expected a letter then letters/digits"),
    ("nbar-negative", lambda c: c["tracers"][0].update(nbar=-1), "check",
     "tracers[0].nbar = -1: expected a positive number"),
    ("cov-mocks-none", lambda c: c.update(covariance={"kind": "mocks", "mocks": "m_*.txt"}), "check",
     "m_*.txt: found 0 mock data-vector files; need at least 2"),
    # the second sample cannot be simulated: nothing is written for the first one either
    ("simulate-samples-shared-noise", lambda c: (_as_samples("south", {"bright": "b2", "faint": "f2"})(c),
                                                 _south_mock(c),
                                                 c["samples"][1]["spectra"][1].update(shared_nbar=2e-5)),
     "simulate", "(samples[1] south): spectra b2 x f2: shared_nbar (overlapping populations) cannot "
     "be simulated"),
    ("simulate-shared-noise", _spectrum(1, "shared_nbar", 2e-5), "simulate",
     "shared_nbar (overlapping populations) cannot be simulated"),
    ("samples-header", _as_samples("south", {"bright": "b2", "faint": "f2"}), "check",
     "sample south: multi_demo_data.txt: the config's tracers ['b2', 'f2'] are not in the file"),
    ("samples-same-name", _as_samples("north", {"bright": "brightS", "faint": "faintS"}), "check",
     "samples: two samples are named 'north'"),
    ("samples-same-tracer", _as_samples("south", {"bright": "brightS"}), "check",
     "tracer 'faint' is also in sample 'north'"),
    ("samples-top-survey", lambda c: (_as_samples("south", {"bright": "b2", "faint": "f2"})(c),
                                      c.update(survey={"redshift": 1.0})), "check",
     "survey: not allowed at the top level together with samples"),
    ("analytic-nonlinear", lambda c: c["parameters"]["b1_faint"].update(analytic=True), "check",
     "parameters.b1_faint.analytic: only parameters entering the model linearly"),
    ("analytic-not-bool", lambda c: c["parameters"]["shot_noise_faint"].update(analytic="yes"),
     "check", "parameters.shot_noise_faint.analytic: expected true or false"),
] + [
    ("theory-samples", _as_samples("south", {"bright": "b2", "faint": "f2"}), "theory",
     "ergofit theory works on one sample"),
    ("forecast-samples-scan", lambda c: (_as_samples("south", {"bright": "b2", "faint": "f2"})(c),
                                         c.update(forecast={"scan": {"quantity": "nbar",
                                                                     "values": [1e-4, 2e-4]}})),
     "forecast", "forecast.scan is not available with samples"),
    ("forecast-scan-quantity", lambda c: c.update(forecast={"scan": {"quantity": "nbar",
                                                                     "values": [1e-4, 2e-4]}}),
     "forecast", "forecast.scan quantity nbar is for one tracer; with several tracers scan "
     "quantity: bias_split"),
    ("forecast-scan-three", lambda c: (c["tracers"].append({"name": "dim", "nbar": 1e-4}),
                                       c.update(forecast={"scan": {"quantity": "bias_split",
                                                                   "values": [0, 1]}})),
     "forecast", "bias_split compares one tracer with a split into two; the config has 3 tracers"),
    ("forecast-split-nbar", lambda c: c.update(forecast={"scan": {"quantity": "nbar", "values": [1e-4],
                                                                  "nbar": [1e-4]}}),
     "forecast", "forecast.scan.nbar: only with quantity: bias_split")]


@pytest.mark.parametrize("case", MULTI_CASES, ids=[c[0] for c in MULTI_CASES])
def test_malformed_multi_tracer_input_exits_2_with_one_line(case, tmp_path, capsys, monkeypatch):
    for name in ("multi_demo_data.txt", "multi_demo_cov.txt"):
        shutil.copy(os.path.join(DEMO, name), tmp_path / name)
    _check_refused(MULTI, case, tmp_path, capsys, monkeypatch)


#: the bad inputs listed by issue 13, also through `ergofit run` and `ergofit simulate`: refused
#: before the output folder or any mock file is made
ISSUE13 = ("unknown-tracer", "cross-without-auto", "odd-ell-auto", "samples-same-name",
           "header-tracers", "header-ells", "samples-header")


@pytest.mark.parametrize("command", ["run", "simulate --n 3"])
@pytest.mark.parametrize("case_id", ISSUE13)
def test_issue13_bad_input_writes_nothing(case_id, command, tmp_path, capsys, monkeypatch):
    case = next(c for c in MULTI_CASES if c[0] == case_id)
    for name in ("multi_demo_data.txt", "multi_demo_cov.txt"):
        shutil.copy(os.path.join(DEMO, name), tmp_path / name)
    _check_refused(MULTI, (case[0], case[1], command, case[3]), tmp_path, capsys, monkeypatch)
