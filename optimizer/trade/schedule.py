"""The sweep driver: solves every cell of a grid of burn epoch x arrival epoch (or longest return
duration) along the warm-start tree of :mod:`optimizer.trade.cells`, in parallel, resumable, and
gathers the table.

Parallelism.  Each cell is one task; a task is submitted as soon as its warm source is known, so
many cells run at once (local processes by default, or a Dask distributed cluster; the executors of
:mod:`optimizer.executors`).  Results come back to this process, which saves each finished cell in
the resume store (:mod:`optimizer.trade.store`) and reports progress.

Columns of the table (units in the names; epochs TDB, ``_tdb`` ISO-8601 text, ``_tdb_s`` seconds
past J2000; return duration counts from the problem's start epoch): :data:`COLUMNS`.  Δv and event
values are filled only for verified cells (from the independent re-propagation); a cell that
failed keeps its status and reason and NaN values.

One job: scheduling the cells of one sweep.  May import: numpy, pandas, the package version,
:mod:`optimizer.constants`, :mod:`optimizer.timescales`, :mod:`optimizer.plan`,
:mod:`optimizer.problem`, the trade wing's ``spec``, ``cells`` and ``store``,
:mod:`optimizer.executors`, the models and solver (to build the sweep's one model) and, lazily, the
file layer's ``problem_to_dict`` (the sweep's fingerprint holds the problem's table form: the one
reach upward).  Never plotting or the export layer.
"""

from __future__ import annotations

import dataclasses
import math
import os
import time
from dataclasses import dataclass, field

import pandas as pd

from .. import __version__
from ..constants import CAUTION
from ..executors import Processes, make_executor
from ..plan import Plan
from ..problem import Problem
from ..timescales import format_epoch
from .cells import (CELL_IPOPT_OPTIONS, FALLBACK_MAX_INFEASIBILITY, FAR_CAP_SHARE, STORE_KIND, cell_problem,
                    children_of, far_cap, final, label,
                    record, reference_problem, retry_sources, seed_cell, solve_task, tree, warm_of)
from .spec import DEFAULT_MAX_ITER, SweepSpecError, grid_of, parse_sweep_spec
from .store import ResumeStore

__all__ = ["sweep", "sweep_from_spec", "progress_text", "SweepProgress", "COLUMNS", "TIMING_COLUMNS"]

COLUMNS = ["row", "col", "cell", "burn_epoch_tdb", "burn_epoch_tdb_s", "arrival_grid_epoch_tdb_s",
           "max_return_duration_days", "arrival_window_open_tdb_s", "arrival_window_close_tdb_s",
           "status", "verified", "reason", "total_dv_mps", "dv_r_mps", "dv_t_mps", "dv_n_mps",
           "arrival_epoch_tdb", "arrival_epoch_tdb_s", "return_duration_days", "burn_to_arrival_days",
           "perilune_epoch_tdb_s", "perilune_altitude_km", "arrival_flight_path_deg", "arrival_speed_kms",
           "arrival_inclination_deg", "iterations", "max_iter", "wall_s", "cpu_s", "warm_from", "attempts",
           "mesh_steps"]
#: Columns that legitimately differ between two runs of the same sweep.
TIMING_COLUMNS = ["wall_s", "cpu_s"]


@dataclass(frozen=True)
class SweepProgress:
    """What :func:`sweep` reports after every finished cell.

    Attributes
    ----------
    stage : str
        ``"solve"`` (first pass over the grid) or ``"retry"`` (second attempts of failed cells).
    done, total : int
        Cells (or retries) finished and planned in this stage; cells read back from ``resume_dir``
        count as done.
    failed : int
        Cells not verified so far (over the whole grid).
    elapsed_s : float
        Wall time since the sweep started.
    eta_s : float or None
        Estimated wall time left in this stage (None until a cell has been solved in this run).
    cell : str
        Label of the cell just finished (``"r03c07"``), empty for the first report.
    """

    stage: str
    done: int
    total: int
    failed: int
    elapsed_s: float
    eta_s: float | None
    cell: str = ""


def progress_text(p: SweepProgress) -> str:
    """One line for a progress display, e.g. ``solve 37/144 cells, 2 without a verified answer,
    about 1 min 10 s left``."""
    if p.eta_s is None:
        left = "estimating time left"
    elif p.eta_s >= 60:
        left = f"about {int(p.eta_s // 60)} min {int(p.eta_s % 60):02d} s left"
    else:
        left = f"about {int(p.eta_s)} s left"
    what = "cells" if p.stage == "solve" else "retries"
    return f"{p.stage} {p.done}/{p.total} {what}, {p.failed} without a verified answer, {left}"


