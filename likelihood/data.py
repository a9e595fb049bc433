"""Data vectors and covariances: file formats, selection and checks.

Data vector
-----------
Multipoles P_ℓ(k) in (Mpc/h)^3 on k bins in h/Mpc. Odd ℓ (cross spectra) hold the real number
Π_ℓ with P_ℓ = i Π_ℓ. The flat data vector is ℓ-major: [P_ℓ0(bins), P_ℓ1(bins), ...].

Plain-text format (``# ergofit data vector`` header, one row per k bin)::

    # ergofit data vector
    # ells: 0 2 4
    # columns: k_lo k_hi k_eff n_modes P_0 P_2 P_4
    # meta: key = value              (optional lines, kept as strings)
    0.0020 0.0040 0.00312 151.2 8.1e4 2.3e4 1.1e2
    ...

``n_modes`` counts the Fourier modes of the bin with k and -k counted separately
(V 4π k² Δk / (2π)^3 for a thin shell), so that the Gaussian error of P_0 is P √(2/n_modes).

``.npz`` format: arrays ``ells``, ``edges`` (n+1), ``k_eff``, ``n_modes``, ``values`` (n_ell, n).

Covariance
----------
Text: a header ``# ergofit covariance`` with ``# ells: ...`` and ``# n_bins: N`` lines, then the
square matrix (rows of the flat data vector order). ``.npz``: ``covariance``, ``ells``.
"""
from __future__ import annotations

import glob as _glob
import os
from dataclasses import dataclass, field

import numpy as np

from .errors import DataError
from .io import input_file, open_atomic, read_comment_header

DATA_HEADER = "# ergofit data vector"
COV_HEADER = "# ergofit covariance"


