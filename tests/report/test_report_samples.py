"""Reports of a run with several samples and spectra: the multipoles figure has one labelled
panel per sample and spectrum (odd ℓ of a cross spectrum apart, one row per sample), and the
χ² per sample and spectrum agrees with the likelihood's own χ²."""
import os
import shutil
import warnings

import numpy as np
import pytest
import yaml

from likelihood.model import build
from likelihood.report.breakdown import fit_blocks, parameter_samples, triangle_groups
from likelihood.report.figures import multipoles_figure

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


@pytest.fixture(scope="module")
def built(tmp_path_factory, two_samples):
    """configs/multi_demo.yaml as sample 'north' plus a one-tracer mock sample 'south'."""
    folder = tmp_path_factory.mktemp("samples")
    for name in ("multi_demo_data.txt", "multi_demo_cov.txt"):
        shutil.copy(os.path.join(ROOT, "configs", name), folder / name)
    cfg = two_samples(yaml.safe_load(open(os.path.join(ROOT, "configs", "multi_demo.yaml"))))
    path = folder / "both.yaml"
    path.write_text(yaml.safe_dump(cfg))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lik = build(str(path))
    theta = np.array([{"fnl": 3.0, "nu_obs": 0.5, "b1_bright": 2.41, "b1_faint": 1.49,
                       "shot_noise_bright": 1.02, "shot_noise_faint": 0.98, "b1_lrg": 2.02}[n]
                      for n in lik.parameter_names])
    return lik, theta


def test_multipoles_figure_has_a_labelled_panel_per_sample_and_spectrum(built):
    lik, theta = built
    fig = multipoles_figure(lik, theta, title="both")
    tops = [ax for ax in fig.axes if ax.get_title()]
    assert [ax.get_title() for ax in tops] == [
        "north: bright", "north: bright x faint", "north: bright x faint (odd ell)",
        "north: faint", "south: lrg"]
    assert len(fig.axes) == 2 * len(tops)                  # data above, residuals below
    rows = [ax.get_position().y0 for ax in tops]
    assert max(rows[:4]) - min(rows[:4]) < 1e-9 and rows[4] < min(rows[:4]) - 0.1   # a row each
    # each panel holds its multipoles: the legend entries, and the model line = model_observables
    legends = [[t.get_text() for t in ax.get_legend().get_texts()] for ax in tops]
    assert legends[1] == [r"$\ell=0$", r"$\ell=2$"]
    assert legends[2] == [r"$\ell=1$ ($\Pi_\ell$)", r"$\ell=3$ ($\Pi_\ell$)"]
    obs, model = lik.observables(), lik.model_observables(theta)
    i = next(j for j, (s, sp, l) in enumerate(zip(obs["samples"], obs["spectra"], obs["ells"]))
             if s == "south" and l == 2)
    line = tops[4].get_lines()[-1]
    order = np.argsort(obs["k"][i])
    np.testing.assert_allclose(line.get_ydata(), (obs["k"][i] * model[i])[order], rtol=1e-12)


def test_fit_blocks_agree_with_the_likelihood_chi2(built):
    """The χ² per sample (residuals of model_observables against the data, the sample's whole
    covariance) equals each sample likelihood's own χ² (the fast path's quadratic form in the
    templates, another code path) and their sum the run's (independent samples); a sample with
    one spectrum has that spectrum's χ² equal to its own."""
    lik, theta = built
    blocks = {(b["sample"], b["spectrum"]): b for b in fit_blocks(lik, theta)}
    assert list(blocks) == [("north", "bright"), ("north", "bright x faint"), ("north", "faint"),
                            ("north", "all"), ("south", "lrg"), ("south", "all")]
    for name, part, cols in zip(lik.names, lik.parts, lik.columns):
        assert blocks[(name, "all")]["chi2"] == pytest.approx(part.chi2(theta[cols]), rel=1e-8)
    assert blocks[("north", "all")]["chi2"] + blocks[("south", "all")]["chi2"] == \
        pytest.approx(lik.chi2(theta), rel=1e-8)
    assert blocks[("south", "lrg")]["chi2"] == pytest.approx(blocks[("south", "all")]["chi2"], rel=1e-12)
    assert blocks[("north", "bright x faint")]["n_points"] == 64 and blocks[("north", "all")]["n_points"] == 128
    owner = parameter_samples(lik)
    assert owner["fnl"] == "shared" and owner["b1_lrg"] == "south" and owner["b1_sigma8_faint"] == "north"
    groups = triangle_groups(lik, list(lik.parameter_names))
    assert groups["south"] == [n for n in lik.parameter_names if n in ("fnl", "nu_obs")] + ["b1_lrg"]
