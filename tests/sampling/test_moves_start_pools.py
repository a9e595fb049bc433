"""Moves (sampling.moves), the optimum start (sampling.start) and pools that pay (issue 16)."""
from __future__ import annotations

import multiprocessing
import os
import time
import warnings

import numpy as np
import pytest
import yaml

from likelihood.cli import main
from likelihood.config import load_config, validate
from likelihood.errors import ConfigError
from likelihood.model import build
from likelihood.sampling import ConvergenceWarning, SamplerSettings, load_chain, run_sampler
from likelihood.sampling.moves import check_moves, default_moves, evaluations_per_step, same_moves
from likelihood.sampling.pools import ChunkedLogProb, choose_evaluation
from likelihood.sampling.start import find_optimum
from test_sampler import ToyGaussian, full_chain

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEMO = os.path.join(ROOT, "configs", "demo.yaml")


# ---------------------------------------------------------------------------------------------
# Bad input: one line naming sampling.moves...
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("moves, n_walkers, words", [
    ({"strech": 1.0}, 32, ["sampling.moves.strech", "did you mean 'stretch'"]),
    ({"differential_evoluton": 1.0}, 32, ["sampling.moves.differential_evoluton",
                                           "'differential_evolution'"]),
    ({"stretch": -0.5, "differential_evolution": 1.0}, 32, ["sampling.moves.stretch", ">= 0"]),
    ({"stretch": 0.0, "differential_evolution": 0.0}, 32, ["sampling.moves", "sum to 0"]),
    ({"stretch": float("nan")}, 32, ["sampling.moves.stretch", "finite"]),
    ({"de_snooker": 1.0}, 4, ["sampling.moves.de_snooker", "at least 6 walkers", "4 configured"]),
    ([1, 2], 32, ["sampling.moves", "mapping"]),
])
def test_bad_moves(moves, n_walkers, words):
    with pytest.raises(ConfigError) as exc:
        check_moves(moves, "sampling.moves", n_walkers)
    msg = str(exc.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg


def test_bad_moves_from_the_command_line(tmp_path, capsys):
    with open(DEMO) as fh:
        raw = yaml.safe_load(fh)
    raw["sampling"]["moves"] = {"stretch": 0.5, "snooker": 0.5}
    raw["data"]["file"] = os.path.join(ROOT, "configs", raw["data"]["file"])
    raw["covariance"]["file"] = os.path.join(ROOT, "configs", raw["covariance"]["file"])
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(raw))
    assert main(["run", str(path), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "sampling.moves.snooker" in err[0] and "de_snooker" in err[0]
    assert not (tmp_path / "out").exists()


def test_moves_and_sampler_settings_leave_the_config_hash_alone():
    with open(DEMO) as fh:
        raw = yaml.safe_load(fh)
    base = validate(raw, src=DEMO, base_dir=os.path.dirname(DEMO)).hash
    assert base == load_config(DEMO).hash
    raw["sampling"].update(moves={"de_snooker": 1.0}, start="ball")
    assert validate(raw, src=DEMO, base_dir=os.path.dirname(DEMO)).hash == base


def test_default_moves():
    """The documented default (likelihood.sampling.moves docstring), for the smallest walker
    count the config allows too; snooker costs two ensemble evaluations per step (emcee's
    DESnookerMove updates the ensemble in four parts, the others in two)."""
    mix = {"stretch": 0.5, "differential_evolution": 0.5}
    assert SamplerSettings(n_walkers=32).moves == mix and SamplerSettings(n_walkers=4).moves == mix
    assert load_config(DEMO)["sampling"]["moves"] == mix
    import emcee
    assert emcee.moves.DESnookerMove().nsplits == 4 and emcee.moves.DEMove().nsplits == 2
    assert evaluations_per_step({"differential_evolution": 0.8, "de_snooker": 0.2}) == pytest.approx(1.2)


def test_same_moves_normalises_weights():
    assert same_moves({"stretch": 1.0, "differential_evolution": 1.0},
                      {"stretch": 0.5, "differential_evolution": 0.5})
    assert same_moves(None, {"stretch": 2.0})        # chains stored before moves were a setting
    assert not same_moves(None, {"stretch": 0.5, "differential_evolution": 0.5})


# ---------------------------------------------------------------------------------------------
# Resume with other moves: allowed, noted; resume stays bit-identical
# ---------------------------------------------------------------------------------------------


def test_resume_with_other_moves_is_noted(tmp_path):
    lik = ToyGaussian()
    kw = dict(n_walkers=16, check_every=10**6, seed=5, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        run_sampler(lik, SamplerSettings(max_steps=100, moves={"stretch": 1.0}, **kw), tmp_path / "r")
        lines = []
        res = run_sampler(lik, SamplerSettings(max_steps=200, **kw), tmp_path / "r", resume=True,
                          report=lines.append)
    assert res.n_steps == 200
    assert any("other moves" in n and "stretch 1" in n for n in res.notes)
    assert any("other moves" in ln for ln in lines)


@pytest.mark.parametrize("moves", [{"de_snooker": 1.0}, {"stretch": 0.3, "differential_evolution": 0.7}])
def test_resume_with_mixture_is_bit_identical(tmp_path, moves):
    lik = ToyGaussian()
    kw = dict(n_walkers=16, check_every=10**6, seed=9, progress=False, moves=moves)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        run_sampler(lik, SamplerSettings(max_steps=300, **kw), tmp_path / "whole")
        run_sampler(lik, SamplerSettings(max_steps=120, **kw), tmp_path / "part")
        run_sampler(lik, SamplerSettings(max_steps=300, **kw), tmp_path / "part", resume=True)
    np.testing.assert_array_equal(full_chain(tmp_path / "whole"), full_chain(tmp_path / "part"))


# ---------------------------------------------------------------------------------------------
# Optimum start
# ---------------------------------------------------------------------------------------------


def test_optimum_of_a_gaussian_is_its_mean_and_covariance():
    """For a Gaussian log posterior the maximum is the mean and the inverse Hessian is the
    covariance exactly (Laplace approximation, exact for a Gaussian: common practice)."""
    lik = ToyGaussian(mean=(1.0, -2.0), sigma=(0.5, 2.0), rho=0.7)
    opt = find_optimum(lik.log_prob, lik.start + np.array([1.0, 3.0]), lik.start_scale,
                       lik.prior_bounds, np.random.default_rng(1))
    np.testing.assert_allclose(opt.best, lik.mean, atol=1e-5)
    np.testing.assert_allclose(opt.cov, lik.cov, rtol=1e-4)


def test_start_ball_around_the_optimum_is_reported(tmp_path):
    lik = ToyGaussian()
    lik.start = lik.mean + np.array([2.0, 5.0])       # far from the maximum
    lines = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        res = run_sampler(lik, SamplerSettings(n_walkers=32, max_steps=10, seed=2, progress=False),
                          tmp_path / "r", report=lines.append)
    assert lines[0].startswith("best fit (posterior maximum") and "chi2 = 0.000" in lines[0]
    init = load_chain(tmp_path / "r")
    assert res.notes and res.notes[0] == lines[0]
    # walkers start on the posterior (ball = 1 sigma of the Laplace approximation), not at start
    from likelihood.sampling.backend import read_chain
    c0 = read_chain(os.path.join(tmp_path, "r", "chain.h5")).initial_coords
    assert np.all(np.abs(c0.mean(axis=0) - lik.mean) < 4 * np.sqrt(np.diag(lik.cov)) / np.sqrt(32))
    np.testing.assert_allclose(c0.std(axis=0), np.sqrt(np.diag(lik.cov)), rtol=0.4)
    assert init.n_steps == 10


def test_optimizer_best_fit_agrees_with_the_best_sample(write_config, tmp_path):
    """The optimizer's chi2 is within 0.1 of (and not above) the best sample of a chain on a small
    noisy mock (4 walkers-worth of parameters; the chain's best of ~2e4 samples lies within
    ~0.1 of the minimum for a few parameters: chi2_min + chi2_d distribution, common practice)."""
    cfg = write_config({
        "data": {"mock": {"noise": True, "seed": 3, "truth": {"fnl": 10.0}, "k_min": 0.002,
                          "k_max": 0.03, "n_bins": 8}},
        "parameters": {"b1": {"flat": [0.5, 5.0], "start": 2.3, "scale": 0.01},
                       "fnl": {"flat": [-200.0, 200.0], "start": 30.0, "scale": 1.0}},
    })
    lik = build(cfg)
    lines = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_sampler(lik, SamplerSettings(n_walkers=16, max_steps=1500, check_every=10**6,
                                               seed=3, progress=False), tmp_path / "r",
                          report=lines.append)
    chi2_opt = float(lines[0].rsplit("chi2 = ", 1)[1])
    chi2_best = float(lik.chi2(res.best_fit))
    assert chi2_opt <= chi2_best + 1e-3
    assert chi2_best - chi2_opt < 0.1


# ---------------------------------------------------------------------------------------------
# Pools that pay
# ---------------------------------------------------------------------------------------------


class CostlyGaussian(ToyGaussian):
    """The toy posterior with a cost per walker (like a cosmology-varying model)."""

    def __init__(self, per_walker=2e-3, **kw):
        super().__init__(**kw)
        self.per_walker = per_walker

    def log_prob(self, theta):
        theta = np.atleast_2d(theta)
        time.sleep(self.per_walker * theta.shape[0])
        return super().log_prob(theta)


def test_fast_model_stays_in_one_process_and_says_so(tmp_path):
    lik = ToyGaussian()
    lines = []
    with multiprocessing.get_context("fork").Pool(2) as pool:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            run_sampler(lik, SamplerSettings(n_walkers=16, max_steps=50, seed=1, progress=False),
                        tmp_path / "p", pool=pool, report=lines.append)
    said = [ln for ln in lines if "pool" in ln]
    assert len(said) == 1 and "not used" in said[0] and "slower" in said[0]


def test_costly_model_uses_the_pool_in_chunks_and_matches_serial(tmp_path):
    lik = CostlyGaussian(per_walker=2e-3)
    kw = dict(n_walkers=16, max_steps=40, check_every=10**6, seed=4, progress=False, start="ball")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        t0 = time.perf_counter()
        run_sampler(lik, SamplerSettings(**kw), tmp_path / "serial")
        t_serial = time.perf_counter() - t0
        lines = []
        with multiprocessing.get_context("fork").Pool(2) as pool:
            t0 = time.perf_counter()
            run_sampler(lik, SamplerSettings(**kw), tmp_path / "pool", pool=pool, report=lines.append)
            t_pool = time.perf_counter() - t0
    assert any(ln.startswith("pool of 2 workers:") for ln in lines)
    np.testing.assert_array_equal(full_chain(tmp_path / "serial"), full_chain(tmp_path / "pool"))
    assert t_pool < t_serial          # 2 workers on 2 cores for a sleep-bound model


def test_chunked_evaluation_splits_walkers_over_workers():
    calls = []

    class Recorder:
        def map(self, fn, chunks):
            calls.append([len(c) for c in chunks])
            return [fn(c) for c in chunks]

    lik = ToyGaussian()
    theta = lik.mean + np.random.default_rng(0).standard_normal((10, 2))
    out = ChunkedLogProb(lik.log_prob, Recorder(), 3)(theta)
    np.testing.assert_array_equal(out, lik.log_prob(theta))
    assert calls == [[4, 3, 3]]
    fn, msg = choose_evaluation(lik.log_prob, None, theta)
    assert fn == lik.log_prob and msg == ""


def test_pool_of_one_worker_is_not_used():
    """MPI with 2 ranks: one worker while the master waits cannot beat one process, so the run
    stays in one process without timing the pool (no task is sent)."""
    class OneWorker:
        size = 1
        sent = 0

        def map(self, fn, chunks):
            OneWorker.sent += 1
            return [fn(c) for c in chunks]

    lik = CostlyGaussian(per_walker=2e-3)
    theta = np.zeros((4, 2))
    fn, msg = choose_evaluation(lik.log_prob, OneWorker(), theta)
    assert fn == lik.log_prob and OneWorker.sent == 0
    assert msg.startswith("pool of 1 worker not used") and "one process" in msg


# ---------------------------------------------------------------------------------------------
# The posterior does not depend on the moves
# ---------------------------------------------------------------------------------------------


def _demo_moments(tmp_path, moves, steps, seed):
    lik = build(DEMO)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if steps is None:
            s = SamplerSettings(n_walkers=32, max_steps=60000, check_every=500, tau_factor=100,
                                seed=seed, progress=False, moves=moves)
        else:
            s = SamplerSettings(n_walkers=32, max_steps=steps, check_every=10**6, seed=seed,
                                progress=False, moves=moves)
        res = run_sampler(lik, s, tmp_path / f"{len(moves)}-{seed}")
    if steps is not None:
        # fixed-length chain: drop the first fifth (the start is on the posterior already)
        from likelihood.sampling.backend import read_chain
        chain = read_chain(res.chain_path).chain[steps // 5:].reshape(-1, len(res.parameter_names))
    else:
        chain = res.samples
    names = res.parameter_names
    return {n: (chain[:, names.index(n)].mean(), chain[:, names.index(n)].std()) for n in ("fnl", "b1")}


def test_posterior_does_not_depend_on_the_moves_short(tmp_path):
    """Stretch alone against the default mixture on the demo, 2000 steps x 32 walkers each:
    means within 0.3 sigma and sigmas within 15 % (loose: the Monte Carlo error of a mean from
    ~1500 effective samples is ~0.03 sigma per chain, of a sigma ~2 %; common practice)."""
    a = _demo_moments(tmp_path, {"stretch": 1.0}, 2000, 11)
    b = _demo_moments(tmp_path, default_moves(32), 2000, 12)
    for n in ("fnl", "b1"):
        assert abs(a[n][0] - b[n][0]) < 0.3 * a[n][1], n
        assert abs(a[n][1] / b[n][1] - 1) < 0.15, n


@pytest.mark.slow
def test_posterior_does_not_depend_on_the_moves_long(tmp_path):
    """The issue's check: converged chains (stop rule with tau_factor 100), means and sigmas of
    f_NL and b1 within 0.1 sigma between stretch and the default mixture."""
    a = _demo_moments(tmp_path, {"stretch": 1.0}, None, 21)
    b = _demo_moments(tmp_path, default_moves(32), None, 22)
    for n in ("fnl", "b1"):
        assert abs(a[n][0] - b[n][0]) < 0.1 * a[n][1], n
        assert abs(a[n][1] - b[n][1]) < 0.1 * a[n][1], n


_IDLE_WORKER_SCRIPT = r"""
import os, sys, time
from mpi4py import MPI
pids = MPI.COMM_WORLD.allgather(os.getpid())
from likelihood.sampling.pools import close_pool, mpi_pool

def cpu(pid):
    fields = open(f"/proc/{pid}/stat").read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

pool = mpi_pool()                              # the worker rank serves in here
time.sleep(1.5)       # let the worker finish its imports (slow on a fresh install: no .pyc yet)
c0, t0 = cpu(pids[1]), time.perf_counter()
while time.perf_counter() - t0 < 2.0:          # the master works; the pool is open but idle
    sum(range(10000))
idle_cpu = (cpu(pids[1]) - c0) / (time.perf_counter() - t0)     # worker CPU per idle second
squares = pool.map(abs, [-1, -2, -3])
close_pool(pool)
print("RESULT", idle_cpu, squares, flush=True)
"""


@pytest.mark.mpi
def test_idle_mpi_worker_sleeps(tmp_path):
    """An open but idle MPI pool's worker does not poll a core (mpich's blocking receive would
    take ~1 s of CPU per second, the master's core on a 2-core machine), and still serves tasks."""
    pytest.importorskip("mpi4py")
    pytest.importorskip("schwimmbad")
    import shutil
    import subprocess
    import sys
    exe = shutil.which("mpiexec") or os.path.join(os.path.dirname(sys.executable), "mpiexec")
    if not os.path.exists(exe):
        pytest.skip("mpiexec not found (install the mpi extra)")
    script = tmp_path / "idle.py"
    script.write_text(_IDLE_WORKER_SCRIPT)
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    r = subprocess.run([exe, "-n", "2", sys.executable, str(script)], capture_output=True, text=True,
                       timeout=120, env=dict(os.environ, PYTHONPATH=root))
    assert r.returncode == 0, r.stderr[-2000:]
    line = [ln for ln in r.stdout.splitlines() if ln.startswith("RESULT")][0].split(" ", 2)
    assert float(line[1]) < 0.2
    assert line[2] == "[1, 2, 3]"
