"""ergofit: likelihood and run tool for the largest-scale galaxy power spectrum multipoles.

Public Python surface: :class:`Cosmology` (background, growth, linear power, σ8),
:class:`Tracer` (bias, f_NL, evolution and magnification bias), :func:`load_config` (validated
YAML) and :func:`build` (the likelihood: ``log_prob(theta)`` vectorised over walkers,
``log_likelihood(params)``, ``parameter_names``).
"""
from .config.schema import load_config
from .theory.cosmology import Cosmology
from .errors import ConfigError, DataError, ErgofitError
from .model import Likelihood, build
from .theory.tracer import PlaneParallelWarning, Tracer

__version__ = "0.1.0"

__all__ = ["Cosmology", "Tracer", "Likelihood", "load_config", "build", "ErgofitError", "ConfigError",
           "DataError", "PlaneParallelWarning", "__version__"]
