"""The Pareto set of a sweep's table (total Δv against return duration) and the best cell of a
sweep re-solved as a full plan.

One job: choosing among the cells of a finished sweep.  May import: numpy, pandas,
:mod:`optimizer.plan`, :mod:`optimizer.problem`, :mod:`optimizer.trade.cells`,
:mod:`optimizer.trade.store` and (when a cell is re-solved) the solver and the models.  Never
plotting, the file layer or the export layer.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..plan import Plan
from ..problem import Objective, Problem
from .cells import STORE_KIND, cell_problem, reference_problem, warm_of, warm_stub
from .store import read_saved

__all__ = ["pareto", "best_plan"]


def pareto(df: pd.DataFrame, x: str = "return_duration_days", y: str = "total_dv_mps",
           x_tol: float = 1e-3) -> pd.DataFrame:
    """The verified cells no other verified cell beats on both Δv and return duration.

    A cell is kept unless another has ``x <=`` and ``y <=`` with at least one strictly smaller.
    Values of ``x`` that form a chain with gaps of at most ``x_tol`` count as equal (default
    1e-3 d = 86 s: the re-propagated arrivals of one grid column differ by fractions of a second,
    which must not make a dearer cell "faster"); ``x_tol=0`` compares exactly.  Cells equal in
    both are all kept.  Sorted by ``x``.
    """
    xv = pd.to_numeric(df[x], errors="coerce").to_numpy(dtype=float)
    yv = pd.to_numeric(df[y], errors="coerce").to_numpy(dtype=float)
    mask = df["verified"].to_numpy(dtype=bool) & np.isfinite(xv) & np.isfinite(yv)
    ok = df[mask]
    if ok.empty:
        return ok.copy()
    xv, yv = xv[mask], yv[mask]
    by_x = np.argsort(xv, kind="stable")
    group = np.empty(len(xv), dtype=int)  # x classes: chains of gaps <= x_tol
    group[by_x] = np.r_[0, np.cumsum(np.diff(xv[by_x]) > x_tol)]
    order = np.lexsort((xv, yv, group))  # by class, then Δv, then x
    gs, ys = group[order], yv[order]
    keep = np.zeros(len(gs), dtype=bool)
    best = math.inf  # smallest y among earlier classes
    i = 0
    while i < len(gs):
        j = i
        while j < len(gs) and gs[j] == gs[i]:
            j += 1
        gmin = ys[i]  # sorted by y within a class
        if gmin < best:
            keep[i:j] = ys[i:j] == gmin
            best = gmin
        i = j
    front = ok.iloc[order[keep]]
    return front.iloc[np.argsort(front[x].to_numpy(dtype=float), kind="stable")].copy()


def _pick(df: pd.DataFrame, problem: Problem | None, by: str | None):
    ok = df[df["verified"].astype(bool)]
    if ok.empty:
        raise ValueError("no verified cell in the sweep")
    obj = problem.objective if problem is not None else Objective()
    by = by or {"min-dv": "total_dv_mps", "earliest": "return_duration_days", "weighted": "objective"}[obj.kind]
    if by == "total_dv_mps":
        score = ok["total_dv_mps"]
    elif by == "return_duration_days":
        within = ok if obj.dv_budget_mps is None else ok[ok["total_dv_mps"] <= obj.dv_budget_mps]
        if within.empty:
            raise ValueError(f"no verified cell within the Δv budget of {obj.dv_budget_mps} m/s")
        ok, score = within, within["return_duration_days"]
    elif by == "objective":
        score = ok["total_dv_mps"] + obj.mps_per_day * ok["return_duration_days"]
    else:
        raise ValueError(f"by: expected total_dv_mps, return_duration_days or objective, got {by!r}")
    return ok.loc[score.idxmin()]


def best_plan(problem: Problem, df: pd.DataFrame, *, by: str | None = None, cell: str | None = None,
              resume_dir=None, model=None, burn_index: int | None = None) -> Plan:
    """Re-solve the best cell of a sweep (or ``cell``, e.g. ``"r03c07"``) as a full, verified Plan.

    ``by``: ``"total_dv_mps"`` (cheapest), ``"return_duration_days"`` (fastest, within the problem's
    Δv budget if it has one) or ``"objective"`` (the problem's weighted objective); default follows
    the problem's objective kind.  The cell is started from its saved warm start in ``resume_dir``
    when there is one (which reproduces the sweep's result exactly), otherwise from the problem's
    own optimum, otherwise cold.
    """
    from ..models import build_model
    from .. import solve

    if cell is not None:
        hit = df[df["cell"] == cell]
        if hit.empty:
            raise ValueError(f"cell: no cell {cell!r} in the sweep")
        row = hit.iloc[0]
    else:
        row = _pick(df, problem, by)
    meta = df.attrs.get("sweep", {})
    bi = burn_index if burn_index is not None else int(meta.get("burn_index", 0))
    win = None
    if math.isfinite(row["arrival_window_open_tdb_s"]):
        win = (row["arrival_window_open_tdb_s"], row["arrival_window_close_tdb_s"])
    dur = row["max_return_duration_days"] if math.isfinite(row["max_return_duration_days"]) else None
    cp = cell_problem(problem, row["burn_epoch_tdb_s"], win, dur, bi, name=f"{problem.name}-{row['cell']}")
    if model is None:
        from ..solve.guess import model_span

        spans = [model_span(p) for p in (cp, problem)]
        model = build_model(problem.model, min(a for a, _ in spans), max(b for _, b in spans))
    warm = None
    if resume_dir is not None:
        entry = read_saved(resume_dir, STORE_KIND, row["cell"])
        if entry is not None:
            entry = entry["retry"] if entry.get("retry") and entry["retry"]["warm"] is not None else entry
            warm = entry.get("warm")
    if warm is None:
        ref = solve(reference_problem(problem), model=None if problem.model.continuation else model)
        if ref.verified:
            warm = warm_of(ref)
    plan = solve(cp, warm=warm_stub(warm) if warm else None, model=model)
    if not plan.verified and warm is not None:
        cold = solve(cp, model=model)
        plan = cold if cold.verified else plan
    plan.solver["trade_cell"] = row["cell"]
    return plan
