"""Tests of likelihood.report.summary: posterior statistics, tables, figures, re-summary and overlay.

Target: a linear Gaussian model d = M theta + noise with flat priors, whose posterior is exactly
Gaussian with mean (A^T A)^{-1} A^T b and covariance (A^T A)^{-1}, A = M / sigma, b = d / sigma
(generalised least squares, the normal equations; e.g. Press et al., Numerical Recipes 3rd ed.
2007, Sec. 15.4). The analytic values are computed here with numpy's least-squares solver
independently of the code under test. Interval endpoints of a Gaussian at credibility p are
mean +- Phi^{-1}((1 + p)/2) sigma (scipy.stats.norm).
"""

from __future__ import annotations

import json
import os
import shutil
import warnings

import matplotlib.image
import numpy as np
import pytest
from scipy import stats

from likelihood.io import atomic_write
from likelihood.errors import ErgofitError
from likelihood.sampling import ConvergenceWarning, SamplerResult, SamplerSettings, load_chain, run_sampler
from likelihood.report.tables import decimals as _decimals, fmt as _fmt
from likelihood.report.summary import (
    make_samples,
    marginal_stats,
    overlay,
    summarize,
    write_summary,
)

FILES = ["summary.json", "constraints.md", "constraints.tex", "triangle.png", "triangle.pdf",
         "multipoles.png"]


class LinearToy:
    """Invented two-multipole data vector, linear in (b, c): an exactly Gaussian posterior."""

    def __init__(self, data_seed=0, config_hash="linear-toy-0"):
        k = np.linspace(0.004, 0.04, 10)
        self.k, self.ells = k, [0, 2]
        mono = np.stack([np.ones_like(k), (0.01 / k) ** 2], axis=1) * 1e4
        quad = np.stack([0.5 * np.ones_like(k), k / 0.02], axis=1) * 1e4
        self.M = np.concatenate([mono, quad])
        signal = self.M @ np.array([2.0, 0.3])
        self.sigma = 300.0 + 0.05 * np.abs(signal)
        self.d = signal + self.sigma * np.random.default_rng(data_seed).standard_normal(signal.size)
        self.parameter_names = ["b", "c"]
        self.labels = ["b", r"c_{\rm s}"]
        self.prior_bounds = np.array([[-10.0, 10.0], [-np.inf, np.inf]])
        self.derived_names, self.derived_labels = ["bc"], ["b+c_{\\rm s}"]
        self.config_hash = config_hash
        self.dof = self.d.size - 2
        # analytic posterior (independent solver: numpy least squares)
        A, y = self.M / self.sigma[:, None], self.d / self.sigma
        self.mean = np.linalg.lstsq(A, y, rcond=None)[0]
        self.cov = np.linalg.inv(A.T @ A)
        self.chi2_min = float(np.sum((A @ self.mean - y) ** 2))
        sd = np.sqrt(np.diag(self.cov))
        self.start, self.start_scale = self.mean + 0.2 * sd, 0.1 * sd

    def _chi2(self, theta):
        r = (np.atleast_2d(theta) @ self.M.T - self.d) / self.sigma
        return np.sum(r * r, axis=1)

    def log_prob(self, theta):
        theta = np.atleast_2d(theta)
        lo, hi = self.prior_bounds[:, 0], self.prior_bounds[:, 1]
        inside = np.all((theta > lo) & (theta < hi), axis=1)
        return np.where(inside, -0.5 * self._chi2(theta), -np.inf)

    def chi2(self, theta):
        return float(self._chi2(theta)[0])

    def derived(self, theta):
        theta = np.atleast_2d(theta)
        return (theta[:, 0] + theta[:, 1])[:, None]

    def observables(self):
        n = self.k.size
        return dict(ells=self.ells, k=[self.k, self.k], data=[self.d[:n], self.d[n:]],
                    sigma=[self.sigma[:n], self.sigma[n:]])

    def model_observables(self, theta):
        m = self.M @ np.asarray(theta, dtype=float)
        return [m[: self.k.size], m[self.k.size:]]


TOYS = {"run_a": LinearToy(0, "linear-toy-0"), "run_b": LinearToy(1, "linear-toy-1")}


