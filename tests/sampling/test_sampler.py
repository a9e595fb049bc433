"""Tests of likelihood.sampling.driver: convergence rule, crash safety, resume, reproducibility, errors.

Target: a correlated 2-D Gaussian whose mean and covariance are known analytically. The
reference tools are emcee itself (its HDF5 backend reader and its autocorrelation estimator,
Foreman-Mackey et al. 2013) and scipy; the stop rule and burn-in/thinning are those of the emcee
documentation ("Saving & monitoring progress" tutorial).
"""

from __future__ import annotations

import hashlib
import multiprocessing
import os
import signal
import subprocess
import sys
import textwrap
import time
import warnings

import emcee
import h5py
import numpy as np
import pytest

from likelihood.errors import ConfigError, ErgofitError
from likelihood.sampling import (
    CHAIN_FILENAME,
    ConvergenceWarning,
    SamplerSettings,
    load_chain,
    run_sampler,
)

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))


class ToyGaussian:
    """Correlated bivariate Gaussian posterior, flat prior; written with elementwise arithmetic
    so that one walker and a batch of walkers give bit-identical log posteriors."""

    def __init__(self, mean=(1.0, -2.0), sigma=(0.5, 2.0), rho=0.7, config_hash="toy-hash-1",
                 delay=0.0, marker=None, marker_after=0):
        self.mean = np.array(mean, dtype=float)
        s = np.array(sigma, dtype=float)
        self.cov = np.array([[s[0] ** 2, rho * s[0] * s[1]], [rho * s[0] * s[1], s[1] ** 2]])
        self.icov = np.linalg.inv(self.cov)
        self.parameter_names = ["a", "b"]
        self.labels = ["a", "b"]
        self.prior_bounds = np.array([[-20.0, 20.0], [-np.inf, np.inf]])
        self.start = self.mean + np.array([0.1, -0.2])
        self.start_scale = np.array([0.05, 0.1])
        self.config_hash = config_hash
        self.derived_names, self.derived_labels = [], []
        self.delay, self.marker, self.marker_after, self.calls = delay, marker, marker_after, 0

    def log_prob(self, theta):
        theta = np.atleast_2d(theta)
        d0, d1 = theta[:, 0] - self.mean[0], theta[:, 1] - self.mean[1]
        ic = self.icov
        lp = -0.5 * (ic[0, 0] * d0 * d0 + 2.0 * ic[0, 1] * d0 * d1 + ic[1, 1] * d1 * d1)
        lo, hi = self.prior_bounds[:, 0], self.prior_bounds[:, 1]
        inside = np.all((theta > lo) & (theta < hi), axis=1)
        self.calls += 1
        if self.marker and self.calls == self.marker_after:
            open(self.marker, "w").close()
        if self.delay:
            time.sleep(self.delay)
        return np.where(inside, lp, -np.inf)


def quiet(n_walkers=16, **kw):
    kw.setdefault("progress", False)
    return SamplerSettings(n_walkers=n_walkers, **kw)


