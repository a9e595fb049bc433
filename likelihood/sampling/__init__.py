"""Sampling: the emcee driver (:mod:`.driver`), the HDF5 chain beside emcee's backends
(:mod:`.backend`), settings and results (:mod:`.settings`), process/MPI pools (:mod:`.pools`)."""
from .backend import CHAIN_FILENAME
from .driver import load_chain, run_sampler
from .settings import ConvergenceWarning, SamplerResult, SamplerSettings

__all__ = ["CHAIN_FILENAME", "ConvergenceWarning", "SamplerResult", "SamplerSettings", "load_chain",
           "run_sampler"]
