"""The cells of a trade study: each cell's problem, the solve of one cell (what a worker runs),
the warm-start tree the cells are started along, and which failed cells are retried from where.

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

One job: cells.  May import: numpy, the standard library, :mod:`optimizer.constants`,
:mod:`optimizer.problem`, :mod:`optimizer.plan`, the wing's ``store``,
:mod:`optimizer.transcription` (its thread count) and, inside a worker, the solver.  Never pandas,
plotting, the file layer or the export layer.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import pickle
import time
from contextlib import nullcontext

import numpy as np

from ..constants import SECONDS_PER_DAY
from ..plan import Plan
from ..problem import Objective, Problem
from .store import StoreKind

__all__ = ["cell_problem", "reference_problem", "label", "solve_task", "record", "warm_of", "warm_stub",
           "tree", "children_of", "seed_cell", "far_cap", "retry_sources", "final", "CELL_IPOPT_OPTIONS",
           "FAR_CAP_SHARE", "FALLBACK_CAP_SHARE", "FALLBACK_MAX_INFEASIBILITY", "STORE_KIND"]

#: IPOPT options of a cell (over the solver's own): optimality tolerance 1e-7 instead of 1e-9; the
#: constraint tolerances, and so the verification, are unchanged.  The reference and
#: :func:`optimizer.trade.front.best_plan` are solved at the solver's full tolerance.  A cell starts
#: warm, next to its optimum, where a limited-memory Hessian needs few iterations and each costs a
#: fraction of an exact one (docs/sweep-format.md has the measured figures).
CELL_IPOPT_OPTIONS = {"ipopt.tol": 1e-7, "ipopt.acceptable_tol": 1e-6,
                      "ipopt.hessian_approximation": "limited-memory"}
#: Share of the cap given to a first attempt whose neighbour on the continuation tree failed (it
#: starts further away, usually inside a region with no solution; retries get the full cap).
FAR_CAP_SHARE = 0.25
#: Share of the cap for the exact-Hessian attempt after a stalled limited-memory one.  Its iteration
#: count is not a stable property (it moved with a rounding-level rewrite of the right-hand side),
#: so the exact attempt gets the whole cap.
FALLBACK_CAP_SHARE = 1.0
#: The exact-Hessian attempt is made only when the stalled limited-memory one ended at most this
#: far from feasible (IPOPT's primal infeasibility of its last iterate).  Measured by
#: ``tests/benchmarks/bench_cell_fallback.py`` (cells of the test grid of tests/test_trade.py and of
#: the demo-trade grid, each warm-started from its verified neighbour): a feasible cell whose
#: limited-memory attempt stalled ended at 8.4e-7 and the exact attempt then verified it; cells
#: with no solution (arrival too early for the perilune range) ended at 0.15 to 5.0, and 100 more
#: exact iterations never verified one.  Below this, the exact attempt runs; above, the cell fails
#: fast (a retry from another verified neighbour may still solve it).
FALLBACK_MAX_INFEASIBILITY = 1e-3

#: The resume folder of a sweep: ``sweep.json`` names the sweep, ``cells/<label>.json`` one cell
#: (and ``cells/reference.json`` the reference solve).
STORE_KIND = StoreKind(head="sweep.json", items="cells", head_format="slingback-trade-sweep",
                       item_format="slingback-trade-cell", option="resume_dir", what="sweep",
                       changed="problem, grid or options changed")

_EVENT_VALUES = ("solved_burn_epoch_tdb_s", "total_dv_mps", "dv_r_mps", "dv_t_mps", "dv_n_mps",
                 "arrival_epoch_tdb_s", "return_duration_days", "burn_to_arrival_days", "perilune_epoch_tdb_s",
                 "perilune_altitude_km", "arrival_flight_path_deg", "arrival_speed_kms", "arrival_inclination_deg")


# ------------------------------------------------------------------------------------------------
# Cell problems
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


def reference_problem(problem: Problem) -> Problem:
    """The problem with a minimum-Δv objective: its optimum seeds the sweep."""
    return dataclasses.replace(problem, objective=Objective("min-dv"))


def label(r: int, c: int) -> str:
    """The name of cell (r, c): ``"r03c07"``."""
    return f"r{r:02d}c{c:02d}"


# ------------------------------------------------------------------------------------------------
# Solving one cell (in a worker)
# ------------------------------------------------------------------------------------------------
def warm_stub(warm: dict) -> Plan:
    """A Plan carrying only warm-start variables and the model name (what ``solve(warm=...)``
    reads: multipliers are used only when the model is the same)."""
    return Plan(name="", status="verified", reason="", model={"name": warm.get("model")}, start_epoch=0.0,
                start_state=(), burns=[],
                events=[], trajectory_t=np.empty(0), trajectory_y=np.empty((0, 6)), verification=None,
                solver={}, warm=warm)


def warm_of(plan: Plan) -> dict:
    """What a neighbour needs to start from ``plan``."""
    return {**plan.warm, "model": plan.model.get("name")}


def nan_record() -> dict:
    return {k: math.nan for k in _EVENT_VALUES}


def record(plan: Plan, problem: Problem, burn_index: int, wall: float, cpu: float = math.nan) -> dict:
    """The table values of a solved cell (events from the independent re-propagation)."""
    rec = nan_record()
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
               return_duration_days=(arr.epoch - problem.start_epoch) / SECONDS_PER_DAY,
               burn_to_arrival_days=(arr.epoch - burn.epoch) / SECONDS_PER_DAY, perilune_epoch_tdb_s=peri.epoch,
               perilune_altitude_km=peri.altitude_km,
               arrival_flight_path_deg=arr.flight_path_deg if arr.flight_path_deg is not None else math.nan,
               arrival_speed_kms=arr.speed_kms if arr.speed_kms is not None else math.nan,
               arrival_inclination_deg=arr.inclination_deg if arr.inclination_deg is not None else math.nan)
    return rec


def solve_task(problem: Problem, warm: dict | None, model, max_iter: int, burn_index: int, cell: bool = True,
               fallback: bool = True, threads: int | None = None):
    """Solve one cell (runs in a worker).  Returns (record dict, warm dict or None).

    ``model=None`` lets ``solve`` build its own (and run the problem's model continuation);
    ``cell=False`` solves at the solver's full tolerance (the reference); ``threads``: threads of
    the transcription's segment maps (None: its default)."""
    from ..transcription import map_threads

    with map_threads(threads) if threads is not None else nullcontext():
        return _solve_cell(problem, warm, model, max_iter, burn_index, cell, fallback)


def _solve_cell(problem, warm, model, max_iter, burn_index, cell, fallback):
    from .. import solve  # CasADi is loaded in the worker, not at import of this module

    t0, c0 = time.perf_counter(), time.process_time()
    model = _interned(model)
    options = {**(CELL_IPOPT_OPTIONS if cell else {}), "ipopt.max_iter": int(max_iter)}
    try:
        # cells share one NLP structure (only bounds change): the solver's own per-thread cache
        # reuses one built IPOPT solver for them, given the same (interned) model object
        plan = solve(problem, warm=warm_stub(warm) if warm else None, model=model, ipopt_options=options)
        if cell and fallback and not plan.verified and "Maximum_Iterations" in plan.reason and plan.warm.get("x") \
                and _near_feasible(plan):
            # the limited-memory Hessian can stall on a cell far from its neighbour: the exact
            # Hessian goes on from where it stopped (see FALLBACK_CAP_SHARE)
            attempts = plan.solver.get("attempts", [])
            options.pop("ipopt.hessian_approximation", None)
            options["ipopt.max_iter"] = max(5, int(max_iter * FALLBACK_CAP_SHARE))
            plan = solve(problem, warm=plan, model=model, ipopt_options=options)
            plan.solver["attempts"] = attempts + plan.solver.get("attempts", [])
    except Exception as exc:  # a cell that cannot even be set up is a failed cell, not a failed sweep
        rec = nan_record()
        rec.update(status="failed", reason=f"{type(exc).__name__}: {exc}", iterations=0,
                   max_iter=int(max_iter), wall_s=time.perf_counter() - t0, cpu_s=time.process_time() - c0,
                   mesh_steps="")
        return rec, None
    rec = record(plan, problem, burn_index, time.perf_counter() - t0, time.process_time() - c0)
    rec["max_iter"] = int(max_iter)
    return rec, (warm_of(plan) if plan.verified else None)


def _near_feasible(plan) -> bool:
    """Whether the last IPOPT attempt of ``plan`` ended within FALLBACK_MAX_INFEASIBILITY of
    feasible (an attempt without that record counts as near: the fallback is then tried)."""
    attempts = plan.solver.get("attempts") or [{}]
    inf_pr = attempts[-1].get("primal_infeasibility")
    return inf_pr is None or inf_pr <= FALLBACK_MAX_INFEASIBILITY


_MODELS = {}  # per worker process: one model object per distinct model (fingerprint -> model)


def _interned(model):
    """The worker's own copy of ``model``: every task brings a fresh unpickled copy, and a built
    solver can be reused only with the very model object it was built on."""
    if model is None:
        return None
    key = hashlib.sha256(pickle.dumps(model, protocol=4)).hexdigest()
    return _MODELS.setdefault(key, model)


# ------------------------------------------------------------------------------------------------
# The warm-start tree and the retries
# ------------------------------------------------------------------------------------------------
def tree(n_rows: int, n_cols: int, seed: tuple[int, int]) -> dict:
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


def children_of(parent: dict) -> dict:
    """The tree the other way round: cell (None for the root) -> its children, in grid order."""
    children = {}
    for key, par in parent.items():
        children.setdefault(par, []).append(key)
    return children


def seed_cell(rows, cols, axis_key, ref_rec, problem, burn_index=0):
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
    dur = (ta - problem.start_epoch) / SECONDS_PER_DAY
    longer = [i for i, d in enumerate(cols) if d >= dur]
    return r0, (longer[0] if longer else len(cols) - 1)


def far_cap(max_iter: int) -> int:
    """Iteration cap of a first attempt whose tree neighbour failed."""
    return max(5, int(max_iter * FAR_CAP_SHARE))


def _neighbours(key, n_rows, n_cols):
    r, c = key
    for dr, dc in ((-1, 0), (1, 0), (0, -1), (0, 1)):
        if 0 <= r + dr < n_rows and 0 <= c + dc < n_cols:
            yield (r + dr, c + dc)


def retry_sources(results: dict, rnd: int) -> tuple[dict, dict]:
    """The retries of round ``rnd``: ``(state, todo)``, ``state`` the results after round rnd-1
    (first-pass results overridden by retries of earlier rounds), ``todo`` failed cell -> the
    cheapest verified neighbour it was not started from."""
    n_rows = 1 + max(r for r, _ in results)
    n_cols = 1 + max(c for _, c in results)
    state = {k: (v["retry"] if v.get("retry") and v["retry"]["round"] < rnd else v) for k, v in results.items()}
    todo = {}
    for key in sorted(results):
        if state[key]["warm"] is not None or results[key].get("retry", {}).get("round", rnd) < rnd:
            continue
        tried = results[key].get("warm_from")
        options = [(state[n]["record"]["total_dv_mps"], n) for n in _neighbours(key, n_rows, n_cols)
                   if state[n]["warm"] is not None and label(*n) != tried]
        if options:
            todo[key] = min(options)[1]
    return state, todo


def final(entry: dict) -> dict:
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