def run_quiet(lik, settings, out, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return run_sampler(lik, settings, out, **kw)


def full_chain(out):
    return emcee.backends.HDFBackend(os.path.join(out, CHAIN_FILENAME), read_only=True).get_chain()


def sha256(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


# ---------------------------------------------------------------------------------------------
# Convergence rule, posterior moments, file format
# ---------------------------------------------------------------------------------------------


def test_converges_early_and_recovers_gaussian(tmp_path):
    lik = ToyGaussian()
    s = quiet(n_walkers=32, check_every=100, max_steps=20000)
    res = run_sampler(lik, s, tmp_path)
    assert res.converged and res.status == "converged"
    assert res.n_steps < s.max_steps and res.n_steps % s.check_every == 0
    # stop rule of the emcee tutorial, recomputed independently with emcee's own estimator
    chain = full_chain(tmp_path)
    assert chain.shape == (res.n_steps, 32, 2)
    tau_now = emcee.autocorr.integrated_time(chain, tol=0)
    tau_before = emcee.autocorr.integrated_time(chain[: res.n_steps - s.check_every], tol=0)
    np.testing.assert_allclose(res.tau, tau_now, rtol=1e-12)
    assert res.n_steps > 50 * tau_now.max()
    assert np.max(np.abs(tau_now - tau_before) / tau_now) < 0.01
    # not converged one check earlier (otherwise the run should have stopped there)
    tau_2 = emcee.autocorr.integrated_time(chain[: res.n_steps - 2 * s.check_every], tol=0)
    n_prev = res.n_steps - s.check_every
    assert not (n_prev > 50 * tau_before.max() and np.max(np.abs(tau_before - tau_2) / tau_before) < 0.01)
    # burn-in and thinning as in the emcee tutorial, samples as emcee's get_chain
    assert res.burn_in == int(2 * tau_now.max()) and res.thin == max(1, int(0.5 * tau_now.min()))
    b = emcee.backends.HDFBackend(res.chain_path, read_only=True)
    np.testing.assert_array_equal(res.samples, b.get_chain(discard=res.burn_in, thin=res.thin, flat=True))
    np.testing.assert_array_equal(res.log_prob, b.get_log_prob(discard=res.burn_in, thin=res.thin, flat=True))
    assert res.acceptance_fraction == pytest.approx(np.mean(b.accepted) / b.iteration, rel=1e-12)
    # posterior mean within 3 x Monte Carlo error (N_eff = walkers x kept steps / tau)
    n_eff = 32 * (res.n_steps - res.burn_in) / tau_now
    sd = np.sqrt(np.diag(lik.cov))
    assert np.all(np.abs(res.samples.mean(0) - lik.mean) < 3 * sd / np.sqrt(n_eff))
    # best fit = highest stored log posterior, near the analytic maximum
    assert res.best_log_prob == pytest.approx(b.get_log_prob().max())
    assert np.all(np.abs(res.best_fit - lik.mean) < 0.3 * sd)
    # ergofit metadata in the file
    with h5py.File(res.chain_path, "r") as f:
        assert f.attrs["config_hash"] == "toy-hash-1"
        assert list(f.attrs["parameter_names"]) == ["a", "b"]
        assert '"check_every": 100' in f.attrs["settings"]
    again = load_chain(tmp_path)
    np.testing.assert_array_equal(again.samples, res.samples)
    assert again.converged


def test_not_converged_warns(tmp_path):
    s = quiet(check_every=20, max_steps=60)
    with pytest.warns(ConvergenceWarning, match="not converged"):
        res = run_sampler(ToyGaussian(), s, tmp_path)
    assert not res.converged and res.status == "max_steps" and res.n_steps == 60
    assert any("not converged" in n for n in res.notes)
    assert not load_chain(tmp_path).converged


def test_same_seed_same_chain_other_seed_differs(tmp_path):
    s = quiet(check_every=1000, max_steps=150, seed=7)
    run_quiet(ToyGaussian(), s, tmp_path / "one")
    run_quiet(ToyGaussian(), s, tmp_path / "two")
    run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=150, seed=8), tmp_path / "three")
    np.testing.assert_array_equal(full_chain(tmp_path / "one"), full_chain(tmp_path / "two"))
    assert not np.array_equal(full_chain(tmp_path / "one"), full_chain(tmp_path / "three"))


def test_seed_none_is_recorded_and_runs_differ(tmp_path):
    s = quiet(check_every=1000, max_steps=20, seed=None)
    r1 = run_quiet(ToyGaussian(), s, tmp_path / "one")
    r2 = run_quiet(ToyGaussian(), s, tmp_path / "two")
    assert r1.seed != r2.seed and int(r1.seed) > 0
    assert not np.array_equal(full_chain(tmp_path / "one"), full_chain(tmp_path / "two"))


