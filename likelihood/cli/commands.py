"""The ``ergofit`` command line: run, summarize, forecast, simulate, window, theory, check.

Exit codes: 0 on success, 2 on bad input (one line on stderr), 1 on an unexpected failure.
"""
from __future__ import annotations

import argparse
import logging
import os
import sys
import warnings

from ..errors import ErgofitError
from ..io import ensure_folder, write_text
from ..sampling.pools import pool_for


def _out_dir(path):
    return ensure_folder(path, "choose another with output.folder or --out")


def cmd_check(args):
    from ..model import build
    lik = build(args.config)
    print(lik.describe())
    print("config OK")
    return 0


def _one_sample(cfg, command):
    """Refuse a config with several samples in a command that works on one."""
    if "samples" in cfg:
        raise ErgofitError(f"{cfg.path}: ergofit {command} works on one sample; write a config with "
                           "that sample's survey, tracers and spectra")
    return cfg


def cmd_theory(args):
    from ..report.theory import check_theory, spectra_theory_report, theory_report
    from ..config.schema import load_config
    cfg = _one_sample(load_config(args.config), "theory")
    check_theory(cfg)
    out = os.path.join(_out_dir(args.out or cfg.output_folder), "theory.txt")
    report = spectra_theory_report if "tracers" in cfg else theory_report
    for line in report(cfg, out, fnl=args.fnl):
        print(line)
    return 0


def _settings(cfg, args):
    from ..sampling import SamplerSettings
    s = cfg["sampling"]
    return SamplerSettings(n_walkers=s["walkers"], max_steps=s["max_steps"], check_every=s["check_every"],
                           tau_factor=s["tau_factor"], tau_rtol=s["tau_rtol"], seed=s["seed"],
                           progress=s["progress"] and not args.quiet, moves=s["moves"],
                           start=s["start"])


def _rebuild(run_dir):
    from ..model import build
    return build(os.path.join(run_dir, "config.yaml"))


def cmd_run(args):
    with pool_for(args.processes, args.mpi) as pool:
        return _run(args, pool)


def _run(args, pool):
    from ..config.schema import load_config
    from ..sampling import CHAIN_FILENAME
    from ..sampling.driver import chain_status
    cfg = load_config(args.config)
    out = args.out or cfg.output_folder
    chain = os.path.join(out, CHAIN_FILENAME)
    if os.path.isfile(chain) and not args.resume:
        return _existing_run(cfg, out, chain, chain_status(chain))
    existed = _first_missing_folder(out)
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
    from ..report.summary import constraints_text
    path = os.path.join(out, "summary.json")
    if os.path.isfile(path):
        import json
        with open(path, encoding="utf-8") as fh:
            summary = json.load(fh)
    else:
        from ..report.summary import write_summary
        from ..sampling import load_chain
        summary = write_summary(out, load_chain(out), _rebuild(out))
    print(f"{out}: this config was run to convergence already ({n} steps); nothing recomputed. "
          "Its constraints:")
    print(constraints_text(summary))
    return 0


def _first_missing_folder(path):
    """The outermost folder of ``path`` that does not exist yet (None if ``path`` exists)."""
    path, missing = os.path.abspath(path), None
    while not os.path.isdir(path):
        missing, parent = path, os.path.dirname(path)
        if parent == path:
            break
        path = parent
    return missing


def _remove_unstarted(out, chain, created, had_chain):
    """Leave nothing behind from a run that did not start (no stored step): the chain file and
    the empty folders this run created (``created``: the outermost of them, or None)."""
    from ..sampling.driver import chain_status
    if os.path.isfile(chain) and not had_chain:
        try:
            started = chain_status(chain)[2] > 0
        except ErgofitError:
            started = False
        if started:
            return
        os.remove(chain)
    if created is None:
        return
    folder = os.path.abspath(out)
    while os.path.isdir(folder) and not os.listdir(folder):
        os.rmdir(folder)
        if folder == created:
            break
        folder = os.path.dirname(folder)


