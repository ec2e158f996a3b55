"""Exports of a plan: run folders (plan.json, CSV, CCSDS OEM and OPM, figures, report, manifest)
and re-checks.

Public API: :func:`write_run`, :func:`sample_plan`, :func:`oem_text`, :func:`write_plot_files`,
:func:`opm_text`, :func:`report_markdown`, :func:`constraint_rows`, :func:`read_plan`,
:func:`recheck`, :func:`write_manifest`.

May import: the export layer's own modules only.
"""

from .check import PlanFileError, claim_differences, plan_path, plan_problem, read_plan, read_plan_data, recheck
from .manifest import manifest_dict, write_manifest
from .oem import oem_text
from .opm import opm_text
from .report import constraint_rows, report_markdown
from .run import OutputPathError, plan_json, run_summary, write_plot_files, write_run
from .sampling import SampledPath, plan_model, propagation_end, sample_plan

__all__ = ["write_run", "run_summary", "write_plot_files", "plan_json", "sample_plan", "SampledPath", "plan_model",
           "propagation_end", "oem_text", "report_markdown", "constraint_rows", "read_plan",
           "plan_problem", "plan_path", "recheck", "read_plan_data", "claim_differences", "PlanFileError", "OutputPathError", "opm_text", "manifest_dict", "write_manifest"]
