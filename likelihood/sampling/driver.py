"""Affine-invariant ensemble sampling with crash-safe HDF5 chains and an autocorrelation stop rule.

The sampler is emcee's :class:`emcee.EnsembleSampler` (Foreman-Mackey et al. 2013) with the
move mixture of ``settings.moves`` (:mod:`.moves`: stretch, Goodman & Weare 2010; differential
evolution, ter Braak 2006; DE snooker, ter Braak & Vrugt 2008). A new chain starts around the
posterior maximum (:mod:`.start`). A pool evaluates one chunk of walkers per worker, and only
when that is measured to be faster than one process (:mod:`.pools`). This module adds what a
long inference run needs:

* **Never lose a chain.** Steps are appended to ``OUT_DIR/chain.h5`` in emcee's HDF5 backend
  layout (group ``mcmc``: datasets ``chain``, ``log_prob``, ``accepted``; attributes
  ``iteration``, ``random_state_*``), so ``emcee.backends.HDFBackend(path, read_only=True)``
  reads it. Steps are buffered in memory and flushed every ``flush_every`` steps or
  ``flush_seconds`` seconds, whichever comes first. A flush writes the new rows, forces them to
  disk, and only then advances the ``iteration`` counter, so a process killed at any moment
  leaves a file whose first ``iteration`` steps are complete; at most the unflushed buffer is
  lost. SIGINT and SIGTERM received during a run are deferred to the end of the current step:
  the buffer is flushed, then the signal is delivered as usual (KeyboardInterrupt, or the
  previous SIGTERM action).
* **Resume.** ``resume=True`` continues from the last stored step with the stored random state,
  so an interrupted-and-resumed run reproduces the uninterrupted run with the same seed
  exactly. A chain made with a different config hash is never appended to.
* **Convergence.** Every ``check_every`` steps the integrated autocorrelation time tau of each
  parameter is estimated over the whole stored chain (``emcee.autocorr.integrated_time`` with
  ``tol=0``). The run stops when ``n_steps > tau_factor * max(tau)`` and the largest relative
  change of tau since the previous check is below ``tau_rtol``. This is the rule of the emcee
  documentation ("Saving & monitoring progress" tutorial; Foreman-Mackey et al. 2013, Sec. 3),
  common practice, not a guarantee: tau estimated from a chain that has not yet explored a
  multi-modal or strongly curved posterior is itself underestimated.
* **Burn-in and thinning** of the returned samples: ``burn_in = int(2 max tau)`` and
  ``thin = max(1, int(min tau / 2))``, the choice of the same emcee tutorial (common practice).

Settings and results: :mod:`.settings`; the chain file: :mod:`.backend`.
"""
from __future__ import annotations

import json
import os
import signal
import sys
import threading
import time
import warnings
from typing import Any

import emcee
import numpy as np

from ..errors import ConfigError, ErgofitError
from .backend import (CHAIN_FILENAME, ChainWriter, RunLock, StoredChain, create_chain_file, read_chain,
                      set_root_attrs)
from .moves import emcee_moves, same_moves
from .pools import choose_evaluation
from .settings import ConvergenceWarning, SamplerResult, SamplerSettings

__all__ = ["load_chain", "run_sampler"]

_MAX_BALL_ROUNDS = 100



