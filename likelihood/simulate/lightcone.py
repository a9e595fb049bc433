"""Light-cone mocks: the observed number counts with growth, bias, f and the local projection
coefficients taken at each cell's distance from the observer (linear theory).

The curved-sky engine writes the local kernel as a sum of pieces (docs/curved_sky.md, section 2;
:func:`likelihood.curved.lightcone.local_pieces`), each a radial coefficient c_p(r) times an
operator on the linear matter density today δ_0 (P(q) = cosmo.power(q, 0)):

    piece        c_p(r)                                       operator on δ_0(k)
    density      D b                                          1
    rsd          −D f                    (order 2: j_J'')      (iμ)² = −μ²     → +D f μ² δ_0
    doppler      D γ1                    (order 1: j_J')       iμ / k
    potential    D γ2                                         1 / k²
    fnl          D f_NL (b − p) 3δ_cΩ_m0(H0/c)²/D_md          1 / (k² T(k))

with μ = k̂·n̂, n̂ = x/|x| the local (end-point) line of sight, iμ ↔ ∂/∂(qr) and μ² ↔ −∂²/∂(qr)²
on e^{iq·x} (design.md, "The curved sky"). In configuration space each operator is applied with
the local line of sight (:func:`likelihood.simulate.fields.los_power`: ∂_r of (−∇²)^{-1/2}, and
∂_r² ∇⁻² for μ²), giving one real field per piece; the observed field is

    Δ(x) = Σ_p c_p(|x|) [O_p δ_0](x),

with the coefficient of every cell evaluated exactly at its own distance (the same
``LightCone``, ``TracerCoefficients`` and ``local_pieces`` as the curved-sky engine). The
radial derivatives are taken at fixed time, so the coefficients are not differentiated
(docs/curved_sky.md, section 1): the mocks and the engine describe the same linear field.

Snapshot mode (``snapshot_z``): every coefficient at that redshift (also the χ of the
1/(χℋ) pieces), exactly as the engine's snapshot mode; it reproduces the snapshot mocks of
:func:`likelihood.simulate.mocks.simulate_mocks` with the plane-parallel tracer kernel at z
(tested to rounding).

Not in the mocks: the integrated terms (lensing, ISW, time delay) and the observer terms; a
model compared with these mocks must leave them out. The other limits of the Gaussian mocks
(linear theory, periodic box, modes only from k_f to k_N) are in :mod:`likelihood.simulate.mocks`.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..curved.lightcone import LOCAL_TERMS, LightCone, TracerCoefficients, check_terms, local_pieces
from ..errors import ConfigError, ErgofitError
from ..observation.estimator import window_weights
from .fields import los_power
from .mocks import simulate_mocks

#: LocalPiece.order (j_J, j_J', j_J'') → (los_power power, sign): j ↔ 1, j' ↔ iμ, j'' ↔ −μ²
_OPERATOR = {0: (0, 1.0), 1: (1, 1.0), 2: (2, -1.0)}


def _cone(cosmo, r_hi):
    """A LightCone that reaches r_hi [Mpc/h]."""
    z = 0.5
    while True:
        cone = LightCone(cosmo, z)
        if cone.r_max >= r_hi:
            return cone
        z *= 2.0
        if z > 1000.0:
            raise ConfigError(f"light cone: distance {r_hi:.6g} Mpc/h lies beyond the "
                              "cosmology's horizon")


@dataclass(frozen=True)
class LightConeKernel:
    """The local kernel pieces of one tracer on the mesh: for each piece its name, its
    ``los_power`` operator (power, q factor on the rfft layout) and its coefficient on the cells
    where the window is non-zero (``cells``: flat indices; elsewhere the field is 0 — the
    estimator and the Poisson sampling see only the window)."""

    names: tuple
    powers: tuple
    qfactors: tuple
    coefficients: tuple
    cells: np.ndarray
    snapshot_z: object = None

    @classmethod
    def make(cls, mesh, cosmo, tracer, terms, window, snapshot_z=None):
        """Pieces ``terms`` (from LOCAL_TERMS) of ``tracer`` (a TracerCoefficients: b, b_e, s
        numbers or callables of z) at every cell of ``window`` (a geometry or weights on the
        mesh), at the cell's own distance or, with ``snapshot_z``, all at that redshift."""
        if not isinstance(tracer, TracerCoefficients):
            raise ErgofitError(f"tracer = {tracer!r}: expected a "
                               "likelihood.curved.TracerCoefficients")
        terms = check_terms(terms, LOCAL_TERMS, "light-cone mock terms (local terms only: the "
                            "mocks have no lensing, ISW or time delay)")
        w = window_weights(mesh, window, "window")
        if w is None:
            raise ErgofitError("light-cone mocks need a window (the survey's radial range)")
        cells = np.flatnonzero(w > 0)
        r = mesh.radius().astype(float).ravel()[cells]
        if np.any(r == 0) and any(t in ("doppler", "potential") for t in terms):
            raise ConfigError("light-cone mocks: the window contains the observer, where the "
                              "Doppler and potential coefficients diverge (2(1 − 𝒬)/(χℋ)); use "
                              "a shell with r_min > 0")
        r_u, inverse = np.unique(r, return_inverse=True)
        cone = _cone(cosmo, float(r_u[-1]))
        if snapshot_z is not None:
            snapshot_z = float(snapshot_z)
            bg = cone.background(np.full(r_u.shape, float(cosmo.comoving_distance(snapshot_z))))
        else:
            bg = cone.background(r_u)
        pieces = local_pieces(bg, tracer.at(bg["z"]), terms)
        rdt = mesh.real_dtype
        powers, qfs, coefs = [], [], []
        for p in pieces:
            power, sign = _OPERATOR[p.order]
            c = sign * p.radial[inverse]
            if not np.all(np.isfinite(c)):
                raise ErgofitError(f"light-cone mocks: the {p.name} coefficient is not finite "
                                   "in the window")
            powers.append(power)
            if p.qpower == 0 and not p.transfer:
                qfs.append(1.0)
            else:
                qfs.append(mesh.on_grid(lambda k, p=p: p.qfactor(cosmo, k),
                                        f"{p.name} q factor").astype(rdt))
            coefs.append(c.astype(rdt))
        return cls(tuple(p.name for p in pieces), tuple(powers), tuple(qfs), tuple(coefs),
                   cells, snapshot_z)

    def pieces(self, mesh, delta_k, names=None):
        """{piece: real field on the mesh} of the pieces ``names`` (default all) for the linear
        density today ``delta_k`` (rfft layout, drawn with cosmo.power(k, 0))."""
        out = {}
        for name, power, qf, c in zip(self.names, self.powers, self.qfactors, self.coefficients):
            if names is not None and name not in names:
                continue
            t = los_power(mesh, delta_k, power, qf)
            field = np.zeros(t.size, dtype=mesh.real_dtype)
            field[self.cells] = c * t.ravel()[self.cells]
            out[name] = field.reshape(t.shape)
        return out

    def field(self, mesh, delta_k, names=None):
        """Δ(x) = Σ_p c_p(|x|) [O_p δ_0](x) over the pieces ``names`` (default all)."""
        if names is not None:
            unknown = sorted(set(names) - set(self.names))
            if unknown:
                raise ErgofitError(f"light-cone pieces {unknown}: not among {list(self.names)}")
        out = np.zeros(mesh.n ** 3, dtype=mesh.real_dtype)
        for name, power, qf, c in zip(self.names, self.powers, self.qfactors, self.coefficients):
            if names is None or name in names:
                t = los_power(mesh, delta_k, power, qf)
                out[self.cells] += c * t.ravel()[self.cells]
        return out.reshape((mesh.n,) * 3)