def test_pool_matches_vectorised(tmp_path):
    s = quiet(check_every=1000, max_steps=60, seed=3)
    run_quiet(ToyGaussian(), s, tmp_path / "vec")
    with multiprocessing.get_context("fork").Pool(2) as pool:
        run_quiet(ToyGaussian(), s, tmp_path / "pool", pool=pool)
    np.testing.assert_array_equal(full_chain(tmp_path / "vec"), full_chain(tmp_path / "pool"))


def test_initial_ball_respects_prior(tmp_path):
    lik = ToyGaussian()
    lik.prior_bounds = np.array([[0.95, 20.0], [-np.inf, np.inf]])
    lik.start = np.array([1.0, -2.0])
    lik.start_scale = np.array([0.2, 0.2])  # most draws of 'a' fall below 0.95
    run_quiet(lik, quiet(check_every=1000, max_steps=2), tmp_path)
    with h5py.File(tmp_path / CHAIN_FILENAME, "r") as f:
        initial = np.array(f["initial_coords"])
    assert np.all(initial[:, 0] > 0.95)
    assert initial[:, 0].std() > 0.05  # a genuine ball, not the start point repeated


# ---------------------------------------------------------------------------------------------
# Resume and existing chains
# ---------------------------------------------------------------------------------------------


def test_resume_extends_to_identical_chain(tmp_path):
    run_quiet(ToyGaussian(), quiet(check_every=50, max_steps=100, seed=5), tmp_path / "split")
    first = full_chain(tmp_path / "split")
    res = run_quiet(ToyGaussian(), quiet(check_every=50, max_steps=230, seed=999),
                    tmp_path / "split", resume=True)
    run_quiet(ToyGaussian(), quiet(check_every=50, max_steps=230, seed=5), tmp_path / "direct")
    chain = full_chain(tmp_path / "split")
    assert res.n_steps == 230 and chain.shape[0] == 230
    np.testing.assert_array_equal(chain[:100], first)
    np.testing.assert_array_equal(chain, full_chain(tmp_path / "direct"))


def test_resume_of_converged_run(tmp_path):
    s = quiet(n_walkers=16, check_every=100, max_steps=20000, tau_factor=30.0)
    first = run_sampler(ToyGaussian(), s, tmp_path)
    assert first.converged
    before = full_chain(tmp_path)
    # same settings: nothing to do, chain unchanged
    again = run_sampler(ToyGaussian(), s, tmp_path, resume=True)
    assert again.n_steps == first.n_steps and "run had converged already" in again.notes
    # a stricter rule: the chain is continued until the stricter rule holds
    factor = 1.3 * first.n_steps / np.max(first.tau)  # not met by the stored chain
    stricter = quiet(n_walkers=16, check_every=100, max_steps=20000, tau_factor=factor)
    more = run_sampler(ToyGaussian(), stricter, tmp_path, resume=True)
    assert more.converged and more.n_steps > first.n_steps
    assert more.n_steps > factor * np.max(more.tau)
    assert any("converged under other settings" in n for n in more.notes)
    np.testing.assert_array_equal(full_chain(tmp_path)[: first.n_steps], before)


def test_resume_without_chain_starts_fresh(tmp_path):
    res = run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=10), tmp_path, resume=True)
    assert res.n_steps == 10


def test_existing_chain_is_refused_and_untouched(tmp_path):
    run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=10), tmp_path)
    path = tmp_path / CHAIN_FILENAME
    before = sha256(path)
    with pytest.raises(ErgofitError, match=r"exists already.*--resume.*new output folder") as e:
        run_sampler(ToyGaussian(), quiet(check_every=1000, max_steps=10), tmp_path)
    assert "\n" not in str(e.value)
    assert sha256(path) == before


