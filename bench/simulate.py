"""Benchmark: one 256³ Gaussian mock with RSD (local line of sight) in a window, and its
ℓ = 0, 2, 4 measurement with the FFT estimator. Prints the time of each stage and the peak memory.

    python bench/simulate.py [--n 256] [--box 4000] [--float64]

Target (project): <= 20 s on 2 cores for n = 256 in float32. The spectrum is the project's
Planck 2018 cosmology at z = 1 if ``likelihood.theory.cosmology`` is importable, otherwise an invented
smooth spectrum; the window is a spherical shell around the observer (r in [0.1, 0.45] L).
"""
import argparse
import os
import resource
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from likelihood.numerics.mesh import Mesh  # noqa: E402
from likelihood.observation.estimator import measure_multipoles  # noqa: E402
from likelihood.simulate.fields import gaussian_field, observed_field, poisson_sample  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=256)
    ap.add_argument("--box", type=float, default=4000.0)
    ap.add_argument("--float64", action="store_true")
    ap.add_argument("--nbar", type=float, default=3e-4)
    args = ap.parse_args()

    mesh = Mesh(args.n, args.box, dtype="float64" if args.float64 else "float32")
    try:
        from likelihood.theory.cosmology import Cosmology
        cosmo = Cosmology.from_preset("planck2018")
        pk = lambda k: cosmo.power(k, 1.0)  # noqa: E731
        f = float(cosmo.growth_rate(1.0))
        label = "Planck 2018 preset, z = 1"
    except ImportError:
        pk = lambda k: 2e4 * (k / 0.02) / (1 + (k / 0.02) ** 2.2)  # noqa: E731
        f = 0.8
        label = "invented spectrum"
    r = mesh.radius()
    window = ((r > 0.1 * args.box) & (r < 0.45 * args.box)).astype(mesh.dtype)
    # Poisson sampling needs 1 + Δ >= 0: the mock keeps the modes below k_cut = k_N/4 only
    k_cut = 0.25 * mesh.k_nyquist
    kmag = mesh.kmag()
    edges = np.linspace(mesh.k_fundamental, 0.22 * mesh.k_nyquist, 30)

    times = {}
    t0 = time.perf_counter()
    dk = gaussian_field(mesh, np.where(kmag <= k_cut, mesh.on_grid(pk), 0.0), 1)
    times["gaussian field"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    gal = observed_field(mesh, dk, 2.0, None, f)
    print(f"  fraction of cells with 1 + Δ < 0: {np.mean(gal < -1):.2e}")
    times["RSD, local LOS (10 FFTs)"] = time.perf_counter() - t0
    del dk
    t0 = time.perf_counter()
    counts = poisson_sample(mesh, gal, args.nbar, window, seed=2)
    times["Poisson sampling"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    dv = measure_multipoles(mesh, counts, window, edges, (0, 2, 4), nbar=args.nbar)
    times["multipoles l=0,2,4 (15 FFTs)"] = time.perf_counter() - t0

    total = sum(times.values())
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB -> MiB on Linux
    print(f"mesh {args.n}^3, L = {args.box:g} Mpc/h, {mesh.dtype}, {label}, {os.cpu_count()} cores")
    for name, t in times.items():
        print(f"  {name:32s} {t:7.2f} s")
    print(f"  {'total':32s} {total:7.2f} s   (target <= 20 s for 256^3)")
    print(f"  peak memory (max RSS)          {peak:7.0f} MiB")
    i = len(dv.k_eff) // 4
    print(f"  check: k = {dv.k_eff[i]:.4f} h/Mpc  P0 = {dv.values[0, i]:.4g}  P2 = {dv.values[1, i]:.4g}"
          f"  P4 = {dv.values[2, i]:.4g}  (Mpc/h)^3")


if __name__ == "__main__":
    main()
