"""Dispersion analysis of a verified plan: execution and navigation errors, corridor margins.

Public API: :func:`load_error_model`, :func:`error_model_from_table`, :func:`run_dispersion`,
:func:`linear_covariance`, :func:`run_samples`, :func:`wilson_interval`.
"""

from .errors import (DEFAULTS, ErrorModel, ErrorModelError, error_model_from_table, load_error_model,
                     parse_overrides)
from .lincov import LinearCovariance, linear_covariance
from .montecarlo import dispersion_model, nominal_of, run_samples

__all__ = ["DEFAULTS", "ErrorModel", "ErrorModelError", "error_model_from_table", "load_error_model",
           "parse_overrides", "LinearCovariance", "linear_covariance", "dispersion_model", "nominal_of",
           "run_samples"]
