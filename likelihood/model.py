"""The likelihood: config → cosmology → tracer kernel → observation operator → Gaussian likelihood.

Decomposition used by the fast path
-----------------------------------
The observed galaxy field is Z(k, μ) δ_m with Z = A + iμB + Fμ² (see :mod:`likelihood.tracer`).
At fixed cosmology Z is *linear* in a short vector of coefficients

    x = (1, b1, v, b_e, 𝒬),   v = f_NL (b1 − p),   𝒬 = 5s/2,

because A = b1 + v α(k) + γ2/k², B = γ1/k and γ1, γ2 are linear in (b_e, 𝒬). Writing
Z = Σ_a x_a Z_a, every power spectrum is the quadratic form Σ_ab x_a x_b Re[Z_a Z_b^*] P_m, and the
observation operator M (window, integral constraint, mode-averaged bins) is linear, so

    model = Σ_{a≤b} c_ab x_a x_b T_ab + (ν² − 1) Σ_{a≤b} c_ab x_a x_b O_ab + A_sn S/n̄ − s e₀/n̄,

with T_ab = M[multipoles of Z_a Z_b^* P_m] (symmetrised), O_ab the observer-term templates
(the estimator applied to the constrained mean field is quadratic in the kernel), S the response
to white noise (1 in the monopole minus the integral-constraint term W²_ℓ(k)/W²_0(0)), e₀ the
monopole indicator and s = 1 when the data had the flat Poisson 1/n̄ subtracted from the
monopole (the usual estimator; the constant −s e₀/n̄ is moved to the data side), c_ab = 1. With the data whitened by the Cholesky factor L of the covariance
(C = L Lᵀ), χ² = |d_w|² − 2 c·g + cᵀ G c with g = W d_w, G = W Wᵀ, W = L⁻¹ T: an evaluation
is a handful of tiny dot products. Only b_e and 𝒬 that are sampled get their own coefficient;
fixed ones are folded into the constant kernel Z_0.

The direct path recomputes the full model (tracer multipoles → operator → observer term) and
must agree with the fast path to 1e-10 (tests). When cosmological parameters are sampled the
templates are rebuilt per walker (the window matrix is reused).
"""
from __future__ import annotations

import warnings

import numpy as np
from scipy.linalg import cho_solve

from . import tracer as tr
from .config import parameter_set
from .cosmology import Cosmology
from .data import (DataVector, check_covariance, condition_number,
                   covariance_from_mocks, gaussian_covariance, load_covariance)
from .errors import ConfigError, DataError, ErgofitError
from .observation import KBins, WindowMatrix, theory_k_grid
from .params import KNOWN

COSMO_PARAMS = ("h", "omega_cdm", "omega_b", "n_s", "ln10As", "sigma8")
TRACER_PARAMS = ("b1", "fnl", "b_e", "s")


def make_cosmology(cfg, values=None):
    """Cosmology from the config's preset and overrides, then sampled/fixed values on top."""
    c = cfg["cosmology"]
    over = dict(c["overrides"])
    for name in COSMO_PARAMS:
        if name in cfg["fixed"]:
            over[name] = cfg["fixed"][name]
    if values:
        over.update({k: float(v) for k, v in values.items() if k in COSMO_PARAMS})
    if "ln10As" in over:
        over["A_s"] = np.exp(over.pop("ln10As")) * 1e-10
        over["sigma8"] = None
    elif "sigma8" in over:
        over["A_s"] = None
    kwargs = dict(transfer=c["transfer"])
    if c["transfer"] == "table":
        kwargs.update(table_file=cfg.resolve(c["table"]), table_kind=c["table_kind"])
    return Cosmology.from_preset(c["preset"], **kwargs, **over)


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


def make_geometry(cfg, cosmo=None):
    """(window object or None, effective volume in (Mpc/h)^3)."""
    from . import window as win
    geo = cfg["survey"]["geometry"]
    shape = geo["shape"]
    if shape == "box":
        return None, geo["volume"]
    if shape == "sphere":
        w = win.SphereWindow(geo["radius"])
    elif shape == "shell":
        w = win.ShellWindow(geo["r_min"], geo["r_max"])
    elif shape == "cap":
        w = win.CapShellWindow(geo["r_min"], geo["r_max"], geo["fsky"])
    else:
        path = cfg.resolve(geo["randoms"])
        pos, wts = win.load_randoms(path, cosmo=cosmo)
        return win.window_from_randoms(pos, wts, name=path), randoms_volume(pos, wts)
    return w, w.volume


