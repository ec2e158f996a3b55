"""IPOPT on a transcription: options, the retries of a cold start, the per-thread solver cache.

``solve_nlp`` runs one NLP from a starting point (with the options of a cold or warm start) and
returns the library's solution and a plain record of the run; ``build_solver`` makes the CasADi
``nlpsol`` (compiled functions when :mod:`optimizer.compiled` has them); ``NLPCache`` keeps built
solvers by structure (:func:`structure_key`), one cache stack per thread.

May import: transcription, compiled, and the wing's ``base``.  Never ``guess``, ``primer`` or
``strategy``.
"""

from __future__ import annotations

import math
import threading
import time

import casadi as ca
import numpy as np

from .. import compiled
from ..transcription import Transcription, is_injection

IPOPT_OPTIONS = {
    "ipopt.print_level": 0,
    "print_time": False,
    "ipopt.sb": "yes",
    # a NaN at a line-search trial point (a step through a body's centre) is handled by IPOPT's
    # backtracking; CasADi's per-evaluation warning for it flooded sweep logs (3,745 lines in one
    # bench_trade.py run).  A real evaluation failure still ends the solve with its status.
    "show_eval_warnings": False,
    "ipopt.max_iter": 300,
    "ipopt.tol": 1e-9,
    "ipopt.constr_viol_tol": 1e-10,
    "ipopt.acceptable_tol": 1e-7,
    "ipopt.acceptable_constr_viol_tol": 1e-9,
    "ipopt.mu_strategy": "adaptive",
    "ipopt.nlp_scaling_method": "gradient-based",
    # At full weight the objective (Δv in units of 100 m/s) overrides the scaled constraints: from
    # a targeted guess IPOPT first drives the burn to ~0 and then wanders infeasible.  Lighter
    # weights tame the robustness cases that stall at full weight but slow the well-posed abort
    # case; 0.3 is the compromise kept (compared at 1, 0.3, 0.1 and 0.01 on the bench_abort.py case
    # and the bench_robustness.py cases; those scripts print the iteration counts).
    "ipopt.obj_scaling_factor": 0.3,
}
#: The first IPOPT attempt of a cold start (no multipliers, no Hessian named by the caller): a
#: limited-memory Hessian, whose iterations cost a fraction of an exact one's.  Measured on the
#: tuning half of tests/benchmarks/global_cases.py (33 cases, two at a time): with the
#: limited-memory Hessian in every attempt, median 5.9 -> 1.7 s and summed time 291 -> 127 s, but
#: one case (seed 0) lost; so the exact Hessian stays, as the first retry.
FIRST_PASS = {"ipopt.hessian_approximation": "limited-memory"}
#: A lighter objective weight: measured on the robustness set (bench_robustness.py), cases 14 and
#: 26 stall at the default weight and converge at 0.03.
LIGHTER_WEIGHT = {"ipopt.obj_scaling_factor": 0.03}
#: Cold starts that stall, or that IPOPT declares locally infeasible, are retried from the same
#: point (not a global-search start made after a verified plan: it only explores) with, in turn,
#: each of these settings that the caller's options do not name: the exact Hessian after the
#: limited-memory first pass, then the lighter objective weight.
RETRIES = (("the exact Hessian", {"ipopt.hessian_approximation": "exact"}),
           ("a lighter objective weight (0.03)", LIGHTER_WEIGHT))
WARM_OPTIONS = {
    # a warm start is near its optimum, with multipliers: the objective keeps its full weight
    # (measured: the shorter-return cell of tests/test_trade.py::test_duration_axis_is_a_relaxation
    # converges at 1 and stalls at the cold starts' 0.3 within the cell's iteration cap)
    "ipopt.obj_scaling_factor": 1.0,
    "ipopt.warm_start_init_point": "yes",
    "ipopt.warm_start_bound_push": 1e-9,
    "ipopt.warm_start_mult_bound_push": 1e-9,
    "ipopt.mu_init": 1e-6,
}


def structure_key(tr: Transcription) -> tuple:
    """What the NLP's expressions depend on (everything else of a problem is a bound): two
    transcriptions with the same key have the same functions and differ only in bounds and start."""
    pr = tr.problem
    inj = None if not is_injection(pr) else (pr.start.inclination_deg, pr.start.altitude_km)
    obj = pr.objective
    return (id(tr.model), tr.sc.t_ref, tuple(tr.steps), tr.segments,
            tuple((b.leg, b.direction) for b in pr.burns), inj, pr.arrival.target,
            pr.arrival.inclination_deg is not None, obj.kind,
            obj.mps_per_day if obj.kind == "weighted" else None)