def test_resume_with_other_config_hash_is_refused(tmp_path):
    run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=10), tmp_path)
    before = sha256(tmp_path / CHAIN_FILENAME)
    other = ToyGaussian(config_hash="toy-hash-2")
    with pytest.raises(ErgofitError, match=r"toy-hash-1.*toy-hash-2.*new output folder") as e:
        run_sampler(other, quiet(check_every=1000, max_steps=20), tmp_path, resume=True)
    assert "\n" not in str(e.value)
    assert sha256(tmp_path / CHAIN_FILENAME) == before


def test_resume_with_other_walker_count_is_refused(tmp_path):
    run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=10), tmp_path)
    with pytest.raises(ConfigError, match="n_walkers"):
        run_sampler(ToyGaussian(), quiet(n_walkers=20, check_every=1000, max_steps=20), tmp_path,
                    resume=True)


@pytest.mark.parametrize("kind", ["garbage", "truncated", "foreign_hdf5"])
def test_corrupt_chain_gives_one_line_error(tmp_path, kind):
    path = tmp_path / CHAIN_FILENAME
    if kind == "garbage":
        path.write_bytes(b"this is not an HDF5 file" * 100)
    elif kind == "truncated":
        run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=200), tmp_path)
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 3])
    else:
        with h5py.File(path, "w") as f:
            f.create_dataset("x", data=np.arange(3))
    for call in (lambda: run_sampler(ToyGaussian(), quiet(max_steps=10), tmp_path, resume=True),
                 lambda: load_chain(tmp_path)):
        with pytest.raises(ErgofitError) as e:
            call()
        msg = str(e.value)
        assert str(path) in msg and "\n" not in msg and "remove it or choose a new output folder" in msg


def test_second_writer_is_refused(tmp_path):
    import fcntl

    fd = os.open(tmp_path, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # as a running sampler holds it
        with pytest.raises(ErgofitError, match="another process is running the sampler"):
            run_sampler(ToyGaussian(), quiet(max_steps=10), tmp_path, resume=True)
    finally:
        os.close(fd)
    assert not os.path.exists(tmp_path / CHAIN_FILENAME)
    assert run_quiet(ToyGaussian(), quiet(check_every=1000, max_steps=10), tmp_path).n_steps == 10


def test_reader_holding_the_file_does_not_break_the_run(tmp_path):
    """Another program keeping chain.h5 open (with HDF5's default file lock) while the run
    appends: the run must go on (emcee's own backend fails here with 'unable to lock file')."""
    run_quiet(ToyGaussian(), quiet(check_every=50, max_steps=100, seed=2), tmp_path)
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import h5py, sys, time; f = h5py.File(sys.argv[1], 'r'); print('open', flush=True); "
         "time.sleep(30)", str(tmp_path / CHAIN_FILENAME)],
        stdout=subprocess.PIPE)
    try:
        assert holder.stdout.readline().strip() == b"open"
        res = run_quiet(ToyGaussian(), quiet(check_every=50, max_steps=300, flush_every=5),
                        tmp_path, resume=True)
        assert res.n_steps == 300
        load_chain(tmp_path)
    finally:
        holder.kill()
        holder.wait()


def test_load_chain_missing(tmp_path):
    with pytest.raises(ErgofitError, match="no chain file"):
        load_chain(tmp_path)


CHILD = textwrap.dedent(
    """
    import sys
    sys.path[:0] = [{root!r}, {here!r}]
    from test_sampler import ToyGaussian
    from likelihood.sampling import SamplerSettings, run_sampler
    lik = ToyGaussian(delay=0.003, marker={marker!r}, marker_after=200)
    settings = SamplerSettings(n_walkers=16, max_steps=400, check_every=10**6, seed=11,
                               progress=False, flush_every={flush_every}, flush_seconds=1e6,
                               start="ball", moves={{"stretch": 1.0}})
    run_sampler(lik, settings, {out!r})
    """
)