def _sample_and_summarise(args, cfg, out, pool):
    from ..model import build
    from ..report.summary import constraints_text, write_summary
    from ..sampling import run_sampler
    lik = build(cfg)
    settings = _settings(cfg, args)
    if lik.n_walkers_min() > settings.n_walkers:
        raise ErgofitError(f"{args.config}: sampling.walkers must be at least {lik.n_walkers_min()} "
                           f"(twice the {len(lik.parameter_names)} sampled parameters)")
    print(lik.describe())
    result = run_sampler(lik, settings, out, resume=args.resume, pool=pool, report=print)
    cfg_copy = os.path.join(out, "config.yaml")
    if os.path.abspath(args.config) != os.path.abspath(cfg_copy):
        _write_config_copy(args.config, cfg_copy)
    summary = write_summary(out, result, lik)
    print(f"outputs in {out}/: chain.h5, config.yaml, summary.json, constraints.md, "
          "constraints.tex, triangle.png, triangle.pdf, multipoles.png" + _triangles(summary))
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
    from ..config.schema import GEOMETRY_FILES, Config, load_config
    cfg = load_config(src)
    run_dir = os.path.dirname(os.path.abspath(dst))
    with open(src, encoding="utf-8") as fh:
        raw = yaml.safe_load(fh)

    def portable(rel, pattern=False, folder="inputs"):
        path = cfg.resolve(rel)
        files = sorted(glob.glob(path)) if pattern else [path]
        if sum(os.path.getsize(f) for f in files) > COPY_INPUTS_MAX_BYTES:
            return os.path.relpath(path, run_dir)
        sub = os.path.join(folder, "mocks") if pattern else folder
        os.makedirs(os.path.join(run_dir, sub), exist_ok=True)
        for f in files:
            target = os.path.join(run_dir, sub, os.path.basename(f))
            if os.path.abspath(f) != os.path.abspath(target):
                shutil.copyfile(f, target)
        return os.path.join(sub, os.path.basename(path))

    # several samples: each sample's files go to inputs/<sample name>/ (names may repeat)
    blocks = [(raw, "inputs")] + [(s, os.path.join("inputs", s["name"])) for s in raw.get("samples") or []]
    for block, folder in blocks:
        for sec, key in Config.INPUT_FILES:
            if isinstance(block.get(sec), dict) and key in block[sec]:
                block[sec][key] = portable(block[sec][key], (sec, key) == ("covariance", "mocks"), folder)
        geo = (block.get("survey") or {}).get("geometry") or {}
        for key in GEOMETRY_FILES:
            if key in geo:
                geo[key] = portable(geo[key], False, folder)
    raw.setdefault("run", cfg.run_name)
    write_text(dst, yaml.safe_dump(raw, sort_keys=False))


def cmd_summarize(args):
    from ..report.summary import constraints_text, summarize
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
                                      "constraints.tex, triangle.png, triangle.pdf, multipoles.png"
                                      + _triangles(summaries[0])))
    return 0


def _triangles(summary):
    """', triangle_NAME.png/.pdf' for each sample's triangle plot of a run with samples."""
    return "".join(f", {t}.png/.pdf" for t in summary.get("sample_triangles") or [])


def cmd_window(args):
    from ..theory.cosmology import Cosmology
    from ..observation.geometry import randoms_volume
    from ..observation.randoms import load_randoms, window_from_randoms
    pos, wts = load_randoms(args.randoms, cosmo=Cosmology.from_preset(args.preset))
    wm = window_from_randoms(pos, wts, s_max=args.s_max, name=args.randoms)
    wm.meta["volume"] = f"{randoms_volume(pos, wts):.6e}"   # read by survey.geometry shape: window
    out = _out_dir(args.out)
    table, png = os.path.join(out, "window.txt"), os.path.join(out, "window.png")
    wm.save(table)
    wm.plot(png)
    print(f"window multipoles Q_0..Q_8 written to {table}; plot {png}; effective volume "
          f"{wm.meta['volume']} (Mpc/h)^3. Use the table in a config with "
          f"survey.geometry: {{shape: window, file: {table}}}")
    return 0


