"""Process pools for the command line: a local process pool or an MPI pool (optional extra:
mpi4py, mpich, schwimmbad). One place creates them for every command (``run``, ``forecast``).

Worker ranks serve the master's tasks inside :func:`mpi_pool` and exit there, so code after the
call runs on the master only.
"""
from __future__ import annotations

import contextlib
import sys

from ..errors import ErgofitError


#: an idle MPI worker polls without pause this long after its last task (the gap between two
#: steps' tasks while sampling is far shorter), then sleeps between polls
SPIN_SECONDS = 5e-3
#: longest sleep between two polls of an idle worker (the delay of the first task after a pause)
MAX_PAUSE_SECONDS = 0.02


def _resting_pool_class(MPIPool):
    """schwimmbad's MPIPool whose idle workers sleep between polls.

    schwimmbad's workers wait in a blocking receive, and mpich's blocking receive polls: an idle
    worker takes a whole core while the master builds the model, finds the posterior maximum,
    runs in one process after a fallback or writes the summary (measured: 1.86 s of worker CPU
    during 1.88 s of master work). Here a worker probes for a task, polls without pause for
    ``SPIN_SECONDS`` after its last task and then sleeps up to ``MAX_PAUSE_SECONDS`` between
    probes (≈ 0 % CPU when idle)."""

    class RestingMPIPool(MPIPool):
        def wait(self, callback=None):
            if self.is_master():
                return
            import time
            from mpi4py import MPI
            status = MPI.Status()
            last = time.perf_counter()
            while True:
                if not self.comm.Iprobe(source=self.master, tag=MPI.ANY_TAG, status=status):
                    idle = time.perf_counter() - last
                    if idle > SPIN_SECONDS:
                        time.sleep(min(MAX_PAUSE_SECONDS, 0.1 * idle))
                    continue
                task = self.comm.recv(source=self.master, tag=status.tag)
                if task is None:
                    break
                func, arg = task
                self.comm.ssend(func(arg), self.master, status.tag)
                last = time.perf_counter()
            if callback is not None:
                callback()

    return RestingMPIPool


def mpi_pool():
    """An MPI pool on the master rank (workers wait in here, sleeping when idle, and then exit)."""
    try:
        from schwimmbad import MPIPool
    except ImportError:
        raise ErgofitError("--mpi needs the optional extra (mpi4py, mpich, schwimmbad): "
                           "pip install 'ergofit[mpi]'") from None
    try:
        pool = _resting_pool_class(MPIPool)()
    except (ValueError, RuntimeError, ImportError, OSError) as exc:
        raise ErgofitError(f"--mpi: cannot start an MPI pool ({str(exc).splitlines()[0]}); "
                           "run under mpiexec -n N with N >= 2") from None
    if not pool.is_master():
        pool.wait()
        sys.exit(0)
    return pool


@contextlib.contextmanager
def pool_for(processes=0, mpi=False):
    """``with pool_for(n, mpi) as pool``: an MPI pool (``mpi``), a forked pool of ``processes``
    local workers that ignore Ctrl-C (the master handles it), or None (serial) for n <= 1."""
    processes = int(processes or 0)
    if processes < 0:
        raise ErgofitError(f"--processes {processes}: expected 0 (serial) or a positive number")
    if mpi:
        pool = mpi_pool()   # worker ranks serve the pool and exit there
        try:
            yield pool
        finally:
            close_pool(pool)
    elif processes > 1:
        import multiprocessing
        import signal
        with multiprocessing.get_context("fork").Pool(
                processes, initializer=signal.signal, initargs=(signal.SIGINT, signal.SIG_IGN)) as pool:
            yield pool
    else:
        yield None


# --------------------------------------------------------------------------------------------
# Pools that pay: chunks of walkers per worker, and a measured fallback to one process
# --------------------------------------------------------------------------------------------


def close_pool(pool) -> None:
    """Close an MPI pool once (idempotent): its workers leave ``pool.wait`` and exit."""
    if pool is not None and not getattr(pool, "_ergofit_closed", False):
        pool.close()
        pool._ergofit_closed = True


