"""Regression against a chain and a window-matrix cache written by the code before the issue-14
restructuring (tests/fixtures/legacy/, made by its make_values.py and ``ergofit run``).

The restructuring must not change what the tool computes: the same config gives the same config
hash (so old chains resume) and the same window-matrix cache key (so old caches are read, not
rebuilt), and the same log posterior at fixed points. The reference numbers are the outputs of the
earlier code itself (a regression check, not a physics check; the physics is tested against
outside references elsewhere).
"""
import json
import os
import shutil
import subprocess
import sys

import h5py
import numpy as np
import pytest

import likelihood

FIXTURE = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))),
                       "fixtures", "legacy")
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(FIXTURE.rstrip(os.sep))))   # the repository
with open(os.path.join(FIXTURE, "values.json"), encoding="utf-8") as _fh:
    REF = json.load(_fh)
CACHE_FILE = "window-matrix-" + REF["cache_key"][:24] + ".npz"


@pytest.fixture
def cache_copy(tmp_path, monkeypatch):
    """XDG_CACHE_HOME pointing at a copy of the fixture's cache (ergofit/window-matrix-*.npz)."""
    base = tmp_path / "xdg"
    shutil.copytree(os.path.join(FIXTURE, "cache"), base)
    monkeypatch.setenv("XDG_CACHE_HOME", str(base))
    return base / "ergofit"


def _build():
    with pytest.warns(UserWarning):      # the wide-angle regime warning of this small survey
        return likelihood.build(os.path.join(FIXTURE, "config.yaml"))


def test_same_config_hash_and_cache_hit(cache_copy):
    entry = cache_copy / CACHE_FILE
    before = entry.stat()
    lik = _build()
    assert lik.config_hash == REF["config_hash"]
    assert lik.operator.cache_key() == REF["cache_key"]
    matrix = lik.operator.matrix                      # read from the cache (or rebuilt on a miss)
    assert sorted(os.listdir(cache_copy)) == [CACHE_FILE]  # no new entry written
    after = entry.stat()
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)   # not rewritten
    with np.load(os.path.join(FIXTURE, "cache", "ergofit", CACHE_FILE)) as f:
        np.testing.assert_array_equal(matrix, f["matrix"])


def test_same_log_prob_and_model_vector(cache_copy):
    lik = _build()
    assert list(lik.parameter_names) == REF["parameter_names"]
    lp = lik.log_prob(np.array(REF["theta"]))
    # The fast path's χ² = |d_w|² − 2 c·g + cᵀGc cancels |d_w|² ≈ 1e5 down to χ² ≈ 13 here, so a
    # change in the order of the floating-point sums that build the templates (e.g. all pairs
    # through the window matrix in one product, issue 16: rows move by 4e-16) moves log_prob by
    # ~ε |d_w|² ≈ 1e-11 however small χ² is: that floor is the absolute tolerance.
    floor = 1e-15 * lik._dd
    np.testing.assert_allclose(lp, REF["log_prob"], rtol=1e-12, atol=floor)
    for theta, ref in zip(REF["theta"], REF["log_prob"]):      # the scalar (per-walker) path
        assert lik.log_prob(np.array(theta)) == pytest.approx(ref, rel=1e-12, abs=floor)
    np.testing.assert_allclose(lik.model_vector(REF["model_point"]), REF["model_vector"],
                               rtol=1e-12, atol=0)


def test_resume_legacy_chain(cache_copy, tmp_path):
    """`ergofit run --resume` appends to the old chain (same config hash) instead of refusing."""
    run = tmp_path / "run"
    run.mkdir()
    shutil.copy(os.path.join(FIXTURE, "chain.h5"), run / "chain.h5")
    with open(os.path.join(FIXTURE, "config.yaml"), encoding="utf-8") as fh:
        text = fh.read()
    assert "max_steps: 50," in text
    cfg = tmp_path / "config.yaml"
    cfg.write_text(text.replace("max_steps: 50,", "max_steps: 75,"))
    with h5py.File(run / "chain.h5", "r") as f:
        old = np.array(f["mcmc/chain"])
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run([sys.executable, "-m", "likelihood.cli", "run", str(cfg), "--out", str(run),
                           "--resume", "--quiet"], capture_output=True, text=True, env=env, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "config hash" not in proc.stderr
    summ = json.loads((run / "summary.json").read_text())
    assert summ["config_hash"] == REF["config_hash"]
    assert summ["n_steps"] == 75
    with h5py.File(run / "chain.h5", "r") as f:
        new = np.array(f["mcmc/chain"])
    assert old.shape[0] == 50 and new.shape[0] == 75
    np.testing.assert_array_equal(new[:50], old)      # appended to, not restarted
