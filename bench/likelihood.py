"""Likelihood speed: fast path (single and batched), direct path, cosmology-varying path.

Targets (issue "Data vectors, covariance and the Gaussian likelihood, fast"): fast ≤ 20 µs single,
≤ 2 µs per walker in a batch of 64, direct/fast ≥ 100; cosmology-varying (h and ω_c sampled,
issue 16) ≤ 2 ms, with the observer term as configured and without it, one evaluation per new
point (no cache hit). Times are the best of several repeats of the CPU time of this process
(time.process_time), so that other jobs on a shared machine inflate them less.
Several tracers (issue 13): the two-tracer demo (two tracers, three spectra, configs/multi_demo.yaml)
≤ 20 µs single, ≤ 3 µs per walker in a batch of 64.
Run: python bench/likelihood.py [CONFIG]   (default: configs/demo.yaml, then the two-tracer demo)
"""
import copy
import os
import sys
import time
import warnings

import numpy as np
import yaml

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
from likelihood.config import validate, load_config  # noqa: E402
from likelihood.model import build  # noqa: E402


def per_call(fn, n, *args, repeats=5):
    """Best over ``repeats`` of the mean CPU time of n calls of fn(*args)."""
    fn(*args)
    best = np.inf
    for _ in range(repeats):
        t0 = time.process_time()
        for _ in range(n):
            fn(*args)
        best = min(best, (time.process_time() - t0) / n)
    return best


def fast_and_direct(lik, seed, n_direct):
    """(fast single, fast per walker in a batch of 64, direct single) CPU seconds per call at
    points near the start."""
    rng = np.random.default_rng(seed)
    theta = lik.start + 1e-2 * lik.start_scale * rng.standard_normal(lik.start.size)
    batch = lik.start + 1e-2 * lik.start_scale * rng.standard_normal((64, lik.start.size))
    return (per_call(lik.log_prob, 5000, theta), per_call(lik.log_prob, 2000, batch) / 64,
            per_call(lik.log_likelihood_direct, n_direct, lik.theta_to_dict(theta)))


def cosmology_varying(raw, path, observer):
    """Seconds per log_prob at new points with h and ω_c sampled (each point a new cosmology)."""
    raw = copy.deepcopy(raw)
    raw["parameters"]["h"] = {"flat": [0.6, 0.75], "start": 0.6736, "scale": 1e-3}
    raw["parameters"]["omega_c"] = {"flat": [0.08, 0.16], "start": 0.12, "scale": 1e-3}
    if not observer:
        raw["effects"]["observer"] = False
        raw["parameters"].pop("nu_obs", None)
    lik = build(validate(raw, src=path, base_dir=os.path.dirname(os.path.abspath(path))))
    rng = np.random.default_rng(2)
    points = iter(lik.start + lik.start_scale * rng.standard_normal((2000, lik.start.size)))
    return per_call(lambda: lik.log_prob(next(points)), 40, repeats=7)


def main():
    warnings.simplefilter("ignore")
    here = os.path.dirname(os.path.abspath(__file__))
    path = sys.argv[1] if len(sys.argv) > 1 else os.path.join(here, "..", "configs", "demo.yaml")
    lik = build(load_config(path))
    t_single, t_batch, t_direct = fast_and_direct(lik, seed=1, n_direct=20)
    print(f"config: {path}  ({lik.data.size} data points, {len(lik.parameter_names)} sampled: "
          f"{', '.join(lik.parameter_names)}; observer term {'on' if lik.observer is not None else 'off'})")
    print(f"fast path, single evaluation : {t_single * 1e6:8.2f} us   (target <= 20)")
    print(f"fast path, per walker (64)   : {t_batch * 1e6:8.2f} us   (target <= 2)")
    print(f"direct path, single          : {t_direct * 1e6:8.0f} us")
    print(f"ratio direct / fast          : {t_direct / t_single:8.0f}      (target >= 100)")
    with open(path) as fh:
        raw = yaml.safe_load(fh)
    if raw.get("effects", {}).get("observer"):
        t_obs = cosmology_varying(raw, path, observer=True)
        print(f"cosmology-varying, observer  : {t_obs * 1e3:8.2f} ms   (h, omega_c sampled; target <= 2)")
    t_cosmo = cosmology_varying(raw, path, observer=False)
    print(f"cosmology-varying, no observer: {t_cosmo * 1e3:7.2f} ms   (h, omega_c sampled; target <= 2)")
    multi_tracer(os.path.join(here, "..", "configs", "multi_demo.yaml"))


def multi_tracer(path):
    """Fast path of the two-tracer demo (two tracers, three spectra)."""
    lik = build(load_config(path))
    t_single, t_batch, t_direct = fast_and_direct(lik, seed=2, n_direct=5)
    print(f"config: {path}  ({lik.data.size} data points in {len(lik.forward.spectra)} spectra of "
          f"{len(lik.forward.tracers)} tracers, {len(lik.parameter_names)} sampled, "
          f"{lik._templates['M'].shape[0]} templates)")
    print(f"multi-tracer fast, single    : {t_single * 1e6:8.2f} us   (target <= 20)")
    print(f"multi-tracer fast, per walker: {t_batch * 1e6:8.2f} us   (target <= 3, batch of 64)")
    print(f"multi-tracer direct, single  : {t_direct * 1e3:8.1f} ms")


if __name__ == "__main__":
    main()
