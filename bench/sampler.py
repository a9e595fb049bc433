"""Sampler: moves, start and pools, measured on the demo and on a cosmology-varying config.

Prints, in one run (a few minutes on 2 cores):
1. for each move mixture and each config: τ (max over parameters), acceptance, effective samples
   per second and wall time to convergence (optimum start and the τ-based stop rule of
   likelihood.sampling.driver; ESS = walkers × (steps − burn-in) / max τ, per second of the whole
   run, start included);
2. steps per second with 1 process, a pool of 2 processes and MPI with 2 ranks (mpiexec -n 2, from
   the `mpi` extra; skipped with a message if absent), for the fast path and the cosmology-varying
   path: "forced" is the chunked pool evaluation itself, "run" what `ergofit run` then does (it
   falls back to one process where the pool is slower).

The cosmology-varying config is the demo with h and ω_c sampled under Gaussian priors from
Planck 2018 (TT,TE,EE+lowE+lensing, Table 2 of the 2018 parameters paper: h = 0.6736 ± 0.0054,
ω_c = 0.1200 ± 0.0012), the observer term off (one evaluation ≈ 0.7 ms; ≈ 1.3–1.5 ms with it, see
bench/likelihood.py), 12 walkers; its chains are capped at ``COSMO_STEPS`` steps (τ from that
chain, time to convergence projected as tau_factor × τ steps at the measured step rate, marked
"proj.").

Run: PYTHONPATH=. python3 -P bench/sampler.py [--quick]
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np
import yaml

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
sys.path.insert(0, ROOT)
from likelihood.config import validate  # noqa: E402
from likelihood.model import build  # noqa: E402
from likelihood.sampling import SamplerSettings, run_sampler  # noqa: E402
from likelihood.sampling.moves import default_moves, emcee_moves, evaluations_per_step  # noqa: E402
from likelihood.sampling.pools import ChunkedLogProb, choose_evaluation  # noqa: E402

MIXTURES = {
    "stretch": {"stretch": 1.0},
    "DE 0.8 + snooker 0.2": {"differential_evolution": 0.8, "de_snooker": 0.2},
    "stretch 0.5 + DE 0.5": {"stretch": 0.5, "differential_evolution": 0.5},
    "DE": {"differential_evolution": 1.0},
}
COSMO_STEPS = 600
DEMO = os.path.join(ROOT, "configs", "demo.yaml")


def raw_config(cosmo: bool) -> dict:
    with open(DEMO) as fh:
        raw = yaml.safe_load(fh)
    if cosmo:
        raw["parameters"]["h"] = {"gauss": [0.6736, 0.0054], "start": 0.6736, "scale": 0.002}
        raw["parameters"]["omega_c"] = {"gauss": [0.1200, 0.0012], "start": 0.12, "scale": 5e-4}
        raw["effects"]["observer"] = False        # keeps the bench to minutes (see docstring)
        del raw["parameters"]["nu_obs"]
        raw["sampling"]["walkers"] = 12
    return raw


def make_lik(cosmo: bool):
    return build(validate(raw_config(cosmo), src=DEMO, base_dir=os.path.dirname(DEMO)))


def run_mixture(lik, cosmo: bool, moves: dict, seed: int, tmp: str) -> dict:
    s = raw_config(cosmo)["sampling"]
    settings = SamplerSettings(n_walkers=s["walkers"], max_steps=COSMO_STEPS if cosmo else s["max_steps"],
                               check_every=100 if cosmo else s["check_every"], tau_factor=s["tau_factor"],
                               tau_rtol=s["tau_rtol"], seed=seed, progress=False, moves=moves)
    out = tempfile.mkdtemp(dir=tmp)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = run_sampler(lik, settings, out)
    wall = time.perf_counter() - t0
    shutil.rmtree(out)
    tau = float(np.max(r.tau))
    ess = r.n_walkers * (r.n_steps - r.burn_in) / tau
    rate = r.n_steps / wall
    t_conv = wall if r.converged else settings.tau_factor * tau / rate
    return dict(tau=tau, acc=r.acceptance_fraction, ess_s=ess / wall, t_conv=t_conv,
                steps=r.n_steps, converged=r.converged)


def moves_table(tmp: str, seeds_demo, seeds_cosmo) -> None:
    print("moves (mean over seeds; tau = max over parameters; cost = tau x ensemble evaluations per "
          "step, i.e. evaluations per independent sample, independent of machine load; ESS/s over "
          "the whole run, start included)")
    print(f"{'config':<16} {'moves':<22} {'tau':>6} {'cost':>6} {'acc':>5} {'ESS/s':>7} {'steps':>6} "
          f"{'t_conv [s]':>11}")
    for cosmo, seeds in ((False, seeds_demo), (True, seeds_cosmo)):
        lik = make_lik(cosmo)
        for name, moves in MIXTURES.items():
            rows = [run_mixture(lik, cosmo, moves, seed, tmp) for seed in seeds]
            m = {k: float(np.mean([r[k] for r in rows])) for k in ("tau", "acc", "ess_s", "t_conv",
                                                                     "steps")}
            conv = all(r["converged"] for r in rows)
            cost = m["tau"] * evaluations_per_step(moves)
            print(f"{'cosmo (h, w_c)' if cosmo else 'demo':<16} {name:<22} {m['tau']:6.1f} {cost:6.1f} "
                  f"{m['acc']:5.2f} {m['ess_s']:7.0f} {m['steps']:6.0f} "
                  f"{m['t_conv']:9.1f}{'' if conv else ' proj.'}", flush=True)


def steps_per_second(lik, pool, n_steps: int, force: bool) -> tuple[float, str]:
    """emcee steps/s with the default moves: the chunked pool (force) or what the run picks."""
    import emcee
    from likelihood.sampling.driver import _VectorisedLogProb
    n_walkers = 12 if lik.cosmo_free else 32
    rng = np.random.default_rng(3)
    p0 = lik.start + 0.1 * lik.start_scale * rng.standard_normal((n_walkers, lik.start.size))
    serial = _VectorisedLogProb(lik)
    if pool is None:
        fn, msg = serial, "one process"
    elif force:
        fn, msg = ChunkedLogProb(serial, pool, getattr(pool, "_processes", None)
                                 or getattr(pool, "size", 1)), "forced"
        fn(p0)   # warm-up: workers build their model
    else:
        fn, msg = choose_evaluation(serial, pool, p0)
    sampler = emcee.EnsembleSampler(n_walkers, lik.start.size, fn, vectorize=True,
                                    moves=emcee_moves(default_moves(n_walkers)))
    t0 = time.perf_counter()
    sampler.run_mcmc(p0, n_steps, progress=False)
    return n_steps / (time.perf_counter() - t0), msg


def pool_rows(which: str) -> dict:
    """steps/s in one process ('serial') or with a pool of 2 local processes ('processes')."""
    import multiprocessing
    import signal
    out = {}
    for cosmo in (False, True):
        lik = make_lik(cosmo)
        n = 40 if cosmo else 3000
        key = "cosmo" if cosmo else "fast"
        if which == "serial":
            out[key] = {"run": steps_per_second(lik, None, n, False)[0]}
        elif which == "processes":
            with multiprocessing.get_context("fork").Pool(
                    2, initializer=signal.signal, initargs=(signal.SIGINT, signal.SIG_IGN)) as pool:
                out[key] = {"forced": steps_per_second(lik, pool, n, True)[0],
                            "run": steps_per_second(lik, pool, n, False)[0]}
    return out


def mpi_rows() -> dict | str:
    exe = shutil.which("mpiexec") or os.path.join(os.path.dirname(sys.executable), "mpiexec")
    try:
        import mpi4py  # noqa: F401
        import schwimmbad  # noqa: F401
    except ImportError:
        return "skipped: the mpi extra (mpi4py, mpich, schwimmbad) is not installed"
    if not exe or not os.path.exists(exe):
        return "skipped: mpiexec not found (install the mpi extra)"
    out = {}
    for cosmo in (False, True):
        r = subprocess.run([exe, "-n", "2", sys.executable, "-P", os.path.abspath(__file__), "--mpi-worker",
                            "cosmo" if cosmo else "fast"], capture_output=True, text=True, timeout=600,
                           env=dict(os.environ, PYTHONPATH=ROOT))
        lines = [ln for ln in r.stdout.splitlines() if ln.startswith("{")]
        if r.returncode != 0 or not lines:
            return f"failed: {r.stderr.strip().splitlines()[-1] if r.stderr.strip() else r.returncode}"
        out.update(json.loads(lines[-1]))
    return out


def mpi_worker(kind: str) -> None:
    from likelihood.sampling.pools import close_pool, mpi_pool
    warnings.simplefilter("ignore")
    cosmo = kind == "cosmo"
    pool = mpi_pool()            # worker rank serves here and exits (before building anything, as
    lik = make_lik(cosmo)        # `ergofit run --mpi` does: a worker building its own copy would
                                 # compete with the master's measurement)
    n = 40 if cosmo else 3000
    try:
        res = {kind: {"forced": steps_per_second(lik, pool, n, True)[0],
                      "run": steps_per_second(lik, pool, n, False)[0]}}   # may close the pool
    finally:
        close_pool(pool)
    print(json.dumps(res), flush=True)


def pools_table() -> None:
    print("\nsteps per second (default moves; fast: demo, 32 walkers; cosmo: h and w_c sampled, "
          "12 walkers)")
    serial = pool_rows("serial")
    procs = pool_rows("processes")
    mpi = mpi_rows()
    print(f"{'path':<8} {'1 process':>10} {'2 proc forced':>14} {'2 proc run':>11} "
          f"{'MPI 2 forced':>13} {'MPI 2 run':>10}")
    for key in ("fast", "cosmo"):
        m = (f"{mpi[key]['forced']:13.1f} {mpi[key]['run']:10.1f}" if isinstance(mpi, dict)
             else f"{'-':>13} {'-':>10}")
        print(f"{key:<8} {serial[key]['run']:10.1f} {procs[key]['forced']:14.1f} "
              f"{procs[key]['run']:11.1f} {m}")
    if not isinstance(mpi, dict):
        print(f"MPI: {mpi}")
    print("('run' is what ergofit run does with --processes 2 / --mpi: the pool where it is measured "
          "to be faster, else one process; MPI with 2 ranks has one worker)")


def main() -> None:
    warnings.simplefilter("ignore")
    if "--mpi-worker" in sys.argv:
        mpi_worker(sys.argv[sys.argv.index("--mpi-worker") + 1])
        return
    quick = "--quick" in sys.argv
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        moves_table(tmp, seeds_demo=(1,) if quick else (1, 2, 3), seeds_cosmo=(1,))
    pools_table()
    print(f"\nbench/sampler.py: {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