@dataclass
class _Run:
    """The state of one sweep while its cells are solved (passed to the plain functions below)."""

    problems: dict
    model: object
    max_iter: int
    burn_index: int
    store: ResumeStore
    say: object
    t_start: float
    ex: object = None
    threads: int | None = None
    ref_warm: dict | None = None
    parent: dict = field(default_factory=dict)
    children: dict = field(default_factory=dict)
    results: dict = field(default_factory=dict)  # (r, c) -> {"record", "warm", "warm_from", "attempts"}
    pending: dict = field(default_factory=dict)  # task handle -> (cell, its warm source)
    solved_here: int = 0
    t_stage: float = 0.0


def _executor(workers, scheduler):
    """Dask, local processes or this process (:mod:`optimizer.executors`), and the threads each
    task's CasADi maps get: local processes share the cores out (cores // workers), else None
    (the transcription's default)."""
    ex = make_executor(workers if workers is None else int(workers), scheduler, SweepSpecError)
    threads = max(1, (os.cpu_count() or 1) // ex.workers) if isinstance(ex, Processes) else None
    return ex, threads


def sweep(problem: Problem, burn_epochs, arrival_epochs=None, *, return_durations_days=None,
          arrival_tolerance_s: float = 0.0, burn_index: int = 0, workers: int | None = None, scheduler=None,
          resume_dir=None, progress=None, model=None, max_iter: int = DEFAULT_MAX_ITER,
          retry: bool = True, reference: Plan | None = None) -> pd.DataFrame:
    """Minimum Δv over a grid of burn epoch x arrival epoch (or longest return duration).

    Parameters
    ----------
    problem : Problem
        The base problem.  Its objective is replaced by minimum total Δv in every cell.
    burn_epochs : sequence of float
        TDB seconds past J2000, strictly increasing, inside the window of burn ``burn_index``.
        One grid row per burn epoch.
    arrival_epochs : sequence of float, optional
        TDB s, strictly increasing: one grid column per epoch; the cell's arrival lies within
        ``arrival_tolerance_s`` of it (0: exactly at it), and inside the problem's arrival window.
    return_durations_days : sequence of float, optional
        Instead of ``arrival_epochs``: the cell's arrival is at most this many days after the
        problem's start epoch (and within the problem's own limits).
    arrival_tolerance_s : float
        Half-width of the arrival window of a cell on the ``arrival_epochs`` axis, s.
    burn_index : int
        Which of the problem's burns is swept (0-based); the others keep their windows.
    workers : int, optional
        Local worker processes (default: every core; 1 runs in this process).
    scheduler : str or distributed.Client, optional
        Address of a Dask distributed scheduler (or a client): cells run there instead.
    resume_dir : path, optional
        Folder where every finished cell is saved as it completes; a rerun with the same folder
        skips the saved cells.  It refuses a folder holding a different sweep.
    progress : callable(SweepProgress), optional
        Called in this process after every finished cell.
    model : ForceModel, optional
        Prebuilt model covering the whole sweep; built once from ``problem.model`` otherwise.
    max_iter : int
        IPOPT iteration cap per cell.
    retry : bool
        Give every failed cell with a verified neighbour one more attempt from that neighbour.
    reference : Plan, optional
        The problem's own minimum-Δv optimum, when it has been solved already (``solve`` of the
        problem with ``objective = min-dv`` on ``model``); solved here otherwise.  A reference saved
        in ``resume_dir`` takes precedence.

    Returns
    -------
    pandas.DataFrame
        One row per cell, row-major, columns :data:`COLUMNS`; ``df.attrs["sweep"]`` holds the
        definition, the reference optimum, the model and timings.
    """
    t_start = time.perf_counter()
    rows, cols, axis_key = grid_of(problem, burn_epochs, arrival_epochs, return_durations_days,
                                   arrival_tolerance_s, burn_index)
    if axis_key == "arrival_epochs":
        windows = [(t - arrival_tolerance_s, t + arrival_tolerance_s) for t in cols]
        durations = [None] * len(cols)
    else:
        windows, durations = [None] * len(cols), list(cols)
    problems = {(r, c): cell_problem(problem, tb, windows[c], durations[c], burn_index,
                                     name=f"{problem.name}-{label(r, c)}")
                for r, tb in enumerate(rows) for c in range(len(cols))}
    ref_problem = reference_problem(problem)
    if model is None:
        model = _sweep_model(problem, [ref_problem, *problems.values()])
    definition = {"problem": _problem_dict(problem), "burn_epochs_tdb_s": list(rows), "axis": axis_key,
                  "columns": list(cols), "arrival_tolerance_s": float(arrival_tolerance_s),
                  "burn_index": burn_index, "max_iter": int(max_iter), "retry": bool(retry),
                  "cell_ipopt_options": CELL_IPOPT_OPTIONS, "far_cap_share": FAR_CAP_SHARE,
                  "fallback_max_infeasibility": FALLBACK_MAX_INFEASIBILITY,
                  "model": model.describe()}
    store = ResumeStore(resume_dir, definition, STORE_KIND, SweepSpecError)
    run = _Run(problems, model, int(max_iter), burn_index, store, progress or (lambda p: None), t_start)
    ref_rec = _reference(run, problem, ref_problem, reference)
    seed = seed_cell(rows, cols, axis_key, ref_rec, problem, burn_index)
    run.parent = tree(len(rows), len(cols), seed)
    run.children = children_of(run.parent)
    for key in problems:
        entry = store.load(label(*key))
        if entry is not None:
            run.results[key] = entry
    run.ex, run.threads = _executor(workers, scheduler)
    try:
        _first_pass(run)
        if retry:
            _retry_rounds(run)
    finally:
        run.ex.close()

    df = _table(problems, run.results, rows, cols, windows, durations, axis_key)
    df.attrs["sweep"] = {
        "software": f"slingback {__version__}", "caution": CAUTION, "problem": problem.name,
        "summary": problem.summary, "model": model.describe(), "axis": axis_key,
        "burn_index": burn_index, "arrival_tolerance_s": float(arrival_tolerance_s),
        "start_epoch_tdb_s": problem.start_epoch, "tolerances": dataclasses.asdict(problem.tolerances),
        "mesh": dataclasses.asdict(problem.mesh), "max_iter": int(max_iter), "retry": bool(retry),
        "cell_ipopt_options": dict(CELL_IPOPT_OPTIONS),
        "reference": {k: ref_rec.get(k) for k in ("status", "reason", "total_dv_mps", "arrival_epoch_tdb_s",
                                                  "return_duration_days", "iterations")}
        | {"burn_epoch_tdb_s": ref_rec.get("solved_burn_epoch_tdb_s")},
        "seed_cell": label(*seed), "wall_s": time.perf_counter() - t_start,
    }
    return df


def sweep_from_spec(problem: Problem, spec: dict, *, source: str = "<sweep>", **kwargs) -> pd.DataFrame:
    """Run the sweep a ``[sweep]`` table describes; ``kwargs`` go to :func:`sweep` (``workers``,
    ``scheduler``, ``resume_dir``, ``progress``, ``model``, ``reference``)."""
    s = parse_sweep_spec(spec, problem, source)
    return sweep(problem, s.burn_epochs, s.arrival_epochs, return_durations_days=s.return_durations_days,
                 arrival_tolerance_s=s.arrival_tolerance_s, burn_index=s.burn_index, max_iter=s.max_iter,
                 retry=s.retry, **kwargs)


def _sweep_model(problem, problems):
    """One model over the span every cell (and the reference) can reach."""
    from ..models import build_model
    from ..solve.guess import model_span

    spans = [model_span(p) for p in problems]
    return build_model(problem.model, min(a for a, _ in spans), max(b for _, b in spans))


def _problem_dict(problem):
    from ..problem_file import problem_to_dict as problem_dict

    return problem_dict(problem)


def _reference(run: _Run, problem, ref_problem, reference) -> dict:
    """The problem's own optimum (minimum Δv), which seeds the continuation: read back from the
    store, taken from ``reference``, or solved cold.  Sets ``run.ref_warm``; returns its record."""
    saved = run.store.load("reference")
    if saved is None:
        if reference is not None:
            ref_rec = record(reference, ref_problem, run.burn_index, reference.solver.get("end_to_end_s", math.nan))
            ref_warm = warm_of(reference) if reference.verified and reference.warm.get("x") else None
        else:
            # a cold solve: with the problem's model continuation when it has one (solve then
            # builds its own model), on the sweep's model otherwise
            ref_model = None if problem.model.continuation else run.model
            ref_rec, ref_warm = solve_task(ref_problem, None, ref_model, max(run.max_iter, 300), run.burn_index,
                                           cell=False)
        saved = {"record": ref_rec, "warm": ref_warm}
        run.store.save("reference", saved)
    run.ref_warm = saved["warm"]
    return saved["record"]


# ------------------------------------------------------------------------------------------------
# First pass: along the continuation tree
# ------------------------------------------------------------------------------------------------
def _source(run: _Run, key):
    """Nearest verified ancestor of ``key``: (label, warm), else the reference, else ("cold", None)."""
    par = run.parent[key]
    while par is not None:
        res = run.results[par]
        if res["warm"] is not None:
            return label(*par), res["warm"]
        par = run.parent[par]
    return ("reference", run.ref_warm) if run.ref_warm is not None else ("cold", None)


def _report(run: _Run, done: int, total: int, cell: str) -> None:
    failed = sum(1 for v in run.results.values() if v["warm"] is None)
    rate = (time.perf_counter() - run.t_stage) / run.solved_here if run.solved_here else None  # wall s per cell
    eta = None if rate is None else rate * (total - done)
    run.say(SweepProgress("solve", done, total, failed, time.perf_counter() - run.t_start, eta, cell))


def _launch(run: _Run, key) -> None:
    """Submit ``key`` (or, when it is resumed, its children at once)."""
    if key in run.results:
        for ch in run.children.get(key, []):
            _launch(run, ch)
        return
    src, warm = _source(run, key)
    par = run.parent[key]
    # its neighbour on the tree failed: likely inside a region without solutions, and started from
    # further away; a smaller cap (a feasible cell lost this way is retried from any verified
    # neighbour at the full cap)
    cap = run.max_iter if par is None or run.results[par]["warm"] is not None else far_cap(run.max_iter)
    fut = run.ex.submit(solve_task, run.problems[key], warm, run.model, cap, run.burn_index, True,
                        cap == run.max_iter, run.threads)
    run.pending[fut] = (key, src)


def _first_pass(run: _Run) -> None:
    run.t_stage, run.solved_here = time.perf_counter(), 0
    total = len(run.problems)
    _report(run, len(run.results), total, "")
    for ch in run.children[None]:
        _launch(run, ch)
    while run.pending:
        for fut, (rec, warm) in run.ex.wait_one(list(run.pending)):
            key, src = run.pending.pop(fut)
            run.results[key] = {"record": rec, "warm": warm, "warm_from": src, "attempts": 1}
            run.store.save(label(*key), run.results[key])
            run.solved_here += 1
            _report(run, len(run.results), total, label(*key))
            for ch in run.children.get(key, []):
                _launch(run, ch)


# ------------------------------------------------------------------------------------------------
# Retry rounds: failed cells with a verified neighbour they did not start from
# ------------------------------------------------------------------------------------------------
def _retry_rounds(run: _Run) -> None:
    rnd = 0
    while True:
        rnd += 1
        state, todo = retry_sources(run.results, rnd)
        if not todo:
            return
        _retry_round(run, rnd, state, todo)


def _retry_round(run: _Run, rnd: int, state: dict, todo: dict) -> None:
    pending, done, t_round, solved = {}, 0, time.perf_counter(), 0
    for key, src in todo.items():
        if run.results[key].get("retry"):  # resumed: this round's retry is already saved
            done += 1
            continue
        fut = run.ex.submit(solve_task, run.problems[key], state[src]["warm"], run.model, run.max_iter,
                            run.burn_index, True, True, run.threads)
        pending[fut] = (key, src)
    while pending:
        for fut, (rec, warm) in run.ex.wait_one(list(pending)):
            key, src = pending.pop(fut)
            run.results[key]["retry"] = {"record": rec, "warm": warm, "warm_from": label(*src), "round": rnd}
            run.store.save(label(*key), run.results[key])
            done, solved = done + 1, solved + 1
            rate = (time.perf_counter() - t_round) / solved
            failed = sum(1 for v in run.results.values() if (v.get("retry") or v)["warm"] is None)
            run.say(SweepProgress("retry", done, len(todo), failed, time.perf_counter() - run.t_start,
                                  rate * (len(todo) - done), label(*key)))


# ------------------------------------------------------------------------------------------------
# The table
# ------------------------------------------------------------------------------------------------
def _table(problems, results, rows, cols, windows, durations, axis_key) -> pd.DataFrame:
    out = []
    for (r, c) in sorted(problems):
        rec = final(results[(r, c)])
        win = windows[c]
        ew = problems[(r, c)].arrival.epoch_window
        out.append({
            "row": r, "col": c, "cell": label(r, c), "burn_epoch_tdb": format_epoch(rows[r], 3),
            "burn_epoch_tdb_s": rows[r],
            "arrival_grid_epoch_tdb_s": cols[c] if axis_key == "arrival_epochs" else math.nan,
            "max_return_duration_days": durations[c] if durations[c] is not None else math.nan,
            "arrival_window_open_tdb_s": ew[0] if ew is not None and win is not None else math.nan,
            "arrival_window_close_tdb_s": ew[1] if ew is not None and win is not None else math.nan,
            "verified": rec["status"] == "verified",
            "arrival_epoch_tdb": (format_epoch(rec["arrival_epoch_tdb_s"], 3)
                                  if math.isfinite(rec["arrival_epoch_tdb_s"]) else ""),
            **{k: v for k, v in rec.items() if k in COLUMNS},
        })
    df = pd.DataFrame(out, columns=COLUMNS)
    return df.astype({"row": int, "col": int, "iterations": int, "max_iter": int, "attempts": int, "verified": bool})