def release_unused(pool) -> None:
    """A pool the run does not use: MPI workers wait for tasks by polling (mpich's blocking
    receive spins), which takes a core from the master, so an MPI pool is closed at once and
    its workers exit; a local process pool's idle workers sleep on a pipe and are left alone."""
    if pool is not None and hasattr(pool, "is_master") and hasattr(pool, "workers"):
        close_pool(pool)


def pool_size(pool) -> int:
    """Number of workers of a multiprocessing or schwimmbad pool (1 if unknown)."""
    for attr in ("_processes", "size"):
        n = getattr(pool, attr, None)
        if isinstance(n, int) and n > 0:
            return n
    return 1


class ChunkedLogProb:
    """Vectorised log posterior that hands each worker one chunk of walkers (``pool.map`` over
    ``n_workers`` chunks, each evaluated vectorised by the worker's own copy of the likelihood).
    One task per worker and step: the per-walker pickling of a per-walker map is gone, and the
    likelihood itself travels as its config (``Likelihood.__reduce__``)."""

    def __init__(self, evaluate, pool, n_workers: int):
        self.evaluate, self.pool, self.n_workers = evaluate, pool, max(1, int(n_workers))

    def __call__(self, theta):
        import numpy as np
        theta = np.atleast_2d(theta)
        chunks = [c for c in np.array_split(theta, min(self.n_workers, theta.shape[0])) if len(c)]
        return np.concatenate(list(self.pool.map(self.evaluate, chunks)))


#: an ensemble evaluation faster than this in one process is not worth a pool: one round trip of
#: a pool map with two workers costs ~0.2-1 ms on this kind of machine (measured with
#: bench/sampler.py), so the pool could at best break even.
POOL_MIN_SECONDS = 2e-3


#: the pool must be measured this much faster than one process (a 10 % margin): a probe of a few
#: evaluations on a shared machine carries ~10-20 % of load noise, and a pool chosen on noise
#: runs slower than one process for the whole chain
POOL_MARGIN = 0.9


def choose_evaluation(evaluate, pool, coords, repeats: int = 3):
    """Decide whether ``pool`` pays for the ensemble ``coords``.

    Times ``evaluate(coords)`` in this process and the chunked pool evaluation (after one warm-up
    map, in which each worker builds its likelihood); the pool is used only when it is faster by
    more than 10 % (``POOL_MARGIN``), and never with one worker (the master would only wait).
    Returns ``(log_prob_fn, message)``: the chunked evaluator or ``evaluate`` itself, and a
    one-line message saying what was chosen and why ("" without a pool).
    """
    import time
    if pool is None:
        return evaluate, ""
    n = pool_size(pool)
    if n < 2:
        release_unused(pool)
        return evaluate, ("pool of 1 worker not used: the master would wait while its one worker "
                          "evaluates, which cannot beat one process (MPI: use 3 or more ranks); "
                          "running in one process")
    t_serial = min(_timed(evaluate, coords) for _ in range(repeats))
    if t_serial < POOL_MIN_SECONDS:
        release_unused(pool)
        return evaluate, (f"pool of {n} workers not used: one evaluation of all {len(coords)} walkers "
                          f"takes {1e3 * t_serial:.2f} ms in this process (vectorised), a pool would "
                          "be slower; running in one process")
    chunked = ChunkedLogProb(evaluate, pool, n)
    t0 = time.perf_counter()
    chunked(coords)                        # warm-up: each worker builds its model here
    t_warm = time.perf_counter() - t0
    t_pool = min(_timed(chunked, coords) for _ in range(repeats))
    if t_pool >= POOL_MARGIN * t_serial:
        release_unused(pool)
        return evaluate, (f"pool of {n} workers not used: {1e3 * t_pool:.1f} ms per step against "
                          f"{1e3 * t_serial:.1f} ms in one process (a pool must be 10 % faster); "
                          "running in one process")
    return chunked, (f"pool of {n} workers: {1e3 * t_pool:.1f} ms per step against "
                     f"{1e3 * t_serial:.1f} ms in one process (workers ready in {t_warm:.1f} s)")


def _timed(fn, x) -> float:
    import time
    t0 = time.perf_counter()
    fn(x)
    return time.perf_counter() - t0
