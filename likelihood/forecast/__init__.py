"""Fisher forecasts and f_NL bias studies: how far does neglecting an effect push f_NL?

The question: "if I analyse my survey without the projection terms (or without the integral
constraint, or ignoring the observer term), how far is f_NL pushed, in units of its error?"
It is answered with Fisher matrices built on exactly the likelihood of a config (same data
vector, k bins, window, integral constraint, observer term and covariance; the model comes from
:func:`likelihood.model.factories.build`), and confirmed by MCMC on a noiseless mock.

Fisher matrix
-------------
For a Gaussian likelihood whose covariance C does not depend on the parameters
(Tegmark, Taylor & Heavens 1997, ApJ 480, 22, eq. 15, first term)::

    F_ij = h ∂μᵀ/∂θ_i C⁻¹ ∂μ/∂θ_j  +  δ_ij / σ_i²   (Gaussian prior N(m_i, σ_i) on θ_i)

μ is the masked model vector, h the Hartlap factor when C was estimated from mocks (1 otherwise).
Flat priors do not enter (the Fisher matrix knows no bounds: a warning says when a marginalised
error reaches a quarter of a flat prior's width); the truncation bounds of a Gaussian prior are
ignored. Marginalised errors are sqrt((F⁻¹)_ii), conditional errors 1/sqrt(F_ii), the correlation
(F⁻¹)_ij / (σ_i σ_j). Parameters that are not in the Fisher matrix are held at their fiducial or
fixed values (the errors are conditional on them, e.g. on the cosmology unless it is sampled).

Derivatives are central differences [μ(θ + h e_i) − μ(θ − h e_i)] / 2h. The first step is the
parameter's ``scale`` (config ``parameters.NAME.scale``); the step is halved until two successive
estimates agree to ``step_rtol`` in the whitened norm |L⁻¹(D_h − D_h/2)| / |L⁻¹ D_h/2| (C = L Lᵀ)
(or two successive Richardson combinations (4 D_h/2 − D_h)/3 do), and the last Richardson
combination is returned. The model is a polynomial of degree
≤ 2 in b1, f_NL, b_e, s, ν_obs and the shot-noise amplitude (see :mod:`likelihood.model`), so for
them central differences are exact up to rounding; cosmological parameters are not polynomial
and are differentiated by the slower direct path (a warning names any derivative that does not
stabilise).

Bias from a mis-modelled effect
-------------------------------
The *truth* model is the config as written (all effects it switches on); the *analysis* model is
the same config with the effects of ``forecast.neglect`` switched off (doppler, potential, fnl,
rsd, window, observer → false; integral_constraint → none; for a curved-sky truth model
(engine.kind: curved_sky, config/variants.py) also plane_parallel → the plane-parallel engine,
radial_integral_constraint → the exact global constraint instead, effective_redshift → the
snapshot mode (coefficients at survey.redshift), lensing, isw, time_delay → false). To first
order in the model error the maximum of the analysis posterior on noiseless truth data moves by
(the systematic-shift formula, e.g. Huterer, Takada, Bernstein & Jain 2006, MNRAS 366, 101,
eq. 4 — cited from memory; it follows from expanding χ² to second order around the fiducial
point)::

    Δθ = F⁻¹ [ h ∂μᵀ/∂θ C⁻¹ (μ_truth − μ_analysis) + Σ_i e_i (m_i − θ_i^fid) / σ_i² ]

F, ∂μ/∂θ, C and h are those of the analysis model (what the analyst would use). μ_truth is the
noiseless mock of the truth model at the fiducial values (``data.mock.truth`` over the tracer
block and fixed values); μ_analysis is the analysis model at the fiducial values of the Fisher
parameters with its own fixed values, so a parameter fixed to a value different from the mock
truth is a mis-modelling too. The last term is the pull of a Gaussian prior not centred on the
fiducial value (zero for centred priors).

Validity. Linear response: the shift is accurate while Δθ is small compared to the scale on which
∂μ/∂θ changes. The model is quadratic in f_NL (the [f_NL (b1 − p) α(k)]² term), so the first-order
shift degrades once f_NL (b1 − p) α(k_min) is no longer small next to b1 over the range
fiducial ± (σ + |Δ|); when |Δf_NL| ≳ σ(f_NL), confirm with ``--check-mcmc``. The model itself is
linear theory with a plane-parallel kernel and local projection terms only (see
:mod:`likelihood.theory.tracer`); the Fisher matrix inherits those limits.

Scans
-----
A grid over one of redshift, volume, fsky, thickness, b1, nbar, b_e, s, k_min; each grid point
is an independent pair (truth, analysis) of models, run serially, on a process pool or on MPI
ranks. What changes with the scanned quantity:

* ``redshift``: survey.redshift; for shell and cap geometries the shell is re-centred at χ(z).
  ``redshift_geometry: recentre`` (default) keeps its comoving thickness r_max − r_min (the
  volume grows with z); ``fixed_volume`` re-centres and adjusts the thickness so the volume stays
  that of the config. If the re-centred shell would reach the observer it is cut at r_min = 0
  (a note says so). Box, sphere (centred on the observer) and random-catalogue geometries do not
  change. ``bias_evolution: inverse_growth`` scales b1 as b1(z) = b1(z₀) D(z₀)/D(z) (constant
  clustering amplitude, common practice); ``constant`` (default) keeps b1.
* ``volume``: box volume; sphere radius; shell/cap thickness about the fixed centre distance.
* ``fsky``: the cap's sky fraction (a full-sky shell becomes a cap).
* ``thickness``: r_max − r_min of a shell or cap about the fixed centre distance.
* ``b1``, ``b_e``, ``s``: the fiducial value (tracer block, fixed value, mock truth, and the
  start of a sampled parameter).
* ``nbar``: survey.nbar. ``k_min``: data.k_min (same k bins, fewer of them used).

Several samples
---------------
A config with ``samples`` is forecast sample by sample and combined as independent data: the
Fisher matrices and bias vectors add on the union of the parameters (:mod:`.samples`,
:func:`combine_independent`); the result's ``samples`` holds each sample's forecast alone.

Public API: :class:`Fisher`, :func:`combine_independent`, :func:`samples_forecast`,
:func:`fisher_from_derivatives`, :func:`derivative`, :func:`likelihood_fisher`, :class:`BiasForecast`, :func:`bias_forecast`, :func:`analysis_config`,
:func:`scan_config`, :class:`ScanResult`, :func:`bias_scan`, :func:`mcmc_check`,
:func:`run_forecast`, :func:`forecast_lines`, :func:`config_to_raw`, :func:`forecast_settings`;
output helpers :func:`plot_ellipses`, :func:`plot_scan`, :func:`scan_tables`,
:func:`forecast_markdown`. Speed figures: ``python bench/forecast.py``.
"""
from .bias import DEFAULTS, BiasForecast, bias_forecast, forecast_settings
from .fisher import (Fisher, combine_independent, derivative, fisher_from_derivatives,
                     likelihood_fisher)
from .mcmc import mcmc_check
from .report import (forecast_lines, forecast_markdown, plot_ellipses, plot_scan, ranges_text,
                     run_forecast, scan_tables)
from .samples import samples_forecast
from .scans import ScanResult, bias_scan
from ..config.variants import analysis_config, config_to_raw, scan_config

__all__ = ["Fisher", "combine_independent", "samples_forecast", "fisher_from_derivatives",
           "derivative", "likelihood_fisher", "BiasForecast",
           "bias_forecast", "analysis_config", "scan_config", "ScanResult", "bias_scan",
           "mcmc_check", "run_forecast", "config_to_raw", "forecast_settings", "forecast_lines",
           "plot_ellipses", "plot_scan", "ranges_text", "scan_tables", "forecast_markdown",
           "DEFAULTS"]
