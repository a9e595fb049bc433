"""Data vectors of several tracers: any set of auto and cross spectra, each on its own k bins.

A multi-tracer data vector is a list of spectra. Each spectrum is labelled by its tracer pair
(X, Y) (X = Y: auto spectrum; X ≠ Y: cross spectrum, <δ_X δ_Y^*>) and holds a single-tracer
:class:`~likelihood.data.DataVector` (its multipoles on its own k bins). Odd ℓ (cross spectra
only: an auto spectrum is even in μ) hold Π_ℓ with P_ℓ = iΠ_ℓ, as in the single-tracer files.
The flat vector is spectrum by spectrum (in the order of the file), then ℓ-major inside each.

Plain-text format (one row per data point, rows in the flat order)::

    # ergofit spectra
    # tracers: bright faint
    # spectrum: bright bright | ells: 0 2
    # spectrum: bright faint | ells: 0 1 2
    # spectrum: faint faint | ells: 0 2
    # columns: tracer_1 tracer_2 ell k_lo k_hi k_eff n_modes value
    # meta: key = value                       (optional)
    bright bright 0 0.0020 0.0040 0.00312 151.2 8.1e4
    ...

``.npz``: ``tracers`` (names), ``pairs`` (n_spectra, 2) and per spectrum i the arrays
``ells_i``, ``edges_i``, ``k_eff_i``, ``n_modes_i``, ``values_i`` (n_ell, n_bins), plus ``meta``.

Covariance of a multi-tracer vector: the single-tracer covariance header (``# ergofit
covariance``) with the ``# spectrum:`` lines of the data file instead of ``# ells:``, then the
square matrix in the flat order; ``.npz``: ``covariance``, ``pairs``, ``ells_i``.

A single-tracer data file (``# ergofit data vector``) is read as one auto spectrum of the one
tracer a config names (:meth:`SpectraVector.from_single`).
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass, field

import numpy as np

from .data import (COV_HEADER, DATA_HEADER, DataVector, MockCovariance, check_covariance,
                   mock_data_files, read_covariance_file, read_header)
from .errors import DataError
from .io import input_file, open_atomic, read_comment_header

SPECTRA_HEADER = "# ergofit spectra"

#: a tracer name: a letter, then letters and digits (no '_': parameter names are b1_NAME)
TRACER_NAME = re.compile(r"[A-Za-z][A-Za-z0-9]*")


def pair_label(pair):
    """'bright x faint' (cross) or 'bright' (auto): how a spectrum is named in messages/plots."""
    x, y = pair
    return x if x == y else f"{x} x {y}"


def _spectrum_line(pair, ells):
    return f"{pair[0]} {pair[1]} | ells: {' '.join(str(l) for l in ells)}"


def _parse_spectrum_line(path, text):
    """'X Y | ells: 0 2' -> ((X, Y), (0, 2))."""
    left, sep, right = text.partition("|")
    names = left.split()
    key, _, ells = right.partition(":")
    try:
        ells = tuple(int(v) for v in ells.split())
    except ValueError:
        ells = ()
    if not sep or len(names) != 2 or key.strip() != "ells" or not ells:
        raise DataError(f"{path}: '# spectrum: {text}': expected '# spectrum: X Y | ells: 0 2'")
    return (names[0], names[1]), ells


def _check_odd(src, pair, ells):
    odd = [l for l in ells if l % 2]
    if pair[0] == pair[1] and odd:
        raise DataError(f"{src}: auto spectrum {pair[0]} has odd multipoles {odd}; an auto "
                        "spectrum is even in mu (odd ell only in cross spectra)")


@dataclass
class SpectraVector:
    """Several spectra: ``tracers`` (names), ``pairs`` [(X, Y)], ``parts`` [DataVector] (same order)."""

    tracers: tuple
    pairs: list
    parts: list
    meta: dict = field(default_factory=dict)
    source: str = "<memory>"

    def __post_init__(self):
        self.tracers = tuple(str(t) for t in self.tracers)
        self.pairs = [(str(x), str(y)) for x, y in self.pairs]
        self.validate()

    def validate(self):
        src = self.source
        if not self.pairs or len(self.pairs) != len(self.parts):
            raise DataError(f"{src}: {len(self.pairs)} spectrum labels for {len(self.parts)} spectra")
        if len(set(self.tracers)) != len(self.tracers):
            raise DataError(f"{src}: a tracer is named twice in {list(self.tracers)}")
        for t in self.tracers:
            if not TRACER_NAME.fullmatch(t):
                raise DataError(f"{src}: tracer name '{t}': expected a letter then letters/digits")
        seen = set()
        for pair, part in zip(self.pairs, self.parts):
            for t in pair:
                if t not in self.tracers:
                    raise DataError(f"{src}: spectrum {pair_label(pair)} names tracer '{t}', which "
                                    f"the header's tracers {list(self.tracers)} do not list")
            key = frozenset(pair)
            if key in seen:
                raise DataError(f"{src}: spectrum {pair_label(pair)} is given twice")
            seen.add(key)
            _check_odd(src, pair, part.ells)

    # -- views ------------------------------------------------------------------------------
    @property
    def flat(self):
        return np.concatenate([p.flat for p in self.parts])

    @property
    def sizes(self):
        return [p.flat.size for p in self.parts]

    def index(self, pair):
        """Position of the spectrum of ``pair`` (either order for a cross spectrum), or None."""
        for i, p in enumerate(self.pairs):
            if p == tuple(pair) or p == tuple(pair)[::-1]:
                return i
        return None

    @classmethod
    def from_single(cls, dv, tracer):
        """A single-tracer data vector as the auto spectrum of ``tracer``."""
        return cls((tracer,), [(tracer, tracer)], [dv], dict(dv.meta), source=dv.source)

    # -- I/O --------------------------------------------------------------------------------
    def save(self, path):
        """Write to ``path`` (``.npz`` or the documented plain text), atomically."""
        path = os.fspath(path)
        if path.endswith(".npz"):
            arrays = dict(tracers=np.array(self.tracers), pairs=np.array(self.pairs),
                          meta=np.array([f"{k} = {v}" for k, v in self.meta.items()], dtype=str))
            for i, p in enumerate(self.parts):
                arrays.update({f"ells_{i}": np.array(p.ells), f"edges_{i}": p.edges,
                               f"k_eff_{i}": p.k_eff, f"n_modes_{i}": p.n_modes,
                               f"values_{i}": p.values})
            open_atomic(path, lambda fh: np.savez(fh, **arrays), binary=True)
            return
        lines = [SPECTRA_HEADER,
                 "# multipoles in (Mpc/h)^3, k in h/Mpc; odd ell hold Pi_ell with P_ell = i Pi_ell",
                 "# cross spectrum X Y: <delta_X delta_Y^*>; n_modes counts k and -k separately",
                 f"# tracers: {' '.join(self.tracers)}"]
        lines += [f"# spectrum: {_spectrum_line(pr, p.ells)}" for pr, p in zip(self.pairs, self.parts)]
        lines.append("# columns: tracer_1 tracer_2 ell k_lo k_hi k_eff n_modes value")
        lines += [f"# meta: {k} = {v}" for k, v in self.meta.items()]
        for (x, y), p in zip(self.pairs, self.parts):
            for j, l in enumerate(p.ells):
                for i in range(p.n_bins):
                    lines.append(f"{x} {y} {l} {p.edges[i]:.10e} {p.edges[i + 1]:.10e} "
                                 f"{p.k_eff[i]:.10e} {p.n_modes[i]:.10e} {p.values[j, i]:.10e}")
        open_atomic(path, lambda fh: fh.write("\n".join(lines) + "\n"))

    @classmethod
    def load(cls, path):
        """Read a multi-tracer data vector (``.npz`` or text)."""
        path = input_file(path, "data vector")
        if path.endswith(".npz"):
            return cls._load_npz(path)
        first, header = read_header(path)
        if first != SPECTRA_HEADER:
            raise DataError(f"{path}: first line must be '{SPECTRA_HEADER}' (a multi-tracer data vector)")
        if "tracers" not in header or "spectrum" not in header:
            raise DataError(f"{path}: needs a '# tracers: A B' line and one '# spectrum: X Y | ells: ...' "
                            "line per spectrum")
        tracers = tuple(header["tracers"][0].split())
        specs = [_parse_spectrum_line(path, s) for s in header["spectrum"]]
        for pair, ells in specs:               # header checks before any row is read
            _check_odd(path, pair, ells)
        rows = {}
        try:
            with open(path, encoding="utf-8") as fh:
                for n_line, line in enumerate(fh, 1):
                    if line.startswith("#") or not line.strip():
                        continue
                    f = line.split()
                    if len(f) != 8:
                        raise DataError(f"{path}: line {n_line}: {len(f)} columns, expected 8 "
                                        "(tracer_1 tracer_2 ell k_lo k_hi k_eff n_modes value)")
                    try:
                        key = (f[0], f[1], int(f[2]))
                        num = [float(v) for v in f[3:]]
                    except ValueError:
                        raise DataError(f"{path}: line {n_line}: cannot parse '{line.strip()}'") from None
                    rows.setdefault(key, []).append(num)
        except (OSError, UnicodeDecodeError) as exc:
            raise DataError(f"{path}: cannot read file ({exc})") from None
        pairs, parts = [], []
        for pair, ells in specs:
            tables = []
            for l in ells:
                t = rows.pop((pair[0], pair[1], l), None)
                if t is None:
                    raise DataError(f"{path}: spectrum {pair_label(pair)} ell = {l} is announced in "
                                    "the header but has no rows")
                tables.append(np.array(t))
            t0 = tables[0]
            if any(t.shape != t0.shape or not np.array_equal(t[:, :4], t0[:, :4]) for t in tables):
                raise DataError(f"{path}: spectrum {pair_label(pair)}: the multipoles must share "
                                "the same k bins")
            if np.any(t0[1:, 0] != t0[:-1, 1]):
                raise DataError(f"{path}: spectrum {pair_label(pair)}: k bins must be contiguous "
                                "and increasing (k_lo[i+1] == k_hi[i])")
            edges = np.append(t0[:, 0], t0[-1, 1])
            parts.append(DataVector(ells, edges, t0[:, 2], t0[:, 3], np.array([t[:, 4] for t in tables]),
                                    source=f"{path} ({pair_label(pair)})"))
            pairs.append(pair)
        if rows:
            x, y, l = next(iter(rows))
            raise DataError(f"{path}: rows of spectrum {x} {y} ell = {l} are not announced by a "
                            "'# spectrum:' header line")
        meta = dict(m.split(" = ", 1) for m in header.get("meta", []) if " = " in m)
        return cls(tracers, pairs, parts, meta, source=path)

    @classmethod
    def _load_npz(cls, path):
        try:
            with np.load(path) as z:
                if "pairs" not in z:
                    raise DataError(f"{path}: not a multi-tracer .npz data vector (no 'pairs' array); "
                                    "a single-tracer vector needs a config with one tracer")
                tracers = tuple(str(t) for t in z["tracers"])
                pairs = [tuple(str(t) for t in p) for p in z["pairs"]]
                parts = [DataVector(tuple(z[f"ells_{i}"]), z[f"edges_{i}"], z[f"k_eff_{i}"],
                                    z[f"n_modes_{i}"], z[f"values_{i}"],
                                    source=f"{path} ({pair_label(p)})") for i, p in enumerate(pairs)]
                meta = dict(m.split(" = ", 1) for m in z["meta"]) if "meta" in z else {}
        except (OSError, ValueError, KeyError) as exc:
            raise DataError(f"{path}: not a valid ergofit multi-tracer .npz data vector "
                            f"(needs tracers, pairs, ells_i, edges_i, k_eff_i, n_modes_i, values_i): {exc}") from None
        return cls(tracers, pairs, parts, meta, source=path)


def is_single_tracer_file(path):
    """True when ``path`` (an existing file) is a single-tracer data vector (``# ergofit data
    vector`` text, or ``.npz`` with ``values`` and no ``pairs``)."""
    if path.endswith(".npz"):
        try:
            with np.load(path) as z:
                return "pairs" not in z and "values" in z
        except (OSError, ValueError):
            return False
    try:
        return read_comment_header(path)[0] == DATA_HEADER
    except (OSError, UnicodeDecodeError):
        return False


def load_spectra(path, tracer=None):
    """A multi-tracer data vector, or a single-tracer one read as the auto spectrum of ``tracer``
    (the config's only tracer); ``tracer=None`` refuses single-tracer files."""
    path = input_file(path, "data vector")
    if is_single_tracer_file(path):
        if tracer is None:
            raise DataError(f"{path}: a single-tracer data vector, but the config has several "
                            "tracers; write a multi-tracer file (likelihood.spectra.SpectraVector)")
        return SpectraVector.from_single(DataVector.load(path), tracer)
    return SpectraVector.load(path)


# --- covariance -----------------------------------------------------------------------------
def save_spectra_covariance(path, cov, sv):
    """Covariance of the flat vector of ``sv`` (text with '# spectrum:' lines, or ``.npz``)."""
    path = os.fspath(path)
    if path.endswith(".npz"):
        arrays = {f"ells_{i}": np.array(p.ells) for i, p in enumerate(sv.parts)}
        open_atomic(path, lambda fh: np.savez(fh, covariance=cov, pairs=np.array(sv.pairs), **arrays),
                    binary=True)
        return
    head = [COV_HEADER, "# units (Mpc/h)^6; rows follow the flat multi-tracer data vector "
                        "(spectrum by spectrum, ell-major)"]
    head += [f"# spectrum: {_spectrum_line(pr, p.ells)}" for pr, p in zip(sv.pairs, sv.parts)]

    def write(fh):
        fh.write("\n".join(head) + "\n")
        np.savetxt(fh, cov, fmt="%.12e")
    open_atomic(path, write)


def load_spectra_covariance(path, sv):
    """Read the covariance of the multi-tracer vector ``sv``; its spectra (pairs, ells) and size
    must match the data's."""
    path = input_file(path, "covariance")

    def npz_specs(z):
        if "pairs" not in z:
            return None
        return [(tuple(str(t) for t in p), tuple(int(l) for l in z[f"ells_{i}"]))
                for i, p in enumerate(z["pairs"])]

    cov, specs = read_covariance_file(
        path, npz_specs,
        lambda header: [_parse_spectrum_line(path, s) for s in header.get("spectrum", [])] or None)
    mine = [(tuple(p), tuple(d.ells)) for p, d in zip(sv.pairs, sv.parts)]
    if specs is not None and specs != mine:
        raise DataError(f"{path}: covariance spectra {[(pair_label(p), list(e)) for p, e in specs]} "
                        f"differ from the data's {[(pair_label(p), list(e)) for p, e in mine]}")
    check_covariance(cov, n=sv.flat.size, source=path)
    return cov


def spectra_covariance_from_mocks(pattern, tracer=None):
    """(MockCovariance, first vector): the unbiased (1/(n−1)) sample covariance of the
    multi-tracer data vectors matching ``pattern`` (covariance files skipped, as in
    :func:`likelihood.data.covariance_from_mocks`); all must hold the same spectra, multipoles
    and k bins. ``tracer``: single-tracer files are read as its auto spectrum (:func:`load_spectra`)."""
    files = mock_data_files(pattern)
    vecs = [load_spectra(f, tracer) for f in files]
    first = vecs[0]
    layout = [(p, d.ells) for p, d in zip(first.pairs, first.parts)]
    for v in vecs[1:]:
        if ([(p, d.ells) for p, d in zip(v.pairs, v.parts)] != layout
                or any(not np.allclose(a.edges, b.edges) for a, b in zip(v.parts, first.parts))):
            raise DataError(f"{v.source}: spectra, multipoles or k bins differ from {first.source}")
    x = np.array([v.flat for v in vecs])
    return MockCovariance(np.atleast_2d(np.cov(x, rowvar=False, ddof=1)), len(files)), first
