"""Trade studies: Δv over a grid of burn epoch x arrival epoch (or longest return duration).

Every cell of the grid is the problem itself, narrowed: the swept burn's epoch fixed at the cell's
burn epoch, the arrival held to the cell's arrival window (or to at most the cell's return duration),
and the objective minimum total Δv.  A sweep never widens the problem, so no cell can be cheaper
than the problem's own unconstrained optimum, the *reference* solve that seeds the sweep.

Continuation.  Cold solves with both ends pinned often wander off, so cells are warm-started along a
fixed tree: the *seed* cell (burn epoch and arrival nearest the reference optimum) starts from the
reference plan; the *spine* (the seed's column) runs up and down the burn epochs, each cell from
the one before; every row then runs left and right from its spine cell.  A cell starts from its
nearest *verified* ancestor on that tree (or cold when there is none).  After this first pass, each
cell that did not verify but has a verified neighbour it was not started from is retried once from
that neighbour, in rounds (a cell freshly verified in round k can rescue its neighbours in round
k+1).  The tree and the rounds depend on the results alone, never on which worker finished first,
so a sweep is deterministic and a resumed sweep equals an uninterrupted one.

Parallelism.  Each cell is one task; a task is submitted as soon as its warm source is known, so
many cells run at once (local processes by default, or a Dask distributed cluster).  Results come
back to this process, which writes each finished cell to ``resume_dir`` (one small JSON file per
cell, written atomically) and reports progress.

Columns of the table (units in the names; epochs TDB, ``_tdb`` ISO-8601 text, ``_tdb_s`` seconds
past J2000; return duration counts from the problem's start epoch):

``row, col, cell, burn_epoch_tdb, burn_epoch_tdb_s, arrival_grid_epoch_tdb_s,
max_return_duration_days, arrival_window_open_tdb_s, arrival_window_close_tdb_s, status, verified,
reason, total_dv_mps, dv_r_mps, dv_t_mps, dv_n_mps, arrival_epoch_tdb, arrival_epoch_tdb_s,
return_duration_days, burn_to_arrival_days, perilune_epoch_tdb_s, perilune_altitude_km,
arrival_flight_path_deg, arrival_speed_kms, arrival_inclination_deg, iterations, max_iter, wall_s,
cpu_s, warm_from, attempts, mesh_steps``.

Δv and event values are filled only for verified cells (from the independent re-propagation); a
cell that failed keeps its status and reason and NaN values.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .constants import CAUTION, SECONDS_PER_DAY
from .executors import Processes, atomic_json, make_executor
from .plan import Plan
from .export.manifest import write_folder_manifest
from .export.run import refuse_existing, staged_folder
from .problem import Objective, Problem
from .timescales import format_epoch, parse_epoch

__all__ = ["sweep", "sweep_from_spec", "parse_sweep_spec", "load_sweep_file", "run_sweep_file", "progress_text",
           "SweepSpec", "SweepProgress", "SweepSpecError", "cell_problem", "pareto", "best_plan", "write_sweep",
           "COLUMNS", "DEFAULT_MAX_ITER"]

DAY = SECONDS_PER_DAY
#: IPOPT iteration cap per cell: it bounds the time lost on cells that have no solution.  First
#: attempts of the verified cells of the benchmark grid: median 19, 95th percentile 54 iterations.
DEFAULT_MAX_ITER = 100
#: IPOPT options of a cell (over the solver's own): optimality tolerance 1e-7 instead of 1e-9; the
#: constraint tolerances, and so the verification, are unchanged.  Measured on 24 cells of the
#: benchmark grid: 39 % fewer iterations, every Δv the same to 1e-4 m/s.  The reference and
#: :func:`best_plan` are solved at the solver's full tolerance.  A cell starts warm, next to its
#: optimum, where a limited-memory Hessian needs few iterations and each costs a fraction of an
#: exact one.  Measured on the 12 x 12 demo-trade grid (``bench_trade.py --problem
#: problems/demo-trade.toml``): wall 182 s exact, 63 s limited-memory; the same 96 cells verified;
#: total Δv equal to 0.04 % (the limited-memory answers lower by up to 3.5 mm/s, higher by 1e-8 m/s).
CELL_IPOPT_OPTIONS = {"ipopt.tol": 1e-7, "ipopt.acceptable_tol": 1e-6,
                      "ipopt.hessian_approximation": "limited-memory"}
#: Share of the cap given to a first attempt whose neighbour on the continuation tree failed (it
#: starts further away, usually inside a region with no solution; retries get the full cap).
FAR_CAP_SHARE = 0.25
#: Share of the cap for the exact-Hessian attempt after a stalled limited-memory one.  Measured on
#: the two first-column cells of tests/test_trade.py (0.25 d early arrival): 25 and 37 iterations
#: with the first release's rounding, 46 and 77 after the right-hand side was rewritten (same
#: physics to 1e-15): the count is not a stable property, so the exact attempt gets the whole cap.
FALLBACK_CAP_SHARE = 1.0
CELL_FORMAT, SWEEP_FORMAT, FORMAT_VERSION = "slingback-trade-cell", "slingback-trade-sweep", 1

COLUMNS = ["row", "col", "cell", "burn_epoch_tdb", "burn_epoch_tdb_s", "arrival_grid_epoch_tdb_s",
           "max_return_duration_days", "arrival_window_open_tdb_s", "arrival_window_close_tdb_s",
           "status", "verified", "reason", "total_dv_mps", "dv_r_mps", "dv_t_mps", "dv_n_mps",
           "arrival_epoch_tdb", "arrival_epoch_tdb_s", "return_duration_days", "burn_to_arrival_days",
           "perilune_epoch_tdb_s", "perilune_altitude_km", "arrival_flight_path_deg", "arrival_speed_kms",
           "arrival_inclination_deg", "iterations", "max_iter", "wall_s", "cpu_s", "warm_from", "attempts",
           "mesh_steps"]
#: Columns that legitimately differ between two runs of the same sweep.
TIMING_COLUMNS = ["wall_s", "cpu_s"]


try:  # the command line treats a bad [sweep] table like any other bad problem file
    from .problem_file import ProblemError as _SpecBase
except ImportError:  # pragma: no cover - the file layer is optional for library use
    _SpecBase = ValueError


class SweepSpecError(_SpecBase):
    """A ``[sweep]`` table (or sweep arguments) that cannot be used; the message names the key."""


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


# ------------------------------------------------------------------------------------------------
# Cells
# ------------------------------------------------------------------------------------------------
def cell_problem(problem: Problem, burn_epoch: float, arrival_window=None, max_duration_days=None,
                 burn_index: int = 0, name: str | None = None) -> Problem:
    """The problem of one cell: burn ``burn_index`` fixed at ``burn_epoch``, the arrival narrowed
    to ``arrival_window`` (TDB s, intersected with the problem's own) and/or to at most
    ``max_duration_days`` after the start, minimum total Δv."""
    burns = list(problem.burns)
    burns[burn_index] = dataclasses.replace(burns[burn_index], window=(float(burn_epoch), float(burn_epoch)))
    ret = problem.arrival
    if arrival_window is not None:
        lo, hi = (float(x) for x in arrival_window)
        if ret.epoch_window is not None:
            lo, hi = max(lo, ret.epoch_window[0]), min(hi, ret.epoch_window[1])
        ret = dataclasses.replace(ret, epoch_window=(lo, hi))
    if max_duration_days is not None:
        d = float(max_duration_days)
        if ret.max_duration_days is not None:
            d = min(d, ret.max_duration_days)
        ret = dataclasses.replace(ret, max_duration_days=d)
    return dataclasses.replace(problem, name=name or problem.name, burns=tuple(burns), arrival=ret,
                               objective=Objective("min-dv"))


def _reference_problem(problem: Problem) -> Problem:
    return dataclasses.replace(problem, objective=Objective("min-dv"))


def _label(r: int, c: int) -> str:
    return f"r{r:02d}c{c:02d}"


def _warm_stub(warm: dict) -> Plan:
    """A Plan carrying only warm-start variables and the model name (what ``solve(warm=...)``
    reads: multipliers are used only when the model is the same)."""
    return Plan(name="", status="verified", reason="", model={"name": warm.get("model")}, start_epoch=0.0,
                start_state=(), burns=[],
                events=[], trajectory_t=np.empty(0), trajectory_y=np.empty((0, 6)), verification=None,
                solver={}, warm=warm)


def _nan_record() -> dict:
    return {k: math.nan for k in ("solved_burn_epoch_tdb_s", "total_dv_mps", "dv_r_mps", "dv_t_mps", "dv_n_mps",
                                  "arrival_epoch_tdb_s", "return_duration_days", "burn_to_arrival_days",
                                  "perilune_epoch_tdb_s", "perilune_altitude_km", "arrival_flight_path_deg",
                                  "arrival_speed_kms", "arrival_inclination_deg")}


def _record(plan: Plan, problem: Problem, burn_index: int, wall: float, cpu: float = math.nan) -> dict:
    """The table values of a solved cell (events from the independent re-propagation)."""
    rec = _nan_record()
    attempts = plan.solver.get("attempts", [])
    rec.update(status=plan.status, reason=plan.reason, iterations=int(sum(a.get("iterations", 0) for a in attempts)),
               wall_s=float(wall), cpu_s=float(cpu),
               mesh_steps=" ".join(str(s) for s in plan.warm.get("steps", [])))
    if not plan.verified:
        return rec
    ver = plan.verification
    peri = next(e for e in ver.events if e.name == "perilune")
    arr = next(e for e in ver.events if e.name == problem.arrival.target)
    burn = plan.burns[burn_index]
    rec.update(solved_burn_epoch_tdb_s=burn.epoch, total_dv_mps=plan.total_dv_mps,
               dv_r_mps=1000.0 * burn.dv_rtn[0], dv_t_mps=1000.0 * burn.dv_rtn[1],
               dv_n_mps=1000.0 * burn.dv_rtn[2], arrival_epoch_tdb_s=arr.epoch,
               return_duration_days=(arr.epoch - problem.start_epoch) / DAY,
               burn_to_arrival_days=(arr.epoch - burn.epoch) / DAY, perilune_epoch_tdb_s=peri.epoch,
               perilune_altitude_km=peri.altitude_km,
               arrival_flight_path_deg=arr.flight_path_deg if arr.flight_path_deg is not None else math.nan,
               arrival_speed_kms=arr.speed_kms if arr.speed_kms is not None else math.nan,
               arrival_inclination_deg=arr.inclination_deg if arr.inclination_deg is not None else math.nan)
    return rec


def _solve_task(problem: Problem, warm: dict | None, model, max_iter: int, burn_index: int, cell: bool = True,
                fallback: bool = True, threads: int | None = None):
    """Solve one cell (runs in a worker).  Returns (record dict, warm dict or None).

    ``model=None`` lets ``solve`` build its own (and run the problem's model continuation);
    ``cell=False`` solves at the solver's full tolerance (the reference); ``threads``: threads of
    the transcription's segment maps (None: its default)."""
    from contextlib import nullcontext

    from .transcription import map_threads

    with map_threads(threads) if threads is not None else nullcontext():
        return _solve_cell(problem, warm, model, max_iter, burn_index, cell, fallback)


def _solve_cell(problem, warm, model, max_iter, burn_index, cell, fallback):
    from .solver import solve  # CasADi is loaded in the worker, not at import of this module

    t0, c0 = time.perf_counter(), time.process_time()
    model = _interned(model)
    options = {**(CELL_IPOPT_OPTIONS if cell else {}), "ipopt.max_iter": int(max_iter)}
    try:
        # cells share one NLP structure (only bounds change): the solver's own per-thread cache
        # reuses one built IPOPT solver for them, given the same (interned) model object
        plan = solve(problem, warm=_warm_stub(warm) if warm else None, model=model, ipopt_options=options)
        if cell and fallback and not plan.verified and "Maximum_Iterations" in plan.reason and plan.warm.get("x"):
            # the limited-memory Hessian can stall on a cell far from its neighbour: the exact
            # Hessian goes on from where it stopped (measured on the 0.3 d arrival step of
            # tests/test_trade.py: limited-memory stalls at 100 iterations; exact from the neighbour
            # 50-74, from the stalled point 25-90 over two releases: see FALLBACK_CAP_SHARE)
            attempts = plan.solver.get("attempts", [])
            options.pop("ipopt.hessian_approximation", None)
            options["ipopt.max_iter"] = max(5, int(max_iter * FALLBACK_CAP_SHARE))
            plan = solve(problem, warm=plan, model=model, ipopt_options=options)
            plan.solver["attempts"] = attempts + plan.solver.get("attempts", [])
    except Exception as exc:  # a cell that cannot even be set up is a failed cell, not a failed sweep
        rec = _nan_record()
        rec.update(status="failed", reason=f"{type(exc).__name__}: {exc}", iterations=0,
                   max_iter=int(max_iter), wall_s=time.perf_counter() - t0, cpu_s=time.process_time() - c0,
                   mesh_steps="")
        return rec, None
    rec = _record(plan, problem, burn_index, time.perf_counter() - t0, time.process_time() - c0)
    rec["max_iter"] = int(max_iter)
    return rec, (_warm_of(plan) if plan.verified else None)


_MODELS = {}  # per worker process: one model object per distinct model (fingerprint -> model)


def _interned(model):
    """The worker's own copy of ``model``: every task brings a fresh unpickled copy, and a built
    solver can be reused only with the very model object it was built on."""
    if model is None:
        return None
    import pickle

    key = hashlib.sha256(pickle.dumps(model, protocol=4)).hexdigest()
    return _MODELS.setdefault(key, model)


def _warm_of(plan: Plan) -> dict:
    return {**plan.warm, "model": plan.model.get("name")}


def _executor(workers, scheduler):
    """Dask, local processes or this process (:mod:`optimizer.executors`), and the threads each
    task's CasADi maps get: local processes share the cores out (cores // workers), else None
    (the transcription's default)."""
    ex = make_executor(workers if workers is None else int(workers), scheduler, SweepSpecError)
    threads = max(1, (os.cpu_count() or 1) // ex.workers) if isinstance(ex, Processes) else None
    return ex, threads


# ------------------------------------------------------------------------------------------------
# Resume folder
# ------------------------------------------------------------------------------------------------
class _Store:
    """One JSON file per finished cell in ``resume_dir/cells``; ``sweep.json`` names the sweep."""

    def __init__(self, folder, definition: dict):
        self.folder = Path(folder) if folder is not None else None
        if self.folder is None:
            return
        key = hashlib.sha256(json.dumps(definition, sort_keys=True, default=str).encode()).hexdigest()
        self.key = key
        (self.folder / "cells").mkdir(parents=True, exist_ok=True)
        head = self.folder / "sweep.json"
        if head.exists():
            try:
                old = json.loads(head.read_text())
            except (OSError, ValueError) as exc:
                raise SweepSpecError(f"resume_dir: cannot read {head} ({exc})") from None
            if old.get("fingerprint") != key:
                raise SweepSpecError(f"resume_dir: {self.folder} holds a different sweep (problem, grid or "
                                     "options changed); use an empty folder")
        else:
            atomic_json(head, {"format": SWEEP_FORMAT, "format_version": FORMAT_VERSION,
                                "software": f"slingback {__version__}", "fingerprint": key,
                                "definition": definition})

    def _path(self, label: str) -> Path:
        return self.folder / "cells" / f"{label}.json"

    def load(self, label: str) -> dict | None:
        if self.folder is None:
            return None
        p = self._path(label)
        if not p.exists():
            return None
        try:
            d = json.loads(p.read_text())
        except (OSError, ValueError):
            return None  # a damaged file (cannot happen with atomic writes) is solved again
        return d if d.get("fingerprint") == self.key else None

    def save(self, label: str, entry: dict) -> None:
        if self.folder is not None:
            atomic_json(self._path(label), {"format": CELL_FORMAT, "format_version": FORMAT_VERSION,
                                             "fingerprint": self.key, **entry})


# ------------------------------------------------------------------------------------------------
# The sweep
# ------------------------------------------------------------------------------------------------
def _axis(values, key, *, positive=False) -> tuple[float, ...]:
    try:
        arr = np.asarray([float(v) for v in values], dtype=float)
    except (TypeError, ValueError):
        raise SweepSpecError(f"{key}: expected a sequence of numbers, got {values!r}") from None
    if arr.size == 0:
        raise SweepSpecError(f"{key}: expected at least one value")
    if not np.all(np.isfinite(arr)):
        raise SweepSpecError(f"{key}: every value must be finite")
    if arr.size > 1 and not np.all(np.diff(arr) > 0):
        raise SweepSpecError(f"{key}: values must increase strictly")
    if positive and arr[0] <= 0:
        raise SweepSpecError(f"{key}: values must be positive, got {arr[0]!r}")
    return tuple(float(v) for v in arr)


def _tree(n_rows: int, n_cols: int, seed: tuple[int, int]):
    """Parent of every cell on the continuation tree: along its row towards the seed's column,
    and in that column along the burn epochs towards the seed (whose parent is None)."""
    r0, c0 = seed
    parent = {}
    for r in range(n_rows):
        for c in range(n_cols):
            if c != c0:
                parent[(r, c)] = (r, c - 1 if c > c0 else c + 1)
            elif r != r0:
                parent[(r, c)] = (r - 1 if r > r0 else r + 1, c)
            else:
                parent[(r, c)] = None
    return parent


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
    if (arrival_epochs is None) == (return_durations_days is None):
        raise SweepSpecError("give exactly one of arrival_epochs and return_durations_days")
    if not 0 <= burn_index < len(problem.burns):
        raise SweepSpecError(f"burn: the problem has {len(problem.burns)} burn(s), got index {burn_index}")
    if not (math.isfinite(arrival_tolerance_s) and arrival_tolerance_s >= 0):
        raise SweepSpecError(f"arrival_tolerance: expected a number of at least 0, got {arrival_tolerance_s!r}")
    rows = _axis(burn_epochs, "burn_epochs")
    lo, hi = problem.burns[burn_index].window
    for t in rows:
        if not lo - 1e-6 <= t <= hi + 1e-6:
            raise SweepSpecError(f"burn_epochs: {format_epoch(t, 0)} TDB lies outside the window of burn "
                                 f"{burn_index + 1} [{format_epoch(lo, 0)}, {format_epoch(hi, 0)}] TDB; "
                                 "a sweep only narrows the problem, so widen the window first")
        if t < problem.start_epoch:
            raise SweepSpecError(f"burn_epochs: {format_epoch(t, 0)} TDB is before the start epoch")
    ret = problem.arrival
    if arrival_epochs is not None:
        axis_key, cols = "arrival_epochs", _axis(arrival_epochs, "arrival_epochs")
        if ret.epoch_window is not None:
            for t in cols:
                if not ret.epoch_window[0] - arrival_tolerance_s <= t <= ret.epoch_window[1] + arrival_tolerance_s:
                    raise SweepSpecError(f"arrival_epochs: {format_epoch(t, 0)} TDB lies outside the problem's "
                                         f"arrival window [{format_epoch(ret.epoch_window[0], 0)}, "
                                         f"{format_epoch(ret.epoch_window[1], 0)}] TDB")
        windows = [(t - arrival_tolerance_s, t + arrival_tolerance_s) for t in cols]
        durations = [None] * len(cols)
    else:
        axis_key, cols = "return_durations_days", _axis(return_durations_days, "return_durations_days", positive=True)
        if ret.max_duration_days is not None and cols[-1] > ret.max_duration_days + 1e-9:
            raise SweepSpecError(f"return_durations_days: {cols[-1]} exceeds the problem's "
                                 f"max_duration_days {ret.max_duration_days}")
        windows, durations = [None] * len(cols), list(cols)

    problems = {}
    for r, tb in enumerate(rows):
        for c in range(len(cols)):
            problems[(r, c)] = cell_problem(problem, tb, windows[c], durations[c], burn_index,
                                            name=f"{problem.name}-{_label(r, c)}")
    ref_problem = _reference_problem(problem)
    if model is None:
        from .models import build_model
        from .solver import model_span

        spans = [model_span(p) for p in (ref_problem, *problems.values())]
        model = build_model(problem.model, min(a for a, _ in spans), max(b for _, b in spans))
    definition = {"problem": _problem_dict(problem), "burn_epochs_tdb_s": list(rows), "axis": axis_key,
                  "columns": list(cols), "arrival_tolerance_s": float(arrival_tolerance_s),
                  "burn_index": burn_index, "max_iter": int(max_iter), "retry": bool(retry),
                  "cell_ipopt_options": CELL_IPOPT_OPTIONS, "far_cap_share": FAR_CAP_SHARE,
                  "model": model.describe()}
    store = _Store(resume_dir, definition)
    n_rows, n_cols = len(rows), len(cols)
    say = progress or (lambda p: None)

    # the reference: the problem's own optimum (minimum Δv), which seeds the continuation
    saved = store.load("reference")
    if saved is None:
        if reference is not None:
            ref_rec = _record(reference, ref_problem, burn_index, reference.solver.get("end_to_end_s", math.nan))
            ref_warm = _warm_of(reference) if reference.verified and reference.warm.get("x") else None
        else:
            # a cold solve: with the problem's model continuation when it has one (solve then
            # builds its own model), on the sweep's model otherwise
            ref_model = None if problem.model.continuation else model
            ref_rec, ref_warm = _solve_task(ref_problem, None, ref_model, max(int(max_iter), 300), burn_index,
                                            cell=False)
        saved = {"record": ref_rec, "warm": ref_warm}
        store.save("reference", saved)
    ref_rec, ref_warm = saved["record"], saved["warm"]
    seed = _seed_cell(rows, cols, axis_key, ref_rec, problem, burn_index)
    parent = _tree(n_rows, n_cols, seed)

    results: dict = {}  # (r, c) -> {"record", "warm", "warm_from", "attempts"}
    for key in problems:
        entry = store.load(_label(*key))
        if entry is not None:
            results[key] = entry
    ex, threads = _executor(workers, scheduler)
    try:
        # first pass: along the continuation tree
        children = {}
        for key, par in parent.items():
            children.setdefault(par, []).append(key)

        def source(key):
            """Nearest verified ancestor: (label, warm) or ("cold", None)."""
            par = parent[key]
            while par is not None:
                res = results[par]
                if res["warm"] is not None:
                    return _label(*par), res["warm"]
                par = parent[par]
            return ("reference", ref_warm) if ref_warm is not None else ("cold", None)

        pending, solved_here = {}, 0
        t_stage = time.perf_counter()

        def report(stage, done, total, cell):
            failed = sum(1 for v in results.values() if v["warm"] is None)
            rate = (time.perf_counter() - t_stage) / solved_here if solved_here else None  # wall s per cell
            eta = None if rate is None else rate * (total - done)
            say(SweepProgress(stage, done, total, failed, time.perf_counter() - t_start, eta, cell))

        def launch(key):
            if key in results:  # resumed: its children can go at once
                for ch in children.get(key, []):
                    launch(ch)
                return
            src, warm = source(key)
            par = parent[key]
            # its neighbour on the tree failed: likely inside a region without solutions, and
            # started from further away; a smaller cap (a feasible cell lost this way is retried
            # from any verified neighbour at the full cap)
            cap = max_iter if par is None or results[par]["warm"] is not None else _far_cap(max_iter)
            fut = ex.submit(_solve_task, problems[key], warm, model, cap, burn_index, True, cap == max_iter, threads)
            pending[fut] = (key, src)

        report("solve", len(results), len(problems), "")
        for ch in children[None]:
            launch(ch)
        while pending:
            for fut, (rec, warm) in ex.wait_one(list(pending)):
                key, src = pending.pop(fut)
                results[key] = {"record": rec, "warm": warm, "warm_from": src, "attempts": 1}
                store.save(_label(*key), results[key])
                solved_here += 1
                report("solve", len(results), len(problems), _label(*key))
                for ch in children.get(key, []):
                    launch(ch)

        # retry rounds: failed cells with a verified neighbour they did not start from
        if retry:
            _retry_rounds(problems, results, ex, threads, store, model, max_iter, burn_index, say, t_start)
    finally:
        ex.close()

    df = _table(problems, results, rows, cols, windows, durations, axis_key, problem)
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
        "seed_cell": _label(*seed), "wall_s": time.perf_counter() - t_start,
    }
    return df


def _far_cap(max_iter: int) -> int:
    """Iteration cap of a first attempt whose tree neighbour failed."""
    return max(5, int(max_iter * FAR_CAP_SHARE))


def _problem_dict(problem):
    from .solver import problem_dict

    return problem_dict(problem)


def _seed_cell(rows, cols, axis_key, ref_rec, problem, burn_index):
    """The cell nearest the reference optimum (burn epoch, arrival)."""
    tb = ref_rec.get("solved_burn_epoch_tdb_s")
    if tb is None or not math.isfinite(tb):
        tb = rows[0]
    r0 = int(np.argmin(np.abs(np.asarray(rows) - tb)))
    ta = ref_rec.get("arrival_epoch_tdb_s", math.nan)
    if not math.isfinite(ta):
        return r0, (0 if axis_key == "arrival_epochs" else len(cols) - 1)
    if axis_key == "arrival_epochs":
        return r0, int(np.argmin(np.abs(np.asarray(cols) - ta)))
    dur = (ta - problem.start_epoch) / DAY
    longer = [i for i, d in enumerate(cols) if d >= dur]
    return r0, (longer[0] if longer else len(cols) - 1)


def _neighbours(key, n_rows, n_cols):
    r, c = key
    for dr, dc in ((-1, 0), (1, 0), (0, -1), (0, 1)):
        if 0 <= r + dr < n_rows and 0 <= c + dc < n_cols:
            yield (r + dr, c + dc)


def _retry_rounds(problems, results, ex, threads, store, model, max_iter, burn_index, say, t_start):
    n_rows = 1 + max(r for r, _ in problems)
    n_cols = 1 + max(c for _, c in problems)
    rnd = 0
    while True:
        rnd += 1
        # the state after round rnd-1: first-pass results overridden by retries of earlier rounds
        state = {k: (v["retry"] if v.get("retry") and v["retry"]["round"] < rnd else v) for k, v in results.items()}
        todo = {}
        for key in sorted(problems):
            if state[key]["warm"] is not None or results[key].get("retry", {}).get("round", rnd) < rnd:
                continue
            tried = results[key].get("warm_from")
            options = [(state[n]["record"]["total_dv_mps"], n) for n in _neighbours(key, n_rows, n_cols)
                       if state[n]["warm"] is not None and _label(*n) != tried]
            if options:
                todo[key] = min(options)[1]
        if not todo:
            return
        pending, done, t_round, solved = {}, 0, time.perf_counter(), 0
        for key, src in todo.items():
            if results[key].get("retry"):  # resumed: this round's retry is already saved
                done += 1
                continue
            fut = ex.submit(_solve_task, problems[key], state[src]["warm"], model, max_iter, burn_index, True, True,
                            threads)
            pending[fut] = (key, src)
        while pending:
            for fut, (rec, warm) in ex.wait_one(list(pending)):
                key, src = pending.pop(fut)
                results[key]["retry"] = {"record": rec, "warm": warm, "warm_from": _label(*src), "round": rnd}
                store.save(_label(*key), results[key])
                done, solved = done + 1, solved + 1
                rate = (time.perf_counter() - t_round) / solved
                failed = sum(1 for v in results.values() if (v.get("retry") or v)["warm"] is None)
                say(SweepProgress("retry", done, len(todo), failed, time.perf_counter() - t_start,
                                  rate * (len(todo) - done), _label(*key)))


def _final(entry: dict) -> dict:
    """The cell's result: its retry if it had one that verified or the first pass failed too."""
    first, again = entry, entry.get("retry")
    if again is None:
        return {**first["record"], "warm_from": first["warm_from"], "attempts": 1}
    best = again if again["warm"] is not None or first["warm"] is None else first
    rec = dict(best["record"])
    rec["iterations"] = first["record"]["iterations"] + again["record"]["iterations"]
    for k in ("wall_s", "cpu_s"):
        rec[k] = first["record"].get(k, math.nan) + again["record"].get(k, math.nan)
    if best is again and again["warm"] is None:
        rec["reason"] = (f"first attempt (from {first['warm_from']}): {first['record']['reason']}; "
                         f"retry (from {again['warm_from']}): {again['record']['reason']}")
    return {**rec, "warm_from": best["warm_from"], "attempts": 2}


def _table(problems, results, rows, cols, windows, durations, axis_key, problem) -> pd.DataFrame:
    out = []
    for (r, c) in sorted(problems):
        rec = _final(results[(r, c)])
        win = windows[c]
        cp = problems[(r, c)]
        ew = cp.arrival.epoch_window
        out.append({
            "row": r, "col": c, "cell": _label(r, c), "burn_epoch_tdb": format_epoch(rows[r], 3),
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


# ------------------------------------------------------------------------------------------------
# [sweep] tables of problem files
# ------------------------------------------------------------------------------------------------
SPEC_KEYS = ("burn_epochs", "arrival_epochs", "return_durations_days", "arrival_tolerance_hours", "burn",
             "max_iterations", "retry_failed")
MAX_COUNT = 200


@dataclass(frozen=True)
class SweepSpec:
    """A parsed ``[sweep]`` table (see ``docs/sweep-format.md``)."""

    burn_epochs: tuple[float, ...]
    arrival_epochs: tuple[float, ...] | None = None
    return_durations_days: tuple[float, ...] | None = None
    arrival_tolerance_s: float = 0.0
    burn_index: int = 0
    max_iter: int = DEFAULT_MAX_ITER
    retry: bool = True


def _spec_axis(spec: dict, key: str, where: str, epochs: bool):
    """A grid axis: ``{start, stop, count}`` or an explicit list."""
    what = ('a list of epochs like ["2027-05-10T06:00:00 TDB", ...]' if epochs else "a list of numbers") + \
        " or a table {start = ..., stop = ..., count = ...}"
    x = spec[key]

    def value(v, k):
        if epochs:
            if not isinstance(v, str):
                raise SweepSpecError(f"{where}.{k}: expected an epoch like \"2027-05-10T06:00:00 TDB\", got {_short(v)}")
            try:
                return parse_epoch(v)
            except ValueError:
                raise SweepSpecError(f"{where}.{k}: expected an ISO-8601 TDB epoch like "
                                     f"\"2027-05-10T06:00:00 TDB\", got {_short(v)}") from None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 < v <= 100:
            raise SweepSpecError(f"{where}.{k}: expected a number of days above 0 and at most 100, got {_short(v)}")
        return float(v)

    if isinstance(x, list):
        if not 1 <= len(x) <= MAX_COUNT:
            raise SweepSpecError(f"{where}.{key}: expected 1 to {MAX_COUNT} values, got {len(x)}")
        vals = [value(v, f"{key}[{i}]") for i, v in enumerate(x)]
        if any(b <= a for a, b in zip(vals, vals[1:])):
            raise SweepSpecError(f"{where}.{key}: values must increase strictly")
        return tuple(vals)
    if not isinstance(x, dict):
        raise SweepSpecError(f"{where}.{key}: expected {what}, got {_short(x)}")
    for k in x:
        if k not in ("start", "stop", "count"):
            raise SweepSpecError(f"{where}.{key}.{k}: unknown key; expected start, stop and count")
    for k in ("start", "stop", "count"):
        if k not in x:
            raise SweepSpecError(f"{where}.{key}.{k}: missing; expected {what}")
    n = x["count"]
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= MAX_COUNT:
        raise SweepSpecError(f"{where}.{key}.count: expected a whole number from 1 to {MAX_COUNT}, got {_short(n)}")
    a, b = value(x["start"], f"{key}.start"), value(x["stop"], f"{key}.stop")
    if n == 1 and a != b:
        raise SweepSpecError(f"{where}.{key}: with count = 1, start and stop must be equal")
    if n > 1 and not b > a:
        raise SweepSpecError(f"{where}.{key}.stop: expected later than {key}.start" if epochs else
                             f"{where}.{key}.stop: expected larger than {key}.start")
    return tuple(float(v) for v in np.linspace(a, b, n))


def _short(x) -> str:
    """``repr`` cut to 80 characters (an integer of hundreds of digits is not echoed whole)."""
    try:
        text = repr(x)
    except ValueError:
        return f"a {type(x).__name__} too large to show"
    return text if len(text) <= 80 else text[:77] + "..."


def parse_sweep_spec(spec: dict, problem: Problem | None = None, source: str = "<sweep>") -> SweepSpec:
    """Check a ``[sweep]`` table and turn it into a :class:`SweepSpec`.

    Raises
    ------
    SweepSpecError
        Naming ``source`` and the key, e.g. ``problems/x.toml: [sweep].burn_epochs.count: expected a
        whole number from 1 to 200, got 0``.
    """
    where = f"{source}: [sweep]"
    if not isinstance(spec, dict):
        raise SweepSpecError(f"{where}: expected a table, got {spec!r}")
    for k in spec:
        if k not in SPEC_KEYS:
            import difflib

            near = difflib.get_close_matches(str(k), SPEC_KEYS, n=1)
            hint = f"; did you mean {near[0]!r}?" if near else f"; expected one of {', '.join(SPEC_KEYS)}"
            raise SweepSpecError(f"{where}.{k}: unknown key{hint}")
    if "burn_epochs" not in spec:
        raise SweepSpecError(f"{where}.burn_epochs: missing; expected a table {{start = ..., stop = ..., "
                             "count = ...}} or a list of epochs")
    has_e, has_d = "arrival_epochs" in spec, "return_durations_days" in spec
    if has_e == has_d:
        raise SweepSpecError(f"{where}: give exactly one of arrival_epochs and return_durations_days"
                             + (" (both given)" if has_e else ""))
    burns = _spec_axis(spec, "burn_epochs", where, True)
    arrivals = _spec_axis(spec, "arrival_epochs", where, True) if has_e else None
    durations = _spec_axis(spec, "return_durations_days", where, False) if has_d else None
    tol_h = spec.get("arrival_tolerance_hours", 0.0)
    if isinstance(tol_h, bool) or not isinstance(tol_h, (int, float)) or not 0 <= tol_h <= 1000:
        raise SweepSpecError(f"{where}.arrival_tolerance_hours: expected a number from 0 to 1,000, got {_short(tol_h)}")
    if has_d and "arrival_tolerance_hours" in spec:
        raise SweepSpecError(f"{where}.arrival_tolerance_hours: applies to arrival_epochs only")
    burn = spec.get("burn", 1)
    n_burns = len(problem.burns) if problem is not None else 10**6
    if isinstance(burn, bool) or not isinstance(burn, int) or not 1 <= burn <= n_burns:
        raise SweepSpecError(f"{where}.burn: expected a whole number from 1 to {n_burns} (which [[burn]]), "
                             f"got {_short(burn)}")
    it = spec.get("max_iterations", DEFAULT_MAX_ITER)
    if isinstance(it, bool) or not isinstance(it, int) or not 5 <= it <= 3000:
        raise SweepSpecError(f"{where}.max_iterations: expected a whole number from 5 to 3000, got {_short(it)}")
    retry = spec.get("retry_failed", True)
    if not isinstance(retry, bool):
        raise SweepSpecError(f"{where}.retry_failed: expected true or false, got {retry!r}")
    out = SweepSpec(burns, arrivals, durations, float(tol_h) * 3600.0, burn - 1, it, retry)
    if problem is not None:  # the grid must narrow the problem: check it here to name the keys
        lo, hi = problem.burns[burn - 1].window
        for i, t in enumerate(burns):
            if not lo - 1e-6 <= t <= hi + 1e-6:
                raise SweepSpecError(f"{where}.burn_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) lies outside "
                                     f"the window of [[burn]] {burn}, [{format_epoch(lo, 0)}, "
                                     f"{format_epoch(hi, 0)}] TDB")
        win = problem.arrival.epoch_window
        if arrivals is not None and win is not None:
            for i, t in enumerate(arrivals):
                if not win[0] - out.arrival_tolerance_s <= t <= win[1] + out.arrival_tolerance_s:
                    raise SweepSpecError(f"{where}.arrival_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) lies "
                                         f"outside [return].epoch_window [{format_epoch(win[0], 0)}, "
                                         f"{format_epoch(win[1], 0)}] TDB")
        t0 = problem.start_epoch
        for i, t in enumerate(arrivals or ()):
            if not t > max(t0, burns[0]):
                raise SweepSpecError(f"{where}.arrival_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) is not "
                                     f"after the start and the first burn epoch ({format_epoch(max(t0, burns[0]), 0)} "
                                     "TDB)")
        if problem.model.kind == "ephemeris" or "ephemeris" in problem.model.continuation:
            from .problem_file import EPHEMERIS_SPAN

            last = arrivals[-1] if arrivals else t0 + durations[-1] * 86400.0
            key = "arrival_epochs" if arrivals else "return_durations_days"
            if last + 86400.0 > EPHEMERIS_SPAN[1]:
                raise SweepSpecError(f"{where}.{key}: an arrival at {format_epoch(last, 0)} TDB runs past the DE421 "
                                     f"span of the ephemeris model (ends {format_epoch(EPHEMERIS_SPAN[1], 0)} TDB; "
                                     "the path must end a day before)")
        mx = problem.arrival.max_duration_days
        if durations is not None and mx is not None and durations[-1] > mx + 1e-9:
            raise SweepSpecError(f"{where}.return_durations_days: {durations[-1]} exceeds "
                                 f"[return].max_duration_days {mx}")
    return out


def sweep_from_spec(problem: Problem, spec: dict, *, source: str = "<sweep>", **kwargs) -> pd.DataFrame:
    """Run the sweep a ``[sweep]`` table describes; ``kwargs`` go to :func:`sweep` (``workers``,
    ``scheduler``, ``resume_dir``, ``progress``, ``model``)."""
    s = parse_sweep_spec(spec, problem, source)
    return sweep(problem, s.burn_epochs, s.arrival_epochs, return_durations_days=s.return_durations_days,
                 arrival_tolerance_s=s.arrival_tolerance_s, burn_index=s.burn_index, max_iter=s.max_iter,
                 retry=s.retry, **kwargs)


def load_sweep_file(path) -> tuple[Problem, SweepSpec]:
    """Read a problem file that carries a ``[sweep]`` table: the problem (the file without that
    table, checked by :func:`optimizer.problem_file.problem_from_dict`) and the parsed grid.

    Raises
    ------
    SweepSpecError
        (a ``ProblemError``) naming the file and key, for every mistake in the file.
    """
    import tomllib

    from .problem_file import problem_from_dict

    source = str(path)
    try:
        data = tomllib.loads(Path(path).read_bytes().decode("utf-8"))
    except OSError as exc:
        raise SweepSpecError(f"{source}: cannot read the file ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise SweepSpecError(f"{source}: not a UTF-8 text file") from None
    except tomllib.TOMLDecodeError as exc:
        raise SweepSpecError(f"{source}: invalid TOML: {exc}") from None
    spec = data.pop("sweep", None)
    if spec is None:
        raise SweepSpecError(f"{source}: [sweep]: missing; a trade study needs a [sweep] table "
                             "(see docs/sweep-format.md)")
    problem = problem_from_dict(data, source=source)
    return problem, parse_sweep_spec(spec, problem, source)


def run_sweep_file(path, out_dir, *, workers=None, scheduler=None, resume_dir=None, progress=None,
                   force: bool = False) -> tuple[pd.DataFrame, Path]:
    """What ``slingback sweep FILE`` does: read the file, run its sweep, write the trade folder.

    Returns the table and the folder.  Bad input raises :class:`SweepSpecError` before anything is
    solved or written; an existing ``out_dir`` raises ``FileExistsError`` (before solving) unless
    ``force``.
    """
    problem, s = load_sweep_file(path)
    out = Path(out_dir)
    refuse_existing(out, force)
    df = sweep(problem, s.burn_epochs, s.arrival_epochs, return_durations_days=s.return_durations_days,
               arrival_tolerance_s=s.arrival_tolerance_s, burn_index=s.burn_index, max_iter=s.max_iter,
               retry=s.retry, workers=workers, scheduler=scheduler, resume_dir=resume_dir, progress=progress)
    return df, write_sweep(df, out, problem=problem, force=force)


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


# ------------------------------------------------------------------------------------------------
# Pareto set and the best cell
# ------------------------------------------------------------------------------------------------
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
    from .models import build_model
    from .solver import solve

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
        from .solver import model_span

        spans = [model_span(p) for p in (cp, problem)]
        model = build_model(problem.model, min(a for a, _ in spans), max(b for _, b in spans))
    warm = None
    if resume_dir is not None:
        p = Path(resume_dir) / "cells" / f"{row['cell']}.json"
        if p.exists():
            entry = json.loads(p.read_text())
            entry = entry["retry"] if entry.get("retry") and entry["retry"]["warm"] is not None else entry
            warm = entry.get("warm")
    if warm is None:
        ref = solve(_reference_problem(problem), model=None if problem.model.continuation else model)
        if ref.verified:
            warm = _warm_of(ref)
    plan = solve(cp, warm=_warm_stub(warm) if warm else None, model=model)
    if not plan.verified and warm is not None:
        cold = solve(cp, model=model)
        plan = cold if cold.verified else plan
    plan.solver["trade_cell"] = row["cell"]
    return plan


# ------------------------------------------------------------------------------------------------
# Output folder
# ------------------------------------------------------------------------------------------------
def write_sweep(df: pd.DataFrame, out_dir, *, problem: Problem | None = None, force: bool = False,
                meta: dict | None = None) -> Path:
    """Write a trade folder: ``trade.csv``, ``trade.parquet`` (when pyarrow is installed),
    ``pareto.csv``, ``trade-map.png``, ``trade-abort.png``, ``trade-pareto.png``, ``trade-report.md``.

    Written into a temporary folder beside ``out_dir`` and moved into place when complete; an
    existing ``out_dir`` is replaced only with ``force=True``.
    """
    meta = dict(meta or df.attrs.get("sweep", {}))
    out = Path(out_dir)
    with staged_folder(out, force) as tmp:
        front = pareto(df)
        _csv(df, tmp / "trade.csv")
        _csv(front, tmp / "pareto.csv")
        wrote_parquet = _parquet(df, tmp / "trade.parquet", meta)
        figures = _figures(df, front, tmp, meta)
        (tmp / "trade-report.md").write_text(_report(df, front, meta, figures, wrote_parquet, problem))
        files = {"trade.csv": "one row per cell of the grid",
                 "pareto.csv": "verified cells not beaten on both Δv and return duration"}
        if wrote_parquet:
            files["trade.parquet"] = "the same table as trade.csv (metadata key `slingback`)"
        files.update(figures)
        files["trade-report.md"] = "the trade report"
        write_folder_manifest(tmp, _manifest_head(meta, problem), files)
    return out


def _model_name(meta) -> str:
    return (meta.get("model") or {}).get("name", "unknown")


def _manifest_head(meta, problem) -> dict:
    """What the trade folder's manifest.json says besides its files (the CSV files are plain)."""
    name = meta.get("problem") or (problem.name if problem is not None else "unknown")
    tol = meta.get("tolerances") or (dataclasses.asdict(problem.tolerances) if problem is not None else {})
    return {"format": "slingback-trade-manifest", "format_version": 1,
            "software": {"name": "slingback", "version": __version__}, "case": name,
            "model": _model_name(meta), "verification_tolerances": tol, "time_scale": "TDB",
            "frame": "Earth-centred inertial, ICRF axes",
            "units": "in the column names; return duration from the start epoch",
            "csv_dialect": "comma-separated, header on line 1, no comment lines, UTF-8", "caution": CAUTION}


def _csv(df, path):
    """A plain CSV: header on line 1, no comment lines (metadata in manifest.json)."""
    df.to_csv(path, index=False, lineterminator="\n")


def _parquet(df, path, meta) -> bool:
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        return False
    table = pa.Table.from_pandas(df, preserve_index=False)
    extra = {b"slingback": json.dumps({"software": f"slingback {__version__}", "caution": CAUTION,
                                       "sweep": meta}, default=str).encode()}
    table = table.replace_schema_metadata({**(table.schema.metadata or {}), **extra})
    pq.write_table(table, path)
    return True


def _fmt_epoch(t) -> str:
    return f"{format_epoch(t, 0)} TDB" if t is not None and math.isfinite(t) else "-"


def _report(df, front, meta, figures, wrote_parquet, problem) -> str:
    n = len(df)
    counts = df["status"].value_counts().to_dict()
    ok = df[df["verified"]]
    lines = [f"# Trade study: {meta.get('problem', problem.name if problem else 'unknown')}", "",
             f"> **Caution.** {CAUTION}", ""]
    if meta.get("summary"):
        lines += [meta["summary"], ""]
    axis = meta.get("axis", "arrival_epochs")
    ax_text = ("arrival epoch" + (f" (within ±{meta.get('arrival_tolerance_s', 0) / 3600:g} h)"
                                  if meta.get("arrival_tolerance_s") else " (exact)")
               if axis == "arrival_epochs" else "longest return duration from the start epoch")
    n_rows, n_cols = df["row"].nunique(), df["col"].nunique()
    lines += ["## Set-up", "",
              f"- Grid: {n_rows} burn epochs x {n_cols} values of {ax_text}; {n} cells, each a minimum-Δv "
              "solve with the burn epoch fixed, checked by independent re-propagation.",
              f"- Burn epochs {_fmt_epoch(df['burn_epoch_tdb_s'].min())} to "
              f"{_fmt_epoch(df['burn_epoch_tdb_s'].max())}.",
              f"- Model: {_model_name(meta)}; start epoch {_fmt_epoch(meta.get('start_epoch_tdb_s'))}; "
              "frame Earth-centred inertial (ICRF axes); epochs TDB.",
              f"- Verification tolerances: {json.dumps(meta.get('tolerances', {}))}.",
              f"- IPOPT per cell: iteration cap {meta.get('max_iter', '-')}, options "
              f"{json.dumps(meta.get('cell_ipopt_options', {}))} (constraint tolerances as in a single solve); "
              f"failed cells retried from a verified neighbour: {'yes' if meta.get('retry', True) else 'no'}.",
              f"- Software: slingback {__version__}; sweep wall time {meta.get('wall_s', math.nan):.1f} s.", ""]
    ref = meta.get("reference") or {}
    if ref:
        lines += ["## Reference (the problem's own minimum-Δv optimum)", "",
                  f"- Status {ref.get('status')}; total Δv {_num(ref.get('total_dv_mps'))} m/s; arrival "
                  f"{_fmt_epoch(ref.get('arrival_epoch_tdb_s'))} "
                  f"({_num(ref.get('return_duration_days'), 3)} d after start).",
                  "- No cell can be cheaper: every cell narrows this problem.", ""]
    lines += ["## Cells", "", "| status | cells |", "|---|---|"]
    lines += [f"| {k} | {v} |" for k, v in sorted(counts.items())]
    lines += [""]
    if not ok.empty:
        cheap = ok.loc[ok["total_dv_mps"].idxmin()]
        fast = ok.loc[ok["return_duration_days"].idxmin()]
        lines += [f"- Cheapest verified cell {cheap['cell']}: {cheap['total_dv_mps']:.3f} m/s, burn "
                  f"{_fmt_epoch(cheap['burn_epoch_tdb_s'])}, arrival {_fmt_epoch(cheap['arrival_epoch_tdb_s'])}.",
                  f"- Fastest verified cell {fast['cell']}: {fast['return_duration_days']:.3f} d after start, "
                  f"{fast['total_dv_mps']:.3f} m/s, burn {_fmt_epoch(fast['burn_epoch_tdb_s'])}.", ""]
    bad = df[~df["verified"]]
    if not bad.empty:
        lines += ["Cells without a verified answer (kept in `trade.csv` with status and reason):", ""]
        for _, r in bad.head(20).iterrows():
            lines.append(f"- {r['cell']} ({r['status']}): {str(r['reason'])[:160]}")
        if len(bad) > 20:
            lines.append(f"- ... and {len(bad) - 20} more")
        lines.append("")
    lines += ["## Pareto set (total Δv against return duration)", ""]
    if front.empty:
        lines += ["No verified cell.", ""]
    else:
        lines += ["| cell | burn epoch (TDB) | arrival epoch (TDB) | return duration (d) | total Δv (m/s) |",
                  "|---|---|---|---|---|"]
        for _, r in front.iterrows():
            lines.append(f"| {r['cell']} | {_fmt_epoch(r['burn_epoch_tdb_s'])} | "
                         f"{_fmt_epoch(r['arrival_epoch_tdb_s'])} | {r['return_duration_days']:.3f} | "
                         f"{r['total_dv_mps']:.3f} |")
        lines.append("")
    lines += ["## Files", "", "- `trade.csv`: every cell (reads as it is with `pandas.read_csv(path)`).",
              "- `manifest.json`: every file with its role; columns and units of the CSV files."]
    if wrote_parquet:
        lines.append("- `trade.parquet`: the same table (metadata key `slingback`).")
    lines.append("- `pareto.csv`: the Pareto set.")
    lines += [f"- `{name}`: {what}" for name, what in figures.items()]
    lines += ["", f"*{CAUTION}*", ""]
    return "\n".join(lines)


def _num(x, digits=3) -> str:
    return f"{x:.{digits}f}" if isinstance(x, (int, float)) and math.isfinite(x) else "-"


# ------------------------------------------------------------------------------------------------
# Figures (matplotlib, Agg backend, PNG)
# ------------------------------------------------------------------------------------------------
#: Neutral ink and marker colours; the Δv map uses matplotlib's perceptually uniform "cividis".
_INK, _GUIDE, _NOGO, _FRONT, _CHEAP, _FAST = "#2b2f33", "#b9c0c7", "#7a7f85", "#9c4a3c", "#3f5f7f", "#b8862d"
_SHADE = "#e4e6e9"


def _edges(v) -> np.ndarray:
    """Cell edges around grid values (midpoints; half a step beyond the ends)."""
    v = np.asarray(v, dtype=float)
    if v.size == 1:
        return np.array([v[0] - 0.5, v[0] + 0.5])
    mid = 0.5 * (v[1:] + v[:-1])
    return np.r_[v[0] - (mid[0] - v[0]), mid, v[-1] + (v[-1] - mid[-1])]


FIGURES = {"trade-map.png": "total Δv over burn epoch x arrival, cells without a verified answer "
                            "shaded and crossed, the Pareto set circled",
           "trade-abort.png": "Δv and return duration against burn epoch, cheapest and fastest verified return",
           "trade-pareto.png": "total Δv against return duration, every verified cell and the Pareto set"}


def _figures(df, front, out: Path, meta) -> dict:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t_start = meta.get("start_epoch_tdb_s")
    if t_start is None or not math.isfinite(t_start):
        t_start = float(df["burn_epoch_tdb_s"].min())
    start_text = f"{format_epoch(t_start, 0)} TDB"
    axis = meta.get("axis", "arrival_epochs" if df["arrival_grid_epoch_tdb_s"].notna().any() else "durations")
    rows = np.sort(df["row"].unique())
    cols = np.sort(df["col"].unique())
    burn_h = (df.groupby("row")["burn_epoch_tdb_s"].first().reindex(rows).to_numpy() - t_start) / 3600.0
    if axis == "arrival_epochs":
        col_val = (df.groupby("col")["arrival_grid_epoch_tdb_s"].first().reindex(cols).to_numpy() - t_start) / DAY
        ylabel = f"arrival epoch, days after {start_text}"
    else:
        col_val = df.groupby("col")["max_return_duration_days"].first().reindex(cols).to_numpy()
        ylabel = f"longest return duration, days after {start_text}"
    xlabel = f"burn epoch, hours after {start_text}"
    dv = np.full((len(cols), len(rows)), np.nan)
    for r, c, v, ok in df[["row", "col", "total_dv_mps", "verified"]].itertuples(index=False):
        if ok:
            dv[c, r] = v

    def style(ax, title):
        ax.set_title(title, loc="left", fontsize=10, color=_INK)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        for side in ("left", "bottom"):
            ax.spines[side].set_color(_GUIDE)
        ax.tick_params(colors=_INK, labelsize=8)
        ax.grid(color=_GUIDE, linewidth=0.4, alpha=0.6)

    def save(fig, name):
        fig.text(0.01, 0.008, f"slingback {__version__} | {meta.get('problem', '')} | model {_model_name(meta)} | "
                 f"epochs TDB | CAUTION: {CAUTION}", fontsize=5.2, color="#6b7177", wrap=True)
        what = f"{meta.get('problem', '')}: {FIGURES[name]}. {CAUTION}"
        fig.savefig(out / name, dpi=130, metadata={"Software": f"slingback {__version__}", "Description": what})
        plt.close(fig)

    # 1. the map
    fig, ax = plt.subplots(figsize=(8.0, 5.6))
    fig.subplots_adjust(bottom=0.16)
    style(ax, "Minimum total Δv of each cell (m/s)")
    finite = np.isfinite(dv)
    if len(rows) >= 2 and len(cols) >= 2 and finite.sum() >= 4 and np.nanmax(dv) > np.nanmin(dv):
        levels = np.linspace(np.nanmin(dv), np.nanmax(dv), 13)
        cs = ax.contourf(burn_h, col_val, np.ma.masked_invalid(dv), levels=levels, cmap="cividis")
        ax.contour(burn_h, col_val, np.ma.masked_invalid(dv), levels=levels, colors="white", linewidths=0.3,
                   alpha=0.6)
    else:
        bx, by = np.meshgrid(burn_h, col_val)
        cs = ax.scatter(bx[finite], by[finite], c=dv[finite], cmap="cividis", s=60, marker="s")
    fig.colorbar(cs, ax=ax, label="total Δv (m/s)")
    xe, ye = _edges(burn_h), _edges(col_val)
    if (~finite).any():  # the cells without a verified answer, shaded
        from matplotlib.colors import ListedColormap

        ax.pcolormesh(xe, ye, np.ma.masked_where(finite, np.ones_like(dv)), cmap=ListedColormap([_SHADE]),
                      shading="flat", zorder=0)
    ax.set_xlim(xe[0], xe[-1])
    ax.set_ylim(ye[0], ye[-1])
    bx, by = np.meshgrid(burn_h, col_val)
    ax.scatter(bx[finite], by[finite], s=4, color=_INK, alpha=0.5, label="verified cell")
    if (~finite).any():
        ax.scatter(bx[~finite], by[~finite], marker="x", s=36, color=_NOGO, linewidths=1.2,
                   label="no verified answer (infeasible or failed), shaded")
    if not front.empty:
        ax.scatter(burn_h[front["row"].to_numpy()], col_val[front["col"].to_numpy()], s=90, facecolors="none",
                   edgecolors=_FRONT, linewidths=1.4, label="Pareto set (Δv vs return duration)")
    ax.set_xlabel(xlabel, fontsize=8, color=_INK)
    ax.set_ylabel(ylabel, fontsize=8, color=_INK)
    ax.legend(fontsize=7, loc="upper right", framealpha=0.85)
    save(fig, "trade-map.png")

    # 2. against burn (abort) time: cheapest and fastest verified return per burn epoch
    ok = df[df["verified"]]
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(8.0, 6.0), sharex=True)
    fig.subplots_adjust(bottom=0.14, hspace=0.25)
    style(a1, "Total Δv against burn epoch")
    style(a2, "Return duration against burn epoch")
    if not ok.empty:
        cheap = ok.loc[ok.groupby("row")["total_dv_mps"].idxmin()]
        fast = ok.loc[ok.sort_values(["return_duration_days", "total_dv_mps"]).groupby("row").head(1).index]
        fast = fast.sort_values("row")
        for sel, colour, name, mark in ((cheap, _CHEAP, "cheapest return", "o"), (fast, _FAST, "fastest return", "s")):
            h = (sel["burn_epoch_tdb_s"].to_numpy() - t_start) / 3600.0
            a1.plot(h, sel["total_dv_mps"], marker=mark, ms=4, color=colour, label=name)
            a2.plot(h, sel["return_duration_days"], marker=mark, ms=4, color=colour, label=name)
        a1.legend(fontsize=7)
    a1.set_ylabel("total Δv (m/s)", fontsize=8, color=_INK)
    a2.set_ylabel(f"days from {start_text} to arrival", fontsize=8, color=_INK)
    a2.set_xlabel(xlabel, fontsize=8, color=_INK)
    save(fig, "trade-abort.png")

    # 3. Pareto set
    fig, ax = plt.subplots(figsize=(8.0, 5.0))
    fig.subplots_adjust(bottom=0.16)
    style(ax, "Total Δv against return duration (verified cells)")
    if not ok.empty:
        ax.scatter(ok["return_duration_days"], ok["total_dv_mps"], s=10, color=_GUIDE, label="verified cell")
    if not front.empty:
        ax.step(front["return_duration_days"], front["total_dv_mps"], where="post", color=_FRONT, linewidth=1.0)
        ax.scatter(front["return_duration_days"], front["total_dv_mps"], s=22, color=_FRONT, label="Pareto set")
        ax.legend(fontsize=7)
    ax.set_xlabel(f"return duration, days from {start_text} to arrival", fontsize=8, color=_INK)
    ax.set_ylabel("total Δv (m/s)", fontsize=8, color=_INK)
    save(fig, "trade-pareto.png")
    return dict(FIGURES)
