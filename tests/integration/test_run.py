"""`ergofit run` end to end: injection-recovery, resume safety, MPI pool, bad output folders."""
import json
import os
import shutil
import subprocess
import sys

import numpy as np
import pytest

from likelihood.cli import main

SMALL = {"data": {"mock": {"noise": False, "truth": {"fnl": 10.0}, "k_min": 0.002, "k_max": 0.03,
                           "n_bins": 8}},
         "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.0, "scale": 0.01},
                        "fnl": {"flat": [-200.0, 200.0], "start": 8.0, "scale": 1.0}},
         "sampling": {"walkers": 16, "max_steps": 1500, "check_every": 100, "seed": 4, "progress": False}}


def test_injection_recovery_fnl(write_config, tmp_path):
    """A noiseless mock made with f_NL = 10 is fitted: the posterior mean of f_NL lies within 0.2 σ
    of 10 (a noiseless data vector has its likelihood peak at the truth; common practice)."""
    out = tmp_path / "run"
    assert main(["run", write_config(SMALL), "--out", str(out), "--quiet"]) == 0
    summ = json.loads((out / "summary.json").read_text())
    f = summ["parameters"]["fnl"]
    assert abs(f["mean"] - 10.0) < 0.2 * f["std"]
    for name in ("chain.h5", "constraints.md", "constraints.tex", "triangle.png", "triangle.pdf",
                 "multipoles.png", "config.yaml"):
        assert (out / name).stat().st_size > 0
    for key in ("n_steps", "tau", "acceptance_fraction", "converged", "chi2", "dof", "config_hash"):
        assert key in summ
    for key in ("mean", "std", "median", "interval68", "interval95", "best_fit"):
        assert key in f
    # the stored config rebuilds the likelihood: summarize works from the run folder alone,
    # also after the folder has been moved away from the inputs (issue 15, item 6)
    assert main(["summarize", str(out)]) == 0
    moved = tmp_path / "elsewhere" / "run"
    shutil.move(str(out), str(moved))
    assert main(["summarize", str(moved)]) == 0


