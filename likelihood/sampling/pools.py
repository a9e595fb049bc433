"""Process pools for the command line: a local process pool or an MPI pool (optional extra:
mpi4py, mpich, schwimmbad). One place creates them for every command (``run``, ``forecast``).

Worker ranks serve the master's tasks inside :func:`mpi_pool` and exit there, so code after the
call runs on the master only.
"""
from __future__ import annotations

import contextlib
import sys

from ..errors import ErgofitError


def mpi_pool():
    """A schwimmbad MPIPool on the master rank (workers wait in here and then exit)."""
    try:
        from schwimmbad import MPIPool
    except ImportError:
        raise ErgofitError("--mpi needs the optional extra (mpi4py, mpich, schwimmbad): "
                           "pip install 'ergofit[mpi]'") from None
    try:
        pool = MPIPool()
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
            pool.close()
    elif processes > 1:
        import multiprocessing
        import signal
        with multiprocessing.get_context("fork").Pool(
                processes, initializer=signal.signal, initargs=(signal.SIGINT, signal.SIG_IGN)) as pool:
            yield pool
    else:
        yield None
