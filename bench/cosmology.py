"""Timings of likelihood.theory.cosmology for a cosmology-varying likelihood call.

Run: python bench/cosmology.py
Prints median wall-clock times (single thread) of: construction, power on 2000 log-spaced k,
growth factor and rate at one z, background at one z, the sigma8 normalisation, and the
whole "cosmology-varying" call (construct with sigma8 given + power + growth + background).
Target for the whole call: <= 5 ms.
"""
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from likelihood.theory.cosmology import Cosmology  # noqa: E402

K = np.logspace(-4, 0, 2000)  # h/Mpc
Z = 1.2
BASE = dict(h=0.6736, omega_b=0.02237, omega_c=0.1200, n_s=0.9649)


def median_time(fn, repeat=200):
    fn()
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main():
    rng = np.random.default_rng(1)
    c_as = Cosmology(**BASE, A_s=2.1e-9)

    def construct_as():
        return Cosmology(**BASE, A_s=2.1e-9)

    def construct_s8():
        return Cosmology(**BASE, sigma8=0.81)

    def varying_call():
        c = Cosmology(h=0.6736 + 0.01 * rng.standard_normal(), omega_b=0.02237,
                      omega_c=0.12 + 0.002 * rng.standard_normal(), n_s=0.9649,
                      sigma8=0.81 + 0.01 * rng.standard_normal(), w=-1.0)
        c.power(K, Z)
        c.growth_factor(Z)
        c.growth_factor(Z, norm="matter")
        c.growth_rate(Z)
        c.comoving_distance(Z)
        c.conformal_hubble(Z)
        c.conformal_hubble_ratio(Z)
        c.Omega_m(Z)
        return c

    rows = [
        ("construction (A_s given)", median_time(construct_as)),
        ("construction (sigma8 given: one sigma8 integral)", median_time(construct_s8)),
        ("power(2000 k, z)", median_time(lambda: c_as.power(K, Z))),
        ("transfer(2000 k) eh98", median_time(lambda: c_as.transfer(K))),
        ("growth_factor + growth_rate at one z", median_time(
            lambda: (c_as.growth_factor(Z), c_as.growth_rate(Z)))),
        ("background at one z (chi, calH, calH'/calH^2, Omega_m)", median_time(
            lambda: (c_as.comoving_distance(Z), c_as.conformal_hubble(Z),
                     c_as.conformal_hubble_ratio(Z), c_as.Omega_m(Z)))),
        ("sigma_R(8) integral", median_time(lambda: c_as.sigma_R(8.0))),
        ("whole cosmology-varying call", median_time(varying_call)),
    ]
    width = max(len(name) for name, _ in rows)
    for name, t in rows:
        print(f"{name:<{width}}  {t * 1e3:8.3f} ms")
    total = rows[-1][1]
    print(f"target for the whole call: <= 5 ms -> {'OK' if total <= 5e-3 else 'MISSED'}")


if __name__ == "__main__":
    main()
