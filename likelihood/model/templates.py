"""The model data vector: direct path and the template decomposition of the fast path.

Decomposition used by the fast path
-----------------------------------
The observed galaxy field is Z(k, μ) δ_m with Z = A + iμB + Fμ² (see :mod:`likelihood.theory.tracer`).
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
monopole (the usual estimator; the constant −s e₀/n̄ is moved to the data side), c_ab = 1.
Only b_e and 𝒬 that are sampled get their own coefficient; fixed ones are folded into the
constant kernel Z_0. The whitening of the templates (χ² as a handful of dot products) is done by
:class:`likelihood.model.likelihood.Likelihood`.

The direct path recomputes the full model (tracer multipoles → operator → observer term) and
must agree with the fast path to 1e-10 (tests).
"""
from __future__ import annotations

import warnings

import numpy as np

from ..theory import tracer as tr
from .fiducial import make_tracer


class ForwardModel:
    """The (unmasked and masked) model data vector of one survey as a function of parameters.

    survey: :class:`~likelihood.observation.geometry.Survey`; operator: the window matrix from the
    theory grid ``k_theory`` (multipoles ``ells_theory``) to the data; observer: the observer term
    or None; ells, n_bins: the data vector's multipoles and bins; mask: the fitted entries;
    held: values of the parameters not sampled; lin_free: sampled b_e/s (own templates);
    cosmology: callable ``values -> Cosmology`` (see :func:`likelihood.model.factories.cosmology`);
    cosmo_keys: cosmological parameters the direct path takes from the values by default.
    """

    def __init__(self, survey, k_theory, ells_theory, operator, observer, ells, n_bins, mask, held,
                 lin_free, cosmology, cosmo_keys, shot_noise_subtracted):
        self.survey = survey
        self.z, self.nbar, self.p, self.effects = survey.z, survey.nbar, survey.p, survey.effects
        self.k_theory, self.ells_theory = k_theory, ells_theory
        self.operator, self.observer = operator, observer
        self.mask = mask
        self.held = held
        self.lin_free = list(lin_free)
        self.cosmology = cosmology
        self.cosmo_keys = list(cosmo_keys)
        self.sn_sub = 1.0 if shot_noise_subtracted else 0.0
        self.white_noise = operator.white_noise_response()   # fixed by the operator alone
        #: 1 on the ℓ = 0 entries of the full data vector, 0 elsewhere
        self.monopole = np.repeat(np.array([l == 0 for l in ells], float), n_bins)

    # --- direct path ----------------------------------------------------------------------------
    def kernel(self, cosmo, values, k, i=0):
        return tr.kernel(cosmo, self.z, k, make_tracer(values, self.p, self.nbar, i), effects=self.effects)

    def full(self, values, cosmo_keys=None):
        """Full (unmasked) model vector(s) by the direct path. The cosmology takes the values of
        ``cosmo_keys`` (default: the sampled and fixed cosmological parameters) from ``values``."""
        with warnings.catch_warnings():
            # the fine theory grid reaches k chi << 1 by construction; the data range is
            # checked once when the likelihood is built
            warnings.simplefilter("ignore", tr.PlaneParallelWarning)
            return self._full_quiet(values, cosmo_keys)

    def _full_quiet(self, values, cosmo_keys=None):
        if cosmo_keys is None:
            cosmo_keys = self.cosmo_keys
        cosmo = self.cosmology({k: float(np.atleast_1d(values[k])[0])
                                for k in cosmo_keys if k in values})
        out = []
        n = len(np.atleast_1d(values["b1"]))
        for i in range(n):
            t = make_tracer(values, self.p, self.nbar, i)
            pl = tr.multipoles(cosmo, self.z, self.k_theory, t, effects=self.effects,
                               ells=self.ells_theory, shot_noise=False)
            model = self.operator(pl)
            amp = float(np.atleast_1d(values["shot_noise"])[i])
            model = model + (amp * self.white_noise - self.sn_sub * self.monopole) / self.nbar
            if self.observer is not None:
                nu = float(np.atleast_1d(values["nu_obs"])[i])
                kern = tr.kernel(cosmo, self.z, self.k_theory, t, effects=self.effects)
                model = model + (nu ** 2 - 1.0) * self.observer.correction(cosmo, self.z, self.k_theory, kern)
            out.append(model)
        return np.array(out)

    # --- templates ------------------------------------------------------------------------------
    def basis(self, cosmo, k):
        """Basis kernels Z_a with Z = Σ_a x_a Z_a (see module docstring); names in order."""
        return basis_kernels(cosmo, self.z, k, self.effects, self.held["b_e"], self.held["s"],
                             self.lin_free)

    def coefficients(self, values):
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

    def templates(self, cosmo):
        """Unwhitened template rows (masked) at the given cosmology, in the order of :meth:`design`:
        dict(pairs, pair_list, n_pairs, M). All pairs go through the operator in one product."""
        k = self.k_theory
        pm = cosmo.power(k, self.z)
        basis = self.basis(cosmo, k)
        kernels = [z for _, z in basis]
        n = len(basis)
        pairs = [(a, b) for a in range(n) for b in range(a, n)]
        pab = tr.symmetric_pair_multipoles(kernels, pairs, pm, self.ells_theory)
        stack = [self.operator(pab)[:, self.mask]]
        if self.observer is not None:
            stack.append(self.observer.templates(cosmo, self.z, self.k_theory, kernels,
                                                 pairs)[:, self.mask])
        stack.append(self.white_noise[self.mask][None] / self.nbar)
        return dict(pairs=np.array(pairs), n_pairs=len(pairs), pair_list=pairs, M=np.vstack(stack))

    def design(self, values, tpl):
        """(n, n_templates) coefficients multiplying the template rows ``tpl["M"]``."""
        x = self.coefficients(values)
        c = x[:, tpl["pairs"][:, 0]] * x[:, tpl["pairs"][:, 1]]
        n = c.shape[0]
        out = np.empty((n, tpl["M"].shape[0]))
        npair = c.shape[1]
        out[:, :npair] = c
        if self.observer is not None:
            out[:, npair:2 * npair] = c * (np.reshape(values["nu_obs"], (-1, 1)) ** 2 - 1.0)
        out[:, -1] = values["shot_noise"]
        return out


