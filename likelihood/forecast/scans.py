"""Bias scans: the forecast over a grid of one survey quantity, serial or on a pool (method:
:mod:`likelihood.forecast`)."""
from __future__ import annotations

from dataclasses import dataclass

from ..config.schema import Config, load_config, validate
from ..errors import ConfigError, ErgofitError
from ..config.variants import config_to_raw, scan_config
from .bias import bias_forecast, collect_warnings, forecast_settings


@dataclass
class ScanResult:
    """A bias scan: one row per grid point (dicts with the columns of :meth:`columns`)."""

    quantity: str
    rows: list
    neglect: list
    threshold: float
    notes: list

    def columns(self):
        keys = []
        for r in self.rows:
            keys += [k for k in r if k not in keys]
        return keys

    def exceeding(self):
        """Grid values where |Δf_NL|/σ(f_NL) exceeds the threshold."""
        return [r[self.quantity] for r in self.rows if abs(r["delta_fnl_over_sigma"]) > self.threshold]


def _scan_point(payload):
    """Worker: one grid point -> (row dict, notes). Top level so process pools can pickle it."""
    (raw, src, base_dir, quantity, value, zgeo, bevo, neglect, parameters, priors, rtol) = payload
    cfg = validate(raw, src=src, base_dir=base_dir)
    notes = []
    try:
        with collect_warnings(notes):
            pcfg, geo_notes = scan_config(cfg, quantity, value, zgeo, bevo)
        notes += geo_notes
        res = bias_forecast(pcfg, neglect, parameters, priors, rtol)
    except ErgofitError as exc:
        raise ErgofitError(f"scan {quantity} = {value:g}: {str(exc).splitlines()[0]}") from None
    f = res.fisher
    row = {quantity: float(value), "sigma_fnl": float(res.value("sigma")),
           "delta_fnl": float(res.value("delta")),
           "delta_fnl_over_sigma": float(res.value("ratio")), "fnl_eff_neglected": res.fnl_eff_neglected,
           "b1": float(res.info["fiducial"]["b1"]), "volume": res.info["volume"],
           "r_min": pcfg["survey"]["geometry"].get("r_min"),
           "r_max": pcfg["survey"]["geometry"].get("r_max"), "n_data": res.info["n_data"],
           "chi2_residual": res.chi2_residual}
    for i, n in enumerate(f.names):
        if n != "fnl":
            row[f"sigma_{n}"] = float(f.errors[i])
            row[f"delta_{n}"] = float(res.delta[i])
    if row["r_min"] is None:
        del row["r_min"], row["r_max"]
    return row, notes + res.warnings


def no_scan_with_samples(cfg):
    """Refuse a scan of a config with samples in one line (scan a sample's own config)."""
    if "samples" in cfg:
        raise ConfigError(f"{cfg.path}: forecast.scan is not available with samples; scan one "
                          "sample's own config")


def bias_scan(config, scan=None, neglect=None, parameters=None, priors=None, step_rtol=None,
              threshold=None, pool=None):
    """Bias forecast over a grid (the config's ``forecast.scan`` unless ``scan`` is given).

    scan: mapping like the config's (``{quantity, values | range, spacing, redshift_geometry,
    bias_evolution}``), validated the same way; pool: optional object with ``map`` (process
    pool, MPI pool) over which the grid points are spread. Returns a :class:`ScanResult`.
    """
    from ..config.schema import forecast_scan
    cfg = config if isinstance(config, Config) else load_config(config)
    no_scan_with_samples(cfg)
    fs = forecast_settings(cfg)
    if scan is not None:
        scan = forecast_scan(scan, f"{cfg.path}: forecast.scan")
    else:
        scan = fs["scan"]
    if not scan:
        raise ConfigError(f"{cfg.path}: forecast.scan is missing; give {{quantity, values}}")
    neglect = list(fs["neglect"] if neglect is None else neglect)
    parameters = fs["parameters"] if parameters is None else parameters
    priors = fs["priors"] if priors is None else priors
    step_rtol = fs["step_rtol"] if step_rtol is None else step_rtol
    threshold = fs["threshold"] if threshold is None else threshold
    if parameters is not None and "fnl" not in parameters:
        raise ConfigError(f"{cfg.path}: forecast.parameters must include fnl for a scan "
                          "(it reports sigma(f_NL) and the f_NL shift)")
    if parameters is None and "fnl" not in cfg["parameters"]:
        raise ConfigError(f"{cfg.path}: a scan reports sigma(f_NL): sample fnl under parameters")
    q = scan["quantity"]
    raw = config_to_raw(cfg)
    payloads = [(raw, cfg.path, cfg.base_dir, q, v, scan["redshift_geometry"],
                 scan["bias_evolution"], neglect, parameters, priors, step_rtol)
                for v in scan["values"]]
    results = list(pool.map(_scan_point, payloads)) if pool is not None else \
        [_scan_point(p) for p in payloads]
    notes = []
    for _, n in results:
        notes += [m for m in n if m not in notes]
    return ScanResult(quantity=q, rows=[r for r, _ in results], neglect=neglect,
                      threshold=float(threshold), notes=notes)

