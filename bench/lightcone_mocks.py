"""Benchmark: the cost of one light-cone mock (likelihood.simulate.lightcone) against one snapshot
mock with the plane-parallel tracer kernel, continuous field, ℓ = 0, 2, 4, on a full-sky shell.

    python bench/lightcone_mocks.py [--n 48 96] [--mocks 5] [--r-min 300] [--r-max 900]

Prints, per mesh size, the set-up time (window and the coefficients at every cell's distance)
and the seconds per mock of each kind. Goal (tests): < 1 s per mock on the default tests' meshes.
Set OMP_NUM_THREADS / OPENBLAS_NUM_THREADS yourself on a shared machine.
"""
import argparse
import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from likelihood.curved import TracerCoefficients  # noqa: E402
from likelihood.numerics.mesh import Mesh  # noqa: E402
from likelihood.observation.window import ShellWindow  # noqa: E402
from likelihood.simulate.lightcone import LightConeKernel, simulate_lightcone  # noqa: E402
from likelihood.simulate.mocks import simulate_from_settings  # noqa: E402
from likelihood.theory.cosmology import Cosmology  # noqa: E402
from likelihood.theory.tracer import Tracer  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, nargs="+", default=[48, 96])
    ap.add_argument("--mocks", type=int, default=5)
    ap.add_argument("--r-min", type=float, default=300.0)
    ap.add_argument("--r-max", type=float, default=900.0)
    args = ap.parse_args()
    cosmo = Cosmology.from_preset("planck2018")
    win = ShellWindow(args.r_min, args.r_max)
    terms = ("density", "rsd", "doppler", "potential")
    tc = TracerCoefficients(lambda z: 1.2 * (1.0 + np.asarray(z)), 1.0, 0.3)
    edges = np.arange(1, 9) * 0.004
    print(f"shell {args.r_min:g}-{args.r_max:g} Mpc/h, box 4.1 r_max, {args.mocks} mocks, "
          f"terms {', '.join(terms)}, ell = 0, 2, 4")
    for n in args.n:
        mesh = Mesh(n, 4.1 * args.r_max, dtype="float32")
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        LightConeKernel.make(mesh, cosmo, tc, terms, win)
        t_setup = time.perf_counter() - t0
        t0 = time.perf_counter()
        simulate_lightcone(cosmo, tc, terms, mesh, win, edges, (0, 2, 4), args.mocks, 1)
        t_lc = (time.perf_counter() - t0) / args.mocks
        t0 = time.perf_counter()
        simulate_from_settings(cosmo, 0.2, Tracer(b1=1.44, b_e=1.0, s=0.3),
                               ("rsd", "doppler", "potential"), mesh, win, edges, (0, 2, 4),
                               args.mocks, 1)
        t_snap = (time.perf_counter() - t0) / args.mocks
        print(f"n = {n}^3: light-cone set-up {t_setup:.2f} s; per mock (incl. set-up share): "
              f"light cone {t_lc:.3f} s, snapshot kernel {t_snap:.3f} s")


if __name__ == "__main__":
    main()