def _check_likelihood(lik: Any) -> tuple[list[str], list[str], np.ndarray, np.ndarray, np.ndarray]:
    for attr in ("parameter_names", "labels", "prior_bounds", "start", "start_scale", "log_prob",
                 "config_hash"):
        if not hasattr(lik, attr):
            raise ErgofitError(f"likelihood object has no attribute '{attr}' needed by the sampler")
    names = [str(n) for n in lik.parameter_names]
    n_dim = len(names)
    if n_dim == 0:
        raise ErgofitError("likelihood has no sampled parameters (parameter_names is empty)")
    if len(set(names)) != n_dim:
        raise ErgofitError(f"likelihood parameter_names {names} contain duplicates")
    labels = [str(s) for s in lik.labels]
    if len(labels) != n_dim:
        raise ErgofitError(
            f"likelihood labels has {len(labels)} entries, expected {n_dim} (one per parameter)"
        )
    bounds = np.asarray(lik.prior_bounds, dtype=float)
    if bounds.shape != (n_dim, 2) or np.isnan(bounds).any() or np.any(bounds[:, 0] >= bounds[:, 1]):
        raise ErgofitError(
            f"likelihood prior_bounds: expected an ({n_dim}, 2) array with lower < upper, "
            f"got {np.array2string(bounds, separator=', ')}"
        )
    start = np.asarray(lik.start, dtype=float)
    scale = np.asarray(lik.start_scale, dtype=float)
    for attr, arr in (("start", start), ("start_scale", scale)):
        if arr.shape != (n_dim,) or not np.all(np.isfinite(arr)):
            raise ErgofitError(f"likelihood {attr}: expected {n_dim} finite numbers, got {arr}")
    if np.any(scale <= 0):
        bad = names[int(np.argmax(scale <= 0))]
        raise ErgofitError(f"likelihood start_scale for '{bad}' must be > 0")
    outside = (start <= bounds[:, 0]) | (start >= bounds[:, 1])
    if outside.any():
        i = int(np.argmax(outside))
        raise ErgofitError(
            f"start value {start[i]:g} of '{names[i]}' is outside its prior "
            f"[{bounds[i, 0]:g}, {bounds[i, 1]:g}]"
        )
    if not isinstance(lik.config_hash, str) or not lik.config_hash:
        raise ErgofitError("likelihood config_hash: expected a non-empty string")
    return names, labels, bounds, start, scale


def _checked_log_prob(lik: Any, theta: np.ndarray) -> np.ndarray:
    lp = np.asarray(lik.log_prob(theta), dtype=float)
    if lp.shape != (theta.shape[0],):
        raise ErgofitError(
            f"likelihood log_prob returned shape {lp.shape} for {theta.shape[0]} walkers; "
            f"expected ({theta.shape[0]},)"
        )
    bad = np.isnan(lp) | (lp == np.inf)
    if bad.any():
        i = int(np.argmax(bad))
        raise ErgofitError(
            f"likelihood log_prob is {lp[i]} at theta = {np.array2string(theta[i], separator=', ')}; "
            "expected a finite number or -inf outside the prior"
        )
    return lp


class _VectorisedLogProb:
    """log posterior for all walkers at once (emcee ``vectorize=True``)."""

    def __init__(self, lik: Any):
        self.lik = lik

    def __call__(self, theta: np.ndarray) -> np.ndarray:
        return _checked_log_prob(self.lik, np.atleast_2d(theta))


# --------------------------------------------------------------------------------------------
# Chain file: emcee HDF5 layout plus ergofit metadata
# --------------------------------------------------------------------------------------------


class _DeferredSignals:
    """Record SIGINT/SIGTERM during a run; deliver them after the chain is flushed.

    Only active in the main thread (Python allows signal handlers nowhere else). A second
    SIGINT while one is pending raises KeyboardInterrupt at once.
    """

    _SIGNALS = tuple(s for s in (getattr(signal, "SIGINT", None), getattr(signal, "SIGTERM", None))
                     if s is not None)

    def __init__(self) -> None:
        self.received: int | None = None
        self._old: dict[int, Any] = {}

    def _handler(self, signum, frame) -> None:
        if self.received is not None and signum == signal.SIGINT:
            raise KeyboardInterrupt
        self.received = signum

    def __enter__(self) -> _DeferredSignals:
        if threading.current_thread() is threading.main_thread():
            for s in self._SIGNALS:
                self._old[s] = signal.getsignal(s)
                signal.signal(s, self._handler)
        return self

    def restore(self) -> None:
        for s, old in self._old.items():
            signal.signal(s, old if old is not None else signal.SIG_DFL)
        self._old = {}

    def __exit__(self, exc_type, exc, tb) -> None:
        self.restore()
        if self.received is not None and exc_type is None:
            if self.received == signal.SIGINT:
                raise KeyboardInterrupt
            signal.raise_signal(self.received)


# --------------------------------------------------------------------------------------------
# Convergence helpers
# --------------------------------------------------------------------------------------------


