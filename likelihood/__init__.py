"""ergofit: likelihood and run tool for the largest-scale galaxy power spectrum multipoles.

Public Python surface (see shared design): :class:`Cosmology`, :class:`Tracer`,
:func:`load_config`, :func:`build`.
"""
from .errors import ErgofitError, ConfigError, DataError

__version__ = "0.1.0"

__all__ = ["ErgofitError", "ConfigError", "DataError", "__version__"]

try:  # the modules below are filled in progressively; keep the package importable
    from .cosmology import Cosmology  # noqa: F401
    __all__.append("Cosmology")
except ImportError:  # pragma: no cover
    pass
try:
    from .tracer import Tracer  # noqa: F401
    __all__.append("Tracer")
except ImportError:  # pragma: no cover
    pass
try:
    from .config import load_config  # noqa: F401
    from .model import build  # noqa: F401
    __all__ += ["load_config", "build"]
except ImportError:  # pragma: no cover
    pass
