"""The survey of a config: redshift, density, switched-on effects and the window geometry.

:func:`survey_from_config` is the one place that turns the ``survey`` and ``effects`` sections
into the objects the model uses (the window of an analytic geometry or of a random catalogue,
and the effective volume that sets the mode count).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import DataError
from . import window as win
from .randoms import load_randoms, window_from_randoms


def randoms_volume(positions, weights=None, n_mesh=64):
    """Effective volume I₂²/I₄ of the window traced by a random catalogue [(Mpc/h)^3].

    W(x) ∝ weighted random density, deposited on an n_mesh³ grid over the catalogue's bounding
    box; V = (∫W)²/∫W², estimated as (Σw)² / Σ_cells[(Σ_cell w)² − Σ_cell w²] × cell volume, the
    Σw² term removing the Poisson self-pairs (common practice). Equals the geometric volume for a
    uniform selection up to the partly filled boundary cells (+1.5 % for a 500 Mpc/h sphere with
    10^6 randoms); for a weighted selection it is the volume that sets the mode count.
    """
    pos = np.asarray(positions, float)
    w = np.ones(len(pos)) if weights is None else np.asarray(weights, float)
    lo, hi = pos.min(0), pos.max(0)
    span = (hi - lo) * (1 + 1e-9) + 1e-12
    idx = np.floor((pos - lo) / span * n_mesh).astype(int)
    flat = np.ravel_multi_index(idx.T, (n_mesh,) * 3)
    sw = np.bincount(flat, weights=w, minlength=n_mesh ** 3)
    sw2 = np.bincount(flat, weights=w * w, minlength=n_mesh ** 3)
    pairs = np.sum(sw * sw - sw2)
    if pairs <= 0:
        raise DataError("randoms: too few points to estimate the survey volume (need several per cell)")
    return float(sw.sum() ** 2 / pairs * np.prod(span) / n_mesh ** 3)


def precomputed_window(path, volume=None):
    """(window, effective volume) of a Q_ℓ(s) table written by ``ergofit window``.

    The volume that sets the mode count is ``volume`` if given (``survey.geometry.volume``),
    else the ``volume`` entry of the table's header (the randoms' I₂²/I₄, see
    :func:`randoms_volume`); a table with neither is refused naming the key to add.
    """
    wm = win.WindowMultipoles.load(path)
    if volume is None:
        try:
            volume = float(wm.meta["volume"])
        except (KeyError, ValueError):
            raise DataError(f"{path}: the window table has no '# meta: volume = ...' line; give "
                            "survey.geometry.volume (the survey's effective volume in (Mpc/h)^3)"
                            ) from None
        if not (np.isfinite(volume) and volume > 0):
            raise DataError(f"{path}: header volume = {wm.meta['volume']}: expected a finite "
                            "volume > 0 in (Mpc/h)^3")
    return wm, float(volume)


def window_and_volume(cfg, cosmo=None):
    """(window object or None, effective volume in (Mpc/h)^3) of ``survey.geometry``."""
    geo = cfg["survey"]["geometry"]
    shape = geo["shape"]
    if shape == "box":
        return None, geo["volume"]
    if shape == "sphere":
        w = win.SphereWindow(geo["radius"])
    elif shape == "shell" and "mask" in geo:
        # a HEALPix mask (curved_sky only): no plane-parallel window; the mode-count volume is
        # the shell's times the mask's mode fraction (likelihood.curved.mask)
        from ..curved.mask import HealpixMask, read_healpix_map
        w = win.ShellWindow(geo["r_min"], geo["r_max"])
        sky = HealpixMask(read_healpix_map(cfg.resolve(geo["mask"])), lmax=1,
                          source=geo["mask"])
        return None, w.volume * sky.mode_fraction()
    elif shape == "shell":
        w = win.ShellWindow(geo["r_min"], geo["r_max"])
    elif shape == "cap":
        w = win.CapShellWindow(geo["r_min"], geo["r_max"], geo["fsky"])
    elif shape == "window":
        return precomputed_window(cfg.resolve(geo["file"]), geo.get("volume"))
    else:
        path = cfg.resolve(geo["randoms"])
        pos, wts = load_randoms(path, cosmo=cosmo)
        return window_from_randoms(pos, wts, name=path), randoms_volume(pos, wts)
    return w, w.volume


def effects_tuple(cfg):
    """The tracer-kernel effects switched on in the ``effects`` section, in kernel order."""
    e = cfg["effects"]
    return tuple(name for name in ("rsd", "fnl", "doppler", "potential") if e[name])


@dataclass(frozen=True)
class Survey:
    """What the ``survey``, ``tracer.p`` and ``effects`` sections fix for every model evaluation.

    ``window`` is None for a periodic box or when ``effects.window`` is off (``volume`` still
    sets the mode count); ``ic`` is the integral constraint actually applied ("none" without a
    window).
    """
    z: float
    nbar: float
    p: float
    effects: tuple
    window: object
    volume: float
    ic: str
    observer_on: bool
    shape: str


def survey_from_config(cfg, cosmo=None):
    """The :class:`Survey` of a validated config (``cosmo`` converts randoms in RA, Dec, z)."""
    window, volume = window_and_volume(cfg, cosmo)
    if not cfg["effects"]["window"]:
        window = None
    return Survey(z=cfg["survey"]["redshift"], nbar=cfg["survey"]["nbar"], p=cfg["tracer"]["p"],
                  effects=effects_tuple(cfg), window=window, volume=volume,
                  ic=cfg["effects"]["integral_constraint"] if window is not None else "none",
                  observer_on=cfg["effects"]["observer"],
                  shape=cfg["survey"]["geometry"]["shape"])
