"""Multi-tracer Fisher information of f_NL and the linear biases from the tracer fields.

Per Fourier mode the N tracer fields δ_X(k) = Z_X(k, μ) δ_m(k) + ε_X are Gaussian with the
Hermitian covariance (k and −k counted separately, δ_X(−k) = δ_X(k)^*)

    C_XY(k, μ) = P_m(k) Z_X Z_Y^* + N_XY,     N_XX = 1/n̄_X (Poisson), N_XY = shared noise (else 0),

with Z_X = A_X + iμB_X + Fμ² the kernel of :func:`likelihood.theory.tracer.kernel`. The Fisher
information of one mode is (Tegmark, Taylor & Heavens 1997, ApJ 480, 22, eq. 15, the term in the
derivatives of C, cited from memory; ½ because k and −k carry the same complex amplitude)

    F_ij(k, μ) = ½ Tr[C⁻¹ ∂_i C C⁻¹ ∂_j C],   ∂_i C = P_m (∂_i Z Z^† + Z ∂_i Z^†),

and the survey information is F_ij = Σ_bins N_modes(k) ½∫dμ F_ij(k, μ) (μ by Gauss–Legendre).
For one tracer it is ½ (∂_i P ∂_j P)/(P + N)² per mode, the information the single-tracer
multipole Fisher approaches as ℓ_max grows (tests/forecast/test_multitracer_fisher.py).

Exact derivatives: A = b1 + f_NL (b1 − p) α(k) + γ2/k², so ∂Z_X/∂f_NL = (b1_X − p_X) α(k) and
∂Z_X/∂b1_X = 1 + f_NL α(k) (α from :func:`likelihood.theory.tracer.fnl_alpha`).

Why several tracers help (Seljak 2009, PRL 102, 021302; McDonald & Seljak 2009, JCAP 10, 007):
for two tracers with real kernels the information on f_NL splits (Sherman–Morrison, derivation
in docs/multi_tracer.md) into an amplitude part that saturates at the cosmic-variance limit as
n̄ → ∞ and a bias-ratio part ∝ n̄_A n̄_B p² (b_A − b_B)² α² P_m²/(1 + X) that grows without bound.

Regime of validity: what :mod:`likelihood.theory.tracer` assumes (linear theory,
plane-parallel, local projection terms) plus a Gaussian field in a volume with no window
(N_modes from the volume: the window's mode coupling and the integral constraint are ignored).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..checks import positive_number
from ..errors import ErgofitError
from ..theory.tracer import DEFAULT_EFFECTS, Tracer, fnl_alpha, kernel

_N_MU = 32


@dataclass
class MultiTracerFisher:
    """Fisher matrix of (f_NL, b1 of each tracer): ``names`` (e.g. ["fnl", "b1_A", "b1_B"]),
    ``matrix`` (n, n), ``per_mode`` (n_k, n_mu, n, n) information of one mode at the μ nodes
    ``mu``."""

    names: list
    matrix: np.ndarray
    per_mode: np.ndarray
    mu: np.ndarray

    @property
    def covariance(self):
        """F⁻¹ (inverted after normalising the diagonal, so very unequal scales stay accurate)."""
        d = np.sqrt(np.diag(self.matrix))
        if not np.all(d > 0):
            raise ErgofitError(f"multi-tracer Fisher: no information on "
                               f"{[n for n, v in zip(self.names, d) if not v > 0]}")
        r = self.matrix / np.outer(d, d)
        w, v = np.linalg.eigh(r)
        if w.min() <= 1e-12 * w.max():
            raise ErgofitError(f"multi-tracer Fisher: the parameters {self.names} are degenerate "
                               "(singular Fisher matrix); fix one of them")
        return (v / w) @ v.T / np.outer(d, d)

    def sigma(self, name="fnl", marginalised=True):
        """1σ error of ``name``: sqrt((F⁻¹)_ii), or 1/sqrt(F_ii) with the others fixed."""
        if name not in self.names:
            raise ErgofitError(f"parameter '{name}' is not in this Fisher matrix "
                               f"(parameters: {', '.join(self.names)})")
        i = self.names.index(name)
        if marginalised:
            return float(np.sqrt(self.covariance[i, i]))
        return float(1.0 / np.sqrt(self.matrix[i, i]))


def mode_counts(volume, edges):
    """Modes per k shell, k and −k counted separately: V (k_hi³ − k_lo³)/(6π²) (the shell's
    k-space volume 4π(k_hi³ − k_lo³)/3 over (2π)³/V; common practice)."""
    v = positive_number(volume, "volume")
    e = np.asarray(edges, float)
    if e.ndim != 1 or e.size < 2 or np.any(np.diff(e) <= 0) or e[0] < 0:
        raise ErgofitError("edges: expected increasing, non-negative k bin edges in h/Mpc")
    return v * (e[1:] ** 3 - e[:-1] ** 3) / (6 * np.pi ** 2)


def per_mode_fisher(C, dC):
    """F_ij = ½ Re Tr[C⁻¹ ∂_i C C⁻¹ ∂_j C] for Hermitian C (..., n, n), dC (p, ..., n, n).

    Returns (..., p, p). (Zero-mean Gaussian field: Tegmark, Taylor & Heavens 1997, eq. 15.)"""
    C = np.asarray(C)
    dC = np.asarray(dC)
    M = np.linalg.solve(C[None], dC)             # C⁻¹ ∂_i C, (p, ..., n, n)
    F = 0.5 * np.einsum("i...ab,j...ba->...ij", M, M).real
    return F


def _tracer_table(tracers):
    if isinstance(tracers, Tracer):
        tracers = [tracers]
    try:
        items = list(tracers.items()) if hasattr(tracers, "items") else \
            [(t.name, t) for t in tracers]
    except AttributeError:
        raise ErgofitError("tracers: expected Tracer objects or a dict {name: Tracer}") from None
    if not items:
        raise ErgofitError("tracers: expected at least one Tracer")
    names = [str(n) for n, _ in items]
    if len(set(names)) != len(names):
        raise ErgofitError(f"tracers: names {names} are not distinct")
    for n, t in items:
        if not isinstance(t, Tracer):
            raise ErgofitError(f"tracer '{n}': expected a likelihood.theory.tracer.Tracer")
    fnls = {t.fnl for _, t in items}
    if len(fnls) > 1:
        raise ErgofitError(f"tracers: f_NL is shared; the tracers give {sorted(fnls)}")
    return names, [t for _, t in items]


def _checked_bins(k, n_modes):
    k = np.atleast_1d(np.asarray(k, float))
    nm = np.atleast_1d(np.asarray(n_modes, float))
    if k.ndim != 1 or not np.all(np.isfinite(k)) or np.any(k <= 0):
        raise ErgofitError("k: expected positive wavenumbers in h/Mpc")
    if nm.shape != k.shape or not np.all(np.isfinite(nm)) or np.any(nm <= 0):
        raise ErgofitError(f"n_modes: expected {k.size} positive mode counts (one per k)")
    return k, nm


def _noise_matrix(names, trs, shared_noise):
    noise = np.diag([t.shot_noise for t in trs]).astype(float)
    for (x, y), v in (shared_noise or {}).items():
        if x not in names or y not in names or x == y:
            raise ErgofitError(f"shared_noise ({x!r}, {y!r}): expected two different tracers "
                               f"among {names}")
        noise[names.index(x), names.index(y)] = noise[names.index(y), names.index(x)] = float(v)
    return noise


def _field_covariance(cosmo, z, k, trs, effects, mu, noise):
    """Z (n_k, n_mu, n_tr) and C = P_m Z Z^† + N (n_k, n_mu, n_tr, n_tr)."""
    Z = []
    for t in trs:
        ker = kernel(cosmo, z, k, t, effects)
        A = np.broadcast_to(ker.A, k.shape)[:, None]
        B = np.broadcast_to(ker.B, k.shape)[:, None]
        Z.append(A + 1j * mu[None, :] * B + ker.F * mu[None, :] ** 2)
    Z = np.moveaxis(np.array(Z), 0, -1)
    P = np.asarray(cosmo.power(k, z), float)[:, None, None, None]
    return Z, P * Z[..., :, None] * np.conj(Z[..., None, :]) + noise


def _derivatives(cosmo, z, k, names, trs, effects, mu, Z, params):
    """∂C/∂θ for θ in ``params`` (exact: the kernel is linear in f_NL and b1)."""
    alpha = fnl_alpha(cosmo, k, z) if "fnl" in (effects or ()) else np.zeros_like(k)
    P = np.asarray(cosmo.power(k, z), float)[:, None, None, None]
    dC = []
    for p in params:
        d = np.zeros(Z.shape, complex)
        for i, (n, t) in enumerate(zip(names, trs)):
            if p == "fnl":
                d[..., i] = ((t.b1 - t.p) * alpha)[:, None]
            elif p == f"b1_{n}":
                d[..., i] = (1.0 + t.fnl * alpha)[:, None]
        outer = d[..., :, None] * np.conj(Z[..., None, :])
        dC.append(P * (outer + np.conj(np.swapaxes(outer, -1, -2))))
    return np.array(dC)


def _parameters(names, parameters):
    all_params = ["fnl"] + [f"b1_{n}" for n in names]
    params = all_params if parameters is None else list(parameters)
    bad = [p for p in params if p not in all_params]
    if bad or not params:
        raise ErgofitError(f"parameters {bad or params}: expected some of {all_params}")
    return params


def multi_tracer_fisher(cosmo, z, k, n_modes, tracers, effects=DEFAULT_EFFECTS,
                        shared_noise=None, parameters=None):
    """Fisher matrix of f_NL and each tracer's b1 from N tracer fields in a volume.

    ``k`` (n_k,) bin wavenumbers in h/Mpc and ``n_modes`` (n_k,) their mode counts (k and −k
    counted; :func:`mode_counts`); ``tracers``: a dict {name: Tracer} or Tracer objects (their
    ``name``), with their fiducial b1, p, n̄, b_e, s and the shared fiducial f_NL; ``effects``:
    as :func:`likelihood.theory.tracer.kernel`; ``shared_noise``: {(X, Y): N_XY} for populations
    that overlap (default none); ``parameters``: subset of ["fnl", "b1_<name>", ...] (default
    all). Formula: module docstring. Returns a :class:`MultiTracerFisher`.
    """
    names, trs = _tracer_table(tracers)
    k, nm = _checked_bins(k, n_modes)
    params = _parameters(names, parameters)
    mu, wq = np.polynomial.legendre.leggauss(_N_MU)
    Z, C = _field_covariance(cosmo, z, k, trs, effects, mu, _noise_matrix(names, trs, shared_noise))
    dC = _derivatives(cosmo, z, k, names, trs, effects, mu, Z, params)
    per_mode = per_mode_fisher(C, dC)                          # (n_k, n_mu, p, p)
    F = np.einsum("k,m,kmij->ij", nm, 0.5 * wq, per_mode)
    return MultiTracerFisher(params, F, per_mode, mu)


def multi_tracer_bias(cosmo, z, k, n_modes, tracers, effects, neglect, shared_noise=None,
                      parameters=None):
    """First-order shift of (f_NL, b1's) when the analysis drops the effects ``neglect``.

    The truth has ``effects``, the analysis ``effects`` minus ``neglect`` (same fiducial values).
    Maximising the expected Gaussian log-likelihood of the analysis model, whose covariance
    C_a(θ) is wrong by ΔC = C_t − C_a, to first order (the systematic-shift formula, e.g.
    Huterer, Takada, Bernstein & Jain 2006, MNRAS 366, 101, eq. 4, cited from memory, written
    for a parameter-dependent covariance):

        Δθ_i = (F⁻¹)_ij Σ_modes ½ Tr[C_a⁻¹ ∂_j C_a C_a⁻¹ ΔC],

    F the analysis Fisher matrix (:func:`multi_tracer_fisher`). For one tracer it is the shift
    of the multipole forecast with the Gaussian covariance (checked against
    ``likelihood.forecast.bias_forecast``). Returns (dict {name: Δθ}, the analysis
    :class:`MultiTracerFisher`).
    """
    names, trs = _tracer_table(tracers)
    k, nm = _checked_bins(k, n_modes)
    params = _parameters(names, parameters)
    effects = tuple(effects or ())
    unknown = [n for n in neglect if n not in effects]
    if unknown:
        raise ErgofitError(f"neglect {unknown}: not among the truth effects {list(effects)}")
    analysis = tuple(e for e in effects if e not in set(neglect))
    mu, wq = np.polynomial.legendre.leggauss(_N_MU)
    noise = _noise_matrix(names, trs, shared_noise)
    _, C_t = _field_covariance(cosmo, z, k, trs, effects, mu, noise)
    Z_a, C_a = _field_covariance(cosmo, z, k, trs, analysis, mu, noise)
    dC = _derivatives(cosmo, z, k, names, trs, analysis, mu, Z_a, params)
    per_mode = per_mode_fisher(C_a, dC)
    fisher = MultiTracerFisher(params, np.einsum("k,m,kmij->ij", nm, 0.5 * wq, per_mode),
                               per_mode, mu)
    M = np.linalg.solve(C_a[None], dC)                         # C⁻¹ ∂_i C
    R = np.linalg.solve(C_a, C_t - C_a)                        # C⁻¹ ΔC
    b = np.einsum("k,m,ikmab,kmba->i", nm, 0.5 * wq, M, R).real * 0.5
    shift = fisher.covariance @ b
    return dict(zip(params, shift.tolist())), fisher


def bias_split_gain(cosmo, z, k, n_modes, b_mean, splits, nbar_totals, p=1.0, fnl=0.0,
                    effects=DEFAULT_EFFECTS, marginalise_bias=True):
    """σ(f_NL) of one sample against the same galaxies split into two populations.

    For each bias split Δ in ``splits`` and total density n̄ in ``nbar_totals`` (h/Mpc)³: the
    single tracer has b1 = ``b_mean`` and n̄; the split has equal numbers n̄/2 each with
    b1 = b_mean ± Δ/2 (so the number-weighted bias stays b_mean). Returns a dict of arrays
    (n_split, n_nbar): "sigma_single", "sigma_multi" and "gain" = sigma_single/sigma_multi,
    with the b1's marginalised (``marginalise_bias``) or fixed.
    """
    splits = np.atleast_1d(np.asarray(splits, float))
    nbars = np.atleast_1d(np.asarray(nbar_totals, float))
    if np.any(nbars <= 0) or not np.all(np.isfinite(nbars)):
        raise ErgofitError("nbar_totals: expected positive number densities in (h/Mpc)^3")
    if np.any(np.abs(splits) >= 2 * b_mean) or not np.all(np.isfinite(splits)):
        raise ErgofitError(f"splits: expected |Δ| < 2 b_mean = {2 * b_mean:g} (both biases > 0)")
    single = np.empty((splits.size, nbars.size))
    multi = np.empty_like(single)
    for j, nb in enumerate(nbars):
        one = Tracer(b1=b_mean, fnl=fnl, p=p, nbar=nb, name="all")
        fs = multi_tracer_fisher(cosmo, z, k, n_modes, [one], effects,
                                 parameters=None if marginalise_bias else ["fnl"])
        single[:, j] = fs.sigma("fnl")
        for i, d in enumerate(splits):
            pair = [Tracer(b1=b_mean + d / 2, fnl=fnl, p=p, nbar=nb / 2, name="A"),
                    Tracer(b1=b_mean - d / 2, fnl=fnl, p=p, nbar=nb / 2, name="B")]
            fm = multi_tracer_fisher(cosmo, z, k, n_modes, pair, effects,
                                     parameters=None if marginalise_bias else ["fnl"])
            multi[i, j] = fm.sigma("fnl")
    return {"splits": splits, "nbar": nbars, "sigma_single": single, "sigma_multi": multi,
            "gain": single / multi}


def config_split_scan(cfg, splits, nbar_totals=None):
    """:func:`bias_split_gain` for the survey of a two-tracer config (``forecast.scan`` with
    quantity ``bias_split``): its cosmology, redshift, survey volume (mode counts), the k bins of
    its first spectrum inside that spectrum's k cut, the kernel effects it switches on, the
    number-weighted mean b1 and p of its two tracers and, unless ``nbar_totals`` is given, their
    total n̄. Same regime as :func:`bias_split_gain` (no window: the volume sets the mode count).
    Returns its dict plus "b_mean", "p", "k_range", "volume", "effects"."""
    from ..model import factories as fac
    from ..model.multitracer import data_spectra
    from ..theory.tracer import EFFECTS
    trs = cfg["tracers"]
    if len(trs) != 2:
        raise ErgofitError(f"{cfg.path}: a bias split needs a config with two tracers, not {len(trs)}")
    cosmo = fac.cosmology(cfg)
    srv = fac.survey(cfg, cosmo)
    sv = data_spectra(cfg, srv)[0]
    part, spec = sv.parts[0], cfg["spectra"][0]
    used = part.mask(tuple(spec["ells"]), spec.get("k_min"), spec.get("k_max")).reshape(
        len(part.ells), -1).any(0)
    idx = np.flatnonzero(used)
    edges = part.edges[idx[0]:idx[-1] + 2]
    k = part.k_eff[idx]
    n = np.array([t["nbar"] for t in trs])
    w = n / n.sum()
    b_mean = float(w @ [t["b1"] for t in trs])
    p = float(w @ [t["p"] for t in trs])
    effects = tuple(e for e in srv.effects if e in EFFECTS)
    totals = [float(n.sum())] if nbar_totals is None else list(nbar_totals)
    res = bias_split_gain(cosmo, srv.z, k, mode_counts(srv.volume, edges), b_mean, splits, totals,
                          p=p, effects=effects)
    res.update(b_mean=b_mean, p=p, k_range=[float(edges[0]), float(edges[-1])],
               volume=float(srv.volume), effects=list(effects))
    return res


def split_scan_tables(res):
    """(csv text, markdown text) of :func:`config_split_scan`."""
    rows = ["split,nbar_total,sigma_fnl_single,sigma_fnl_two,gain"]
    md = ["# Gain of a bias split over one tracer", "",
          f"Number-weighted mean bias {res['b_mean']:.4g} split into two halves of equal number "
          f"with b1 = b ± split/2 (p = {res['p']:.3g}); k = {res['k_range'][0]:.4g}–"
          f"{res['k_range'][1]:.4g} h/Mpc, volume {res['volume']:.4g} (Mpc/h)^3, effects "
          f"{', '.join(res['effects'])}; b1's marginalised. Fisher information of the tracer "
          "fields (no window, linear theory). gain = σ(f_NL) one tracer / σ(f_NL) two.", "",
          "| split | " + " | ".join(f"n̄ = {v:.3g}" for v in res["nbar"]) + " |",
          "|---|" + "---|" * len(res["nbar"])]
    for i, d in enumerate(res["splits"]):
        for j, nb in enumerate(res["nbar"]):
            rows.append(f"{d:.6g},{nb:.6g},{res['sigma_single'][i, j]:.6g},"
                        f"{res['sigma_multi'][i, j]:.6g},{res['gain'][i, j]:.6g}")
        md.append(f"| {d:g} | " + " | ".join(f"{res['gain'][i, j]:.3f} (σ {res['sigma_multi'][i, j]:.3g})"
                                            for j in range(len(res["nbar"]))) + " |")
    md += ["", "σ(f_NL) of one tracer: " + ", ".join(
        f"{s:.3g} at n̄ = {nb:.3g}" for s, nb in zip(res["sigma_single"][0], res["nbar"]))]
    return "\n".join(rows) + "\n", "\n".join(md) + "\n"
