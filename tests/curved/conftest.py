"""The curved-sky tests run BLAS single-threaded when nothing has loaded numpy yet: the
engine's per-order matrix products are small, and two OpenBLAS threads made them 5x slower
whenever another process kept a core busy (docs/curved_sky.md, speed and memory)."""
import os
import sys

if "numpy" not in sys.modules:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