def basis_kernels(cosmo, z, k, effects, b_e, s, lin_free):
    """Basis kernels [(name, Z_a)] of one tracer, Z = Σ_a x_a Z_a with x = (1, b1, v, b_e, 𝒬)
    (see the module docstring): "1" carries RSD and the projection terms at the held b_e, s (0
    for those sampled, listed in ``lin_free``), "b1" and "v" the bias and the f_NL response, and
    each sampled b_e/s its own derivative kernel (γ1, γ2 are linear in b_e and 𝒬)."""
    f = cosmo.growth_rate(z) if "rsd" in effects else 0.0
    proj = [e for e in effects if e in tr.PROJECTION_TERMS or e in ("doppler", "potential")]
    be0 = 0.0 if "b_e" in lin_free else b_e
    q0 = 0.0 if "s" in lin_free else 2.5 * s

    def gam(be, q):
        g1 = tr.gamma1(cosmo, z, be, q) if "doppler" in proj else 0.0
        g2 = tr.gamma2(cosmo, z, be, q) if "potential" in proj else 0.0
        return g1, g2

    zero = np.zeros_like(k)
    g1, g2 = gam(be0, q0)
    basis = [("1", tr.Kernel(A=g2 / k ** 2 + zero, B=g1 / k + zero, F=f)),
             ("b1", tr.Kernel(A=np.ones_like(k), B=zero, F=0.0))]
    if "fnl" in effects:
        basis.append(("v", tr.Kernel(A=tr.fnl_alpha(cosmo, k, z), B=zero, F=0.0)))
    for name, (db, dq) in (("b_e", (1.0, 0.0)), ("s", (0.0, 2.5))):
        if name in lin_free:
            h1, h2 = gam(be0 + db, q0 + dq)
            basis.append((name, tr.Kernel(A=(h2 - g2) / k ** 2 + zero, B=(h1 - g1) / k + zero, F=0.0)))
    return basis
