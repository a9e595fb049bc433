"""Window multipoles Q_ℓ(s) from a random catalogue, and reading random catalogues.

Definition and conventions: :mod:`likelihood.observation.window`.

From randoms
------------
:func:`window_from_randoms` counts ordered pairs in (s, μ) bins and projects on Legendre
polynomials. To scale to 10^6 randoms it uses two uniform random subsamples: all pairs of
``n_large`` points (BLAS dot products, chunked) for every s bin, and the pairs closer than
``s_split`` of a larger subsample (``scipy.spatial.cKDTree``), sized so that ~``small_pairs``
pairs fall there, for the small-s bins and for the normalisation Q_0(0) = 1 (intercept of a
quadratic fit to the first bins). Each subsample's counts are rescaled by its pair-survival
probability n(n−1)/(N(N−1)). The returned ``err`` is the Poisson error of the pair counts.
"""

import warnings

import numpy as np

from ..errors import ConfigError, DataError
from ..io import input_file, read_comment_header

from ..numerics.legendre import legendre_all
from .window import N_ELL, WindowMultipoles

__all__ = ["window_from_randoms", "radec_to_cartesian", "load_randoms"]



# ----------------------------------------------------------------------------------------------
def radec_to_cartesian(ra_deg, dec_deg, z, cosmo):
    """Cartesian positions (N, 3) [Mpc/h] from RA, Dec [deg] and redshift, observer at origin.

    x = χ(z) (cos δ cos α, cos δ sin α, sin δ) with χ = ``cosmo.comoving_distance(z)`` [Mpc/h].
    """
    ra, dec, z = (np.asarray(v, dtype=float).ravel() for v in (ra_deg, dec_deg, z))
    if not (ra.size == dec.size == z.size):
        raise DataError(f"radec_to_cartesian: ra, dec, z lengths differ "
                        f"({ra.size}, {dec.size}, {z.size})")
    if np.any(np.abs(dec) > 90):
        raise DataError("radec_to_cartesian: |dec| > 90 degrees; expected degrees in [-90, 90]")
    if np.any(z < 0):
        raise DataError("radec_to_cartesian: negative redshift; expected z >= 0")
    chi = np.asarray(cosmo.comoving_distance(z), dtype=float)
    a, d = np.radians(ra), np.radians(dec)
    return np.column_stack([chi * np.cos(d) * np.cos(a), chi * np.cos(d) * np.sin(a),
                            chi * np.sin(d)])


