"""Trade studies: Δv over a grid of burn epoch x arrival epoch (or longest return duration).

The wing, one module per job (each module's docstring says what it may import):

- ``spec``: the one validator of a ``[sweep]`` table and of a grid (no pandas; the file layer uses it);
- ``cells``: cell problems, the solve of one cell, the warm-start tree, which cells are retried;
- ``store``: the resume store (also used by the dispersion runs);
- ``schedule``: the sweep driver: :func:`sweep`, :func:`sweep_from_spec`, progress, the table;
- ``front``: the Pareto set (:func:`pareto`) and :func:`best_plan` (not named ``pareto``: a submodule
  of that name would hide the function on the package).

The trade folder (CSV, report, figures) is written by :mod:`optimizer.export.trade_folder`; a
problem file with its ``[sweep]`` table is read by :func:`optimizer.problem_file.load_sweep_file`.

The names below are loaded on first use, so ``import optimizer.trade.spec`` (reading a problem
file) does not import the engine, pandas or CasADi.  May import: the wing's own modules only.
"""

from __future__ import annotations

import importlib

_HOMES = {
    "sweep": "schedule", "sweep_from_spec": "schedule", "progress_text": "schedule", "SweepProgress": "schedule",
    "COLUMNS": "schedule", "TIMING_COLUMNS": "schedule",
    "parse_sweep_spec": "spec", "SweepSpec": "spec", "SweepSpecError": "spec", "DEFAULT_MAX_ITER": "spec",
    "cell_problem": "cells", "CELL_IPOPT_OPTIONS": "cells",
    "pareto": "front", "best_plan": "front",
}

__all__ = sorted(_HOMES)


def __getattr__(name):
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{home}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_HOMES))
