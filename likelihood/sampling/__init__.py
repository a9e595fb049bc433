"""Sampling: the emcee driver, the HDF5 chain, process/MPI pools."""
