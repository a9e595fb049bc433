"""``python -m likelihood.cli``: the ``ergofit`` command."""
import sys

from . import main

sys.exit(main())
