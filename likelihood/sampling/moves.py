"""Ensemble moves of the sampler: the ``sampling.moves`` config choice, mapped to emcee.moves.

A move mixture is a mapping ``{name: weight}``; at every step emcee picks one move with
probability ``weight / sum(weights)`` (drawn from the chain's own random state, so a resumed
chain stays bit-identical). The names are those of the published moves:

* ``stretch``: the affine-invariant stretch move (Goodman & Weare 2010, Eq. 7 and 10, a = 2),
  ``emcee.moves.StretchMove``.
* ``differential_evolution``: differential evolution (ter Braak 2006, Eq. 2: a proposal
  x + γ (x_r1 − x_r2) + ε with γ = 2.38 / sqrt(2 d)), ``emcee.moves.DEMove``.
* ``de_snooker``: the DE snooker update (ter Braak & Vrugt 2008, Sec. 2.2, γ = 1.7),
  ``emcee.moves.DESnookerMove``.

Walkers needed: emcee updates the ensemble in two halves, each moved with the other half (the
complementary ensemble) as its source of directions. The stretch move needs one partner, DE two
distinct ones and snooker three, so the complementary half (n_walkers / 2 walkers) must hold at
least 1, 2 and 3 walkers: n_walkers >= 2, 4 and 6.

Default: ``{stretch: 0.5, differential_evolution: 0.5}``, chosen by measurement with
``bench/sampler.py`` (table in the README, "Sampler") on the demo (fixed cosmology, 4
parameters, 32 walkers) and on the demo with h and ω_c sampled (12 walkers). The cost of an
independent sample is τ times the ensemble evaluations per step (1 for stretch and DE, 2 for
snooker, whose emcee implementation updates the ensemble in four parts), which unlike seconds
does not depend on what else the machine runs. Measured max τ (cost): stretch 49.2 (49) and
36.2 (36); DE 0.8 + snooker 0.2 16.3 (19.6) and 19.8 (23.8); stretch 0.5 + DE 0.5 20.5 (20.5)
and 22.4 (22.4); DE alone 13.5 and 16.3. The two mixtures tie within ~10 % and both need 2-2.5
times fewer evaluations than stretch alone; stretch + DE is the default because it keeps an
acceptance of ~0.45 (0.25 with snooker), reached the stop rule fastest in wall time on the
demo, and needs only 4 walkers. DE alone measured best but is not the default: ter Braak (2006,
Sec. 2) adds a small random vector ε to every DE proposal, which lets the chain reach every
point of the parameter space; emcee's DEMove randomises only the step factor γ, so alone it
proposes only along differences of walkers. The stretch half of the mixture supplies proposals
off those differences.
"""
from __future__ import annotations

import math

from ..errors import ConfigError

__all__ = ["DEFAULT_MOVES", "MOVES", "check_moves", "default_moves", "emcee_moves", "evaluations_per_step", "same_moves"]

#: name -> (emcee.moves class name, least number of walkers, ensemble evaluations per step)
MOVES = {
    "stretch": ("StretchMove", 2, 1),               # Goodman & Weare 2010
    "differential_evolution": ("DEMove", 4, 1),     # ter Braak 2006
    "de_snooker": ("DESnookerMove", 6, 2),          # ter Braak & Vrugt 2008 (emcee: nsplits=4)
}


def evaluations_per_step(moves: dict) -> float:
    """Mean number of full-ensemble log_prob evaluations per step of a mixture."""
    total = sum(moves.values())
    return sum(w * MOVES[n][2] for n, w in moves.items()) / total

DEFAULT_MOVES = {"stretch": 0.5, "differential_evolution": 0.5}


def default_moves(n_walkers: int | None = None) -> dict:
    """The default mixture for ``n_walkers`` walkers (the same for every count the config allows,
    4 or more: both moves run with 4)."""
    if n_walkers is not None and n_walkers < MOVES["differential_evolution"][1]:
        return {"stretch": 1.0}
    return dict(DEFAULT_MOVES)


def _suggest(name: str) -> str:
    import difflib
    close = difflib.get_close_matches(str(name), list(MOVES), n=1, cutoff=0.3)
    return f" (did you mean '{close[0]}'?)" if close else ""


def check_moves(value, where: str = "sampling.moves", n_walkers: int | None = None) -> dict:
    """Validate a move mixture; return ``{name: float weight}`` (zero weights dropped).

    Raises a one-line ConfigError naming ``where.NAME`` for an unknown name (the nearest known
    one suggested), a weight that is not a finite number >= 0, weights that do not sum to a
    positive number, or a move needing more walkers than ``n_walkers``.
    """
    if isinstance(value, str):
        value = {value: 1.0}
    if not isinstance(value, dict) or not value:
        raise ConfigError(f"{where}: expected a mapping of move names to weights, e.g. "
                          f"{{stretch: 0.5, differential_evolution: 0.5}}; got {value!r}")
    out = {}
    for name, weight in value.items():
        if name not in MOVES:
            raise ConfigError(f"{where}.{name}: unknown move{_suggest(name)}; "
                              f"known moves: {', '.join(MOVES)}")
        if isinstance(weight, bool) or not isinstance(weight, (int, float)) or not (
                math.isfinite(float(weight)) and float(weight) >= 0):
            raise ConfigError(f"{where}.{name}: weight {weight!r}: expected a finite number >= 0")
        if n_walkers is not None and float(weight) > 0 and n_walkers < MOVES[name][1]:
            raise ConfigError(f"{where}.{name}: this move needs at least {MOVES[name][1]} walkers, "
                              f"{n_walkers} configured (sampling.walkers)")
        if float(weight) > 0:
            out[name] = float(weight)
    if not out:
        raise ConfigError(f"{where}: the weights sum to 0; give at least one move a positive weight")
    return out


def emcee_moves(moves: dict) -> list:
    """``[(emcee move, weight), ...]`` for ``emcee.EnsembleSampler(moves=...)``."""
    import emcee
    return [(getattr(emcee.moves, MOVES[name][0])(), weight) for name, weight in moves.items()]


def same_moves(a: dict | None, b: dict | None) -> bool:
    """True when two mixtures pick the same moves with the same probabilities (``None``: a chain
    stored before moves were a setting, i.e. the stretch move alone)."""
    def norm(m):
        m = dict({"stretch": 1.0} if m is None else m)
        total = sum(m.values())
        return {k: round(v / total, 12) for k, v in m.items() if v > 0}
    return norm(a) == norm(b)
