"""The ``ergofit`` command line: run, summarize, forecast, simulate, window, theory, check.

Exit codes: 0 on success, 2 on bad input (one line on stderr), 1 on an unexpected failure.
"""
from __future__ import annotations

import argparse
import os
import sys
import warnings

from .errors import ErgofitError
from .fileio import ensure_folder, write_text
from .pools import mpi_pool


def _out_dir(path):
    return ensure_folder(path, "choose another with output.folder or --out")


def cmd_check(args):
    from .model import build
    lik = build(args.config)
    print(lik.describe())
    print("config OK")
    return 0


def cmd_theory(args):
    from .theory_report import theory_report
    from .config import load_config
    cfg = load_config(args.config)
    out = args.out or os.path.join(cfg.output_folder, "theory.txt")
    _out_dir(os.path.dirname(os.path.abspath(out)))
    for line in theory_report(cfg, out, fnl=args.fnl):
        print(line)
    return 0


def _settings(cfg, args):
    from .sampler import SamplerSettings
    s = cfg["sampling"]
    return SamplerSettings(n_walkers=s["walkers"], max_steps=s["max_steps"], check_every=s["check_every"],
                           tau_factor=s["tau_factor"], tau_rtol=s["tau_rtol"], seed=s["seed"],
                           progress=s["progress"] and not args.quiet)


def _rebuild(run_dir):
    from .model import build
    return build(os.path.join(run_dir, "config.yaml"))


def cmd_run(args):
    pool = mpi_pool() if args.mpi else None   # worker ranks serve the pool and exit there
    try:
        return _run(args, pool)
    finally:
        if pool is not None:
            pool.close()


def _run(args, pool):
    from .config import load_config
    from .sampler import CHAIN_FILENAME, chain_status
    cfg = load_config(args.config)
    out = args.out or cfg.output_folder
    chain = os.path.join(out, CHAIN_FILENAME)
    if os.path.isfile(chain) and not args.resume:
        return _existing_run(cfg, out, chain, chain_status(chain))
    existed = os.path.isdir(out)
    _out_dir(out)
    had_chain = os.path.isfile(chain)
    try:
        return _sample_and_summarise(args, cfg, out, pool)
    except BaseException:
        _remove_unstarted(out, chain, existed, had_chain)
        raise


def _existing_run(cfg, out, chain, status):
    """A second `ergofit run` of a config whose chain exists (without --resume)."""
    stored_hash, state, n = status
    if stored_hash != cfg.hash:
        raise ErgofitError(f"{chain}: made by a different config (hash {stored_hash}, this config "
                           f"{cfg.hash}); start afresh with --out NEW_FOLDER or remove {out}")
    if state != "converged":
        raise ErgofitError(f"{chain}: an unfinished run of this config ({n} steps, {state}); "
                           "continue it with --resume (raise sampling.max_steps if it stopped there)")
    from .summary import constraints_text
    path = os.path.join(out, "summary.json")
    if os.path.isfile(path):
        import json
        with open(path, encoding="utf-8") as fh:
            summary = json.load(fh)
    else:
        from .sampler import load_chain
        from .summary import write_summary
        summary = write_summary(out, load_chain(out), _rebuild(out))
    print(f"{out}: this config was run to convergence already ({n} steps); nothing recomputed. "
          "Its constraints:")
    print(constraints_text(summary))
    return 0


def _remove_unstarted(out, chain, existed, had_chain):
    """Leave nothing behind from a run that did not start (no stored step)."""
    from .sampler import chain_status
    if os.path.isfile(chain) and not had_chain:
        try:
            started = chain_status(chain)[2] > 0
        except ErgofitError:
            started = False
        if started:
            return
        os.remove(chain)
    if not existed and os.path.isdir(out) and not os.listdir(out):
        os.rmdir(out)