def cmd_forecast(args):
    """``ergofit forecast CONFIG [--out DIR] [--check-mcmc] [--mpi] [--processes N]``."""
    from ..config import load_config
    from ..forecast import forecast_lines, forecast_settings, run_forecast
    cfg = load_config(args.config)
    processes = int(getattr(args, "processes", 0) or 0)
    if processes > 0 and not forecast_settings(cfg)["scan"]:
        processes = 0                          # nothing to spread over a pool
    with pool_for(processes, getattr(args, "mpi", False)) as pool:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # collected and written to forecast.md instead
            res = run_forecast(cfg, getattr(args, "out", None),
                               check_mcmc=getattr(args, "check_mcmc", False), pool=pool)
    for line in forecast_lines(cfg, res):
        print(line)
    return 0


def cmd_simulate(args):
    from ..simulate.survey import simulate_survey
    simulate_survey(args.config, args.n, out=args.out, mesh_n=args.mesh, check=args.validate,
                    poisson=not args.no_poisson)
    return 0


def _sub(sub, name, help_text, example):
    return sub.add_parser(name, help=help_text, description=help_text[0].upper() + help_text[1:] + ".",
                          epilog=f"example:\n  {example}",
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def make_parser():
    from .. import __version__
    p = argparse.ArgumentParser(prog="ergofit", description="Fit the largest-scale galaxy power "
                                "spectrum multipoles: f_NL, projection terms, window, integral "
                                "constraint and the observer term. Every --out is an output folder.",
                                epilog="start with: ergofit run configs/demo.yaml",
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"ergofit {__version__}")
    sub = p.add_subparsers(dest="command", required=True)
    cfg_help = "YAML config file (see the README's config section)"

    s = _sub(sub, "run", "sample the posterior of a config with emcee",
             "ergofit run configs/demo.yaml --processes 2")
    s.add_argument("config", help=cfg_help)
    s.add_argument("--resume", action="store_true", help="continue an interrupted run in its folder")
    s.add_argument("--out", help="output folder (default: output.folder or chains/<run>)")
    s.add_argument("--processes", type=_positive_int, default=0, help="process pool size on this machine")
    s.add_argument("--mpi", action="store_true", help="distribute walkers over MPI ranks (under mpiexec)")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_run)

    s = _sub(sub, "summarize", "tables and figures from finished run folders",
             'ergofit summarize chains/a chains/b --labels "model A" "model B" --out chains/overlay')
    s.add_argument("run_dirs", nargs="+", metavar="RUN_FOLDER",
                   help="folders written by 'ergofit run' (chain.h5 and config.yaml)")
    s.add_argument("--labels", nargs="+", help="one legend/table label per run folder "
                   "(default: the folder names)")
    s.add_argument("--out", help="output folder for the overlay and the combined tables "
                   "(default chains/overlay with several runs; with one run and no --out, the "
                   "run folder's own summary is rewritten)")
    s.set_defaults(func=cmd_summarize)

    s = _sub(sub, "forecast", "Fisher forecasts and f_NL biases from neglected effects",
             "ergofit forecast configs/fnl_bias.yaml --processes 2")
    s.add_argument("config", help=cfg_help + "; its forecast section says what to neglect or scan")
    s.add_argument("--out", help="output folder (default: <output folder of the config>/forecast)")
    s.add_argument("--check-mcmc", action="store_true",
                   help="also run a short MCMC on the noiseless truth mock (one or several "
                   "tracers or samples) and compare its widths and shifts with the Fisher "
                   "forecast")
    s.add_argument("--mpi", action="store_true", help="run a scan's points on MPI ranks")
    s.add_argument("--processes", type=_positive_int, default=0,
                   help="run a scan's points on a process pool of this size")
    s.set_defaults(func=cmd_forecast)

    s = _sub(sub, "simulate", "Poisson-sampled Gaussian mock surveys measured with the FFT estimator",
             "ergofit simulate configs/demo.yaml --n 10 --mesh 128")
    s.add_argument("config", help=cfg_help + " (the survey and fiducial model of the mocks)")
    s.add_argument("--n", type=_positive_int, default=10, help="number of mocks")
    s.add_argument("--out", help="output folder of the mock data vectors "
                   "(default: <output folder of the config>/mocks; with samples, one "
                   "subfolder per sample)")
    s.add_argument("--mesh", type=_positive_int, default=None, help="FFT cells per side")
    s.add_argument("--validate", action="store_true",
                   help="compare the mean of the mocks with the model they were made from")
    s.add_argument("--no-poisson", action="store_true",
                   help="mocks of the continuous field, without Poisson sampling (no shot noise)")
    s.set_defaults(func=cmd_simulate)

    s = _sub(sub, "window", "window multipoles Q_l(s) from a random catalogue",
             "ergofit window configs/demo_randoms.npz --out chains/window")
    s.add_argument("randoms", help="random catalogue: text file with a header naming its columns "
                   "(x y z in Mpc/h, or ra dec redshift), optional weight column")
    s.add_argument("--out", required=True, help="output folder: window.txt (Q_l table, read by "
                   "survey.geometry shape: window) and window.png")
    s.add_argument("--s-max", dest="s_max", type=float, default=None,
                   help="largest pair separation [Mpc/h] (default: the catalogue's extent)")
    s.add_argument("--preset", default="planck2018",
                   help="cosmology converting ra/dec/redshift randoms to distances (default planck2018)")
    s.set_defaults(func=cmd_window)

    s = _sub(sub, "theory", "model multipoles component by component, and a plot",
             "ergofit theory configs/demo.yaml --fnl 10")
    s.add_argument("config", help=cfg_help)
    s.add_argument("--out", help="output folder: theory.txt and its plots "
                   "(default: the config's output folder)")
    s.add_argument("--fnl", type=_finite_float, default=None,
                   help="f_NL of the '+ f_NL' component (default: tracer.fnl of the config)")
    s.set_defaults(func=cmd_theory)

    s = _sub(sub, "check", "validate a config and describe the model", "ergofit check configs/demo.yaml")
    s.add_argument("config", help=cfg_help)
    s.set_defaults(func=cmd_check)
    return p