def _start_child(tmp_path, flush_every):
    out, marker = str(tmp_path / "run"), str(tmp_path / "marker")
    script = CHILD.format(root=ROOT, here=HERE, marker=marker, flush_every=flush_every, out=out)
    proc = subprocess.Popen([sys.executable, "-c", script], stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    while not os.path.exists(marker):
        if proc.poll() is not None:
            raise AssertionError(f"child ended early: {proc.stderr.read().decode()}")
        if time.monotonic() > deadline:
            proc.kill()
            raise AssertionError("child never reached the marker")
        time.sleep(0.01)
    return proc, out


def _reference(tmp_path):
    s = quiet(check_every=10**6, max_steps=400, seed=11, start="ball", moves={"stretch": 1.0})
    run_quiet(ToyGaussian(), s, tmp_path / "reference")
    return full_chain(tmp_path / "reference"), s


def test_sigkill_then_resume_loses_nothing_flushed(tmp_path):
    """SIGKILL part-way: every flushed step survives intact, resume completes the same chain."""
    proc, out = _start_child(tmp_path, flush_every=10)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    with h5py.File(os.path.join(out, CHAIN_FILENAME), "r") as f:
        n_killed = int(f["mcmc"].attrs["iteration"])
        before = np.array(f["mcmc/chain"][:n_killed])
    # the marker fires in step 100 (2 log_prob calls per step): at most one buffer (10) is lost
    assert 90 <= n_killed < 400
    reference, s = _reference(tmp_path)
    np.testing.assert_array_equal(before, reference[:n_killed])
    res = run_quiet(ToyGaussian(), s, out, resume=True)
    chain = full_chain(out)
    assert res.n_steps == 400 and chain.shape == (400, 16, 2)
    np.testing.assert_array_equal(chain[:n_killed], before)
    np.testing.assert_array_equal(chain, reference)


def test_sigterm_flushes_buffer_before_exit(tmp_path):
    """With a buffer that is never due, SIGTERM still gets every completed step to disk."""
    proc, out = _start_child(tmp_path, flush_every=10**6)
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=30) == -signal.SIGTERM
    with h5py.File(os.path.join(out, CHAIN_FILENAME), "r") as f:
        n_stopped = int(f["mcmc"].attrs["iteration"])
        status = f.attrs["status"]
    assert 100 <= n_stopped < 400 and status == "running"
    reference, s = _reference(tmp_path)
    np.testing.assert_array_equal(full_chain(out), reference[:n_stopped])
    res = load_chain(out)
    assert any("interrupted" in n for n in res.notes)


@pytest.mark.slow
def test_repeated_kills_never_corrupt(tmp_path):
    """Stress: 15 SIGKILLs at random moments, flushing every step; the chain always resumes."""
    rng = np.random.default_rng(1)
    out = str(tmp_path / "run")
    script = textwrap.dedent(
        f"""
        import sys
        sys.path[:0] = [{ROOT!r}, {HERE!r}]
        from test_sampler import ToyGaussian
        from likelihood.sampling import SamplerSettings, run_sampler
        s = SamplerSettings(n_walkers=16, max_steps=3000, check_every=10**6, seed=11,
                            progress=False, flush_every=1)
        run_sampler(ToyGaussian(), s, {out!r}, resume=True)
        """
    )
    previous = None
    for _ in range(15):
        proc = subprocess.Popen([sys.executable, "-c", script])
        time.sleep(1.5 + rng.uniform(0, 1.5))
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
        with h5py.File(os.path.join(out, CHAIN_FILENAME), "r") as f:
            n = int(f["mcmc"].attrs["iteration"])
            chain = np.array(f["mcmc/chain"][:n])
        if previous is not None:
            assert n >= previous.shape[0]
            np.testing.assert_array_equal(chain[: previous.shape[0]], previous)
        previous = chain
    s = quiet(check_every=10**6, max_steps=3000, seed=11)
    run_quiet(ToyGaussian(), s, out, resume=True)
    run_quiet(ToyGaussian(), s, tmp_path / "reference")
    np.testing.assert_array_equal(full_chain(out), full_chain(tmp_path / "reference"))


