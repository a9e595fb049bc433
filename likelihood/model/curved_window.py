"""The window of a curved-sky run from its config: the radial selection (a Shell of the engine)
and the angular mask (docs/curved_sky.md §8 and §10).

    survey.geometry (engine.kind: curved_sky):
      {shape: shell, r_min, r_max [, mask: FILE] [, selection: FILE] [, fkp_p0: P0]}
      {shape: cap, r_min, r_max, fsky [, selection: FILE] [, fkp_p0: P0]}
      {shape: randoms, randoms: FILE [, nside: 64] [, fkp_p0: P0]}

``selection: FILE`` is a table of the mean density, a text file with the header line
``# columns: z nbar`` and rows of increasing z >= 0 and nbar >= 0 in (h/Mpc)³ (comoving number
density; used as given), or a random catalogue (any format of
likelihood.observation.randoms.load_randoms) whose distances give the shape of n̄(r), scaled so
that its mean over the shell's volume is survey.nbar. ``shape: randoms`` takes both the radial
selection (distances, r_min and r_max the randoms' extremes) and the angular mask (the randoms'
directions on a HEALPix map of ``nside``, their noise removed: likelihood.curved.randoms_mask)
from one catalogue, after measuring how far it is from separable (SeparabilityWarning with the
measured size when it is not). ``fkp_p0`` weights by 1/(1 + n̄ P0) (Feldman, Kaiser & Peacock
1994); it needs a radial selection (config/engine.py refuses it on a uniform shell).
"""
from __future__ import annotations

import os
import warnings

import numpy as np

from ..curved.estimator import Shell
from ..curved.mask import Cap, HealpixMask, separability
from ..curved.selection import RadialSelection
from ..errors import ConfigError, DataError
from ..io import read_comment_header

__all__ = ["curved_window", "read_selection_table", "z_of_distance"]

#: the header of an n(z) table (survey.geometry.selection)
TABLE_COLUMNS = ("z", "nbar")


def z_of_distance(cosmo, r, where):
    """Redshift of the comoving distance r [Mpc/h]; ConfigError naming ``where`` when r lies at
    or beyond the cosmology's horizon (χ(z = 1e4))."""
    from scipy.optimize import brentq
    r = float(r)
    if r <= 0:
        return 0.0
    horizon = float(cosmo.comoving_distance(1.0e4))
    if r >= horizon:
        raise ConfigError(f"{where} = {r:g} Mpc/h lies beyond the cosmology's horizon "
                          f"({horizon:.4g} Mpc/h); expected a distance inside it")
    return brentq(lambda z: float(cosmo.comoving_distance(z)) - r, 0.0, 1.0e4, xtol=1e-12)


def _is_table(path):
    """True for a text file whose header names the columns z nbar."""
    if path.endswith(".npz"):
        return False
    try:
        cols = read_comment_header(path)[1].get("columns", [""])[-1].split()
    except (OSError, UnicodeDecodeError):
        return False
    return tuple(cols) == TABLE_COLUMNS


