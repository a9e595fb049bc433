"""Timings and accuracy figures of likelihood.forecast.bias on the demo config (configs/fnl_bias.yaml).

Run: python bench/forecast.py [--processes N]
Prints: the wall-clock time of one bias forecast (two model builds + Fisher + shift), the
derivative diagnostics (final step, relative change), the redshift scan serially and on a process
pool, and a cosmological-parameter Fisher (direct path, non-polynomial derivatives) with the
stability of its derivatives. Targets: one forecast < 2 s, the demo scan < 1 min serially.
The window matrices are cached on disk (~/.cache/ergofit): the first run of a new geometry is
slower by ~1 s per grid point; the figures below are printed for a cold and a warm cache.
"""
import argparse
import multiprocessing
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from likelihood import forecast as fc  # noqa: E402
from likelihood.config import load_config, validate  # noqa: E402

DEMO = ROOT / "configs" / "fnl_bias.yaml"


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--processes", type=int, default=2)
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    cfg = load_config(DEMO)

    with tempfile.TemporaryDirectory() as cache:
        os.environ["XDG_CACHE_HOME"] = cache
        res, t_cold = timed(lambda: fc.bias_forecast(cfg))
        _, t_warm = timed(lambda: fc.bias_forecast(cfg))
        print(f"one bias forecast (demo, {res.info['n_data']} data points, "
              f"{len(res.fisher.names)} parameters): cold cache {t_cold:.2f} s, warm {t_warm:.2f} s")
        for s in res.fisher.steps:
            print(f"  derivative {s['name']:<10s} step {s['step']:.3g}  relative change "
                  f"{s['rel_change']:.1e}  stable {s['stable']}")
        print(f"  sigma(fnl) = {res.value('sigma'):.4f}, shift = {res.value('delta'):+.4f} "
              f"({res.value('ratio'):+.3f} sigma)")

        n = len(cfg["forecast"]["scan"]["values"])
        scan, t_serial = timed(lambda: fc.bias_scan(cfg))
        print(f"redshift scan, {n} points, serial: {t_serial:.1f} s (warm cache after this)")
        _, t_serial2 = timed(lambda: fc.bias_scan(cfg))
        print(f"redshift scan, {n} points, serial, warm cache: {t_serial2:.1f} s")
        if args.processes > 1:
            with multiprocessing.get_context("fork").Pool(args.processes) as pool:
                _, t_pool = timed(lambda: fc.bias_scan(cfg, pool=pool))
            print(f"redshift scan, {n} points, {args.processes} processes, warm cache: {t_pool:.1f} s")
        print(f"  shift > {scan.threshold:g} sigma at redshift = {fc.ranges_text(scan) or 'none'}")

    # cosmological parameters: direct path, derivative stability
    raw = fc.config_to_raw(cfg)
    raw["parameters"]["omega_c"] = {"flat": [0.08, 0.16], "scale": 0.002}
    raw["parameters"]["n_s"] = {"flat": [0.8, 1.1], "scale": 0.005}
    ccfg = validate(raw, src=str(DEMO) + " [+ omega_c, n_s]", base_dir=cfg.base_dir)
    res, t = timed(lambda: fc.bias_forecast(ccfg))
    print(f"forecast with omega_c and n_s sampled: {t:.2f} s")
    for s in res.fisher.steps:
        print(f"  derivative {s['name']:<10s} step {s['step']:.3g}  relative change "
              f"{s['rel_change']:.1e}  stable {s['stable']}")
    for n, e in zip(res.fisher.names, res.fisher.errors):
        print(f"  sigma({n}) = {e:.4g}")


if __name__ == "__main__":
    main()
