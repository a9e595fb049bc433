"""Constraint tables: Markdown, LaTeX and terminal text of a run summary.

Numbers are rounded by the Particle Data Group rule (PDG, Review of Particle Physics,
Introduction, "Rounding"): the three leading digits of the error decide between two significant
digits (100-354), one (355-949) or rounding up to two (950-999).
"""

from __future__ import annotations

import math


# --------------------------------------------------------------------------------------------
# Number formatting (PDG rounding rule)
# --------------------------------------------------------------------------------------------


def decimals(err: float) -> int:
    """Decimal places for a value with uncertainty ``err`` (PDG rounding rule, see module doc)."""
    if err is None or not math.isfinite(err) or err <= 0:
        return 4
    exponent = math.floor(math.log10(err))
    leading = int(err / 10.0 ** (exponent - 2) + 1e-9)  # three leading digits, 100..999
    if leading >= 950:  # rounds up to 1000: two significant digits of the next decade
        exponent, significant = exponent + 1, 2
    else:
        significant = 1 if leading >= 355 else 2
    return significant - 1 - exponent


def fmt(x: float | None, decimals: int) -> str:
    """``x`` rounded to ``decimals`` places (negative: to tens, hundreds, ...)."""
    if x is None:
        return "-"
    if abs(x) >= 1e9 or decimals > 12:
        return f"{x:.3g}"
    if decimals < 0:
        text = f"{round(x, decimals):.0f}"
    else:
        text = f"{x:.{decimals}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text



def _central(entry: dict) -> tuple[str, str, str]:
    """(mean, +err, -err) strings for a two-sided 68% limit."""
    mean = entry["mean"]
    lo, hi = entry["interval68"]
    up, down = hi - mean, mean - lo
    dec = decimals(min(up, down)) if up > 0 and down > 0 else decimals(entry["std"])
    return fmt(mean, dec), fmt(up, dec), fmt(down, dec)


def _one_sided(entry: dict, level: str, tex: bool) -> str:
    kind = entry[f"limit_type{level}"]
    lo, hi = entry[f"interval{level}"]
    dec = decimals(entry["std"])
    lt, gt = (r"<", r">") if tex else ("<", ">")
    if kind == "upper limit" and hi is not None:
        return f"{lt} {fmt(hi, dec)}"
    if kind == "lower limit" and lo is not None:
        return f"{gt} {fmt(lo, dec)}"
    return "unconstrained" if not tex else r"\mathrm{unconstrained}"


def _interval(entry: dict, level: str, tex: bool) -> str:
    if entry[f"limit_type{level}"] != "two-sided":
        return _one_sided(entry, level, tex)
    lo, hi = entry[f"interval{level}"]
    dec = decimals(entry["std"])
    return f"[{fmt(lo, dec)}, {fmt(hi, dec)}]" if not tex else \
        rf"[{fmt(lo, dec)},\ {fmt(hi, dec)}]"


def _best(entry: dict) -> str:
    return fmt(entry.get("best_fit"), decimals(entry["std"]) + 1)


def constraints_markdown(summary: dict) -> str:
    lines = [f"# Constraints: {summary['label']}", ""]
    conv = "converged" if summary["converged"] else "NOT CONVERGED"
    lines.append(
        f"{summary['n_steps']} steps x {summary['n_walkers']} walkers ({conv}); max tau = "
        f"{fmt(summary['tau_max'], 1)} steps; burn-in {summary['burn_in']}, thin "
        f"{summary['thin']}, {summary['n_samples']} samples; acceptance "
        f"{summary['acceptance_fraction']:.2f}; config hash `{summary['config_hash']}`."
    )
    if summary["chi2"] is not None:
        pte = summary.get("chi2_pte")
        lines.append(f"Best fit: chi2 = {summary['chi2']:.2f} for {summary['dof']} degrees of "
                     "freedom" + (f" (probability to exceed {pte:.3g})." if pte is not None else "."))
    by_sample = any("sample" in e for e in summary["parameters"].values())
    lines += ["", "| parameter | " + ("sample | " if by_sample else "") + "mean and 68% limits | "
              "68% interval | 95% interval | best fit |",
              "|:--|" + (":--|" if by_sample else "") + ":--|:--|:--|:--|"]
    for name, e in summary["parameters"].items():
        label = f"${e['label']}$" + (" (derived)" if e["derived"] else "")
        sample = f" {e.get('sample', '')} |" if by_sample else ""
        lines.append(f"| {label} `{name}` |{sample} {_central_text(e, tex=False)} | "
                     f"{_interval(e, '68', False)} | {_interval(e, '95', False)} | {_best(e)} |")
    lines.append("")
    lines += _blocks_markdown(summary.get("fit_blocks") or [])
    for note in summary["notes"]:
        lines.append(f"> Note: {note}")
    lines.append("")
    lines.append("Limits: getdist marginal limits at 68% and 95% credibility; best fit: "
                 "highest-posterior sample of the chain.")
    return "\n".join(lines) + "\n"