def _positive_int(text):
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if n < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {n}")
    return n


def _finite_float(text):
    from ..checks import finite_number
    x = finite_number(text, "value", argparse.ArgumentTypeError)
    if abs(x) > 1e6:
        raise argparse.ArgumentTypeError(f"expected a finite number with |x| <= 1e6, got {text}")
    return x


def _format_warning(message, category, filename, lineno, line=None):
    """Warnings as one readable line (no source path) on the command line."""
    return f"ergofit: {category.__name__}: {message}\n"


class _OncePerCommand:
    """Show each warning text once per command, however often the model is rebuilt (a warning
    filter alone cannot: every ``catch_warnings`` inside the library resets its registry)."""

    def __init__(self):
        self.seen = set()

    def __call__(self, message, category, filename, lineno, file=None, line=None):
        key = (category, str(message))
        if key not in self.seen:
            self.seen.add(key)
            print(_format_warning(message, category, filename, lineno), end="", file=sys.stderr)


class _QuietGetdist(logging.Filter):
    """getdist logs smoothing-resolution notes for short chains (fine_bins...) that a user
    cannot act on; the posterior numbers do not depend on them."""

    def filter(self, record):
        return "getdist" not in record.pathname or record.levelno > logging.WARNING


def main(argv=None):
    args = make_parser().parse_args(argv)
    quiet = _QuietGetdist()
    logging.getLogger().addFilter(quiet)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("always")
            warnings.showwarning = _OncePerCommand()
            return args.func(args)
    except ErgofitError as exc:
        msg = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        print(f"ergofit {args.command}: error: {msg}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"ergofit {args.command}: interrupted; finished work is kept (resume with --resume)",
              file=sys.stderr)
        return 130
    finally:
        logging.getLogger().removeFilter(quiet)

