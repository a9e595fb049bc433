"""Exception types of ergofit.

Every user-facing error is a ``ValueError`` subclass carrying a one-line message that names the
offending file, key or value and what is expected. The command line turns these into one line
on stderr and exit code 2.
"""


class ErgofitError(ValueError):
    """Bad input detected by ergofit (one-line message, exit code 2 from the command line)."""


class ConfigError(ErgofitError):
    """A configuration file or value is invalid."""


class DataError(ErgofitError):
    """A data vector, covariance, table or catalogue file is invalid."""
