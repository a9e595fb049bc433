"""Benchmark of the observation operator (prints figures; not a test).

    python bench/window.py            # window matrix build/apply, Q_ℓ from 1e5 and 1e6 randoms
    python bench/window.py --quick    # skip the 1e6-random run

Scenario: a sphere of R = 1500 Mpc/h around the observer, 20 k bins in [0.002, 0.2] h/Mpc,
ℓ_theory = ℓ_out = (0, 2, 4), global integral constraint.
"""
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from likelihood.observation.matrix import KBins, WindowMatrix, theory_k_grid  # noqa: E402
from likelihood.observation.randoms import window_from_randoms  # noqa: E402
from likelihood.observation.window import SphereWindow  # noqa: E402

R = 1500.0


def main(quick=False):
    k = theory_k_grid()
    bins = KBins.from_edges(np.linspace(0.002, 0.2, 21))
    sw = SphereWindow(R)
    t0 = time.perf_counter()
    wm = sw.multipoles()
    t_q = time.perf_counter() - t0
    t0 = time.perf_counter()
    m = WindowMatrix(k, (0, 2, 4), bins, (0, 2, 4), wm, ic="global", cache=False)
    t_build = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        WindowMatrix(k, (0, 2, 4), bins, (0, 2, 4), wm, ic="global", cache_dir=tmp)
        t0 = time.perf_counter()
        WindowMatrix(k, (0, 2, 4), bins, (0, 2, 4), wm, ic="global", cache_dir=tmp)
        t_cached = time.perf_counter() - t0
    p = np.stack([k / (1 + (k / 0.02) ** 2) ** 1.5 * 1e5 * f for f in (1.0, 0.5, 0.05)])
    n_rep = 2000
    m(p)
    t0 = time.perf_counter()
    for _ in range(n_rep):
        m(p)
    t_apply = (time.perf_counter() - t0) / n_rep
    batch = np.repeat(p[None], 64, axis=0)
    t0 = time.perf_counter()
    for _ in range(50):
        m(batch)
    t_batch = (time.perf_counter() - t0) / 50 / 64
    print(f"theory grid: {k.size} points in [{k[0]:.0e}, {k[-1]:.0f}] h/Mpc; "
          f"matrix {m.matrix.shape[0]} x {m.matrix.shape[1]}")
    print(f"sphere Q_l table (2049 s values):  {t_q * 1e3:8.1f} ms")
    print(f"window matrix build (with IC):     {t_build:8.3f} s")
    print(f"window matrix from disk cache:     {t_cached * 1e3:8.1f} ms")
    print(f"apply (one data vector):           {t_apply * 1e6:8.1f} us")
    print(f"apply (batch of 64 walkers), each: {t_batch * 1e6:8.1f} us")

    rng = np.random.default_rng(0)
    ref = None
    for n in ((100_000,) if quick else (100_000, 1_000_000)):
        u = rng.normal(size=(n, 3))
        u /= np.linalg.norm(u, axis=1)[:, None]
        pos = u * R * rng.random(n)[:, None] ** (1 / 3)
        t0 = time.perf_counter()
        wr = window_from_randoms(pos, s_max=2 * R, n_s=100)
        dt = time.perf_counter() - t0
        ref = sw.multipoles(wr.s)
        inner = (wr.s > 0) & (wr.s < 1.8 * R)
        pull = (np.abs(wr.Q - ref.Q) / np.where(wr.err > 0, wr.err, np.inf))[:, inner]
        print(f"Q_l from {n:>9,d} randoms: {dt:6.1f} s; median jackknife error of Q_0 "
              f"{np.median(wr.err[0, inner]):.1e}; max |Q - exact|/error (s < 1.8R): "
              + ", ".join(f"l={l}: {pull[l].max():.1f}" for l in (0, 1, 2, 4))
              + " (bin-centre comparison)")


if __name__ == "__main__":
    main(quick="--quick" in sys.argv)