# ---------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------


def test_nan_log_prob_is_a_clear_error(tmp_path):
    lik = ToyGaussian()
    original = lik.log_prob

    def broken(theta):
        lp = original(theta)
        lp[np.atleast_2d(theta)[:, 0] > 1.05] = np.nan
        return lp

    lik.log_prob = broken
    with pytest.raises(ErgofitError, match=r"log_prob is nan at theta") as e:
        run_quiet(lik, quiet(check_every=1000, max_steps=500), tmp_path)
    assert "\n" not in str(e.value)


def test_unplaceable_walkers(tmp_path):
    lik = ToyGaussian()
    lik.prior_bounds = np.array([[0.0, 1e-9], [-np.inf, np.inf]])
    lik.start = np.array([5e-10, -2.0])
    with pytest.raises(ErgofitError, match="could not place"):
        run_sampler(lik, quiet(max_steps=10), tmp_path)
    assert not os.path.exists(tmp_path / CHAIN_FILENAME)


@pytest.mark.parametrize("attr,value,match", [
    ("start", np.array([30.0, 0.0]), "outside its prior"),
    ("start_scale", np.array([0.0, 1.0]), "start_scale for 'a'"),
    ("prior_bounds", np.array([[1.0, 0.0], [0.0, 1.0]]), "prior_bounds"),
    ("labels", ["a"], "labels"),
])
def test_bad_likelihood_attributes(tmp_path, attr, value, match):
    lik = ToyGaussian()
    setattr(lik, attr, value)
    with pytest.raises(ErgofitError, match=match):
        run_sampler(lik, quiet(max_steps=10), tmp_path)


@pytest.mark.parametrize("kw,match", [
    (dict(n_walkers=7), "even"),
    (dict(n_walkers=2), "n_walkers"),
    (dict(max_steps=0), "max_steps"),
    (dict(tau_rtol=-1.0), "tau_rtol"),
    (dict(seed=-3), "seed"),
    (dict(check_every=2.5), "check_every"),
])
def test_bad_settings(kw, match):
    with pytest.raises(ConfigError, match=match):
        SamplerSettings(**kw)


def test_settings_from_dict():
    s = SamplerSettings.from_dict({"n_walkers": 40, "max_steps": 100})
    assert s.n_walkers == 40 and s.max_steps == 100 and s.check_every == 200
    with pytest.raises(ConfigError, match=r"sampler\.nwalkers"):
        SamplerSettings.from_dict({"nwalkers": 40})


def test_too_few_walkers_for_dimension(tmp_path):
    lik = ToyGaussian()
    lik.parameter_names, lik.labels = ["a", "b", "c"], ["a", "b", "c"]
    lik.prior_bounds = np.array([[-20.0, 20.0], [-np.inf, np.inf], [0.0, 1.0]])
    lik.start, lik.start_scale = np.array([1.0, -2.0, 0.5]), np.full(3, 0.1)
    with pytest.raises(ConfigError, match=r"'n_walkers' = 4: expected at least 2 x 3"):
        run_sampler(lik, quiet(n_walkers=4, max_steps=10), tmp_path)


def test_progress_in_a_log_file_is_a_few_lines():
    """stderr not a terminal: one line per 10 % of the steps, not carriage-return updates
    (issue 15, item 16)."""
    import io
    from likelihood.sampling.driver import _LineProgress
    buf = io.StringIO()
    bar = _LineProgress(1000, 0, stream=buf)
    for i in range(1000):
        bar.set_postfix_str(f"tau={i}")
        bar.update(1)
    bar.close()
    lines = buf.getvalue().splitlines()
    assert len(lines) == 10 and "\r" not in buf.getvalue()
    assert lines[-1].startswith("sampling: 1000/1000 steps (100%)") and "tau=999" in lines[-1]
