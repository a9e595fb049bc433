"""Benchmark: several tracers. The analytic Gaussian covariance of AA (ℓ = 0, 2), AB (ℓ = 0–3) and
BB (ℓ = 0, 2) on 24 bins, the multi-tracer Fisher matrix and the bias-split scan, and two-tracer
Poisson mocks on an n³ mesh (default 64³, float32) measured with measure_spectra. Prints times and
the peak memory.

    python bench/multi_tracer.py [--n 64] [--mocks 4]
"""
import argparse
import os
import resource
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from likelihood.covariance import multi_tracer_covariance  # noqa: E402
from likelihood.forecast.multitracer import bias_split_gain, mode_counts, multi_tracer_fisher  # noqa: E402
from likelihood.numerics.mesh import Mesh  # noqa: E402
from likelihood.simulate.mocks import MeshTracer, multi_tracer_mocks  # noqa: E402
from likelihood.theory.cosmology import Cosmology  # noqa: E402
from likelihood.theory.tracer import Tracer  # noqa: E402

SPECTRA = [(("A", "A"), (0, 2)), (("A", "B"), (0, 1, 2, 3)), (("B", "B"), (0, 2))]


def timed(fn, repeat=1):
    t0 = time.perf_counter()
    for _ in range(repeat):
        out = fn()
    return out, (time.perf_counter() - t0) / repeat


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=64)
    ap.add_argument("--mocks", type=int, default=4)
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    cosmo = Cosmology.from_preset("planck2018")
    z = 1.2
    edges = np.linspace(0.002, 0.05, 25)
    k = 0.5 * (edges[1:] + edges[:-1])
    nm = mode_counts(9.9e10, edges)
    tr = {"A": Tracer(b1=2.3, nbar=1.5e-4, name="A"), "B": Tracer(b1=1.3, nbar=1.5e-4, name="B")}
    pm = cosmo.power(k, z)
    f = float(cosmo.growth_rate(z))

    def pkmu(x, y, mu):
        za = tr[x].b1 + f * mu[None, :] ** 2
        zb = tr[y].b1 + f * mu[None, :] ** 2
        return (za * zb * pm[:, None]).astype(complex)
    noise = {(x, x): t.shot_noise for x, t in tr.items()}
    cov, t_cov = timed(lambda: multi_tracer_covariance(nm, SPECTRA, pkmu, noise), 20)
    fm, t_f = timed(lambda: multi_tracer_fisher(cosmo, z, k, nm, tr, ("fnl", "rsd")), 20)
    scan, t_scan = timed(lambda: bias_split_gain(cosmo, z, k, nm, 1.8, [0.5, 1.0, 2.0],
                                                 [1e-4, 3e-4, 1e-3], effects=("fnl", "rsd")))
    print(f"covariance {cov.shape[0]}x{cov.shape[1]} (3 spectra, 8 multipoles, 24 bins): "
          f"{1e3 * t_cov:.2f} ms")
    print(f"multi-tracer Fisher (2 tracers, 24 bins, 32 mu nodes): {1e3 * t_f:.2f} ms; "
          f"sigma(f_NL) = {fm.sigma():.3g}")
    print(f"bias-split scan (3 splits x 3 densities): {t_scan:.3f} s")

    mesh = Mesh(args.n, 2000.0, observer=(0.0, 0.0, -1e7), dtype="float32")
    kf = mesh.k_fundamental
    e = kf * np.arange(1.5, 0.7 * args.n / 2, 2.0)
    tracers = {"A": MeshTracer(2.3, None, f, 1.5e-4), "B": MeshTracer(1.3, None, f, 1.5e-4)}
    pk = lambda q: cosmo.power(q, z)  # noqa: E731
    mocks, t_m = timed(lambda: multi_tracer_mocks(mesh, pk, tracers, SPECTRA, e, args.mocks,
                                                  seed=1, k_cut=e[-1] * 1.2))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"two-tracer Poisson mocks, {args.n}^3 float32, {len(e) - 1} bins, 3 spectra: "
          f"{t_m / args.mocks:.2f} s per mock (largest clipped fraction {mocks.max_clipped:.1e})")
    print(f"peak memory (max RSS) {peak:.0f} MiB; {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