def _tau(chain: np.ndarray) -> np.ndarray:
    """Integrated autocorrelation time per parameter (emcee, tol=0) of an (n, walkers, dim) chain."""
    if chain.shape[0] < 2:
        return np.full(chain.shape[2], np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(emcee.autocorr.integrated_time(chain, tol=0), dtype=float)


def _stop_rule(n_steps: int, tau: np.ndarray, tau_prev: np.ndarray | None,
               settings: SamplerSettings) -> bool:
    if tau_prev is None or not np.all(np.isfinite(tau)) or not np.all(np.isfinite(tau_prev)):
        return False
    long_enough = n_steps > settings.tau_factor * float(np.max(tau))
    stable = float(np.max(np.abs(tau_prev - tau) / tau)) < settings.tau_rtol
    return bool(long_enough and stable)


def _burn_thin(n_steps: int, tau: np.ndarray) -> tuple[int, int, list[str]]:
    notes = []
    if np.all(np.isfinite(tau)):
        burn_in = int(2 * np.max(tau))
        thin = max(1, int(0.5 * np.min(tau)))
    else:
        burn_in, thin = n_steps // 2, 1
        notes.append("autocorrelation time unavailable; burn-in set to half the chain")
    if burn_in >= n_steps:
        notes.append(
            f"burn-in 2*max(tau) = {burn_in} is not shorter than the chain ({n_steps} steps); "
            "kept the second half of the chain: the chain is far too short"
        )
        burn_in = n_steps // 2
    if n_steps - burn_in < thin:
        thin = 1
    return burn_in, thin, notes


def _acceptance(initial: np.ndarray, chain: np.ndarray) -> np.ndarray:
    """Per-walker accepted counts: a stretch-move step is accepted iff the walker moved."""
    if chain.shape[0] == 0:
        return np.zeros(initial.shape[0])
    previous = np.concatenate([initial[None], chain[:-1]], axis=0)
    return np.any(chain != previous, axis=2).sum(axis=0).astype(float)


def _result_from(stored: StoredChain, path: str, notes: list[str] | None = None) -> SamplerResult:
    notes = list(notes or [])
    n = stored.iteration
    if n == 0:
        raise ErgofitError(
            f"chain file {path} has no stored steps yet; continue the run with resume "
            "(--resume) or remove the file"
        )
    tau = _tau(stored.chain)
    burn_in, thin, burn_notes = _burn_thin(n, tau)
    notes += burn_notes
    kept = stored.chain[burn_in + thin - 1::thin]
    kept_lp = stored.log_prob[burn_in + thin - 1::thin]
    samples = kept.reshape(-1, stored.n_dim)
    log_prob = kept_lp.reshape(-1)
    flat_lp = stored.log_prob.reshape(-1)
    i_best = int(np.argmax(flat_lp))
    best = stored.chain.reshape(-1, stored.n_dim)[i_best]
    accepted = _acceptance(stored.initial_coords, stored.chain)
    converged = stored.status == "converged"
    if stored.status == "running":
        notes.append(f"run was interrupted after {n} steps; continue it with resume (--resume)")
    elif not converged:
        tau_text = f"{np.max(tau):.1f}" if np.all(np.isfinite(tau)) else "undefined"
        notes.append(
            f"not converged: the stop rule n_steps > {stored.settings.get('tau_factor')} max(tau) "
            f"was not met in {n} steps (max tau = {tau_text}); resume with a larger max_steps"
        )
    return SamplerResult(
        samples=samples, log_prob=log_prob, parameter_names=stored.names, labels=stored.labels,
        prior_bounds=stored.bounds, n_steps=n, n_walkers=stored.n_walkers, tau=tau,
        acceptance_fraction=float(np.mean(accepted) / n), converged=converged, burn_in=burn_in,
        thin=thin, chain_path=path, config_hash=stored.config_hash, best_fit=best.copy(),
        best_log_prob=float(flat_lp[i_best]), status=stored.status, seed=stored.seed,
        settings=stored.settings, notes=notes,
    )


def _chain_path(out_dir: str | os.PathLike) -> str:
    out_dir = os.fspath(out_dir)
    if out_dir.endswith(".h5") and not os.path.isdir(out_dir):
        return out_dir
    return os.path.join(out_dir, CHAIN_FILENAME)


def chain_status(path: str | os.PathLike) -> tuple[str, str, int]:
    """(config hash, status, number of stored steps) of a chain file, without its arrays."""
    stored = read_chain(os.fspath(path), with_arrays=False)
    return stored.config_hash, stored.status, int(stored.iteration)


def load_chain(out_dir: str | os.PathLike) -> SamplerResult:
    """Read the chain of a finished or interrupted run (``OUT_DIR/chain.h5``, or a ``.h5`` path).

    Burn-in, thinning and tau are recomputed from the stored chain (see the module docstring).
    Raises ErgofitError (one line, naming the file) when the file is missing, unreadable, not an
    ergofit chain, or has no stored step.
    """
    path = _chain_path(out_dir)
    if not os.path.isfile(path):
        raise ErgofitError(f"no chain file {path}; run the sampler first")
    return _result_from(read_chain(path), path)


# --------------------------------------------------------------------------------------------
# The run
# --------------------------------------------------------------------------------------------


def _initial_ball(lik: Any, centre, scale, bounds, names, settings: SamplerSettings,
                  rng: np.random.Generator, cov: np.ndarray | None = None,
                  what: str = "start") -> tuple[np.ndarray, np.ndarray]:
    """Walkers from N(centre, (ball scale)^2), or N(centre, ball^2 cov) when ``cov`` is given;
    walkers outside the prior (or with log_prob = -inf) are redrawn."""
    n_walkers, n_dim = settings.n_walkers, len(centre)
    coords = np.empty((n_walkers, n_dim))
    log_prob = np.full(n_walkers, -np.inf)
    todo = np.ones(n_walkers, dtype=bool)
    root = None if cov is None else np.linalg.cholesky(cov)
    for _ in range(_MAX_BALL_ROUNDS):
        k = int(todo.sum())
        z = rng.standard_normal((k, n_dim))
        step = z * scale if root is None else z @ root.T
        coords[todo] = centre + settings.ball * step
        inside = np.all((coords > bounds[:, 0]) & (coords < bounds[:, 1]), axis=1)
        check = todo & inside
        if check.any():
            log_prob[check] = _checked_log_prob(lik, coords[check])
        todo = ~(inside & np.isfinite(log_prob))
        if not todo.any():
            return coords, log_prob
    raise ErgofitError(
        f"could not place {int(todo.sum())} of {n_walkers} walkers inside the prior (finite "
        f"log_prob) in {_MAX_BALL_ROUNDS} draws around the {what}; reduce parameters.<name>.scale or "
        f"move parameters.<name>.start of {names} away from the prior edges"
    )


def _start_walkers(lik: Any, start, scale, bounds, names, settings: SamplerSettings,
                   rng: np.random.Generator, report) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Initial walkers of a new chain (``settings.start``: "ball" or "optimum", see .start)."""
    if settings.start == "ball":
        coords, lp = _initial_ball(lik, start, scale, bounds, names, settings, rng)
        return coords, lp, []
    from .start import find_optimum
    t0 = time.perf_counter()
    opt = find_optimum(lambda th: _checked_log_prob(lik, th), start, scale, bounds, rng)
    chi2 = _chi2_of(lik, opt.best, opt.log_prob)
    text = ", ".join(f"{n} = {v:.6g}" for n, v in zip(names, opt.best))
    line = (f"best fit (posterior maximum, {opt.n_evaluations} evaluations in "
            f"{time.perf_counter() - t0:.2g} s): {text}; chi2 = {chi2:.3f}")
    notes = [line]
    if report is not None:
        report(line)
        if opt.note:
            report("note: " + opt.note)
    if opt.note:
        notes.append(opt.note)
    coords, lp = _initial_ball(lik, opt.best, scale, bounds, names, settings, rng, cov=opt.cov,
                               what="best fit")
    return coords, lp, notes


def _chi2_of(lik: Any, theta: np.ndarray, log_prob: float) -> float:
    """chi2 of the data at theta (the likelihood's own, or -2 log posterior without one)."""
    fn = getattr(lik, "chi2", None)
    if callable(fn):
        try:
            return float(np.asarray(fn(theta)).reshape(-1)[0])
        except (TypeError, ValueError, IndexError):
            pass
    return -2.0 * float(log_prob)


def _moves_text(moves: dict) -> str:
    return " + ".join(f"{name} {w:g}" for name, w in moves.items())


def _emcee_state_from_seed(rng: np.random.Generator) -> tuple:
    return np.random.RandomState(int(rng.integers(2**32 - 1))).get_state()


def run_sampler(lik: Any, settings: SamplerSettings | None, out_dir: str | os.PathLike,
                resume: bool = False, pool: Any = None, report=None) -> SamplerResult:
    """Sample the posterior of ``lik`` with emcee and store the chain in ``out_dir/chain.h5``.

    lik: object with parameter_names, labels, prior_bounds, start, start_scale, config_hash and
        a vectorised ``log_prob(theta[n_walkers, n_dim]) -> (n_walkers,)`` (-inf outside prior).
    settings: :class:`SamplerSettings` (``None``: defaults).
    resume: continue the chain stored in ``out_dir`` (made with the same config hash). Without
        it, an existing chain is never touched: the call refuses.
    pool: object with a ``map`` method (multiprocessing pool, MPI pool); the log posterior is then
        evaluated walker by walker through ``pool.map`` (the likelihood must be picklable, and
        is pickled with every map call: worth it only when one evaluation takes milliseconds or
        more). Start multiprocessing workers with ``initializer=signal.signal,
        initargs=(signal.SIGINT, signal.SIG_IGN)`` so that Ctrl-C reaches only this process,
        which then stops cleanly after the current step. The pool gets one chunk of walkers
        per worker and step (evaluated vectorised there), and only when that is measured to be
        more than 10 % faster than one process with at least 2 workers
        (:func:`.pools.choose_evaluation`); otherwise the run stays in this process and says so.
    report: callable taking one line (e.g. ``print``): the best fit before a new chain starts,
        whether the pool is used, a change of moves on resume. ``None``: silent.

    Returns the :class:`SamplerResult` read back from the file. Emits :class:`ConvergenceWarning`
    when ``max_steps`` is reached before the stop rule is met.
    """
    settings = SamplerSettings() if settings is None else settings
    if not isinstance(settings, SamplerSettings):
        raise ErgofitError(f"settings: expected SamplerSettings, got {type(settings).__name__}")
    names, labels, bounds, start, scale = _check_likelihood(lik)
    n_dim = len(names)
    if settings.n_walkers < 2 * n_dim:
        raise ConfigError(
            f"sampler setting 'n_walkers' = {settings.n_walkers}: expected at least "
            f"2 x {n_dim} parameters = {2 * n_dim}"
        )
    out_dir = os.fspath(out_dir)
    if os.path.exists(out_dir) and not os.path.isdir(out_dir):
        raise ErgofitError(f"output folder {out_dir} exists and is not a folder")
    os.makedirs(out_dir, exist_ok=True)
    with RunLock(out_dir):
        return _run_locked(lik, settings, out_dir, resume, pool, names, labels, bounds, start,
                           scale, report)


def _run_locked(lik, settings: SamplerSettings, out_dir: str, resume: bool, pool, names, labels,
                bounds, start, scale, report=None) -> SamplerResult:
    path = os.path.join(out_dir, CHAIN_FILENAME)
    notes: list[str] = []

    if os.path.exists(path) and not resume:
        raise ErgofitError(
            f"chain file {path} exists already; continue it with resume (--resume) or choose a new "
            "output folder"
        )

    if os.path.exists(path):
        stored = read_chain(path)
        if stored.config_hash != lik.config_hash:
            raise ErgofitError(
                f"chain file {path} was made with config hash {stored.config_hash}, this config has "
                f"{lik.config_hash}; start a new run in a new output folder or remove the chain file"
            )
        if stored.names != names:
            raise ErgofitError(
                f"chain file {path} samples {stored.names}, the likelihood samples {names}; start a "
                "new run in a new output folder"
            )
        if stored.n_walkers != settings.n_walkers:
            raise ConfigError(
                f"sampler setting 'n_walkers' = {settings.n_walkers} differs from the "
                f"{stored.n_walkers} walkers of {path}; resume with n_walkers: {stored.n_walkers}"
            )
        n0 = stored.iteration
        seed = stored.seed
        start_notes: list[str] = []
        if n0 == 0:
            coords, log_prob = stored.initial_coords, stored.initial_log_prob
        else:
            coords, log_prob = stored.chain[-1], stored.log_prob[-1]
        random_state = stored.random_state
        if random_state is None:
            ss = np.random.SeedSequence([int(seed), n0])
            random_state = _emcee_state_from_seed(np.random.default_rng(ss))
            notes.append("stored random state did not match the last step; continued with a "
                         "fresh one derived from the seed (the chain stays valid but differs from "
                         "an uninterrupted run)")
        # Rebuild the convergence bookkeeping of the uninterrupted run.
        c = (n0 // settings.check_every) * settings.check_every
        tau_prev = _tau(stored.chain[:c]) if c > 0 else None
        # The stop rule is re-evaluated with the current settings: a chain that met it stays
        # finished; one that met a laxer rule (e.g. a smaller tau_factor) is continued.
        already = False
        if c == n0 and c > settings.check_every:
            already = _stop_rule(n0, tau_prev, _tau(stored.chain[:c - settings.check_every]),
                                 settings)
        if already:
            if stored.status != "converged":
                set_root_attrs(path, status="converged")
            return _result_from(read_chain(path), path, notes + ["run had converged already"])
        if stored.status == "converged":
            notes.append(f"continued a chain that had converged under other settings at {n0} steps")
        accepted = _acceptance(stored.initial_coords, stored.chain)
        if not same_moves(stored.settings.get("moves"), settings.moves):
            was = stored.settings.get("moves") or {"stretch": 1.0}
            line = (f"resumed at step {n0} with other moves: {_moves_text(settings.moves)} "
                    f"(the stored steps used {_moves_text(was)}); the posterior is the same, "
                    "only the mixing differs")
            notes.append(line)
            if report is not None:
                report(line)
        store_settings = dict(stored.settings, **{k: v for k, v in settings.to_dict().items()
                                                  if k not in ("seed", "n_walkers")})
        set_root_attrs(path, settings=json.dumps(store_settings), status="running")
    else:
        ss = np.random.SeedSequence(settings.seed)
        seed = str(ss.entropy)
        rng = np.random.default_rng(ss)
        coords, log_prob, start_notes = _start_walkers(lik, start, scale, bounds, names, settings,
                                                       rng, report)
        random_state = _emcee_state_from_seed(rng)
        store_settings = settings.to_dict()
        create_chain_file(path, names, labels, bounds, lik.config_hash, store_settings, seed,
                           coords, log_prob, random_state)
        n0, tau_prev, accepted = 0, None, np.zeros(settings.n_walkers)

    if n0 >= settings.max_steps:
        set_root_attrs(path, status="max_steps")
        result = _result_from(read_chain(path), path, notes)
        warnings.warn(f"{path}: " + result.notes[-1], ConvergenceWarning, stacklevel=3)
        return result

    if n0 == 0:
        notes += start_notes
    converged = _sample(lik, settings, path, pool, coords, log_prob, random_state, n0, tau_prev,
                        accepted, first=n0 == 0, report=report)
    result = _result_from(read_chain(path), path, notes)
    if not converged:
        warnings.warn(f"{path}: " + result.notes[-1], ConvergenceWarning, stacklevel=3)
    return result


def _sample(lik, settings: SamplerSettings, path: str, pool, coords, log_prob, random_state,
            n0: int, tau_prev, accepted, first: bool, report=None) -> bool:
    """Run emcee from (coords, log_prob, random_state) at step n0; return True if converged."""
    n_walkers, n_dim = coords.shape
    if pool is not None and not hasattr(pool, "map"):
        raise ErgofitError(f"pool: expected an object with a map method, got {type(pool).__name__}")
    log_prob_fn, message = choose_evaluation(_VectorisedLogProb(lik), pool, np.array(coords))
    if message and report is not None:
        report(message)
    sampler = emcee.EnsembleSampler(n_walkers, n_dim, log_prob_fn, vectorize=True,
                                    moves=emcee_moves(settings.moves))
    state = emcee.State(np.array(coords), log_prob=np.array(log_prob), random_state=random_state)
    writer = ChainWriter(path, n0, accepted, settings)
    writer.ensure_capacity(settings.max_steps)
    bar = _progress_bar(settings, n0)
    converged = False
    finished = False
    it = n0
    previous = np.array(coords)
    tau_text = "tau=?"
    try:
        with _DeferredSignals() as signals:
            try:
                try:
                    steps = sampler.sample(state, iterations=settings.max_steps - n0, store=False,
                                           skip_initial_state_check=not first)
                    for state in steps:
                        it += 1
                        moved = np.any(state.coords != previous, axis=1)
                        previous = np.array(state.coords)
                        writer.add(state.coords, state.log_prob, moved, state.random_state)
                        check = it % settings.check_every == 0
                        if check or writer.due() or it == settings.max_steps:
                            writer.flush()
                        if check:
                            tau = _tau(read_chain(path).chain)
                            converged = _stop_rule(it, tau, tau_prev, settings)
                            tau_prev = tau
                            tau_text = (f"tau={np.max(tau):.1f} (need {settings.tau_factor:g} tau"
                                        f" = {settings.tau_factor * np.max(tau):.0f} steps)")
                        if bar is not None:
                            bar.update(1)
                            if check or it % 20 == 0:
                                bar.set_postfix_str(
                                    f"{tau_text} acc={np.mean(writer.accepted) / it:.2f}"
                                    + (" converged" if converged else ""), refresh=check)
                        if converged or signals.received is not None:
                            break
                    finished = True
                except ValueError as exc:
                    if isinstance(exc, ErgofitError):
                        raise
                    if "condition number" in str(exc):
                        raise ErgofitError(
                            "initial walkers are not linearly independent; increase "
                            "parameters.<name>.scale of the sampled parameters") from None
                    raise
            finally:
                writer.flush()
                if finished and signals.received is None:
                    set_root_attrs(path, status="converged" if converged else "max_steps")
                signals.restore()
    finally:
        if bar is not None:
            bar.close()
    return converged


class _LineProgress:
    """Progress for a log file (stderr not a terminal): one line every ``percent`` % of the
    steps or every ``seconds``, instead of carriage-return updates."""

    def __init__(self, total: int, initial: int, percent: float = 10.0, seconds: float = 60.0,
                 stream=None):
        self.total, self.n = total, initial
        self.every = max(1, int(total * percent / 100.0))
        self.seconds = seconds
        self.stream = sys.stderr if stream is None else stream
        self.postfix = ""
        self.t0 = self.t_last = time.monotonic()
        self.n_last = initial

    def update(self, k: int = 1) -> None:
        self.n += k
        now = time.monotonic()
        if self.n // self.every > self.n_last // self.every or now - self.t_last >= self.seconds:
            self._line(now)

    def set_postfix_str(self, text: str, refresh: bool = False) -> None:
        self.postfix = text

    def _line(self, now: float) -> None:
        rate = (self.n - self.n_last) / max(now - self.t_last, 1e-9)
        print(f"sampling: {self.n}/{self.total} steps ({100.0 * self.n / self.total:.0f}%), "
              f"{rate:.0f} steps/s, {self.postfix}".rstrip(", "), file=self.stream, flush=True)
        self.t_last, self.n_last = now, self.n

    def close(self) -> None:
        if self.n != self.n_last:
            self._line(time.monotonic())


def _progress_bar(settings: SamplerSettings, n0: int):
    if not settings.progress:
        return None
    if not sys.stderr.isatty():
        return _LineProgress(settings.max_steps, n0)
    from tqdm.auto import tqdm

    return tqdm(total=settings.max_steps, initial=n0, unit="step", desc="sampling",
                dynamic_ncols=True)