def load_randoms(path, cosmo=None):
    """Read a random catalogue; return positions (N, 3) [Mpc/h] and weights (N,).

    Text format: a header line ``# columns: x y z [w]`` (Cartesian, Mpc/h, observer at the
    origin) or ``# columns: ra dec redshift [w]`` (degrees, redshift; needs ``cosmo``), then one
    row per random. ``.npz``: arrays x, y, z[, w] or ra, dec, redshift[, w] or positions (N, 3)
    [, weights]. ``z`` is always the Cartesian coordinate: the old sky form ``ra dec z`` is refused
    as ambiguous.
    Weights default to 1. Unreadable, empty, non-finite or negative-weight input raises DataError
    naming the file.
    """
    path = input_file(path, "randoms")
    try:
        if path.endswith(".npz"):
            with np.load(path) as f:
                cols = {k: np.asarray(f[k], dtype=float) for k in f.files}
            if "positions" in cols:
                pos = cols["positions"]
                if pos.ndim != 2 or pos.shape[1] != 3:
                    raise DataError(f"{path}: 'positions' must have shape (N, 3), "
                                    f"got {pos.shape}")
                cols.update(x=pos[:, 0], y=pos[:, 1], z=pos[:, 2])
                if "weights" in cols:
                    cols["w"] = cols["weights"]
            names = [n for n in ("x", "y", "z", "ra", "dec", "redshift", "w") if n in cols]
        else:
            header = read_comment_header(path)[1]
            names = header["columns"][-1].split() if "columns" in header else None
            if names is None:
                raise DataError(f"{path}: no '# columns:' header line; add '# columns: x y z w' "
                                "(Mpc/h) or '# columns: ra dec redshift w' (degrees, redshift)")
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)   # empty file: reported below
                data = np.loadtxt(path, comments="#", ndmin=2)
            if data.size == 0:
                raise DataError(f"{path}: randoms file is empty; expected one row per random")
            if data.shape[1] != len(names):
                raise DataError(f"{path}: header lists {len(names)} columns ({' '.join(names)}) "
                                f"but rows have {data.shape[1]}")
            cols = {n: data[:, i] for i, n in enumerate(names)}
    except DataError:
        raise
    except (OSError, ValueError, UnicodeDecodeError, EOFError) as exc:
        raise DataError(f"{path}: cannot read randoms ({exc.__class__.__name__}: "
                        f"{str(exc).splitlines()[0] if str(exc) else ''})") from None
    if "z" in cols and ("ra" in cols or "dec" in cols):
        raise DataError(f"{path}: column 'z' beside ra/dec is ambiguous (z is the Cartesian "
                        "coordinate in Mpc/h); name the redshift column 'redshift', e.g. "
                        "'# columns: ra dec redshift w'")
    if all(n in cols for n in ("x", "y", "z")):
        pos = np.column_stack([cols["x"], cols["y"], cols["z"]])
    elif all(n in cols for n in ("ra", "dec", "redshift")):
        if cosmo is None:
            raise DataError(f"{path}: columns ra dec redshift need a cosmology to convert redshifts "
                            "to distances; pass cosmo=Cosmology(...)")
        ra, dec, z = cols["ra"], cols["dec"], cols["redshift"]
        if not (np.all(np.isfinite(ra)) and np.all(np.isfinite(dec)) and np.all(np.isfinite(z))):
            raise DataError(f"{path}: NaN or inf in ra/dec/redshift; remove those rows")
        try:
            pos = radec_to_cartesian(ra, dec, z, cosmo)
        except DataError as exc:
            raise DataError(f"{path}: {exc}") from None
    else:
        raise DataError(f"{path}: expected columns x y z [w] or ra dec redshift [w], "
                        f"found {sorted(cols)}")
    if pos.shape[0] == 0:
        raise DataError(f"{path}: randoms file is empty; expected one row per random")
    w = cols.get("w", np.ones(pos.shape[0]))
    if w.shape != (pos.shape[0],):
        raise DataError(f"{path}: weights have {w.size} entries for {pos.shape[0]} randoms")
    if not np.all(np.isfinite(pos)):
        raise DataError(f"{path}: NaN or inf in the positions; remove those rows")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise DataError(f"{path}: weights must be finite and >= 0 (found NaN, inf or negative)")
    return pos, w


# ----------------------------------------------------------------------------------------------
_N_MU = 2000  # μ bins of the pair histogram (midpoint Legendre error < 3e-5 for ℓ = 8)
_CHUNK = 4_000_000  # pair elements processed at once (memory ~ 0.5 GB peak)


_N_MU_JK = 50       # coarser μ bins of the jackknife histograms (errors only)
_N_JK = 10          # jackknife groups (random labels)