def read_header(path):
    """(first line, header dict) of a text file; DataError naming the file if unreadable."""
    try:
        return read_comment_header(path)
    except (OSError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: cannot read file ({exc.__class__.__name__}: {exc})") from None


def load_table(path):
    """The numeric rows of a text file (comments skipped); DataError naming the file."""
    try:
        arr = np.loadtxt(path, comments="#", ndmin=2)
    except (OSError, ValueError) as exc:
        raise DataError(f"{path}: cannot parse numeric table ({exc})") from None
    return arr


def _parse_ells(path, header):
    if "ells" not in header:
        raise DataError(f"{path}: missing '# ells: ...' header line listing the multipoles")
    try:
        ells = tuple(int(x) for x in header["ells"][0].split())
    except ValueError:
        raise DataError(f"{path}: '# ells:' must list integers, got '{header['ells'][0]}'") from None
    if not ells or len(set(ells)) != len(ells) or min(ells) < 0:
        raise DataError(f"{path}: '# ells:' must list distinct non-negative integers, got {ells}")
    return ells


@dataclass
class DataVector:
    """Measured (or mock) multipoles on k bins.

    Attributes: ``ells`` (tuple of int), ``edges`` (n+1,) h/Mpc, ``k_eff`` (n,), ``n_modes`` (n,),
    ``values`` (len(ells), n) in (Mpc/h)^3, ``meta`` (dict of strings).
    """

    ells: tuple
    edges: np.ndarray
    k_eff: np.ndarray
    n_modes: np.ndarray
    values: np.ndarray
    meta: dict = field(default_factory=dict)
    source: str = "<memory>"

    def __post_init__(self):
        self.ells = tuple(int(l) for l in self.ells)
        self.edges = np.asarray(self.edges, dtype=float)
        self.k_eff = np.asarray(self.k_eff, dtype=float)
        self.n_modes = np.asarray(self.n_modes, dtype=float)
        self.values = np.atleast_2d(np.asarray(self.values, dtype=float))
        self.validate()

    # -- checks -----------------------------------------------------------------------------
    def validate(self):
        src = self.source
        n = self.k_eff.size
        if n == 0:
            raise DataError(f"{src}: data vector has no k bins")
        if self.edges.shape != (n + 1,):
            raise DataError(f"{src}: {self.edges.size} bin edges for {n} bins; expected {n + 1}")
        if self.n_modes.shape != (n,):
            raise DataError(f"{src}: n_modes has {self.n_modes.size} entries for {n} bins")
        if self.values.shape != (len(self.ells), n):
            raise DataError(f"{src}: values have shape {self.values.shape}, expected "
                            f"({len(self.ells)} multipoles, {n} bins)")
        for name, arr in (("edges", self.edges), ("k_eff", self.k_eff),
                          ("n_modes", self.n_modes), ("values", self.values)):
            if not np.all(np.isfinite(arr)):
                raise DataError(f"{src}: {name} contains NaN or inf")
        if np.any(self.edges < 0) or np.any(np.diff(self.edges) <= 0):
            raise DataError(f"{src}: k bin edges must be non-negative and strictly increasing")
        if np.any(self.k_eff < self.edges[:-1]) or np.any(self.k_eff > self.edges[1:]):
            raise DataError(f"{src}: k_eff must lie inside its bin [k_lo, k_hi]")
        if np.any(self.n_modes <= 0):
            raise DataError(f"{src}: n_modes must be positive")

    # -- views ------------------------------------------------------------------------------
    @property
    def n_bins(self):
        return self.k_eff.size

    @property
    def flat(self):
        """The ℓ-major flat data vector."""
        return self.values.ravel()

    def mask(self, ells=None, k_min=None, k_max=None):
        """Boolean mask over the flat vector keeping the requested ℓ and bins with k_eff in range."""
        ells = self.ells if ells is None else tuple(ells)
        missing = [l for l in ells if l not in self.ells]
        if missing:
            raise DataError(f"{self.source}: multipoles {missing} requested but the file has {list(self.ells)}")
        kmask = np.ones(self.n_bins, bool)
        if k_min is not None:
            kmask &= self.k_eff >= k_min
        if k_max is not None:
            kmask &= self.k_eff <= k_max
        if not kmask.any():
            raise DataError(f"{self.source}: no k bin has k_eff in [{k_min}, {k_max}] h/Mpc "
                            f"(data span {self.k_eff[0]:.4g}..{self.k_eff[-1]:.4g})")
        return np.concatenate([kmask & (l in ells) for l in self.ells])

    # -- I/O --------------------------------------------------------------------------------
    def save(self, path):
        """Write to ``path`` (``.npz`` or documented plain text), atomically."""
        path = os.fspath(path)
        if path.endswith(".npz"):
            open_atomic(path, lambda fh: np.savez(
                fh, ells=np.array(self.ells), edges=self.edges, k_eff=self.k_eff, n_modes=self.n_modes,
                values=self.values, meta=np.array([f"{k} = {v}" for k, v in self.meta.items()], dtype=str)),
                binary=True)
        else:
            cols = " ".join(f"P_{l}" for l in self.ells)
            lines = [DATA_HEADER,
                     "# multipoles in (Mpc/h)^3, k in h/Mpc; odd ell hold Pi_ell with P_ell = i Pi_ell",
                     "# n_modes counts k and -k separately",
                     f"# ells: {' '.join(str(l) for l in self.ells)}",
                     f"# columns: k_lo k_hi k_eff n_modes {cols}"]
            lines += [f"# meta: {k} = {v}" for k, v in self.meta.items()]
            table = np.column_stack([self.edges[:-1], self.edges[1:], self.k_eff, self.n_modes,
                                     self.values.T])
            def write(fh):
                fh.write("\n".join(lines) + "\n")
                np.savetxt(fh, table, fmt="%.10e")
            open_atomic(path, write)

    @classmethod
    def load(cls, path):
        """Read a data vector from ``.npz`` or the documented plain-text format."""
        path = input_file(path, "data vector")
        if path.endswith(".npz"):
            try:
                with np.load(path) as z:
                    ells, edges, k_eff = z["ells"], z["edges"], z["k_eff"]
                    n_modes, values = z["n_modes"], z["values"]
                    meta = dict(m.split(" = ", 1) for m in z["meta"]) if "meta" in z else {}
            except (OSError, ValueError, KeyError) as exc:
                raise DataError(f"{path}: not a valid ergofit .npz data vector "
                                f"(needs ells, edges, k_eff, n_modes, values): {exc}") from None
            return cls(tuple(ells), edges, k_eff, n_modes, values, meta, source=path)
        first, header = read_header(path)
        if first != DATA_HEADER:
            raise DataError(f"{path}: first line must be '{DATA_HEADER}'")
        ells = _parse_ells(path, header)
        table = load_table(path)
        if table.shape[1] != 4 + len(ells):
            raise DataError(f"{path}: {table.shape[1]} columns, expected {4 + len(ells)} "
                            f"(k_lo k_hi k_eff n_modes + one per multipole {list(ells)})")
        k_lo, k_hi = table[:, 0], table[:, 1]
        if np.any(k_lo[1:] != k_hi[:-1]):
            raise DataError(f"{path}: k bins must be contiguous and increasing (k_lo[i+1] == k_hi[i])")
        edges = np.append(k_lo, k_hi[-1])
        meta = dict(m.split(" = ", 1) for m in header.get("meta", []) if " = " in m)
        return cls(ells, edges, table[:, 2], table[:, 3], table[:, 4:].T, meta, source=path)


# --- covariance -----------------------------------------------------------------------------

def check_covariance(cov, n=None, source="covariance"):
    """Check a covariance matrix; return its lower Cholesky factor.

    Refuses (``DataError``) a non-square, wrong-size, non-finite, asymmetric or non positive-definite
    matrix with a message saying what is wrong.
    """
    cov = np.asarray(cov, dtype=float)
    if cov.ndim != 2 or cov.shape[0] != cov.shape[1]:
        raise DataError(f"{source}: covariance must be a square matrix, got shape {cov.shape}")
    if n is not None and cov.shape[0] != n:
        raise DataError(f"{source}: covariance is {cov.shape[0]}x{cov.shape[0]} but the data vector "
                        f"has {n} entries")
    if not np.all(np.isfinite(cov)):
        raise DataError(f"{source}: covariance contains NaN or inf")
    scale = np.max(np.abs(cov))
    if not np.allclose(cov, cov.T, rtol=1e-8, atol=1e-12 * scale):
        raise DataError(f"{source}: covariance is not symmetric (max |C - C^T| = "
                        f"{np.max(np.abs(cov - cov.T)):.3g})")
    try:
        chol = np.linalg.cholesky(0.5 * (cov + cov.T))
    except np.linalg.LinAlgError:
        w = np.linalg.eigvalsh(0.5 * (cov + cov.T))
        raise DataError(f"{source}: covariance is not positive definite (smallest eigenvalue "
                        f"{w[0]:.3g}, largest {w[-1]:.3g})") from None
    return chol


def condition_number(cov):
    w = np.linalg.eigvalsh(cov)
    return float(w[-1] / w[0])


def save_covariance(path, cov, ells, n_bins):
    path = os.fspath(path)
    if path.endswith(".npz"):
        open_atomic(path, lambda fh: np.savez(fh, covariance=cov, ells=np.array(ells), n_bins=n_bins),
                    binary=True)
    else:
        def write(fh):
            fh.write(f"{COV_HEADER}\n# units (Mpc/h)^6; rows follow the flat data vector "
                     f"(ell-major)\n# ells: {' '.join(str(l) for l in ells)}\n# n_bins: {n_bins}\n")
            np.savetxt(fh, cov, fmt="%.12e")
        open_atomic(path, write)


def read_covariance_file(path, npz_meta, header_meta):
    """(cov, meta) of a covariance file: ``.npz`` holding 'covariance' (meta = ``npz_meta(z)``
    of the open archive) or text whose first line is the covariance header (meta =
    ``header_meta(header)`` of its parsed header lines); one-line DataError naming the file
    otherwise. The matrix itself is not checked here."""
    if path.endswith(".npz"):
        try:
            with np.load(path) as z:
                return np.array(z["covariance"], float), npz_meta(z)
        except (OSError, ValueError, KeyError) as exc:
            raise DataError(f"{path}: not a valid .npz covariance (needs 'covariance'): {exc}") from None
    first, header = read_header(path)
    if first != COV_HEADER:
        raise DataError(f"{path}: first line must be '{COV_HEADER}'")
    meta = header_meta(header)
    return load_table(path), meta


def load_covariance(path):
    """Read a covariance (text with the documented header, or ``.npz``); returns (cov, ells)."""
    path = input_file(path, "covariance")
    cov, ells = read_covariance_file(
        path, lambda z: tuple(int(l) for l in z["ells"]) if "ells" in z else None,
        lambda header: _parse_ells(path, header))
    check_covariance(cov, source=path)
    return cov, ells


@dataclass(frozen=True)
class MockCovariance:
    """Sample covariance of mock measurements with the finite-mock corrections.

    - Hartlap, Simon & Schneider (2007), eq. 17: unbiased precision = (n_s − n_d − 2)/(n_s − 1) C⁻¹.
    - Sellentin & Heavens (2016), eq. 6: marginalising over the true covariance gives the
      likelihood ∝ [1 + χ²/(n_s − 1)]^(−n_s/2) instead of a Gaussian.
    - Percival et al. (2014), eqs. 18-20: factor m1 by which parameter variances are inflated.
    """

    covariance: np.ndarray
    n_mocks: int

    def hartlap(self, n_data):
        if self.n_mocks <= n_data + 2:
            raise DataError(f"covariance from mocks: {self.n_mocks} mocks for {n_data} data points; "
                            f"the Hartlap factor needs more than n_data + 2 = {n_data + 2}")
        return (self.n_mocks - n_data - 2.0) / (self.n_mocks - 1.0)

    def require(self, n_used, where):
        """Refuse, in one line naming ``where``, too few mocks for ``n_used`` data points: the
        inverse sample covariance is unbiased after the Hartlap factor only for n_s > n_d + 2
        (Hartlap, Simon & Schneider 2007, eq. 17)."""
        if self.n_mocks <= n_used + 2:
            raise DataError(f"{where}: {self.n_mocks} mocks for {n_used} data points; a mock "
                            f"covariance needs more than n_data + 2 = {n_used + 2} mocks for an "
                            f"unbiased inverse (Hartlap, Simon & Schneider 2007): make at least "
                            f"{n_used + 3} (ergofit simulate CONFIG --n {n_used + 3})")
        return self

    def percival_m1(self, n_data, n_params):
        ns, nd, npar = float(self.n_mocks), float(n_data), float(n_params)
        a = 2.0 / ((ns - nd - 1.0) * (ns - nd - 4.0))
        b = (ns - nd - 2.0) / ((ns - nd - 1.0) * (ns - nd - 4.0))
        return (1.0 + b * (nd - npar)) / (1.0 + a + b * (npar + 1.0))


def covariance_from_mocks(pattern, ells=None):
    """Sample covariance (unbiased, 1/(n−1)) of all data-vector files matching ``pattern``.

    Rule for what counts as a mock: a matched file whose first line is the covariance header
    (``# ergofit covariance``, e.g. the ``covariance.txt`` that ``ergofit simulate`` writes beside
    its ``mock_*.txt``) is skipped; every other matched file must be a data vector.
    """
    files = mock_data_files(pattern)
    vecs = [DataVector.load(f) for f in files]
    first = vecs[0]
    for v in vecs[1:]:
        if v.ells != first.ells or not np.allclose(v.edges, first.edges):
            raise DataError(f"{v.source}: multipoles or k bins differ from {first.source}")
    x = np.array([v.flat for v in vecs])
    cov = np.cov(x, rowvar=False, ddof=1)
    return MockCovariance(cov, len(files)), first


def mock_data_files(pattern):
    """The files matching ``pattern`` (sorted) that are not covariance files (the rule of
    :func:`covariance_from_mocks`); at least 2."""
    files = [f for f in sorted(_glob.glob(os.fspath(pattern))) if not _is_covariance_file(f)]
    if len(files) < 2:
        raise DataError(f"{pattern}: found {len(files)} mock data-vector files; need at least 2")
    return files


def _is_covariance_file(path):
    if path.endswith(".npz"):
        try:
            with np.load(path) as z:
                return "covariance" in z.files
        except (OSError, ValueError):
            return False
    try:
        with open(path, encoding="utf-8") as fh:
            return fh.readline().strip() == COV_HEADER
    except (OSError, UnicodeDecodeError):
        return False


def gaussian_covariance(k, pkmu_coeffs, noise, n_modes, ells):
    """Gaussian (disconnected) covariance of the multipoles, diagonal in k.

    Cov[P_ℓ(k_i), P_ℓ'(k_j)] = δ_ij 2 (2ℓ+1)(2ℓ'+1)/N_i · ½∫dμ L_ℓ(μ) L_ℓ'(μ) [P(k_i, μ) + N]²
    (Feldman, Kaiser & Peacock 1994; multipole form: Grieb et al. 2016, eq. 15), with N_i the number
    of modes in bin i (k and −k counted separately) and N the shot noise 1/n̄.

    ``pkmu_coeffs``: (n_k, n_c) coefficients c_j of P(k, μ) = Σ_j c_j μ^(2j) (even polynomial).
    The μ integral is exact: 24-point Gauss–Legendre integrates polynomials up to degree 47 and the
    integrand has degree ≤ 2ℓ_max + 4(n_c − 1). Auto spectra only (even ℓ).
    Window effects enter only through the effective volume inside ``n_modes`` (approximation:
    neglects the mode coupling of the window; valid for k well above the fundamental mode).
    """
    k = np.asarray(k, float)
    c = np.atleast_2d(np.asarray(pkmu_coeffs, float))
    mu, wq = np.polynomial.legendre.leggauss(24)
    pmu = sum(c[:, j, None] * mu[None, :] ** (2 * j) for j in range(c.shape[1]))  # (nk, nmu)
    tot2 = (pmu + noise) ** 2
    leg = {l: np.polynomial.legendre.Legendre.basis(l)(mu) for l in ells}
    n_e, n_k = len(ells), k.size
    cov = np.zeros((n_e * n_k, n_e * n_k))
    for a, la in enumerate(ells):
        for b, lb in enumerate(ells):
            integ = 0.5 * np.sum(wq * leg[la] * leg[lb] * tot2, axis=1)
            diag = 2.0 * (2 * la + 1) * (2 * lb + 1) * integ / np.asarray(n_modes, float)
            cov[a * n_k:(a + 1) * n_k, b * n_k:(b + 1) * n_k] = np.diag(diag)
    return cov
