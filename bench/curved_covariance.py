"""The curved-sky Gaussian covariance of the estimator (covariance.kind: harmonic) against the
plane-parallel Gaussian form (covariance.kind: gaussian) on a curved-sky config: the time to
compute it (cold disk cache), its diagonal against the simple form in the first bins, and the
Fisher error σ(f_NL) with each covariance (the other sampled parameters marginalised). A config
with several tracers (e.g. configs/multi_curved.yaml) compares every spectrum's blocks with the
plane-parallel multi-tracer Gaussian form (likelihood.covariance).

    PYTHONPATH=. python3 -P bench/curved_covariance.py [CONFIG]   (default configs/demo_curved.yaml)

BLAS runs single-threaded (set before numpy loads; see bench/curved_sky.py for why).
"""
import os
import sys

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import resource  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
import yaml  # noqa: E402

from likelihood.config import validate  # noqa: E402
from likelihood.forecast.fisher import likelihood_fisher  # noqa: E402
from likelihood.model import build  # noqa: E402


def build_with(raw, path, kind):
    raw = dict(raw, covariance={"kind": kind})
    return build(validate(raw, src=path, base_dir=os.path.dirname(os.path.abspath(path))))


DEMO = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "configs",
                    "demo_curved.yaml")


def main(path):
    warnings.simplefilter("ignore")
    os.environ["XDG_CACHE_HOME"] = tempfile.mkdtemp(prefix="ergofit-bench-")   # cold cache
    with open(path) as fh:
        raw = yaml.safe_load(fh)
    simple = build_with(raw, path, "gaussian")          # also fills the template cache
    t0 = time.perf_counter()
    cov = simple.forward.harmonic_covariance(simple.cosmo, simple.fiducial)
    t_cov = time.perf_counter() - t0
    t0 = time.perf_counter()
    harmonic = build_with(raw, path, "harmonic")
    t_warm = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    f = simple.forward
    multi = hasattr(f, "spectra")
    if multi:      # blocks (label, n_bins) of the data vector: spectrum by spectrum, ℓ-major
        shell = f.engine.shell
        blocks = [(f"{s.label} l = {l}", s.part.n_bins) for s in f.spectra for l in s.part.ells]
        what = f"{len(f.spectra)} spectra of {len(f.names)} tracers"
    else:
        shell = f.shell
        blocks = [(f"l = {l}", f.n_bins) for l in f.ells]
        what = f"{len(f.ells)} multipoles x {f.n_bins} bins"
    ic = f.engine.ic if multi else f.ic
    print(f"config: {path}; shell {shell.r_min:g}-{shell.r_max:g} Mpc/h, {ic} integral "
          f"constraint, terms {', '.join(f.terms)}; {what}, {cov.shape[0]} points")
    print(f"harmonic covariance: {t_cov:.1f} s (cold), build with it from the cache "
          f"{t_warm:.1f} s; peak memory {peak:.0f} MB")
    var_simple = np.diag(simple.covariance_full)
    ratio = np.diag(cov) / var_simple
    start = 0
    for label, nb in blocks:
        sl = slice(start, start + nb)
        start += nb
        r = ratio[sl]
        rows = cov[sl, sl][1:-1].sum(1) / var_simple[sl][1:-1]
        print(f"  {label}: variance harmonic/simple, first bins: "
              + ", ".join(f"{x:.3f}" for x in r[:5]) + f"; median over bins {np.median(r):.3f}; "
              f"row sums of the interior bins / simple: {rows.min():.3f}-{rows.max():.3f}")
    h = harmonic
    if multi:
        diag_only = type(h)(h.config, h.params, h.cosmo, h.survey, h.data_full, h.forward,
                            np.diag(np.diag(cov)), h.fiducial, h.known)
    else:
        diag_only = type(h)(h.config, params=h.params, cosmo=h.cosmo, survey=h.survey,
                            data_full=h.data_full, mask=h.mask, forward=h.forward,
                            covariance_full=np.diag(np.diag(cov)), mock_cov=None,
                            fiducial=h.fiducial)
    out = {}
    for name, lik in (("simple (plane-parallel Gaussian, shell volume)", simple),
                      ("harmonic (curved sky)", harmonic),
                      ("harmonic diagonal only", diag_only)):
        fisher = likelihood_fisher(lik)
        out[name] = fisher.errors[fisher.index("fnl")]
        print(f"  sigma(f_NL) with the {name} covariance: {out[name]:.2f} "
              f"(marginalised over {', '.join(n for n in fisher.names if n != 'fnl')})")
    a, b, _ = out.values()
    print(f"  ratio harmonic/simple: {b / a:.3f}")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else DEMO)