def test_rerun_refused_and_other_config_refused(write_config, tmp_path, capsys):
    out = tmp_path / "run"
    small = dict(SMALL, sampling=dict(SMALL["sampling"], max_steps=200))
    assert main(["run", write_config(small), "--out", str(out), "--quiet"]) == 0
    chain = (out / "chain.h5").read_bytes()
    capsys.readouterr()
    # the same config again: a finished (max_steps, not converged) run says --resume
    assert main(["run", write_config(small), "--out", str(out), "--quiet"]) == 2
    assert "--resume" in capsys.readouterr().err
    other = dict(small, tracer={"b1": 2.0, "fnl": 0.0, "b_e": 0.5, "s": 0.3})
    assert main(["run", write_config(other, "other.yaml"), "--out", str(out), "--resume", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "different config" in err or "config hash" in err
    assert (out / "chain.h5").read_bytes() == chain
    assert main(["run", write_config(other, "other.yaml"), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "different config" in err and "--out" in err
    assert (out / "chain.h5").read_bytes() == chain


def test_second_run_of_a_converged_config_reports_it(write_config, tmp_path, capsys):
    """Running the same command twice: the finished run is reported with its constraints and
    nothing is recomputed (issue 15, item 9)."""
    out = tmp_path / "run"
    cfg = write_config(dict(SMALL, sampling=dict(SMALL["sampling"], tau_factor=10, tau_rtol=0.5)))
    assert main(["run", cfg, "--out", str(out), "--quiet"]) == 0
    first = capsys.readouterr().out
    assert "best fit: chi2 =" in first and "probability to exceed" in first
    stamp = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    assert main(["run", cfg, "--out", str(out), "--quiet"]) == 0
    again = capsys.readouterr().out
    assert "nothing recomputed" in again and "fnl" in again
    assert {p.name: p.stat().st_mtime_ns for p in out.iterdir()} == stamp


def test_failed_start_leaves_nothing(write_config, tmp_path, capsys):
    """A run that cannot start (every walker outside the prior) leaves no folder and no 0-step
    chain behind, so the corrected config runs at once (issue 15, item 8)."""
    out = tmp_path / "run"
    bad = dict(SMALL, parameters=dict(SMALL["parameters"],
                                      fnl={"flat": [-200.0, 200.0], "start": 199.99, "scale": 1e6}))
    assert main(["run", write_config(bad), "--out", str(out), "--quiet"]) == 2
    assert "could not place" in capsys.readouterr().err
    assert not out.exists()
    out.mkdir()                                  # an existing folder keeps existing, but empty
    assert main(["run", write_config(bad), "--out", str(out), "--quiet"]) == 2
    assert list(out.iterdir()) == []
    assert main(["run", write_config(SMALL), "--out", str(out), "--quiet"]) == 0


def test_unwritable_output_folder(write_config, tmp_path, capsys):
    if os.geteuid() == 0:
        target = "/proc/ergofit-out"          # root can write anywhere else
    else:
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        target = str(ro / "run")
    assert main(["run", write_config(SMALL), "--out", target, "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "output folder" in err and len(err.splitlines()) == 1


def _mpiexec():
    cand = shutil.which("mpiexec") or os.path.join(os.path.dirname(sys.executable), "mpiexec")
    return cand if cand and os.path.exists(cand) else None


@pytest.mark.mpi
def test_mpi_pool_run(write_config, tmp_path):
    """`ergofit run --mpi` under `mpiexec -n 2` (the `mpi` extra: mpich, mpi4py, schwimmbad)."""
    pytest.importorskip("mpi4py")
    pytest.importorskip("schwimmbad")
    exe = _mpiexec()
    if exe is None:
        pytest.skip("mpiexec not found (install the mpi extra)")
    out = tmp_path / "mpirun"
    cfg = write_config(dict(SMALL, sampling=dict(SMALL["sampling"], max_steps=100)))
    r = subprocess.run([exe, "-n", "2", sys.executable, "-m", "likelihood.cli", "run", cfg, "--mpi",
                        "--out", str(out), "--quiet"], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    summ = json.loads((out / "summary.json").read_text())
    assert summ["n_steps"] == 100
    assert np.isfinite(summ["parameters"]["fnl"]["mean"])


def test_resume_with_more_steps(write_config, tmp_path):
    """The not-converged advice works: raise sampling.max_steps and resume the same chain."""
    out = tmp_path / "run"
    short = dict(SMALL, sampling=dict(SMALL["sampling"], max_steps=150))
    assert main(["run", write_config(short), "--out", str(out), "--quiet"]) == 0
    longer = dict(SMALL, sampling=dict(SMALL["sampling"], max_steps=300))
    assert main(["run", write_config(longer, "longer.yaml"), "--out", str(out), "--resume", "--quiet"]) == 0
    summ = json.loads((out / "summary.json").read_text())
    assert summ["n_steps"] == 300


def _short_copy(tmp_path, demo, name, **sampling):
    """(folder, raw config): configs/DEMO.yaml with a 60-step chain written as NAME beside copies
    of its data and covariance files (DEMO_data.txt, DEMO_cov.txt) in tmp_path/src."""
    import yaml
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    src = tmp_path / "src"
    src.mkdir()
    for suffix in ("data.txt", "cov.txt"):
        shutil.copy(os.path.join(root, "configs", f"{demo}_{suffix}"), src / f"{demo}_{suffix}")
    cfg = yaml.safe_load(open(os.path.join(root, "configs", f"{demo}.yaml")))
    cfg["sampling"].update(max_steps=60, check_every=30, **sampling)
    (src / name).write_text(yaml.safe_dump(cfg))
    return src, cfg


def test_run_folder_is_portable(tmp_path, monkeypatch):
    """The stored config references copies of its input files inside the run folder, so a moved
    folder still summarises, with the same config hash (issue 15, item 6)."""
    import yaml
    src, cfg = _short_copy(tmp_path, "demo", "demo.yaml", walkers=8)
    out = tmp_path / "run"
    assert main(["run", str(src / "demo.yaml"), "--out", str(out), "--quiet"]) == 0
    stored = yaml.safe_load((out / "config.yaml").read_text())
    assert stored["data"]["file"] == os.path.join("inputs", "demo_data.txt")
    assert stored["covariance"]["file"] == os.path.join("inputs", "demo_cov.txt")
    shutil.rmtree(src)                                   # the original inputs are gone
    moved = tmp_path / "far" / "away"
    shutil.move(str(out), str(moved))
    monkeypatch.chdir(tmp_path)
    assert main(["summarize", str(moved)]) == 0
    from likelihood import load_config
    assert load_config(str(moved / "config.yaml")).hash == \
        json.loads((moved / "summary.json").read_text())["config_hash"]


def test_two_tracer_demo_and_samples_end_to_end(tmp_path, monkeypatch, two_samples):
    """The README's two-tracer demo config runs end to end (short chain): outputs, derived b1σ8
    per tracer, the multipoles figure with a column per spectrum; a run with two samples stores
    each sample's input files in inputs/NAME/ and still summarises after its folder moved."""
    import yaml
    src, cfg = _short_copy(tmp_path, "multi_demo", "two.yaml", walkers=16, progress=False)
    out = tmp_path / "two"
    assert main(["run", str(src / "two.yaml"), "--out", str(out), "--quiet"]) == 0
    summ = json.loads((out / "summary.json").read_text())
    assert {"fnl", "b1_bright", "b1_faint", "b1_sigma8_bright", "b1_sigma8_faint"} <= set(summ["parameters"])
    assert summ["dof"] == 128 - 6 and (out / "multipoles.png").stat().st_size > 0

    two_samples(cfg)
    cfg["run"] = "both"
    (src / "both.yaml").write_text(yaml.safe_dump(cfg))
    out = tmp_path / "both"
    assert main(["run", str(src / "both.yaml"), "--out", str(out), "--quiet"]) == 0
    stored = yaml.safe_load((out / "config.yaml").read_text())
    summ = json.loads((out / "summary.json").read_text())      # reports per sample and spectrum
    assert summ["parameters"]["b1_lrg"]["sample"] == "south" and summ["parameters"]["fnl"]["sample"] == "shared"
    assert [b["spectrum"] for b in summ["fit_blocks"] if b["sample"] == "south"] == ["lrg", "all"]
    assert sum(b["chi2"] for b in summ["fit_blocks"] if b["spectrum"] == "all") == \
        pytest.approx(summ["chi2"], rel=1e-6)
    assert "| north | bright x faint | 64 |" in (out / "constraints.md").read_text()
    assert all((out / f"triangle_{s}.png").stat().st_size > 0 for s in ("north", "south"))
    assert stored["samples"][0]["data"]["file"] == os.path.join("inputs", "north", "multi_demo_data.txt")
    shutil.rmtree(src)
    moved = tmp_path / "far" / "both"
    shutil.move(str(out), str(moved))
    monkeypatch.chdir(tmp_path)
    assert main(["summarize", str(moved)]) == 0
    assert "b1_sigma8_lrg" in json.loads((moved / "summary.json").read_text())["parameters"]
