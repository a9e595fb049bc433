"""Curved-sky likelihood speed (engine.kind: curved_sky): the templates with a cold and a warm
disk cache, the fast path (single and per walker), the direct engine run, and one evaluation
when a cosmological parameter is sampled (the engine runs at every point).

    PYTHONPATH=. python3 -P bench/curved_likelihood.py [CONFIG] [--fast-only]
        (default configs/demo_curved.yaml; configs/multi_curved.yaml: two tracers, three
        spectra; --fast-only skips the direct and cosmology-varying runs, minutes for several
        tracers)

BLAS runs single-threaded (set before numpy loads; see bench/curved_sky.py for why).
"""
import os
import sys

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import resource  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import timeit  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
import yaml  # noqa: E402

from likelihood.config import load_config, validate  # noqa: E402
from likelihood.model import build  # noqa: E402


def per_call(fn, n, *args):
    """Seconds per call of fn(*args), after one warm-up call."""
    fn(*args)
    return timeit.timeit(lambda: fn(*args), number=n) / n


def main():
    warnings.simplefilter("ignore")
    here = os.path.dirname(os.path.abspath(__file__))
    args = [a for a in sys.argv[1:] if a != "--fast-only"]
    fast_only = "--fast-only" in sys.argv[1:]
    path = args[0] if args else os.path.join(here, "..", "configs", "demo_curved.yaml")
    os.environ["XDG_CACHE_HOME"] = tempfile.mkdtemp(prefix="ergofit-bench-")
    cfg = load_config(path)
    t0 = time.perf_counter()
    lik = build(cfg)
    t_cold = time.perf_counter() - t0
    t0 = time.perf_counter()
    build(cfg)
    t_warm = time.perf_counter() - t0
    rng = np.random.default_rng(1)
    theta = lik.start + 1e-2 * lik.start_scale * rng.standard_normal(lik.start.size)
    batch = lik.start + 1e-2 * lik.start_scale * rng.standard_normal((64, lik.start.size))
    t_single = per_call(lik.log_prob, 5000, theta)
    t_batch = per_call(lik.log_prob, 2000, batch) / 64
    f = lik.forward
    if hasattr(f, "bases"):                       # several tracers (model/curved_multitracer.py)
        shape = (f"{len(f.spectra)} spectra; basis kernels per tracer "
                 + ", ".join(f"{n}: {len(b.names)}" for n, b in f.bases.items()))
    else:
        shape = (f"{len(f.names)} basis kernels -> {len(f.names) * (len(f.names) + 1) // 2} "
                 "pair templates + noise")
    print(f"config: {path}  ({lik.data.size} data points; terms {', '.join(f.terms)}; "
          f"{f.engine.ic} IC; {shape})")
    print(f"templates, cold cache (build) : {t_cold:8.2f} s")
    print(f"build, warm cache            : {t_warm:8.2f} s")
    print(f"fast path, single evaluation : {t_single * 1e6:8.2f} us")
    print(f"fast path, per walker (64)   : {t_batch * 1e6:8.2f} us")
    if not fast_only:
        t_direct = per_call(lik.log_likelihood_direct, 2, lik.theta_to_dict(theta))
        with open(path) as fh:
            raw = yaml.safe_load(fh)
        raw.setdefault("parameters", {})["omega_c"] = {"flat": [0.08, 0.16], "start": 0.12,
                                                       "scale": 1e-3}
        lik_c = build(validate(raw, src=path, base_dir=os.path.dirname(os.path.abspath(path))))
        t_cosmo = per_call(lik_c.log_prob, 2, lik_c.start.copy() * (1 + 1e-4))
        print(f"direct engine run, single    : {t_direct:8.2f} s")
        print(f"cosmology-varying, single    : {t_cosmo:8.2f} s   (omega_c sampled)")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"peak memory {peak:.0f} MB, load average {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
