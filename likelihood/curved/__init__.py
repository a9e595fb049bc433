"""The curved-sky engine: exact linear-theory expectation of large-scale clustering measured
by an observer at the origin (spherical Fourier–Bessel approach; docs/curved_sky.md).

Self-contained: it imports nothing from the rest of ``likelihood`` but ``likelihood.errors``;
the cosmology is passed in (duck-typed: comoving_distance, conformal_hubble,
conformal_hubble_ratio, Omega_m, Omega_m0, growth_factor, growth_rate, transfer, power).
"""
from .angular import ANGULAR_TERMS, AngularResolution, angular_cl, angular_cl_resolved
from .lightcone import (INTEGRATED_TERMS, LOCAL_TERMS, TERMS, LightCone, ResolutionWarning,
                        TracerCoefficients)

__all__ = ["angular_cl", "angular_cl_resolved", "AngularResolution", "ANGULAR_TERMS",
           "LightCone", "TracerCoefficients", "ResolutionWarning", "TERMS", "LOCAL_TERMS",
           "INTEGRATED_TERMS"]
