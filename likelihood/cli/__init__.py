"""The ``ergofit`` command line: one parser, one function per command (``python -m likelihood.cli``)."""
from .commands import main, make_parser

__all__ = ["main", "make_parser"]