def read_selection_table(path, cosmo):
    """:class:`RadialSelection` of an n(z) table (module docstring); one-line DataError naming
    the file if it is unreadable, empty, non-finite, negative or not increasing in z."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)      # empty file: reported below
            data = np.loadtxt(path, comments="#", ndmin=2)
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: n(z) table unreadable ({exc.__class__.__name__}: "
                        f"{str(exc).splitlines()[0] if str(exc) else ''})") from None
    if data.size == 0:
        raise DataError(f"{path}: n(z) table is empty; expected rows of 'z nbar'")
    if data.shape[1] != 2:
        raise DataError(f"{path}: n(z) table rows have {data.shape[1]} numbers; expected 2 "
                        "(z, nbar in (h/Mpc)^3)")
    return RadialSelection.from_redshift_table(data[:, 0], data[:, 1], cosmo, source=path)


def _randoms(path, cosmo):
    """Positions and distances of a random catalogue (unit weights only)."""
    from ..observation.randoms import load_randoms
    pos, w = load_randoms(path, cosmo=cosmo)
    if np.ptp(w) > 0:
        raise DataError(f"{path}: randoms with unequal weights; the curved-sky window from "
                        "randoms takes unit weights (set FKP weights with "
                        "survey.geometry.fkp_p0)")
    r = np.sqrt(np.einsum("ij,ij->i", pos, pos))
    return pos, r


def _selection(cfg, cosmo, r_min, r_max):
    """The RadialSelection of survey.geometry.selection, checked to cover [r_min, r_max]."""
    geo = cfg["survey"]["geometry"]
    path = cfg.resolve(geo["selection"])
    table = _is_table(path)
    if table:
        sel = read_selection_table(path, cosmo)
        if not sel.covers(r_min, r_max):
            z_lo, z_hi = (z_of_distance(cosmo, r, "survey.geometry.r_max")
                          for r in (r_min, r_max))
            z_tab = [z_of_distance(cosmo, r, path) for r in (sel.r[0], sel.r[-1])]
            raise DataError(f"{path}: n(z) table covers z = {z_tab[0]:.4g}..{z_tab[1]:.4g}; "
                            f"the survey (r = {r_min:g}..{r_max:g} Mpc/h) needs "
                            f"z = {z_lo:.4g}..{z_hi:.4g}")
    else:
        pos, r = _randoms(path, cosmo)
        separability(pos, source=path)          # warns with the measured departure
        sel = RadialSelection.from_distances(r, r_min, r_max, cfg["survey"]["nbar"],
                                             source=path)
    grid = np.linspace(r_min, r_max, 2001)
    values = sel(grid)
    if not np.any(values > 0):
        raise DataError(f"{path}: nbar is zero on the whole shell {r_min:g}..{r_max:g} Mpc/h")
    mean = float(np.sum(grid ** 2 * values) / np.sum(grid ** 2))
    nbar = cfg["survey"]["nbar"]
    if table and abs(mean / nbar - 1.0) > 0.1:
        warnings.warn(f"{path}: the table's mean density over the shell is {mean:.3g} (h/Mpc)^3 "
                      f"but survey.nbar = {nbar:.3g}: the table sets the curved-sky window and "
                      "shot noise, survey.nbar (the mean density) the Gaussian covariance; make "
                      "them agree", UserWarning, stacklevel=2)
    return sel


def curved_window(cfg, cosmo):
    """(Shell, sky mask or None, RadialSelection or None) of a curved-sky config."""
    from ..curved.randoms_mask import RandomsMask
    geo = cfg["survey"]["geometry"]
    nbar = cfg["survey"]["nbar"]
    shape = geo["shape"]
    sky = sel = None
    if shape == "randoms":
        path = cfg.resolve(geo["randoms"])
        pos, r = _randoms(path, cosmo)
        r_min, r_max = float(r.min()), float(r.max())
        z_of_distance(cosmo, r_max, f"{path}: the farthest random's distance")
        separability(pos, source=path)
        sel = RadialSelection.from_distances(r, r_min, r_max, nbar, source=path)
        sky = RandomsMask(pos, geo.get("nside", 64), source=os.path.basename(path))
    else:
        r_min, r_max = geo["r_min"], geo["r_max"]
        z_of_distance(cosmo, r_max, "survey.geometry.r_max")
        if "selection" in geo:
            sel = _selection(cfg, cosmo, r_min, r_max)
        if shape == "cap" and geo["fsky"] < 1.0:
            sky = Cap(geo["fsky"])
        elif "mask" in geo:
            sky = HealpixMask.from_file(cfg.resolve(geo["mask"]))
    if sel is None:
        return Shell(r_min, r_max, nbar=nbar), sky, None
    return sel.shell(r_min, r_max, geo.get("fkp_p0")), sky, sel


#: largest k_max r_max the engine is asked to resolve: J_max ≈ 1100 orders (a few minutes per
#: template set on the full sky); beyond, kχ ≫ 100 and the plane-parallel engine is accurate
#: (docs/curved_sky.md, plane-parallel limit check)
KR_MAX = 1000.0
#: largest C_L(r1, r2) array of one pair of kernel pieces on the masked route [bytes]
MASKED_PAIR_BYTES = 4.0e9


def check_resolvable(shell, edges, resolution, masked, where="data"):
    """ConfigError (one line naming ``where``) when the k range needs more than the engine
    resolves: k_max r_max > KR_MAX, or, with an angular mask, the C_L(r1, r2) of one pair of
    pieces beyond MASKED_PAIR_BYTES (8 (L_top + 1) n_r² bytes, L_top the highest order the q
    grid reaches: likelihood.curved.mask.masked_templates)."""
    from ..curved.bessel import bessel_order_max
    from ..curved.estimator import resolution_grids
    k_max = float(edges[-1])
    kr = k_max * shell.r_max
    if kr > KR_MAX:
        raise ConfigError(f"{where}: k_max = {k_max:g} h/Mpc with r_max = {shell.r_max:g} Mpc/h "
                          f"(k_max r_max = {kr:.0f}) is beyond what the curved-sky engine "
                          f"resolves (k_max r_max <= {KR_MAX:g}); lower k_max or use "
                          "engine.kind: plane_parallel, accurate at such k")
    if masked:
        _, (q, _), (r, _), _ = resolution_grids(shell, np.asarray(edges, float), resolution)
        size = 8.0 * (bessel_order_max(float(q[-1]) * shell.r_max) + 1) * r.size ** 2
        if size > MASKED_PAIR_BYTES:
            raise ConfigError(f"{where}: k_max = {k_max:g} h/Mpc needs {size / 1e9:.1f} GB per "
                              "pair of kernel pieces on the masked curved-sky route (limit "
                              f"{MASKED_PAIR_BYTES / 1e9:g} GB); lower k_max (or "
                              "engine.resolution) or use the full sky")