def _sample_and_summarise(args, cfg, out, pool):
    from .model import build
    from .sampler import run_sampler
    from .summary import constraints_text, write_summary
    lik = build(cfg)
    settings = _settings(cfg, args)
    if lik.n_walkers_min() > settings.n_walkers:
        raise ErgofitError(f"{args.config}: sampling.walkers must be at least {lik.n_walkers_min()} "
                           f"(twice the {len(lik.parameter_names)} sampled parameters)")
    print(lik.describe())
    if pool is None and args.processes and args.processes > 1:
        import multiprocessing
        import signal
        with multiprocessing.get_context("fork").Pool(
                args.processes, initializer=signal.signal,
                initargs=(signal.SIGINT, signal.SIG_IGN)) as local_pool:
            result = run_sampler(lik, settings, out, resume=args.resume, pool=local_pool)
    else:
        result = run_sampler(lik, settings, out, resume=args.resume, pool=pool)
    cfg_copy = os.path.join(out, "config.yaml")
    if os.path.abspath(args.config) != os.path.abspath(cfg_copy):
        _write_config_copy(args.config, cfg_copy)
    summary = write_summary(out, result, lik)
    print(f"outputs in {out}/: chain.h5, config.yaml, summary.json, constraints.md, "
          "constraints.tex, triangle.png, triangle.pdf, multipoles.png")
    print(constraints_text(summary))
    if not result.converged:
        print("WARNING: the chain did not converge (see summary.json: converged=false); "
              "raise sampling.max_steps and rerun with --resume")
    return 0


#: Input files up to this size are copied into the run folder (inputs/), so the folder is
#: portable; larger ones are referenced by a path relative to the run folder.
COPY_INPUTS_MAX_BYTES = 50 * 2**20


def _write_config_copy(src, dst):
    """Copy the config next to the chain with its input files made portable: small inputs are
    copied into ``inputs/`` beside it, large ones referenced relative to the run folder. The
    config hash depends on file contents only, so the copy has the hash of the original."""
    import glob
    import shutil
    import yaml
    from .config import Config, load_config
    cfg = load_config(src)
    run_dir = os.path.dirname(os.path.abspath(dst))
    with open(src, encoding="utf-8") as fh:
        raw = yaml.safe_load(fh)

    def portable(rel, pattern=False):
        path = cfg.resolve(rel)
        files = sorted(glob.glob(path)) if pattern else [path]
        if sum(os.path.getsize(f) for f in files) > COPY_INPUTS_MAX_BYTES:
            return os.path.relpath(path, run_dir)
        sub = os.path.join("inputs", "mocks") if pattern else "inputs"
        os.makedirs(os.path.join(run_dir, sub), exist_ok=True)
        for f in files:
            target = os.path.join(run_dir, sub, os.path.basename(f))
            if os.path.abspath(f) != os.path.abspath(target):
                shutil.copyfile(f, target)
        return os.path.join(sub, os.path.basename(path))

    for sec, key in Config.INPUT_FILES:
        if isinstance(raw.get(sec), dict) and key in raw[sec]:
            raw[sec][key] = portable(raw[sec][key], pattern=(sec, key) == ("covariance", "mocks"))
    geo = (raw.get("survey") or {}).get("geometry") or {}
    if "randoms" in geo:
        geo["randoms"] = portable(geo["randoms"])
    raw.setdefault("run", cfg.run_name)
    write_text(dst, yaml.safe_dump(raw, sort_keys=False))


def cmd_summarize(args):
    from .summary import constraints_text, summarize
    for d in args.run_dirs:
        if not os.path.isfile(os.path.join(d, "chain.h5")):
            raise ErgofitError(f"{d}: no chain.h5 in this folder; give run folders written by 'ergofit run'")
    labels = args.labels
    if labels and len(labels) != len(args.run_dirs):
        raise ErgofitError(f"--labels: {len(labels)} labels for {len(args.run_dirs)} run folders")
    out = args.out
    if out is None and len(args.run_dirs) > 1:
        out = os.path.join("chains", "overlay")
    if out is not None:
        _out_dir(out)
    summaries = summarize(args.run_dirs, labels=labels, lik_factory=_rebuild, out_dir=out)
    for d, s in zip(args.run_dirs, summaries):
        print(f"== {s['label']} ({d})")
        print(constraints_text(s))
    where = out if out is not None else args.run_dirs[0]
    print(f"written to {where}/: " + ("triangle.png, triangle.pdf, constraints.md, summary.json"
                                      if out is not None else "summary.json, constraints.md, "
                                      "constraints.tex, triangle.png, triangle.pdf, multipoles.png"))
    return 0