def build_solver(tr: Transcription, opts: dict):
    """IPOPT on ``tr``'s NLP with the transcription's segment-wise exact derivatives (the Hessian
    only when IPOPT is to use it).  Measured on the ``bench_abort.py`` case: the same iterates as
    CasADi's own derivatives of the whole graph, constraint Jacobian ~2x cheaper to evaluate.

    The functions are compiled C when :mod:`optimizer.compiled` has (or, with
    ``SLINGBACK_COMPILE=wait``, builds) the library of this NLP, interpreted otherwise; the solver
    carries the record of which (``slingback_evaluation``), copied into each run's record."""
    exact = opts.get("ipopt.hessian_approximation", "exact") == "exact"
    fns, record = compiled.nlp_functions(tr, hessian=exact)
    if fns is not None:
        solver = ca.nlpsol("slingback", "ipopt", fns.pop("nlp"), {**opts, **compiled.NLPSOL_OPTIONS, **fns})
    else:
        solver = ca.nlpsol("slingback", "ipopt", tr.nlp, {**opts, **tr.derivative_functions(hessian=exact)})
    solver.slingback_evaluation = record  # read by solve_nlp into the attempt's record
    return solver


class NLPCache:
    """Built IPOPT solvers, reused by NLPs of the same structure (:func:`structure_key`) and options.

    Building a solver costs ~0.25 s (measured on the bench_abort.py case: most of it generating
    the segments' SX derivatives; ~0.7 s before they were assembled per segment), about a warm
    solve; trade-study cells, the zero-burn re-solve and repeated solves share one structure.
    Least recently used entries are dropped beyond ``size``; an entry holds its model, so the
    model's ``id`` in the key cannot be reused.
    """

    def __init__(self, size: int = 6):
        self.size = int(size)
        self._entries = {}  # key -> (model, solver)
        self.hits = self.misses = 0

    def solver(self, tr: Transcription, opts: dict):
        key = (structure_key(tr), tuple(sorted((k, repr(v)) for k, v in opts.items())))
        hit = self._entries.pop(key, None)
        if hit is not None and hit[0] is tr.model:
            self.hits += 1
            self._entries[key] = hit  # most recent last
            return hit[1]
        self.misses += 1
        solver = build_solver(tr, opts)
        self._entries[key] = (tr.model, solver)
        while len(self._entries) > self.size:
            self._entries.pop(next(iter(self._entries)))
        return solver


_LOCAL = threading.local()  # one cache stack per thread: a built solver is never shared by two threads


def active_caches() -> list:
    """This thread's cache stack; its bottom is the cache ``solve`` uses unless given another."""
    if not hasattr(_LOCAL, "stack"):
        _LOCAL.stack = [NLPCache()]
    return _LOCAL.stack


def solve_nlp(tr: Transcription, x0, lam=None, extra=None):
    opts = {**IPOPT_OPTIONS, **(WARM_OPTIONS if lam is not None else {}), **(extra or {})}
    cache = active_caches()[-1]
    t_build = time.perf_counter()
    solver = cache.solver(tr, opts) if cache else build_solver(tr, opts)
    t_build = time.perf_counter() - t_build
    args = dict(x0=x0, lbx=tr.lbx, ubx=tr.ubx, lbg=tr.lbg, ubg=tr.ubg)
    if lam is not None:
        args.update(lam_x0=lam[0], lam_g0=lam[1])
    t0 = time.perf_counter()
    sol = solver(**args)
    wall = time.perf_counter() - t0
    st = solver.stats()
    timing = {k[7:]: round(v, 4) for k, v in st.items() if k.startswith("t_wall_nlp_")}

    # IPOPT's primal infeasibility ("inf_pr" of its iteration log) at the last iterate: a stalled
    # attempt that ended near-feasible is worth continuing, one far from it not.  None when IPOPT
    # logged no iteration or a non-finite figure.
    trace = st.get("iterations", {}).get("inf_pr") or [math.nan]
    last = float(trace[-1])
    return sol, {"primal_infeasibility": last if math.isfinite(last) else None, "timing_s": timing,
                 "build_s": round(t_build, 4),
                 "evaluation": getattr(solver, "slingback_evaluation", None), "status": st["return_status"],
                 "success": bool(st["success"]), "iterations": int(st["iter_count"]),
                 "wall_s": wall, "objective": float(sol["f"])}


def constraint_violations(tr: Transcription, x, g) -> list[str]:
    """Names of the constraint families most violated at ``x`` (for infeasibility reports)."""
    g = np.asarray(g).ravel()
    viol = np.maximum(tr.lbg - g, 0.0) + np.maximum(g - tr.ubg, 0.0)
    worst = []
    for name, sl in tr.v.gindex.items():
        if sl.stop > sl.start and viol[sl].max() > 1e-6:
            worst.append((viol[sl].max(), name))
    return [f"{name} (scaled violation {val:.2e})" for val, name in sorted(worst, reverse=True)[:4]]
