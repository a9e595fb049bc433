"""Process pools for the command line: an MPI pool (optional extra: mpi4py, mpich, schwimmbad).

Worker ranks serve the master's tasks inside :func:`mpi_pool` and exit there, so code after the
call runs on the master only.
"""
from __future__ import annotations

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