class _PairHist:
    """(s, μ) histogram of weighted ordered pairs, plus delete-one-group jackknife histograms."""

    def __init__(self, n_s, ds):
        self.n_s, self.inv_ds = n_s, 1.0 / ds
        self.h = np.zeros(n_s * _N_MU)
        self.jk = np.zeros(_N_JK * n_s * _N_MU_JK)   # pairs touching group k

    def add(self, s, g, r_los, ww, grp_los, grp_oth):
        """Pairs with the line of sight at the point of norm ``r_los``.

        μ = ŝ·x̂₁ with s = x₁ − x₂:  μ = (r₁² − x₁·x₂) / (s r₁).
        """
        mu = (r_los * r_los - g) / (s * r_los)
        ib = np.minimum((s * self.inv_ds).astype(np.int64), self.n_s - 1)
        u = (mu + 1.0) * 0.5
        im = np.clip((u * _N_MU).astype(np.int64), 0, _N_MU - 1)
        self.h += np.bincount(ib * _N_MU + im, weights=ww, minlength=self.h.size)
        ij = ib * _N_MU_JK + np.clip((u * _N_MU_JK).astype(np.int64), 0, _N_MU_JK - 1)
        size = self.n_s * _N_MU_JK
        self.jk += np.bincount(grp_los * size + ij, weights=ww, minlength=self.jk.size)
        other = grp_oth != grp_los
        self.jk += np.bincount(grp_oth[other] * size + ij[other],
                               weights=None if ww is None else ww[other], minlength=self.jk.size)

    def project(self, group_weight):
        """Legendre sums Σ w w L_ℓ(μ) per s bin (9, n_s) and the delete-one-group sums (K, 9, n_s).

        Each delete-one-group estimate is rescaled by (W/W_{-k})², W the summed weight, so that
        it estimates the same pair number as the full sample.
        """
        mu_c = (np.arange(_N_MU) + 0.5) * (2.0 / _N_MU) - 1.0
        pc = legendre_all(mu_c, N_ELL - 1) @ self.h.reshape(self.n_s, _N_MU).T
        mu_j = (np.arange(_N_MU_JK) + 0.5) * (2.0 / _N_MU_JK) - 1.0
        jk = self.jk.reshape(_N_JK, self.n_s, _N_MU_JK)
        tot = self.h.reshape(self.n_s, _N_MU_JK, _N_MU // _N_MU_JK).sum(-1)
        leg = legendre_all(mu_j, N_ELL - 1)                                # (9, N_MU_JK)
        gw = np.asarray(group_weight, dtype=float)
        scale = (gw.sum() / (gw.sum() - gw)) ** 2
        est = np.einsum("lm,ksm->kls", leg, tot[None] - jk) * scale[:, None, None]
        return pc, est


def _all_pairs(pos, w, ds, n_s, s_max, groups):
    """Histogram of all ordered pairs (both ends as line of sight) with s < s_max."""
    n = pos.shape[0]
    r2 = np.einsum("ij,ij->i", pos, pos)
    r = np.sqrt(r2)
    hist = _PairHist(n_s, ds)
    step = max(1, _CHUNK // max(n, 1))
    s_max2 = s_max * s_max
    for a in range(0, n, step):
        b = min(n, a + step)
        g = pos[a:b] @ pos[a:].T                                         # (b-a, n-a)
        d2 = r2[a:b, None] + r2[None, a:] - 2.0 * g
        m = (np.arange(a, n)[None, :] > np.arange(a, b)[:, None]) & (d2 < s_max2) & (d2 > 0)
        ii, jj = np.nonzero(m)
        if ii.size == 0:
            continue
        ii += a
        jj += a
        s = np.sqrt(d2[m])
        gm = g[m]
        ww = None if w is None else w[ii] * w[jj]
        hist.add(s, gm, r[ii], ww, groups[ii], groups[jj])
        hist.add(s, gm, r[jj], ww, groups[jj], groups[ii])
    return hist


def _close_pairs(pos, w, ds, n_s, s_split, groups):
    """Histogram of the ordered pairs closer than s_split (kd-tree), both ends as line of sight."""
    from scipy.spatial import cKDTree
    pairs = cKDTree(pos).query_pairs(s_split, output_type="ndarray")
    r = np.sqrt(np.einsum("ij,ij->i", pos, pos))
    hist = _PairHist(n_s, ds)
    for a in range(0, pairs.shape[0], _CHUNK):
        ii, jj = pairs[a:a + _CHUNK, 0], pairs[a:a + _CHUNK, 1]
        xi, xj = pos[ii], pos[jj]
        d = xi - xj
        s = np.sqrt(np.einsum("ij,ij->i", d, d))
        keep = s > 0
        if not np.all(keep):
            ii, jj, xi, xj, s = ii[keep], jj[keep], xi[keep], xj[keep], s[keep]
        g = np.einsum("ij,ij->i", xi, xj)
        ww = None if w is None else w[ii] * w[jj]
        hist.add(s, g, r[ii], ww, groups[ii], groups[jj])
        hist.add(s, g, r[jj], ww, groups[jj], groups[ii])
    return hist


def _intercept(s_c, y, var):
    """Q_0 normalisation: y(s → 0) from a weighted quadratic fit to the first bins.

    The fit uses the leading run of bins with y > 0.75 y_ref (at least 6), y_ref being the
    inverse-variance mean of the first 10 bins (Q_0 falls linearly at small s).
    """
    good = np.isfinite(y) & (var > 0)
    if good.sum() < 6 or not good[:3].all():
        return np.nan, 0
    first = np.flatnonzero(good)[:10]
    y_ref = np.sum(y[first] / var[first]) / np.sum(1.0 / var[first])
    run = np.flatnonzero(~(good & (y > 0.75 * y_ref)))
    n_fit = max(6, int(run[0]) if run.size else y.size)
    use = np.flatnonzero(good[:n_fit])
    if use.size < 6:
        return np.nan, 0
    return _fit_at(s_c, y, var, n_fit), int(use.size)


def _fit_at(s_c, y, var, n_fit):
    """Intercept of the inverse-variance weighted quadratic fit to the first n_fit bins."""
    use = np.flatnonzero(np.isfinite(y[:n_fit]) & (var[:n_fit] > 0))
    coef = np.polyfit(s_c[use], y[use], 2, w=1.0 / np.sqrt(var[use]))
    return float(np.polyval(coef, 0.0))


def window_from_randoms(positions, weights=None, s_max=None, n_s=200, method="subsample",
                        n_large=20_000, small_pairs=40_000_000, seed=12345, name="randoms"):
    """Window multipoles Q_ℓ(s), ℓ = 0..8, from a random catalogue (end-point line of sight).

    Parameters
    ----------
    positions : (N, 3) Cartesian positions [Mpc/h], observer at the origin
    weights : (N,) weights (default 1); W(x) is the weighted random density
    s_max : largest separation [Mpc/h]; default 2 max|x| (the largest possible)
    n_s : number of uniform s bins in [0, s_max]
    method : "subsample" (default; two subsamples, see module docstring; 10^6 randoms in ~20 s)
        or "all" (every pair; exact but O(N²), for N ≲ 3·10^4)
    n_large : size of the all-pairs subsample (noise per bin ~ 1/(n_large sqrt(bin pair fraction)))
    small_pairs : target number of pairs in the close-pair (kd-tree) subsample
    seed : seed of the subsampling
    name : label used in error messages (e.g. the file name)

    Returns
    -------
    WindowMultipoles with s the volume-weighted bin centres (plus s = 0, Q = δ_ℓ0), Q and the
    Poisson error ``err``.
    """
    pos = np.asarray(positions, dtype=float)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise DataError(f"{name}: positions must have shape (N, 3), got {pos.shape}")
    if pos.shape[0] == 0:
        raise DataError(f"{name}: no randoms; expected a catalogue of >= 1000 points")
    if not np.all(np.isfinite(pos)):
        raise DataError(f"{name}: NaN or inf in the random positions; remove those rows")
    n_tot = pos.shape[0]
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=float)
        if w.shape != (n_tot,) or not np.all(np.isfinite(w)) or np.any(w < 0):
            raise DataError(f"{name}: weights must be {n_tot} finite values >= 0")
        if np.all(w == w[0]):
            w = None  # uniform weights drop out of the normalised Q_ℓ
    if n_tot < 1000:
        raise DataError(f"{name}: only {n_tot} randoms; at least 1000 are needed (use more "
                        "randoms, ideally > 50 times the number of galaxies)")
    if method not in ("subsample", "all"):
        raise ConfigError(f"window_from_randoms method = {method!r}: expected 'subsample' or "
                          "'all'")
    rmax = float(np.sqrt(np.max(np.einsum("ij,ij->i", pos, pos))))
    if s_max is None:
        s_max = 2.0 * rmax
    s_max = float(s_max)
    n_s = int(n_s)
    if not (s_max > 0 and np.isfinite(s_max)) or n_s < 8:
        raise ConfigError(f"window_from_randoms: need s_max > 0 and n_s >= 8 "
                          f"(got s_max = {s_max}, n_s = {n_s})")
    ds = s_max / n_s
    edges = np.arange(n_s + 1) * ds
    rng = np.random.default_rng(seed)

    def subsample(m):
        if m >= n_tot:
            return pos, w, 1.0
        sel = rng.choice(n_tot, size=m, replace=False)
        return pos[sel], (None if w is None else w[sel]), m * (m - 1.0) / (n_tot * (n_tot - 1.0))

    n_l = n_tot if method == "all" else min(n_tot, int(n_large))
    p_l, w_l, surv_l = subsample(n_l)
    grp = rng.integers(0, _N_JK, n_l)
    h_l = _all_pairs(p_l, w_l, ds, n_s, s_max, grp)
    pc_l, jk_l = h_l.project(np.bincount(grp, weights=w_l, minlength=_N_JK))
    pc, jk = pc_l / surv_l, jk_l / surv_l
    n_split = 0
    if method == "subsample" and n_l < n_tot:
        n_split = max(8, n_s // 8)
        s_split = edges[n_split]
        frac = h_l.h[:n_split * _N_MU].sum() / max(h_l.h.sum(), 1e-300)           # pair fraction below split
        n_sm = n_tot if frac <= 0 else int(min(n_tot, np.sqrt(small_pairs / frac)))
        if n_sm > n_l:
            p_s, w_s, surv_s = subsample(n_sm)
            grp = rng.integers(0, _N_JK, n_sm)
            h_s = _close_pairs(p_s, w_s, ds, n_s, s_split * (1 - 1e-12), grp)
            pc_s, jk_s = h_s.project(np.bincount(grp, weights=w_s, minlength=_N_JK))
            pc[:, :n_split] = pc_s[:, :n_split] / surv_s
            jk[:, :, :n_split] = jk_s[:, :, :n_split] / surv_s
    vol = 4.0 * np.pi / 3.0 * (edges[1:] ** 3 - edges[:-1] ** 3)
    s_c = 0.75 * (edges[1:] ** 4 - edges[:-1] ** 4) / (edges[1:] ** 3 - edges[:-1] ** 3)
    var0 = (_N_JK - 1.0) / _N_JK * np.sum((jk[:, 0] - jk[:, 0].mean(0)) ** 2, axis=0)
    norm, n_fit = _intercept(s_c, pc[0] / vol, var0 / vol ** 2)
    if not (np.isfinite(norm) and norm > 0) or pc[0, :3].min() <= 0:
        raise DataError(f"{name}: too few randoms ({n_tot}) for s bins of width {ds:.4g} Mpc/h: "
                        "the smallest separations hold no pairs; use more randoms or fewer, "
                        "wider bins (smaller n_s or larger s_max)")
    ells = np.arange(N_ELL)[:, None]
    Q = (2 * ells + 1) * pc / (vol * norm)
    # jackknife including the normalisation: refit the intercept on each delete-one sample
    norm_k = np.array([_fit_at(s_c, jk[k, 0] / vol, var0 / vol ** 2, n_fit) for k in range(_N_JK)])
    q_k = (2 * ells + 1) * jk / (vol * norm_k[:, None, None])
    err = np.sqrt((_N_JK - 1.0) / _N_JK * np.sum((q_k - q_k.mean(0)) ** 2, axis=0))
    s_out = np.concatenate([[0.0], s_c])
    Q = np.concatenate([np.eye(N_ELL)[:, :1], Q], axis=1)
    err = np.concatenate([np.zeros((N_ELL, 1)), err], axis=1)
    meta = {"source": name, "n_randoms": str(n_tot), "method": method, "s_max": repr(s_max),
            "n_large": str(n_l), "normalisation_bins": str(n_fit)}
    return WindowMultipoles(s_out, Q, err, meta=meta)