def factory(run_dir):
    return TOYS[os.path.basename(run_dir)]


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("summary")
    dirs = []
    for name, lik in TOYS.items():
        run_sampler(lik, SamplerSettings(n_walkers=32, check_every=100, progress=False),
                    base / name)
        dirs.append(str(base / name))
    summaries = [summarize([d], labels=[lab], lik_factory=factory)[0]
                 for d, lab in zip(dirs, ["data A", "data B"])]
    # an overlay writes only under its own folder: the run folders stay as they are
    stamps = {d: {f: os.stat(os.path.join(d, f)).st_mtime_ns for f in os.listdir(d)} for d in dirs}
    both = base / "both"
    again = summarize(dirs, labels=["A again", "B again"], lik_factory=factory, out_dir=both)
    assert [s["label"] for s in again] == ["A again", "B again"]
    assert stamps == {d: {f: os.stat(os.path.join(d, f)).st_mtime_ns for f in os.listdir(d)}
                      for d in dirs}
    with open(both / "summary.json") as fh:
        assert [s["label"] for s in json.load(fh)["runs"]] == ["A again", "B again"]
    assert "A again" in (both / "constraints.md").read_text()
    return dirs, summaries, str(both / "triangle")


def test_files_written(runs):
    dirs, summaries, overlay_base = runs
    for d in dirs:
        for name in FILES:
            assert os.path.getsize(os.path.join(d, name)) > 200, name
        assert not [f for f in os.listdir(d) if f.startswith(".")]  # no temporary left over
        png = matplotlib.image.imread(os.path.join(d, "triangle.png"))
        assert png.ndim == 3 and min(png.shape[:2]) > 300
        with open(os.path.join(d, "triangle.pdf"), "rb") as f:
            assert f.read(5) == b"%PDF-"
    png = matplotlib.image.imread(overlay_base + ".png")
    assert png.shape[0] > 300 and os.path.getsize(overlay_base + ".pdf") > 1000