def _blocks_markdown(blocks: list[dict]) -> list[str]:
    """The best fit per sample and spectrum (likelihood.report.breakdown.fit_blocks)."""
    if not blocks:
        return []
    lines = ["Best fit per sample and spectrum (a spectrum's chi2 with its own block of the "
             "covariance; 'all': the sample's chi2 with its whole covariance):", "",
             "| sample | spectrum | points | chi2 |", "|:--|:--|--:|--:|"]
    for b in blocks:
        lines.append(f"| {b['sample'] or '-'} | {b['spectrum']} | {b['n_points']} | {b['chi2']:.2f} |")
    return lines + [""]


def _central_text(e: dict, tex: bool) -> str:
    """Mean with its 68% limits (Markdown or LaTeX), or the one-sided limit."""
    if e["limit_type68"] != "two-sided":
        return _one_sided(e, "68", tex=tex)
    m, up, down = _central(e)
    if up == down:
        return rf"{m} \pm {up}" if tex else f"{m} ± {up}"
    return rf"{m}^{{+{up}}}_{{-{down}}}" if tex else f"{m} +{up} / -{down}"


def constraints_tex(summary: dict) -> str:
    lines = [
        f"% ergofit constraints for {summary['label']} (config hash {summary['config_hash']})",
        f"% {summary['n_steps']} steps x {summary['n_walkers']} walkers, "
        + ("converged" if summary["converged"] else "NOT CONVERGED"),
        r"\begin{tabular}{lccc}",
        r"\hline",
        r"Parameter & Mean and 68\% limits & 95\% interval & Best fit \\",
        r"\hline",
    ]
    for e in summary["parameters"].values():
        lines.append(rf"${e['label']}$ & ${_central_text(e, tex=True)}$ & ${_interval(e, '95', True)}$ & "
                     rf"${_best(e)}$ \\")
    lines += [r"\hline", r"\end{tabular}"]
    return "\n".join(lines) + "\n"


def constraints_text(summary: dict) -> str:
    """The constraints of a summary as plain text for the terminal: mean ± σ, 68% limits and
    best fit per parameter, then χ²/dof with its probability to exceed, τ and convergence."""
    rows = [("parameter", "mean +/- std", "68% interval", "best fit")]
    for name, e in summary["parameters"].items():
        rows.append((name + (" (derived)" if e["derived"] else ""),
                     _central_text(e, tex=False).replace("±", "+/-"),
                     _interval(e, "68", False), _best(e)))
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    if summary.get("chi2") is not None:
        pte = summary.get("chi2_pte")
        lines.append(f"best fit: chi2 = {summary['chi2']:.2f} for {summary['dof']} dof"
                     + (f" (probability to exceed {pte:.3g})" if pte is not None else ""))
    tau = summary.get("tau_max")
    lines.append(f"{summary['n_steps']} steps x {summary['n_walkers']} walkers, max tau = "
                 f"{'?' if tau is None else f'{tau:.1f}'}, "
                 f"{'converged' if summary['converged'] else 'NOT converged'}")
    return "\n".join(lines)
