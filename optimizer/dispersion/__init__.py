"""Dispersion analysis of a verified plan: execution and navigation errors, corridor margins.

``errors`` reads and checks the error model (docs/dispersion-format.md), ``sampling`` draws and
re-propagates one perturbed execution, ``lincov`` maps the error model through the state
transition matrix, ``montecarlo`` runs many samples in parallel (resumable), ``outputs`` runs the
whole analysis and writes its folder.

May import: the wing's own modules only.
"""

from .errors import (DEFAULTS, ErrorModel, ErrorModelError, error_model_from_layers, error_model_from_table,
                     load_error_model, parse_overrides)
from .lincov import LinearCovariance, linear_covariance
from .montecarlo import dispersion_model, nominal_of, run_samples
from .outputs import read_verified_plan, run_dispersion, wilson_interval, write_dispersion

__all__ = ["DEFAULTS", "ErrorModel", "ErrorModelError", "error_model_from_layers", "error_model_from_table",
           "load_error_model", "parse_overrides", "LinearCovariance", "linear_covariance", "dispersion_model",
           "nominal_of", "run_samples", "read_verified_plan", "run_dispersion", "wilson_interval",
           "write_dispersion"]