def simulate_lightcone(cosmo, tracer, terms, mesh, window, edges, ells=(0, 2, 4), n_mocks=10,
                       seed=0, nbar=None, snapshot_z=None, constraint=None, subtract_mean=True,
                       k_cut=None, progress=None, subtract_shot_noise=True):
    """Light-cone mocks of one tracer: :func:`likelihood.simulate.mocks.simulate_mocks` (same
    streams, Poisson sampling, observer constraint and estimator; which see) with the density
    today, P = cosmo.power(k, 0), observed through :class:`LightConeKernel` (module docstring).
    ``subtract_mean``: True (the survey mean: global integral constraint), False, or "radial"
    (each distance shell's mean: n(r) estimated from the mock, the radial integral constraint).
    Returns (list of DataVector, MockCovariance)."""
    kern = LightConeKernel.make(mesh, cosmo, tracer, terms, window, snapshot_z)
    pk0 = mesh.on_grid(lambda k: cosmo.power(k, 0.0), "cosmology power").astype(mesh.real_dtype)
    return simulate_mocks(mesh, pk0, None, None, 0.0, window, edges, ells, n_mocks, seed,
                          nbar=nbar, constraint=constraint, subtract_mean=subtract_mean,
                          k_cut=k_cut, progress=progress, subtract_shot_noise=subtract_shot_noise,
                          observe=lambda dk: kern.field(mesh, dk))


#: integral constraint of a curved-sky run → the mocks' mean subtraction (measure_multipoles)
SUBTRACT_MEAN = {"none": False, "global": True, "radial": "radial"}


@dataclass(frozen=True)
class LightConeSpec:
    """What the mocks of a curved-sky run take from its model: the tracer's coefficients, the
    local terms, the snapshot redshift (None: light cone) and the integral constraint, which
    sets how each mock estimates its mean (none, the survey mean, or each distance's mean)."""

    cosmo: object
    tracer: TracerCoefficients
    terms: tuple
    snapshot_z: object = None
    ic: str = "global"

    @classmethod
    def of_likelihood(cls, lik):
        """The spec of a curved-sky likelihood at its fiducial values (likelihood.model.curved:
        ``forward.tracer``, ``terms``, ``snapshot_z``, ``ic``); integrated terms dropped."""
        f = lik.forward
        return cls(lik.cosmo, f.tracer(lik.cosmo, lik.fiducial),
                   tuple(t for t in f.terms if t in LOCAL_TERMS), f.snapshot_z, f.ic)

    def describe(self):
        mode = ("snapshot at z = %g" % self.snapshot_z if self.snapshot_z is not None
                else "light cone (coefficients at each cell's distance)")
        return f"{mode}, local terms {', '.join(self.terms)}, {self.ic} mean subtraction"

    def mocks(self, mesh, window, edges, ells, n_mocks, seed, **kw):
        """:func:`simulate_lightcone` with this spec (keyword arguments passed on)."""
        return simulate_lightcone(self.cosmo, self.tracer, self.terms, mesh, window, edges, ells,
                                  n_mocks, seed, snapshot_z=self.snapshot_z,
                                  subtract_mean=SUBTRACT_MEAN[self.ic], **kw)
