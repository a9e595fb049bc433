"""Benchmark: all curved-sky templates of a full-sky shell (1950–3200 Mpc/h), k ≤ 0.06 h/Mpc,
ℓ ≤ 4. Prints wall time, peak memory (ru_maxrss) and the resolution used.

    PYTHONPATH=. python3 -P bench/curved_sky.py [--local-only] [--observer] [--blas-threads N]
        [--mask F_SKY [--templates]]
    (-P: bench/likelihood.py shadows the package)

``--observer``: the observer terms too (observer_motion, observer_potential;
docs/observer_terms.md).

``--mask F_SKY``: the masked case (likelihood.curved.mask) instead: the demo shell 1937–3144
Mpc/h cut to a polar cap of sky fraction F_SKY (0.25 in docs/curved_mask.md), same bins, ℓ ≤ 4,
radial IC; the direct path (every tracer piece summed into one kernel), or with
``--templates`` the pair templates of the pieces.

BLAS threads: 1 by default (set before numpy loads). The per-order matrix products are small
(≤ 280 × 264 × 512); on a machine where another process keeps a core busy, two OpenBLAS
threads made the same run 6–8 times slower (measured 57 s against 6.7 s), while on an idle
machine they gain little. ``--blas-threads 2`` measures the threaded case.
"""
import os
import sys

_n = sys.argv[sys.argv.index("--blas-threads") + 1] if "--blas-threads" in sys.argv else "1"
os.environ["OPENBLAS_NUM_THREADS"] = os.environ["OMP_NUM_THREADS"] = _n

import resource  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from likelihood.theory.cosmology import Cosmology  # noqa: E402
from likelihood.curved import TracerCoefficients  # noqa: E402
from likelihood.curved.estimator import Shell, multipole_templates  # noqa: E402
from likelihood.curved.mask import Cap, masked_templates  # noqa: E402

terms = ("density", "rsd", "doppler", "potential", "fnl")
if "--local-only" not in sys.argv:
    terms = terms + ("lensing", "isw", "time_delay")
if "--observer" in sys.argv:
    terms = terms + ("observer_motion", "observer_potential")
cosmo = Cosmology.from_preset("planck2018")
tr = TracerCoefficients(b=lambda z: 1.0 + 0.6 * z, b_e=0.5, s=0.25, fnl=1.0)
edges = np.arange(0.002, 0.0601, 0.004)
t0 = time.time()
if "--mask" in sys.argv:
    f_sky = float(sys.argv[sys.argv.index("--mask") + 1])
    combine = "--templates" not in sys.argv
    t = masked_templates(cosmo, Shell(1937.0, 3144.0, nbar=3e-4), Cap(f_sky), edges, tr, terms,
                         ells=(0, 1, 2, 3, 4), ic="radial", combine_pieces=combine)
    print(f"masked: cap f_sky = {f_sky}, {'direct path' if combine else 'pair templates'}")
else:
    t = multipole_templates(cosmo, Shell(1950.0, 3200.0, nbar=3e-4), edges, tr, terms,
                            ells=(0, 1, 2, 3, 4), ic="radial")
dt = time.time() - t0
use = resource.getrusage(resource.RUSAGE_SELF)
peak, cpu = use.ru_maxrss / 1024.0, use.ru_utime + use.ru_stime   # cpu: includes the imports
print(f"terms: {terms}")
print(f"templates: {len(t.pairs)} pairs + noise, {len(t.ells)} multipoles x {edges.size - 1} bins")
print(f"BLAS threads {_n}, load average {os.getloadavg()[0]:.1f} at the end")
print(f"time {dt:.1f} s (process CPU {cpu:.1f} s), peak memory {peak:.0f} MB, "
      f"resolution {t.meta}")