def cmd_window(args):
    from .cosmology import Cosmology
    from .window import load_randoms, window_from_randoms
    pos, wts = load_randoms(args.randoms, cosmo=Cosmology.from_preset(args.preset))
    _out_dir(os.path.dirname(os.path.abspath(args.out)))
    wm = window_from_randoms(pos, wts, s_max=args.s_max, name=args.randoms)
    wm.save(args.out)
    png = os.path.splitext(args.out)[0] + ".png"
    wm.plot(png)
    print(f"window multipoles Q_0..Q_8 written to {args.out}; plot {png}")
    return 0


def cmd_forecast(args):
    from .forecast import forecast_cli
    return forecast_cli(args)


def cmd_simulate(args):
    from .simulate_cli import simulate_cli
    return simulate_cli(args)


def make_parser():
    p = argparse.ArgumentParser(prog="ergofit", description="Fit the largest-scale galaxy power "
                                "spectrum multipoles: f_NL, projection terms, window, integral "
                                "constraint and the observer term.")
    sub = p.add_subparsers(dest="command", required=True)

    s = sub.add_parser("run", help="sample the posterior of a config with emcee")
    s.add_argument("config")
    s.add_argument("--resume", action="store_true", help="continue an interrupted run in its folder")
    s.add_argument("--out", help="output folder (default: output.folder or chains/<run>)")
    s.add_argument("--processes", type=int, default=0, help="process pool size on this machine")
    s.add_argument("--mpi", action="store_true", help="distribute walkers over MPI ranks")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_run)

    s = sub.add_parser("summarize", help="tables and figures from finished run folders")
    s.add_argument("run_dirs", nargs="+")
    s.add_argument("--labels", nargs="+")
    s.add_argument("--out", help="output folder for the overlay and the combined tables "
                   "(default chains/overlay with several runs; with one run and no --out, the "
                   "run folder's own summary is rewritten)")
    s.set_defaults(func=cmd_summarize)

    s = sub.add_parser("forecast", help="Fisher forecasts and f_NL biases from neglected effects")
    s.add_argument("config")
    s.add_argument("--out")
    s.add_argument("--check-mcmc", action="store_true")
    s.add_argument("--mpi", action="store_true")
    s.add_argument("--processes", type=int, default=0)
    s.set_defaults(func=cmd_forecast)

    s = sub.add_parser("simulate", help="Gaussian mock surveys measured with the FFT estimator")
    s.add_argument("config")
    s.add_argument("--n", type=int, default=10, help="number of mocks")
    s.add_argument("--out")
    s.add_argument("--mesh", type=int, default=None, help="cells per side")
    s.add_argument("--validate", action="store_true")
    s.set_defaults(func=cmd_simulate)

    s = sub.add_parser("window", help="window multipoles Q_l(s) from a random catalogue")
    s.add_argument("randoms")
    s.add_argument("--out", required=True)
    s.add_argument("--s-max", type=float, default=None, help="largest separation [Mpc/h]")
    s.add_argument("--preset", default="planck2018",
                   help="cosmology converting ra/dec/z randoms to distances (default planck2018)")
    s.set_defaults(func=cmd_window)

    s = sub.add_parser("theory", help="model multipoles component by component, and a plot")
    s.add_argument("config")
    s.add_argument("--out", help="table path (default <output folder>/theory.txt); plots beside it")
    s.add_argument("--fnl", type=float, default=None,
                   help="f_NL of the '+ f_NL' component (default: tracer.fnl of the config)")
    s.set_defaults(func=cmd_theory)

    s = sub.add_parser("check", help="validate a config and describe the model")
    s.add_argument("config")
    s.set_defaults(func=cmd_check)
    return p


def _format_warning(message, category, filename, lineno, line=None):
    """Warnings as one readable line (no source path) on the command line."""
    return f"ergofit: {category.__name__}: {message}\n"


def main(argv=None):
    args = make_parser().parse_args(argv)
    warnings.formatwarning = _format_warning
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            return args.func(args)
    except ErgofitError as exc:
        msg = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        print(f"ergofit {args.command}: error: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"ergofit {args.command}: interrupted; finished work is kept (resume with --resume)",
              file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
