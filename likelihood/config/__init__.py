"""Run configuration: YAML schema and validation, parameters and priors."""
from .schema import (FORECAST_NEGLECT, FORECAST_SCAN, SCHEMA, Config, load_config, parameter_set,
                     validate)

__all__ = ["Config", "FORECAST_NEGLECT", "FORECAST_SCAN", "SCHEMA", "load_config", "parameter_set",
           "validate"]
