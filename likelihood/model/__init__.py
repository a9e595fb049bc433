"""The likelihood model: one factory per config section (:mod:`.factories`), the forward model and
its templates (:mod:`.templates`), the fiducial rules (:mod:`.fiducial`) and the thin Gaussian
likelihood (:mod:`.likelihood`)."""
from .factories import build
from .likelihood import Likelihood

__all__ = ["Likelihood", "build"]