def test_summary_json_fields(runs):
    dirs, summaries, _ = runs
    with open(os.path.join(dirs[0], "summary.json")) as f:
        s = json.load(f, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    assert s == summaries[0]
    for key in ("n_steps", "tau", "acceptance_fraction", "converged", "chi2", "dof",
                "config_hash", "burn_in", "thin", "n_samples", "notes", "parameters"):
        assert key in s, key
    assert s["converged"] is True and s["config_hash"] == "linear-toy-0"
    assert s["label"] == "data A" and s["dof"] == 18 and set(s["tau"]) == {"b", "c"}
    assert s["n_samples"] == len(load_chain(dirs[0]).samples)
    assert list(s["parameters"]) == ["b", "c", "bc"]
    for name, p in s["parameters"].items():
        for key in ("mean", "std", "median", "interval68", "interval95", "best_fit",
                    "limit_type68", "limit_type95", "label", "derived"):
            assert key in p, (name, key)
        assert p["limit_type68"] == p["limit_type95"] == "two-sided"
        assert p["interval95"][0] < p["interval68"][0] < p["median"] < p["interval68"][1] \
            < p["interval95"][1]
    assert s["parameters"]["bc"]["derived"] and not s["parameters"]["b"]["derived"]


def test_posterior_statistics_match_analytic_gaussian(runs):
    """Mean, 68% and 95% limits of b, c and b+c against the exact Gaussian posterior."""
    dirs, summaries, _ = runs
    for d, s in zip(dirs, summaries):
        lik = factory(d)
        result = load_chain(d)
        n_eff = result.n_walkers * (result.n_steps - result.burn_in) / np.max(result.tau)
        grad = {"b": np.array([1.0, 0.0]), "c": np.array([0.0, 1.0]), "bc": np.array([1.0, 1.0])}
        for name, g in grad.items():
            mu, sd = g @ lik.mean, np.sqrt(g @ lik.cov @ g)
            p = s["parameters"][name]
            err_mean = sd / np.sqrt(n_eff)
            assert abs(p["mean"] - mu) < 3 * err_mean, name
            assert abs(p["std"] / sd - 1) < 3 / np.sqrt(2 * n_eff) + 0.01, name
            for level, key in ((0.68, "interval68"), (0.95, "interval95")):
                z = stats.norm.ppf(0.5 + level / 2)
                # asymptotic sd of a sample quantile: sqrt(q(1-q)) / pdf (e.g. Serfling 1980, 2.3)
                q = 0.5 - level / 2
                err_q = np.sqrt(q * (1 - q)) / stats.norm.pdf(z) * sd / np.sqrt(n_eff)
                lo, hi = p[key]
                assert abs(lo - (mu - z * sd)) < 3 * err_q, (name, key)
                assert abs(hi - (mu + z * sd)) < 3 * err_q, (name, key)


def test_best_fit_and_chi2(runs):
    dirs, summaries, _ = runs
    for d, s in zip(dirs, summaries):
        lik = factory(d)
        result = load_chain(d)
        # best fit is the highest-posterior sample: its chi2 lies just above the exact minimum
        assert lik.chi2_min <= s["chi2"] < lik.chi2_min + 0.5
        assert s["chi2"] == pytest.approx(-2 * result.best_log_prob, rel=1e-12)
        best = [s["parameters"][n]["best_fit"] for n in ("b", "c")]
        assert s["parameters"]["bc"]["best_fit"] == pytest.approx(sum(best), rel=1e-12)


def test_tables_agree_with_json(runs):
    dirs, summaries, _ = runs
    s = summaries[0]
    md = open(os.path.join(dirs[0], "constraints.md"), encoding="utf-8").read()
    tex = open(os.path.join(dirs[0], "constraints.tex"), encoding="utf-8").read()
    assert tex.count(r"\\") == 1 + len(s["parameters"])  # header + one row per parameter
    assert r"\begin{tabular}" in tex and r"\end{tabular}" in tex
    for name, p in s["parameters"].items():
        dec = _decimals(min(p["interval68"][1] - p["mean"], p["mean"] - p["interval68"][0]))
        mean_text = _fmt(p["mean"], dec)
        assert f"${p['label']}$" in md and f"`{name}`" in md
        assert mean_text in md and mean_text in tex
        dec95 = _decimals(p["std"])
        assert f"[{_fmt(p['interval95'][0], dec95)}, {_fmt(p['interval95'][1], dec95)}]" in md
    assert "converged" in md and "chi2 = " in md


@pytest.mark.parametrize("value,err,expected", [
    # Particle Data Group, Review of Particle Physics, Introduction, "Rounding" (from memory):
    # 0.827 +- 0.119 -> 0.83 +- 0.12 ; 0.827 +- 0.367 -> 0.8 +- 0.4
    (0.827, 0.119, ("0.83", "0.12")),
    (0.827, 0.367, ("0.8", "0.4")),
    (12.345, 0.0354, ("12.345", "0.035")),   # leading digits 354: two significant digits
    (12.345, 0.0355, ("12.35", "0.04")),     # 355: one significant digit
    (12.345, 0.0962, ("12.35", "0.10")),     # 950-999: round up to 1000, two digits
    (1234.0, 56.0, ("1230", "60")),
])
def test_pdg_rounding(value, err, expected):
    dec = _decimals(err)
    assert (_fmt(value, dec), _fmt(err, dec)) == expected


def test_one_sided_limits_at_prior_edge(tmp_path):
    """Half-normal posterior on a [0, inf) prior: one-tailed upper limits at the analytic
    quantiles x_p = Phi^{-1}((1 + p)/2) (scipy.stats.halfnorm)."""
    rng = np.random.default_rng(4)
    x = np.abs(rng.standard_normal(40000))
    result = _result_from_samples(tmp_path, x[:, None], ["m"], ["m_\\nu"], [[0.0, np.inf]])
    s = write_summary(tmp_path, result)
    p = s["parameters"]["m"]
    assert p["limit_type68"] == p["limit_type95"] == "upper limit"
    for level, key in ((0.68, "interval68"), (0.95, "interval95")):
        exact = stats.halfnorm.ppf(level)
        assert p[key][1] == pytest.approx(exact, rel=0.03), key
    md = open(tmp_path / "constraints.md", encoding="utf-8").read()
    assert f"< {_fmt(p['interval95'][1], _decimals(p['std']))}" in md
    assert "< " in open(tmp_path / "constraints.tex").read()
    assert not os.path.exists(tmp_path / "multipoles.png")
    assert any("no likelihood given" in n for n in s["notes"])


def _result_from_samples(tmp_path, samples, names, labels, bounds):
    n, dim = samples.shape
    return SamplerResult(
        samples=samples, log_prob=np.zeros(n), parameter_names=names, labels=labels,
        prior_bounds=np.array(bounds, dtype=float), n_steps=n, n_walkers=1,
        tau=np.ones(dim), acceptance_fraction=1.0, converged=True, burn_in=0, thin=1,
        chain_path=str(tmp_path / "chain.h5"), config_hash="iid", best_fit=samples[0],
        best_log_prob=0.0, status="converged", seed="0")


def test_summarize_without_likelihood_skips_multipoles(runs, tmp_path):
    src = runs[0][0]
    copy = tmp_path / "copy"
    copy.mkdir()
    shutil.copy(os.path.join(src, "chain.h5"), copy / "chain.h5")
    (s,) = summarize([str(copy)])
    assert not os.path.exists(copy / "multipoles.png")
    assert os.path.exists(copy / "triangle.png")
    assert s["chi2"] is None and "bc" not in s["parameters"]
    assert any("multipoles.png left out" in n for n in s["notes"])
    assert s["label"] == "copy"


def test_overlay_function(runs, tmp_path):
    dirs, _, _ = runs
    paths = overlay(dirs, None, tmp_path / "cmp.png")
    assert paths == [str(tmp_path / "cmp.png"), str(tmp_path / "cmp.pdf")]
    assert all(os.path.getsize(p) > 1000 for p in paths)
    with pytest.raises(ErgofitError, match="2 run folders"):
        overlay(dirs, ["only one"], tmp_path / "x")


def test_config_hash_mismatch_refused(runs, tmp_path):
    src = runs[0][0]
    result = load_chain(src)
    before = open(os.path.join(src, "summary.json")).read()
    with pytest.raises(ErgofitError, match=r"config hash linear-toy-1 differs from linear-toy-0"):
        write_summary(src, result, TOYS["run_b"])
    assert open(os.path.join(src, "summary.json")).read() == before


def test_bad_label_is_one_line_error(runs):
    result = load_chain(runs[0][0])
    result.labels = ["b", r"c_{\\rm s"]
    with pytest.raises(ErgofitError, match="not valid LaTeX") as e:
        make_samples(result)
    assert "\n" not in str(e.value) and "'c'" in str(e.value)


def test_bad_observables(runs, tmp_path):
    result = load_chain(runs[0][0])
    lik = LinearToy(0, "linear-toy-0")
    obs = lik.observables()
    obs["sigma"][0] = np.where(np.arange(obs["sigma"][0].size) == 3, 0.0, obs["sigma"][0])
    lik.observables = lambda: obs
    with pytest.raises(ErgofitError, match=r"observables\(\)\['sigma'\]\[0\] \(ell=0\)"):
        write_summary(tmp_path, result, lik)
    assert os.listdir(tmp_path) == []  # nothing written


def test_atomic_write_keeps_old_file_on_failure(tmp_path):
    path = tmp_path / "summary.json"
    path.write_text("old")

    def failing(tmp):
        with open(tmp, "w") as f:
            f.write("half")
        raise OSError("disk full")

    with pytest.raises(OSError):
        atomic_write(str(path), failing, ".tmp")
    assert path.read_text() == "old" and os.listdir(tmp_path) == ["summary.json"]


def test_marginal_stats_levels(runs):
    samples = make_samples(load_chain(runs[0][0]))
    stats_ = marginal_stats(samples)
    assert list(samples.contours[:2]) == [0.68, 0.95]
    assert set(stats_) == {"b", "c"}


def test_unconverged_run_is_flagged_in_tables(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        result = run_sampler(TOYS["run_a"], SamplerSettings(n_walkers=8, max_steps=300,
                                                            check_every=100, progress=False),
                             tmp_path)
    s = write_summary(tmp_path, result)
    assert s["converged"] is False
    assert "NOT CONVERGED" in open(tmp_path / "constraints.md").read()
    assert "NOT CONVERGED" in open(tmp_path / "constraints.tex").read()
