"""Write the invented demo random catalogue and its window table.

The "Lanternfish Wide Survey" northern cap (invented for the demo): the sky north of
Dec = +30 deg (sky fraction (1 - sin 30 deg)/2 = 0.25) between z = 0.8 and 1.6, with a selection
uniform in comoving volume (constant n(z)), so its window is the analytic cap shell
(``survey.geometry: {shape: cap, r_min, r_max, fsky: 0.25}``) up to the randoms' noise.

Writes configs/demo_randoms.npz (arrays ra, dec [degrees] and redshift, float32: the .npz form
that `ergofit window` and survey.geometry shape: randoms read besides text) and
configs/demo_window.txt (Q_l(s) with the effective volume in its header: the same as
`ergofit window configs/demo_randoms.npz --out DIR`), read by configs/demo_cap.yaml.

Usage: python configs/make_demo_randoms.py   (from the repository root; deterministic: fixed seed)
"""
import os

import numpy as np

from likelihood.observation.geometry import randoms_volume
from likelihood.observation.randoms import load_randoms, window_from_randoms
from likelihood.theory.cosmology import Cosmology

HERE = os.path.dirname(os.path.abspath(__file__))
N_RANDOMS = 40_000
Z_MIN, Z_MAX, DEC_MIN = 0.8, 1.6, 30.0


def make_randoms(n, seed=2026):
    """(ra, dec, redshift) of n points uniform in comoving volume inside the cap shell."""
    cosmo = Cosmology.from_preset("planck2018")
    rng = np.random.default_rng(seed)
    r_lo, r_hi = (float(cosmo.comoving_distance(z)) for z in (Z_MIN, Z_MAX))
    r = np.cbrt(rng.uniform(r_lo ** 3, r_hi ** 3, n))            # uniform in volume
    sin_dec = rng.uniform(np.sin(np.radians(DEC_MIN)), 1.0, n)    # uniform in solid angle
    ra = rng.uniform(0.0, 360.0, n)
    z_grid = np.linspace(Z_MIN - 0.05, Z_MAX + 0.05, 4001)
    z = np.interp(r, cosmo.comoving_distance(z_grid), z_grid)    # invert chi(z)
    return ra, np.degrees(np.arcsin(sin_dec)), z


def main():
    ra, dec, z = make_randoms(N_RANDOMS)
    rfile = os.path.join(HERE, "demo_randoms.npz")
    with open(rfile, "wb") as fh:
        np.savez(fh, ra=ra.astype(np.float32), dec=dec.astype(np.float32),
                 redshift=z.astype(np.float32))
    pos, wts = load_randoms(rfile, cosmo=Cosmology.from_preset("planck2018"))
    wm = window_from_randoms(pos, wts, name="configs/demo_randoms.npz")
    wm.meta["volume"] = f"{randoms_volume(pos, wts):.6e}"
    wfile = os.path.join(HERE, "demo_window.txt")
    wm.save(wfile)
    print(f"wrote {rfile} ({N_RANDOMS} randoms) and {wfile} (volume {wm.meta['volume']} (Mpc/h)^3)")


if __name__ == "__main__":
    main()