def white_noise_response(op):
    """Data vector of a unit white-noise monopole (P(k) = 1, e.g. shot noise per 1/n̄).

    Convolving a constant with the window normalised by I₂ returns the constant in ℓ = 0 and
    zero in ℓ > 0 (end-point line of sight, ∫|W̃|² d³k/(2π)³ = I₂); the global integral
    constraint then subtracts P̂_0(0) W²_ℓ(k)/W²_0(0) = W²_ℓ(k)/W²_0(0)
    (Peacock & Nicholson 1991; see ``likelihood.observation``).
    """
    n_b = op.bins.n
    out = np.zeros(len(op.ells_out) * n_b)
    for o, l in enumerate(op.ells_out):
        if l == 0:
            out[o * n_b:(o + 1) * n_b] = 1.0
        if op.window is not None and op.ic == "global":
            out[o * n_b:(o + 1) * n_b] -= op._avg @ op._W2[l] / op._w2_zero
    return out


def effects_tuple(cfg):
    e = cfg["effects"]
    return tuple(name for name in ("rsd", "fnl", "doppler", "potential") if e[name])


class Likelihood:
    """Gaussian likelihood of the measured multipoles; built by :func:`build`.

    Public surface: ``parameter_names``, ``labels``, ``prior_bounds``, ``start``, ``start_scale``,
    ``log_prob(theta)`` (vectorised over walkers), ``log_likelihood(params)``,
    ``log_likelihood_direct(params)``, ``model_vector(params)``, ``chi2(theta)``, ``derived(theta)``.
    """

    def __init__(self, cfg):
        self.config = cfg
        self.config_hash = cfg.hash
        self.params = parameter_set(cfg)
        self.parameter_names = self.params.names
        self.labels = self.params.labels
        self.prior_bounds = self.params.bounds
        self.start = self.params.start
        self.start_scale = self.params.start_scale
        self.z = cfg["survey"]["redshift"]
        self.nbar = cfg["survey"]["nbar"]
        self.effects = effects_tuple(cfg)
        self.p = cfg["tracer"]["p"]
        self.sn_sub = 1.0 if cfg["data"]["shot_noise_subtracted"] else 0.0
        self.cosmo = make_cosmology(cfg)
        self.cosmo_free = [n for n in self.parameter_names if n in COSMO_PARAMS]
        self.lin_free = [n for n in ("b_e", "s") if self.params.is_free(n)]
        self.observer_on = cfg["effects"]["observer"]
        self.window, self.volume = make_geometry(cfg, self.cosmo)
        if not cfg["effects"]["window"]:
            self.window = None
        self.ells = tuple(cfg["data"]["ells"])
        self.ells_theory = (0, 2, 4)

        self.fiducial = self._fiducial_values()
        self.data_full = self._load_or_mock_bins()
        self.bins = KBins(self.data_full.edges, self.data_full.k_eff, self.data_full.n_modes)
        self.k_theory = theory_k_grid()
        self.operator = WindowMatrix(self.k_theory, self.ells_theory, self.bins, self.data_full.ells,
                                     window=self.window, ic=cfg["effects"]["integral_constraint"]
                                     if self.window is not None else "none")
        self._white_noise = white_noise_response(self.operator)   # fixed by the operator alone
        d = cfg["data"]
        self.mask = self.data_full.mask(self.ells, d.get("k_min"), d.get("k_max"))
        self.observer = self._make_observer()
        self._warn_regime()
        cov_full, self.mock_cov = self._covariance()
        self.covariance_full = cov_full
        if cfg["data"].get("mock") is not None:
            self.data_full = self._make_mock(cov_full)
        self.data = self.data_full.flat[self.mask]
        cov = cov_full[np.ix_(self.mask, self.mask)]
        self.chol = check_covariance(cov, n=self.data.size, source="covariance")
        self.covariance = cov
        self.condition_number = condition_number(cov)
        self.n_mocks = self.mock_cov.n_mocks if self.mock_cov is not None else None
        self.t_likelihood = cfg["covariance"]["kind"] == "mocks" and cfg["covariance"]["method"] == "t"
        scale = 1.0
        if self.mock_cov is not None and not self.t_likelihood:
            scale = self.mock_cov.hartlap(self.data.size)
        self.precision_scale = scale
        # Percival et al. (2014) eq. 18: parameter variances from a mock covariance are inflated
        # by m1 (reported; the posterior itself is not rescaled)
        self.percival_m1 = (self.mock_cov.percival_m1(self.data.size, len(self.parameter_names))
                            if self.mock_cov is not None else None)
        self.dof = int(self.data.size - len(self.parameter_names))
        self._fixed_floats = {k: float(v[0]) for k, v in self._values({}).items()}
        self._chol_inv = np.linalg.inv(self.chol)   # tiny matrix; matmul beats repeated solves
        # the estimator subtracts a flat 1/n̄ from the monopole (shot_noise_subtracted); the model
        # carries A_sn × (noise response incl. the integral constraint) − that flat term, whose
        # constant part is moved to the data side here so the fast path stays a quadratic form
        self._sn_shift = self.sn_sub * self._monopole_indicator()[self.mask] / self.nbar
        self._d_w = self._chol_inv @ (self.data + self._sn_shift)
        self._dd = float(self._d_w @ self._d_w)
        self._templates = self._build_templates(self.cosmo)

    # --- set-up -----------------------------------------------------------------------------
    def _fiducial_values(self):
        """Fiducial values of every known parameter: defaults < tracer block < fixed < mock truth."""
        cfg = self.config
        vals = {n: info.default for n, info in KNOWN.items()}
        vals.update({k: cfg["tracer"][k] for k in TRACER_PARAMS})
        vals["nu_obs"] = cfg["observer"]["nu_true"]
        vals.update(cfg["fixed"])
        mock = cfg["data"].get("mock")
        if mock:
            vals.update(mock["truth"])
        return vals

    def _load_or_mock_bins(self):
        cfg = self.config
        d = cfg["data"]
        if "file" in d:
            dv = DataVector.load(cfg.resolve(d["file"]))
            missing = [l for l in self.ells if l not in dv.ells]
            if missing:
                raise DataError(f"{dv.source}: data.ells asks for {missing} but the file has {list(dv.ells)}")
            return dv
        m = d["mock"]
        edges = np.linspace(m["k_min"], m["k_max"], m["n_bins"] + 1)
        kb = KBins.from_edges(edges, volume=self.volume)
        return DataVector(self.ells, edges, kb.k_eff, kb.n_modes,
                          np.zeros((len(self.ells), edges.size - 1)), source="mock")

    def _warn_regime(self):
        """Say where the plane-parallel, linear-theory kernel is stretched by the data."""
        k_used = self.data_full.k_eff[self.mask.reshape(len(self.data_full.ells), -1).any(0)]
        chi = float(self.cosmo.comoving_distance(self.z))
        if any(e in self.effects for e in ("doppler", "potential")) and \
                k_used[0] * chi < tr.PLANE_PARALLEL_KCHI:
            warnings.warn(f"data k_min = {k_used[0]:.3g} h/Mpc gives k chi = {k_used[0] * chi:.2g} < "
                          f"{tr.PLANE_PARALLEL_KCHI:g} at z = {self.z:g}: the plane-parallel projection "
                          "terms miss wide-angle corrections of order 1/(k chi) there",
                          tr.PlaneParallelWarning, stacklevel=3)
        if self.window is not None and self.operator.ic == "none" and \
                any(e in self.effects for e in ("fnl", "potential")):
            warnings.warn("integral_constraint: none with f_NL or potential terms: the window-convolved "
                          "power of these k^-3..k^-4 terms is infrared divergent without the "
                          "data-estimated mean, so the result depends on the lowest k of the theory "
                          "grid (1e-6 h/Mpc, a stand-in for the horizon); use integral_constraint: global",
                          UserWarning, stacklevel=3)
        if k_used[-1] > 0.1:
            warnings.warn(f"data k_max = {k_used[-1]:.3g} h/Mpc: the model is linear theory "
                          "(no non-linear damping or loop corrections); keep k_max <~ 0.1 h/Mpc at z ~ 1",
                          UserWarning, stacklevel=3)

    def _make_observer(self):
        if not self.observer_on:
            return None
        from .observer import ObserverTerm
        o = self.config["observer"]
        return ObserverTerm(field=o["field"], smoothing=o.get("smoothing"), k_ir=o.get("k_ir"),
                            window=self.window, volume=self.volume, bins=self.bins,
                            ells=self.data_full.ells, ic=self.operator.ic,
                            k_min_data=float(self.data_full.k_eff[self.mask.reshape(len(self.data_full.ells), -1).any(0)][0]))

    def _covariance(self):
        cfg = self.config
        c = cfg["covariance"]
        n = self.data_full.flat.size
        if c["kind"] == "file":
            cov, ells = load_covariance(cfg.resolve(c["file"]))
            if ells is not None and tuple(ells) != self.data_full.ells:
                raise DataError(f"{c['file']}: covariance multipoles {list(ells)} differ from the data's "
                                f"{list(self.data_full.ells)}")
            check_covariance(cov, n=n, source=c["file"])
            return cov, None
        if c["kind"] == "mocks":
            mc, first = covariance_from_mocks(cfg.resolve(c["mocks"]))
            if first.ells != self.data_full.ells or not np.allclose(first.edges, self.data_full.edges):
                raise DataError(f"{c['mocks']}: mock multipoles/k bins differ from the data vector")
            return mc.covariance, mc
        # analytic Gaussian covariance at the fiducial model
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", tr.PlaneParallelWarning)
            kern = self._kernel(self.cosmo, self.fiducial, self.bins.k_eff)
        pm = self.cosmo.power(self.bins.k_eff, self.z)
        coeffs = np.column_stack([kern.A ** 2 * pm, (2 * kern.A * kern.F + kern.B ** 2) * pm,
                                  np.full_like(pm, kern.F ** 2) * pm])
        cov = gaussian_covariance(self.bins.k_eff, coeffs, 1.0 / self.nbar, self.bins.n_modes,
                                  self.data_full.ells)
        return cov, None

    def _make_mock(self, cov_full):
        m = self.config["data"]["mock"]
        truth = {k: np.atleast_1d(v) for k, v in self.fiducial.items()}
        # cosmological values in the mock truth define the mock's cosmology too
        keys = [k for k in COSMO_PARAMS if k in m["truth"] or k in self.cosmo_free
                or k in self.config["fixed"]]
        mean = self._model_full(truth, direct=True, cosmo_keys=keys)[0]
        if m["noise"]:
            rng = np.random.default_rng(m["seed"])
            mean = mean + np.linalg.cholesky(cov_full) @ rng.standard_normal(mean.size)
        dv = self.data_full
        meta = {"generated": "ergofit mock", "seed": m["seed"], "noise": m["noise"]}
        meta.update({f"truth.{k}": v for k, v in m["truth"].items()})
        return DataVector(dv.ells, dv.edges, dv.k_eff, dv.n_modes, mean.reshape(dv.values.shape),
                          meta=meta, source="mock")

    # --- kernels and templates ------------------------------------------------------------------
    def _tracer(self, values, i=0):
        def g(name):
            v = values[name]
            return float(v[i] if np.ndim(v) else v)
        return tr.Tracer(b1=g("b1"), fnl=g("fnl"), p=self.p, nbar=self.nbar, b_e=g("b_e"), s=g("s"))

    def _kernel(self, cosmo, values, k, i=0):
        return tr.kernel(cosmo, self.z, k, self._tracer(values, i), effects=self.effects)

    def _basis(self, cosmo, k):
        """Basis kernels Z_a with Z = Σ_a x_a Z_a (see module docstring); names in order."""
        f = cosmo.growth_rate(self.z) if "rsd" in self.effects else 0.0
        proj = [e for e in self.effects if e in tr.PROJECTION_TERMS or e in ("doppler", "potential")]
        fid = self._fixed_floats          # analysis values: fixed ones win over the mock truth
        be0 = 0.0 if "b_e" in self.lin_free else fid["b_e"]
        q0 = 0.0 if "s" in self.lin_free else 2.5 * fid["s"]

        def gam(be, q):
            g1 = tr.gamma1(cosmo, self.z, be, q) if "doppler" in proj else 0.0
            g2 = tr.gamma2(cosmo, self.z, be, q) if "potential" in proj else 0.0
            return g1, g2

        zero = np.zeros_like(k)
        g1, g2 = gam(be0, q0)
        basis = [("1", tr.Kernel(A=g2 / k ** 2 + zero, B=g1 / k + zero, F=f)),
                 ("b1", tr.Kernel(A=np.ones_like(k), B=zero, F=0.0))]
        if "fnl" in self.effects:
            basis.append(("v", tr.Kernel(A=tr.fnl_alpha(cosmo, k, self.z), B=zero, F=0.0)))
        for name, (db, dq) in (("b_e", (1.0, 0.0)), ("s", (0.0, 2.5))):
            if name in self.lin_free:
                h1, h2 = gam(be0 + db, q0 + dq)
                basis.append((name, tr.Kernel(A=(h2 - g2) / k ** 2 + zero, B=(h1 - g1) / k + zero, F=0.0)))
        return basis

    def _coefficients(self, values):
        """(n, n_basis) coefficient vectors x for the parameter values (arrays or floats)."""
        b1 = values["b1"]
        cols = [1.0, b1]
        if "fnl" in self.effects:
            cols.append(values["fnl"] * (b1 - self.p))
        for name in self.lin_free:
            cols.append(values[name])   # the basis kernel of s already carries d𝒬/ds = 5/2
        n = max(np.size(c) for c in cols)
        x = np.empty((n, len(cols)))
        for j, c in enumerate(cols):
            x[:, j] = c
        return x

    def _build_templates(self, cosmo):
        """Whitened template matrices for the fast path at the given cosmology."""
        k = self.k_theory
        pm = cosmo.power(k, self.z)
        basis = self._basis(cosmo, k)
        n = len(basis)
        pairs = [(a, b) for a in range(n) for b in range(a, n)]
        rows = []
        for a, b in pairs:
            pab = tr.pair_multipoles(basis[a][1], basis[b][1], pm, self.ells_theory)
            if a != b:
                pab = pab + tr.pair_multipoles(basis[b][1], basis[a][1], pm, self.ells_theory)
            rows.append(self.operator(pab)[self.mask])
        stack = [np.array(rows)]
        if self.observer is not None:
            stack.append(self.observer.templates(cosmo, self.z, self.k_theory, [z for _, z in basis],
                                                 pairs)[:, self.mask])
        stack.append(self._white_noise[self.mask][None] / self.nbar)
        M = np.vstack(stack)                       # unwhitened templates, rows as in _design
        W = M @ self._chol_inv.T
        G = W @ W.T
        g = W @ self._d_w
        return dict(pairs=np.array(pairs), n_pairs=len(pairs), pair_list=pairs, M=M, W=W, G=G, g=g,
                    sigma8=cosmo.sigma8, growth=cosmo.growth_factor(self.z) / cosmo.growth_factor(0.0))

    def _monopole_indicator(self):
        """1 on the ℓ = 0 entries of the full data vector, 0 elsewhere."""
        return np.repeat(np.array([l == 0 for l in self.data_full.ells], float), self.data_full.n_bins)

    def _design(self, values, tpl):
        """(n, n_templates) coefficients multiplying the whitened templates."""
        x = self._coefficients(values)
        c = x[:, tpl["pairs"][:, 0]] * x[:, tpl["pairs"][:, 1]]
        n = c.shape[0]
        out = np.empty((n, tpl["W"].shape[0]))
        npair = c.shape[1]
        out[:, :npair] = c
        if self.observer is not None:
            out[:, npair:2 * npair] = c * (np.reshape(values["nu_obs"], (-1, 1)) ** 2 - 1.0)
        out[:, -1] = values["shot_noise"]
        return out

    # --- evaluation -----------------------------------------------------------------------------
    def _chi2_fast(self, values, tpl):
        c = self._design(values, tpl)
        return self._dd - 2.0 * (c @ tpl["g"]) + np.sum((c @ tpl["G"]) * c, axis=1)

    def _loglike_from_chi2(self, chi2):
        """Gaussian (Hartlap-scaled) or t log likelihood; −inf, never NaN, for a non-finite χ²
        (overflowing parameter values such as b1 = 1e154)."""
        chi2 = np.where(np.isnan(chi2), np.inf, chi2)
        if self.t_likelihood:
            ns = self.n_mocks
            return -0.5 * ns * np.log1p(chi2 / (ns - 1.0))
        return -0.5 * self.precision_scale * chi2

    def log_prob(self, theta):
        """Log posterior for an (n_walkers, n_dim) array (or one point); −inf outside the prior."""
        theta = np.asarray(theta, float)
        single = theta.ndim == 1
        n_dim = len(self.parameter_names)
        if theta.ndim not in (1, 2) or theta.shape[-1] != n_dim:
            raise ErgofitError(f"log_prob: theta of shape {theta.shape}: expected ({n_dim},) or "
                               f"(n_walkers, {n_dim}) for the parameters {', '.join(self.parameter_names)}")
        if single and not self.cosmo_free:
            return self._log_prob_single(theta)
        theta = np.atleast_2d(theta)
        lp = self.params.log_prior(theta)
        ok = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            values = self._theta_values(theta[ok])
            chi2 = self._chi2(values)
            ll = self._loglike_from_chi2(chi2)
            res = lp[ok] + ll
            out[ok] = np.where(np.isfinite(res), res, -np.inf)
        return out[0] if single else out

    def _log_prob_single(self, theta):
        """Scalar fast path for one point at fixed cosmology (what a per-walker pool calls)."""
        lo, hi, mean, inv_sig, any_gauss = self.params._prior_arrays()
        th = theta.tolist()
        lp = 0.0
        for i, x in enumerate(th):
            if not lo[i] <= x <= hi[i]:       # also False for NaN
                return -np.inf
            if inv_sig[i]:
                lp -= 0.5 * ((x - mean[i]) * inv_sig[i]) ** 2
        vals = dict(self._fixed_floats)
        vals.update(zip(self.parameter_names, th))
        b1 = vals["b1"]
        x = [1.0, b1]
        if "fnl" in self.effects:
            x.append(vals["fnl"] * (b1 - self.p))
        for name in self.lin_free:
            x.append(vals[name])
        tpl = self._templates
        c = [x[a] * x[b] for a, b in tpl["pair_list"]]
        if self.observer is not None:
            w = vals["nu_obs"] ** 2 - 1.0
            c += [w * ci for ci in c]
        c.append(vals["shot_noise"])
        c = np.array(c)
        chi2 = self._dd - 2.0 * (c @ tpl["g"]) + c @ (tpl["G"] @ c)
        res = lp + float(self._loglike_from_chi2(chi2))
        return res if res == res else -np.inf

    def _chi2(self, values):
        if not self.cosmo_free:
            return self._chi2_fast(values, self._templates)
        n = max(np.size(v) for v in values.values())
        chi2 = np.empty(n)
        for i in range(n):
            row = {k: (v[i] if np.ndim(v) else v) for k, v in values.items()}
            try:
                cosmo = make_cosmology(self.config, {k: row[k] for k in self.cosmo_free})
                tpl = self._build_templates(cosmo)
            except ValueError:
                chi2[i] = np.inf   # e.g. a cosmology the background cannot describe
                continue
            chi2[i] = self._chi2_fast(row, tpl)[0]
        return chi2

    def _theta_values(self, theta):
        """Dict name -> (n,) array (sampled) or float (fixed/fiducial) for (n, n_dim) theta."""
        theta = np.atleast_2d(np.asarray(theta, float))
        vals = dict(self._fixed_floats)
        for i, name in enumerate(self.parameter_names):
            vals[name] = theta[:, i]
        return vals

    @property
    def varied_names(self):
        """Parameters a call to ``log_likelihood``/``model_vector`` may set: the sampled ones plus
        those that enter the fast path's coefficients whether sampled or not (b1, shot_noise,
        f_NL when its effect is on, ν when the observer term is on)."""
        names = set(self.parameter_names) | {"b1", "shot_noise"}
        if "fnl" in self.effects:
            names.add("fnl")
        if self.observer is not None:
            names.add("nu_obs")
        return names

    def _values(self, params):
        """Parameter arrays for a dict of values; the others at their fixed/fiducial values.

        A parameter this likelihood cannot vary (a fixed b_e or s is folded into the templates, a
        cosmological parameter that is not sampled fixes the templates' cosmology) is refused by
        name unless it equals the value held, so no value is ever silently dropped.
        """
        vals = {k: np.atleast_1d(float(v)) for k, v in self.fiducial.items()}
        for k in self.params.fixed:
            vals[k] = np.atleast_1d(float(self.params.fixed[k]))
        varied = self.varied_names
        for k, v in params.items():
            if k not in KNOWN:
                from .params import suggest
                raise ConfigError(f"unknown parameter '{k}'{suggest(k, KNOWN)}")
            x = np.atleast_1d(np.asarray(v, float))
            if k not in varied and not np.all(x == self._fixed_floats[k]):
                why = {"fnl": " (effects.fnl is off)", "nu_obs": " (effects.observer is off)"}.get(
                    k, f"; sample it (parameters.{k}) to vary it")
                raise ConfigError(f"parameter '{k}' = {float(x[0]):g} cannot be varied by this "
                                  f"likelihood: it is held at {self._fixed_floats[k]:g}{why}")
            vals[k] = x
        return vals

    def log_likelihood(self, params):
        """Log likelihood (fast path) for a dict of parameter values (others at fiducial/fixed);
        −inf (never NaN) where the model is not finite."""
        vals = self._values(params)
        with np.errstate(over="ignore", invalid="ignore"):
            return float(self._loglike_from_chi2(self._chi2(vals))[0])

    def _model_full(self, values, direct=False, cosmo_keys=None):
        """Full (unmasked) model vector(s) by the direct path. The cosmology takes the values of
        ``cosmo_keys`` (default: the sampled and fixed cosmological parameters) from ``values``."""
        with warnings.catch_warnings():
            # the fine theory grid reaches k chi << 1 by construction; the data range is
            # checked once in __init__ (_warn_regime)
            warnings.simplefilter("ignore", tr.PlaneParallelWarning)
            return self._model_full_quiet(values, cosmo_keys)

    def _model_full_quiet(self, values, cosmo_keys=None):
        if cosmo_keys is None:
            cosmo_keys = [k for k in COSMO_PARAMS if k in self.cosmo_free or k in self.config["fixed"]]
        cosmo = make_cosmology(self.config, {k: float(np.atleast_1d(values[k])[0])
                                             for k in cosmo_keys if k in values})
        out = []
        n = len(np.atleast_1d(values["b1"]))
        for i in range(n):
            t = self._tracer(values, i)
            pl = tr.multipoles(cosmo, self.z, self.k_theory, t, effects=self.effects,
                               ells=self.ells_theory, shot_noise=False)
            model = self.operator(pl)
            amp = float(np.atleast_1d(values["shot_noise"])[i])
            model = model + (amp * self._white_noise
                             - self.sn_sub * self._monopole_indicator()) / self.nbar
            if self.observer is not None:
                nu = float(np.atleast_1d(values["nu_obs"])[i])
                kern = tr.kernel(cosmo, self.z, self.k_theory, t, effects=self.effects)
                model = model + (nu ** 2 - 1.0) * self.observer.correction(cosmo, self.z, self.k_theory, kern)
            out.append(model)
        return np.array(out)

    def model_vector(self, params, direct=True):
        """Masked model vector for a dict of parameters (direct path by default)."""
        vals = self._values(params)
        if direct:
            return self._model_full(vals)[0][self.mask]
        tpl = self._templates
        return (self._design(vals, tpl) @ tpl["M"])[0] - self._sn_shift

    def log_likelihood_direct(self, params):
        """Log likelihood by full recomputation (reference for the fast path)."""
        r = self.data - self.model_vector(params, direct=True)
        chi2 = float(r @ cho_solve((self.chol, True), r))
        return float(self._loglike_from_chi2(np.array([chi2]))[0])

    def __reduce__(self):
        """Pickle as "the model of this config": process/MPI pools send the config (a few kB)
        and each worker rebuilds the likelihood once (window matrix from the disk cache)."""
        cfg = self.config
        return (_rebuild_in_worker, (cfg.raw, cfg.path, cfg.base_dir, self.config_hash))

    # --- helpers for the sampler/summary -------------------------------------------------------
    def n_walkers_min(self):
        return 2 * len(self.parameter_names)

    def theta_to_dict(self, theta):
        return {n: float(v) for n, v in zip(self.parameter_names, np.asarray(theta, float))}

    def chi2(self, theta):
        vals = self._theta_values(np.atleast_2d(theta))
        return float(self._chi2(vals)[0])

    @property
    def derived_names(self):
        """Derived parameters that vary over the posterior: f_NL mimicked by the projection terms
        (when they are on) and b1 σ8(z) (when b1 is sampled)."""
        names = []
        proj = any(e in self.effects for e in ("doppler", "potential"))
        if proj and any(self.params.is_free(n) for n in ("b1", "b_e", "s")):
            names.append("fnl_eff")
        if self.params.is_free("b1"):
            names.append("b1_sigma8")
        return names

    @property
    def derived_labels(self):
        from .params import DERIVED
        return [DERIVED[n].label for n in self.derived_names]

    def derived(self, theta):
        """(n, len(derived_names)) derived parameters for (n, n_dim) theta."""
        theta = np.atleast_2d(theta)
        vals = self._theta_values(theta)
        names = self.derived_names
        out = np.empty((theta.shape[0], len(names)))
        cosmos = {}

        def cosmo_of(i):
            """The sample's own cosmology when cosmological parameters are sampled."""
            if not self.cosmo_free:
                return self.cosmo
            key = tuple(float(vals[k][i]) for k in self.cosmo_free)
            if key not in cosmos:
                cosmos[key] = make_cosmology(self.config, dict(zip(self.cosmo_free, key)))
            return cosmos[key]

        cache = {}
        for i in range(theta.shape[0]):
            cosmo = cosmo_of(i)
            if "fnl_eff" in names:
                t = self._tracer(vals, i)
                key = (id(cosmo), t.b1, t.b_e, t.s)
                if key not in cache:
                    cache[key] = tr.effective_fnl(cosmo, self.z, t, effects=self.effects)
                out[i, names.index("fnl_eff")] = cache[key]
            if "b1_sigma8" in names:
                b1 = vals["b1"][i] if np.ndim(vals["b1"]) else vals["b1"]
                out[i, names.index("b1_sigma8")] = (b1 * cosmo.sigma8 * cosmo.growth_factor(self.z)
                                                    / cosmo.growth_factor(0.0))
        return out

    def observables(self):
        """Data per multipole for plots: ells, k, data, sigma (masked)."""
        sig = np.sqrt(np.diag(self.covariance))
        m2 = self.mask.reshape(len(self.data_full.ells), -1)
        out = dict(ells=[], k=[], data=[], sigma=[])
        pos = 0
        for j, l in enumerate(self.data_full.ells):
            sel = m2[j]
            if not sel.any():
                continue
            n = int(sel.sum())
            out["ells"].append(l)
            out["k"].append(self.data_full.k_eff[sel])
            out["data"].append(self.data[pos:pos + n])
            out["sigma"].append(sig[pos:pos + n])
            pos += n
        return out

    def model_observables(self, theta):
        vec = self.model_vector(self.theta_to_dict(theta), direct=False)
        parts, pos = [], 0
        for k in self.observables()["k"]:
            parts.append(vec[pos:pos + k.size])
            pos += k.size
        return parts

    def describe(self):
        """Multi-line human summary of the model (used by ``ergofit check``)."""
        cfg = self.config
        lines = [f"run: {cfg['run']}  (config hash {self.config_hash})",
                 f"survey: z = {self.z:g}, nbar = {self.nbar:g} (h/Mpc)^3, geometry "
                 f"{cfg['survey']['geometry']['shape']}, volume {self.volume:.4g} (Mpc/h)^3",
                 f"effects on: {', '.join(self.effects) or 'none'}; window: "
                 f"{'yes' if self.window is not None else 'no'}; integral constraint: {self.operator.ic}; "
                 f"observer term: {'yes (' + cfg['observer']['field'] + ')' if self.observer_on else 'no'}",
                 f"data: {self.data.size} points, multipoles {list(self.ells)}, k in "
                 f"[{self.data_full.k_eff[self.mask.reshape(len(self.data_full.ells), -1).any(0)].min():.4g}, "
                 f"{self.data_full.k_eff[self.mask.reshape(len(self.data_full.ells), -1).any(0)].max():.4g}] h/Mpc",
                 f"covariance: {cfg['covariance']['kind']}, condition number {self.condition_number:.3g}"
                 + (f"; {self.n_mocks} mocks, "
                    + ("Sellentin-Heavens t-likelihood" if self.t_likelihood else
                       f"Hartlap factor {self.precision_scale:.3f}")
                    + ("" if self.t_likelihood else
                       f"; Percival m1 = {self.percival_m1:.3f} (inflate parameter errors by "
                       f"{np.sqrt(self.percival_m1):.3f})") if self.mock_cov is not None else ""),
                 "sampled parameters:"]
        for p in self.params.free:
            lines.append(f"  {p.name:<10s} {p.prior.describe():<30s} start {p.start:g}")
        if self.params.fixed:
            lines.append("fixed: " + ", ".join(f"{k} = {v:g}" for k, v in self.params.fixed.items()))
        return "\n".join(lines)


#: Per-process memo used only when a pickled Likelihood arrives in a pool worker (see
#: ``Likelihood.__reduce__``): each worker rebuilds the model once from its config instead of
#: receiving megabytes of matrices with every task.
_WORKER_MODELS = {}


def _rebuild_in_worker(raw, src, base_dir, config_hash):
    from .config import validate
    lik = _WORKER_MODELS.get(config_hash)
    if lik is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")       # the master has shown them already
            lik = Likelihood(validate(raw, src=src, base_dir=base_dir))
        if lik.config_hash != config_hash:
            raise DataError(f"{src}: the input files changed while the run was going "
                            "(pool worker rebuilt a different model)")
        _WORKER_MODELS.clear()
        _WORKER_MODELS[config_hash] = lik
    return lik


def build(config):
    """Build the likelihood of a validated config (or a path to a YAML file)."""
    from .config import Config, load_config
    if not isinstance(config, Config):
        config = load_config(config)
    return Likelihood(config)
