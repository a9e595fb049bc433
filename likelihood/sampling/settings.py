"""Sampler settings, the result of a run, and the convergence warning (see :mod:`likelihood.sampling.driver`)."""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import ConfigError
from .moves import check_moves, default_moves

class ConvergenceWarning(UserWarning):
    """The autocorrelation stop rule was not met before ``max_steps``."""


# --------------------------------------------------------------------------------------------
# Settings and result
# --------------------------------------------------------------------------------------------


@dataclass
class SamplerSettings:
    """Settings of one sampling run.

    n_walkers: number of walkers (even, at least 2 x the number of sampled parameters).
    max_steps: total number of ensemble steps of the run (a resumed run counts the stored ones).
    check_every: steps between two autocorrelation-time checks.
    tau_factor: stop when ``n_steps > tau_factor * max(tau)`` ...
    tau_rtol: ... and ``max |delta tau / tau| < tau_rtol`` since the previous check.
    seed: seed of the initial ball and of emcee's random state; ``None`` draws one from the OS
        (it is stored in the chain file, so the run can still be repeated).
    progress: show a tqdm progress bar with the current tau estimate and acceptance fraction.
    flush_every, flush_seconds: write buffered steps to disk after this many steps or seconds.
    ball: with ``start="ball"`` the initial walkers are drawn from N(start, (ball * start_scale)^2);
        with ``start="optimum"`` from N(best fit, ball^2 * C), C the inverse Hessian of −log posterior
        at the optimum (the parameter scales where it is not positive definite); walkers outside
        the prior are redrawn.
    moves: move mixture ``{name: weight}`` (:mod:`.moves`); ``None``: the default,
        stretch 0.5 + differential evolution 0.5.
    start: "optimum" (maximise the posterior first, :mod:`.start`) or "ball" (around the
        configured starts). Only a new chain uses it; a resumed chain continues where it stopped.
    """

    n_walkers: int = 32
    max_steps: int = 20000
    check_every: int = 200
    tau_factor: float = 50.0
    tau_rtol: float = 0.01
    seed: int | None = 0
    progress: bool = True
    flush_every: int = 50
    flush_seconds: float = 10.0
    ball: float = 1.0
    moves: dict | None = None
    start: str = "optimum"

    def __post_init__(self) -> None:
        def _int(name: str, minimum: int) -> None:
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
                raise ConfigError(
                    f"sampler setting '{name}' = {value!r}: expected an integer >= {minimum}"
                )
            setattr(self, name, int(value))

        def _pos(name: str) -> None:
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float, np.number)) or not (
                math.isfinite(float(value)) and float(value) > 0
            ):
                raise ConfigError(
                    f"sampler setting '{name}' = {value!r}: expected a finite number > 0"
                )
            setattr(self, name, float(value))

        _int("n_walkers", 4)
        if self.n_walkers % 2:
            raise ConfigError(
                f"sampler setting 'n_walkers' = {self.n_walkers}: expected an even number"
            )
        _int("max_steps", 1)
        _int("check_every", 1)
        _int("flush_every", 1)
        for name in ("tau_factor", "tau_rtol", "flush_seconds", "ball"):
            _pos(name)
        if self.seed is not None:
            if isinstance(self.seed, bool) or not isinstance(self.seed, (int, np.integer)) or (
                self.seed < 0
            ):
                raise ConfigError(
                    f"sampler setting 'seed' = {self.seed!r}: expected a non-negative integer or null"
                )
            self.seed = int(self.seed)
        if self.moves is None:
            self.moves = default_moves(self.n_walkers)
        self.moves = check_moves(self.moves, "sampler setting 'moves'", self.n_walkers)
        if self.start not in ("optimum", "ball"):
            raise ConfigError(f"sampler setting 'start' = {self.start!r}: expected 'optimum' or 'ball'")
        if not isinstance(self.progress, bool):
            raise ConfigError(f"sampler setting 'progress' = {self.progress!r}: expected true or false")

    @classmethod
    def from_dict(cls, values: dict | None, where: str = "sampler") -> SamplerSettings:
        """Build settings from a config mapping; unknown keys raise a one-line ConfigError."""
        if values is None:
            return cls()
        if not isinstance(values, dict):
            raise ConfigError(f"config key '{where}': expected a mapping of sampler settings")
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise ConfigError(
                f"config key '{where}.{unknown[0]}' is not a sampler setting; "
                f"expected one of: {', '.join(sorted(known))}"
            )
        return cls(**values)

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


@dataclass
class SamplerResult:
    """Outcome of a run, read back from its chain file.

    samples: (n_samples, n_dim) burnt-in, thinned, flattened samples (emcee's
        ``get_chain(discard=burn_in, thin=thin, flat=True)`` ordering).
    log_prob: (n_samples,) log posterior of those samples.
    n_steps: stored ensemble steps; tau: (n_dim,) integrated autocorrelation time in steps,
        estimated over the whole stored chain; acceptance_fraction: mean over walkers.
    best_fit / best_log_prob: the highest-posterior sample of the whole stored chain.
    status: "converged", "max_steps" (finished, stop rule not met) or "running" (interrupted).
    notes: human-readable warnings about this result.
    """

    samples: np.ndarray
    log_prob: np.ndarray
    parameter_names: list[str]
    labels: list[str]
    prior_bounds: np.ndarray
    n_steps: int
    n_walkers: int
    tau: np.ndarray
    acceptance_fraction: float
    converged: bool
    burn_in: int
    thin: int
    chain_path: str
    config_hash: str
    best_fit: np.ndarray
    best_log_prob: float
    status: str
    seed: str
    settings: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def n_dim(self) -> int:
        return len(self.parameter_names)


# --------------------------------------------------------------------------------------------
# Likelihood interface checks and log-probability wrappers
# --------------------------------------------------------------------------------------------
