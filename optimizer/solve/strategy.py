"""The solve chain: ``solve(problem) -> Plan``.

1. **Guess.**  The global layer (:mod:`optimizer.solve.search`) for cold solves from a state, the
   targeted coast (:mod:`optimizer.solve.guess`) as its fallback, the injection seed for a parking
   orbit start; a previous Plan can replace all of this (warm start).
2. **NLP.**  :class:`~optimizer.transcription.Transcription` on the problem's mesh, IPOPT with exact
   derivatives and its retries (:mod:`optimizer.solve.ipopt`).
3. **Verify.**  Re-propagate the burns with :mod:`optimizer.propagate` (nothing shared with the
   NLP but the physics) and compare.  If a tolerance is missed, the coasts whose segments disagree
   with the propagator get more integration steps and the NLP is re-solved from its last answer.
   A plan that still fails is returned as ``"unverified"`` with the reason, never as an optimum.
4. **Prune, stage, continue.**  Burns under :data:`PRUNE_MPS` are re-solved at zero; several burns
   are staged (each usable burn alone, unless its screen is far above a verified one, then the
   primer test of the others, :mod:`.primer`); model continuation solves cheaper models first.

The chain reads top to bottom and never calls :func:`solve` again: ``solve`` -> ``_design``
(continuation, the staged solve of several burns, or one layout) -> ``_one_layout`` (warm point,
along-velocity injection first, global search, targeted guess) -> ``_solve_loop`` (NLP, retries,
verification, refinement) -> ``_prune``.  Every step returns :class:`Solved`: the plan and the
transcription its warm-start point belongs to (the staged solve's primer test needs both).

May import everything below the wing (constants, problem, models, propagate, verify, plan,
transcription, compiled) and the wing's other modules.  Never the file formats, the trade engine,
export or the CLI.
"""

from __future__ import annotations

import time
from dataclasses import replace
from typing import Callable, NamedTuple

import casadi as ca
import numpy as np

from .. import __version__
from ..models import build_model
from ..plan import Burn, Plan
from ..problem import Problem
from ..propagate import propagate
from ..transcription import Transcription, is_injection
from ..verify import arrival_record, make_burn, perilune_record, verify
from .base import SolveError, held_burns, usable_burns
from .guess import initial_guess, model_span, path_guess, relayout
from .ipopt import FIRST_PASS, LIGHTER_WEIGHT, RETRIES, active_caches, constraint_violations, solve_nlp
from .primer import PRIMER_TOL, RELEASE_MPS, primer_scan, release_candidates
from .search import SKIP_MPS, SKIP_RATIO, global_solve, screened, search_summary, start_workers

#: Local disagreement (km) between an NLP segment and the propagator above which a coast is refined.
SEGMENT_TOL_KM = 1e-3
#: Burns below this size (m/s) after a verified solve are tried at exactly zero.
PRUNE_MPS = 0.1
#: IPOPT iteration cap of a global-search start made after a verified plan is in hand (it only
#: looks for a cheaper basin), and such a start is not retried with other settings.  Measured on
#: the tuning half of tests/benchmarks/global_cases.py (33 cases): no start after the first ever
#: gave the chosen plan; those starts took 131-300 iterations (and up to 52 s with the retries of
#: one that failed), while every first start that verified took at most 173.
EXPLORE_MAX_ITER = 150


class _Run(NamedTuple):
    """What every step of one solve shares: where progress lines go, the caller's extra IPOPT
    options, the form of the problem a plan carries, and whether a stalled cold start is retried
    with other IPOPT settings (:data:`optimizer.solve.ipopt.RETRIES`)."""

    say: Callable[[str], None]
    ipopt_options: dict | None
    problem_table: Callable[[Problem], dict]
    retries: bool = True


class Solved(NamedTuple):
    """What each step of the chain returns: the plan, and the transcription whose variables its
    warm-start point (``plan.warm["x"]``) holds, for the primer test of a staged solve."""

    plan: Plan
    transcription: Transcription | None


def solve(problem: Problem, *, warm: Plan | None = None, progress=None, model=None,
          ipopt_options: dict | None = None, cache=None, problem_table=None) -> Plan:
    """Minimum-Δv (or other objective) free return for ``problem``, verified independently.

    Parameters
    ----------
    problem : Problem
    warm : Plan, optional
        A previous plan of a problem with the same layout; its variables start the NLP.
    progress : callable(str), optional
        Receives one line per stage.
    model : ForceModel, optional
        Prebuilt model (must cover the problem's span); built from ``problem.model`` otherwise.
    ipopt_options : dict, optional
        Extra CasADi/IPOPT options (e.g. ``{"ipopt.print_level": 5}`` to watch the iterations).
        A global-search start made after a verified plan is capped at :data:`EXPLORE_MAX_ITER`
        iterations (or the given ``ipopt.max_iter`` if smaller), its refinements and pruning too.
    cache : NLPCache or False, optional
        Built solvers to reuse (default: one cache per thread, kept between calls); ``False``
        builds every solver afresh.
    problem_table : callable(Problem) -> dict, optional
        The form of the problem each plan carries (``plan.problem``).  The layers above pass the
        problem file's table form (:func:`optimizer.problem_file.problem_to_dict`; the library's
        ``optimizer.solve`` does); the wing itself never imports the file layer, so by default
        it stores :meth:`Problem.to_dict`.

    Returns
    -------
    Plan
        ``status`` is ``"verified"``, ``"unverified"``, ``"infeasible"`` or ``"failed"``.
    """
    return solve_with_transcription(problem, warm=warm, progress=progress, model=model,
                                    ipopt_options=ipopt_options, cache=cache, problem_table=problem_table).plan


def solve_with_transcription(problem: Problem, *, warm: Plan | None = None, progress=None, model=None,
                             ipopt_options: dict | None = None, cache=None, problem_table=None) -> Solved:
    """:func:`solve`, returning the plan with the transcription its warm-start point belongs to."""
    run = _Run(progress or (lambda msg: None), ipopt_options, problem_table or Problem.to_dict)
    if cache is None:
        return _design(problem, warm, model, run)
    stack = active_caches()
    stack.append(cache)
    try:
        return _design(problem, warm, model, run)
    finally:
        stack.pop()


# -- the chain: each step returns Solved, none re-enters solve() ----------------------------------
def _design(problem, warm, model, run) -> Solved:
    """The whole strategy: model continuation when asked (cold only), the staged solve of several
    burns (cold only), else one solve of the whole layout (:func:`_one_layout`)."""
    t_start = time.perf_counter()
    stages = []
    if problem.model.continuation and warm is None and model is None:
        if held_burns(problem):
            # staged first, each stage with its own continuation: continuing the whole layout
            # from a cheaper model's plan carries its zero held burns, a degenerate start
            # (measured on problems/demo-injection.toml: the ephemeris stage then runs into the
            # iteration cap and needs retries; the one-burn layout's own continuation needs far
            # fewer iterations)
            model = build_model(problem.model, *model_span(problem))
            return _staged(problem, model, run, stages, t_start, continued=True)
        warm, stages = _continuation(problem, run)
    if model is None:
        model = build_model(problem.model, *model_span(problem))
    if warm is None and held_burns(problem):
        return _staged(problem, model, run, stages, t_start)
    return _one_layout(problem, model, warm, run, stages, t_start)


def _whole_layout(problem, model, run) -> Solved:
    """A cold solve of every burn of ``problem`` together, never staged (a stage of
    :func:`_staged`, or its fallback); with model continuation when the problem asks for it and no
    model is given."""
    t_start = time.perf_counter()
    warm, stages = None, []
    if problem.model.continuation and model is None:
        warm, stages = _continuation(problem, run)
    if model is None:
        model = build_model(problem.model, *model_span(problem))
    return _one_layout(problem, model, warm, run, stages, t_start)


def _one_layout(problem, model, warm, run, stages, t_start) -> Solved:
    """One layout from one starting point: the warm plan's variables; for a free-direction
    injection, the answer with the injection along the velocity; for a cold start from a state,
    the global layer's starts and then the targeted guess.  Then :func:`_solve_loop`."""
    steps = [problem.mesh.steps] * (len(problem.burns) + 2)
    lam = None
    if warm is not None and warm.warm.get("x") and warm.warm.get("segments") == problem.mesh.segments \
            and len(warm.warm.get("steps", [])) == len(steps):
        steps = list(warm.warm["steps"])
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        x0 = np.asarray(warm.warm["x"], dtype=float)
        if x0.size != tr.x0.size:
            raise SolveError("the warm-start plan does not match this problem's layout")
        if warm.model.get("name") == problem.model.kind and len(warm.warm.get("lam_x", [])) == x0.size:
            # same physics: multipliers carry over too
            lam = (np.asarray(warm.warm["lam_x"]), np.asarray(warm.warm["lam_g"]))
        run.say("warm start from the given plan" + ("" if lam is not None else " (primal point only)"))
    elif is_injection(problem) and problem.burns[0].direction == "free":
        # A free-direction injection is started from the same design with the injection along the
        # velocity (measured: IPOPT diverges from the raw seed, converges from this point).
        along = replace(problem, burns=(replace(problem.burns[0], direction="along"),) + problem.burns[1:])
        run.say("free-direction injection: solving with the injection along the velocity first")
        first_solved = _design(along, None, model, run)
        first = first_solved.plan
        if first.status not in ("verified", "unverified"):
            return first_solved
        stages = [{"model": problem.model.kind, "status": first.status, "stage": "injection along velocity",
                   "iterations": first.solver.get("iterations"), "total_dv_mps": first.total_dv_mps}]
        steps = list(first.warm["steps"])
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        x0 = relayout(Transcription(along, model, steps, problem.mesh.segments), first.warm["x"], tr)
    else:
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        searched = record = None
        if not is_injection(problem) and problem.objective.kind in ("min-dv", "weighted"):
            searched, record = _global_search(problem, model, tr, run, stages, t_start)
            if searched is not None and searched.plan.verified:
                return searched
            run.say("search: no start gave a verified plan; falling back on the targeted guess")
        run.say("initial guess: targeted coast")
        try:
            states, dvs, slens, start = initial_guess(problem, model, tr)
        except SolveError as exc:
            if searched is not None:
                return Solved(_with_search_reason(searched.plan, record), searched.transcription)
            if record is not None:
                raise SolveError(f"{exc}; {search_summary(record)}") from None
            raise
        x0 = tr.guess_vector(states, dvs, slens, start)
        solved = _solve_loop(problem, model, tr, x0, lam, run, stages, t_start)
        if searched is not None or record is not None:
            solved.plan.solver["search"] = {**(record or {}), "fallback": solved.plan.status}
            _with_search_reason(solved.plan, record)
        return solved
    return _solve_loop(problem, model, tr, x0, lam, run, stages, t_start)


def _staged(problem, model, run, stages, t_start, continued=False) -> Solved:
    """Several burns, cold: solve with one burn alone, test the others (held at zero) with the
    primer vector, then give the whole layout's answer.

    1. The problem with each usable burn alone is solved and verified, the cheapest verified one
       going on (all burns together if none verifies).  A burn alone whose cheapest screened seed
       costs over ``SKIP_RATIO`` x the cheapest verified plan so far + ``SKIP_MPS`` is not solved.
    2. :func:`primer_scan` on its multipliers: if no node of a held burn's window has |p| > 1, the
       answer without it is a KKT point of the whole problem.  The held burn is then returned at
       zero at its node of largest |p| (the same path, so the same verification), with a primal
       warm-start point of the whole layout (a zero burn with a free epoch is a degenerate
       direction of the NLP, its cut can slide: so the whole layout is not re-solved).
    3. Otherwise a cheaper path uses a held burn: the whole problem is solved from the targeted
       guess and, if that does not give a cheaper verified plan, from the answer of step 1 with the
       held burn of largest |p| released at that node along the primer.  The cheapest verified
       whole-layout plan is returned (the answer of step 1 with zero held burns if nothing beats it).

    Measured on the robustness set (``bench_robustness.py``): solving two burns together from a
    cold start stalls in most layouts whose second burn is not needed.

    ``continued``: the problem asks for model continuation; each stage's solve runs its own
    (``model`` is then the final model, used for the held burns' zero-burn path).
    """
    own = None if continued else model  # the model each stage's solve is given
    usable = usable_burns(problem)
    alone_plans = []  # (plan, its transcription, held burns, kept burns, the burn alone)
    for alone in usable:  # each usable burn alone; the cheapest verified one goes on
        held = [j for j in usable if j != alone]
        kept = [j for j in range(len(problem.burns)) if j not in held]
        reduced = replace(problem, burns=tuple(problem.burns[j] for j in kept))
        if alone_plans:
            best = min(a[0].total_dv_mps for a in alone_plans)
            cheapest = _cheapest_screened(reduced, model if own is None else own)
            if cheapest is None:
                run.say(f"burn {alone + 1} alone: no screened seed meets the ranges within its cap; not solved")
                continue
            if cheapest > SKIP_RATIO * best + SKIP_MPS:
                # the rule of the global layer's starts (search.SKIP_RATIO); the primer test on the
                # cheapest plan below still asks whether this burn, added to it, would lower the cost
                run.say(f"burn {alone + 1} alone: cheapest screened seed {cheapest:.3f} m/s, over "
                        f"{SKIP_RATIO:g} x the verified {best:.3f} m/s + {SKIP_MPS:g}; not solved")
                continue
        run.say(f"several burns: solving with burn {alone + 1} alone "
            f"(burn(s) {', '.join(str(j + 1) for j in held)} held at zero)")
        plan, tr1 = _whole_layout(reduced, own, run)
        run.say(f"burn {alone + 1} alone: {plan.status}, {plan.total_dv_mps:.4f} m/s")
        if plan.status == "verified" and tr1 is not None:
            alone_plans.append((plan, tr1, held, kept, alone))
    if not alone_plans:
        run.say("no burn alone gives a verified plan; solving all burns together")
        return _whole_layout(problem, own, run)
    first, tr1, held, kept, alone = min(alone_plans, key=lambda a: a[0].total_dv_mps)
    alone_record = [{"burn": a[4] + 1, "total_dv_mps": a[0].total_dv_mps} for a in alone_plans]
    scan = primer_scan(tr1, first.warm["x"], first.warm["lam_g"])
    epochs = {j: first.burns[i].epoch for i, j in enumerate(kept)}
    t_peri = first.events[0].epoch
    picks = {j: release_candidates(problem, epochs, t_peri, scan, j) for j in held}
    record = {"held_burns": [j + 1 for j in held], "tolerance": PRIMER_TOL, "each_burn_alone": alone_record,
              "max_primer": {str(j + 1): (None if c is None else round(c[1], 6)) for j, c in picks.items()},
              "without_held_dv_mps": first.total_dv_mps}
    start = {k: float(first.warm["x"][tr1.v.index[k].start]) for k in ("tau_injection", "raan", "arg_latitude")
             if k in tr1.v.index}
    burns = [None] * len(problem.burns)
    for i, j in enumerate(kept):
        burns[j] = (first.burns[i].epoch, np.asarray(first.burns[i].dv, dtype=float))
    for j in held:  # a zero burn at its node of largest |p| (window middle when no node fits)
        lo, hi = problem.burns[j].window
        burns[j] = (picks[j][0] if picks[j] is not None else 0.5 * (lo + hi), np.zeros(3))
    steps = [max(first.warm["steps"])] * (len(problem.burns) + 2)  # the answer's finest mesh, every coast

    helpful = {j: c for j, c in picks.items() if c is not None and c[1] > 1.0 + PRIMER_TOL}
    candidates, direct = [], None
    if helpful:
        j, (t_rel, p_max, direction) = max(helpful.items(), key=lambda kv: kv[1][1])
        run.say(f"primer test: |p| = {p_max:.4f} > 1 for burn {j + 1} at {t_rel - first.start_epoch:.0f} s from "
            "the start: a cheaper path uses it; solving all burns together")
        # measured: from the targeted cold guess the whole problem converges where a small burn
        # released along the primer from the one-burn answer stalls (|p| = 19 case of test_primer)
        direct = _whole_layout(problem, own, run)
        if direct.plan.verified and direct.plan.total_dv_mps < first.total_dv_mps:
            direct.plan.solver["primer"] = {**record, "result": f"|p| = {p_max:.4f} > 1 for burn {j + 1}; "
                                            "solved all burns together"}
            candidates.append(direct)
        else:
            run.say(f"that solve ended {direct.plan.status}; releasing burn {j + 1} at the primer's peak instead")
            trial = list(burns)
            trial[j] = (t_rel, direction * RELEASE_MPS / 1000.0)
            released = None
            try:
                tr = Transcription(problem, model, steps, problem.mesh.segments)
                x0 = path_guess(problem, model, tr, first.start_epoch, first.start_state, trial, start)
                released = _solve_loop(problem, model, tr, x0, None, run, stages, t_start)
            except SolveError as exc:
                run.say(f"release: no starting point ({exc})")
            if released is not None and released.plan.verified and released.plan.total_dv_mps < first.total_dv_mps:
                released.plan.solver["primer"] = {**record, "result": f"burn {j + 1} released at |p| = {p_max:.4f}"}
                candidates.append(released)
    else:
        run.say("primer test: no held burn can lower the cost (max |p| "
            f"{max((c[1] for c in picks.values() if c is not None), default=0.0):.4f} <= 1)")
    if not candidates or candidates[0].plan.total_dv_mps > first.total_dv_mps:
        note = ("held burns proved useless (|p| <= 1 + tol in their windows)" if not helpful else
                "|p| > 1 for a held burn, but neither the whole solve nor the release was cheaper; held "
                "burn(s) kept at zero (a cheaper path may exist)")
        zero = _with_zero_burns(problem, model, first, burns, kept, steps, start, run)
        if zero is not None:
            zero.plan.solver["primer"] = {**record, "result": note}
            candidates.append(zero)
    if not candidates:
        if direct is not None:  # the whole problem was solved already (above)
            return direct
        run.say("the staged solve did not give a verified whole-layout plan; solving all burns together")
        return _whole_layout(problem, own, run)
    best = min(candidates, key=lambda c: c.plan.total_dv_mps)
    best.plan.solver["stages"] = list(best.plan.solver.get("stages", [])) + [
        {"stage": "without the held burns", "status": first.status, "total_dv_mps": first.total_dv_mps,
         "iterations": first.solver.get("iterations")}]
    return best


def _continuation(problem, run):
    """Solve the problem in each cheaper model of ``problem.model.continuation`` in turn, each
    warm-starting the next; returns (the last usable plan or None, a record per stage)."""
    plan, stages = None, []
    for kind in problem.model.continuation:
        sub = replace(problem, model=replace(problem.model, kind=kind, continuation=()))
        run.say(f"continuation: solving in the {kind} model first")
        trial = _design(sub, plan, None, run).plan
        stages.append({"model": kind, "status": trial.status, "iterations": trial.solver.get("iterations"),
                       "wall_s": trial.solver.get("wall_s"), "total_dv_mps": trial.total_dv_mps})
        if trial.status in ("verified", "unverified"):
            plan = trial
    return plan, stages


def _global_search(problem, model, tr, run, stages, t_start):
    """The global layer (:mod:`optimizer.solve.search`): screened seeds over every burn window, the most
    promising solved from their own paths, at once where each can have cores of its own and
    forking is sound (:func:`~optimizer.solve.search.start_workers`).  Returns (the cheapest verified plan, else
    the last plan tried, else None, with its transcription; the search record), the record also
    under ``plan.solver["search"]``."""
    st = problem.start
    tried = []

    def solve_from(burns, explore=False, uphill=False, say=None):
        x0 = path_guess(problem, model, tr, st.epoch, np.asarray(st.state, dtype=float), burns)
        run_here = run if say is None else run._replace(say=say)
        if explore:  # a verified plan is in hand: this start only looks for a cheaper basin
            cap = min(EXPLORE_MAX_ITER, (run.ipopt_options or {}).get("ipopt.max_iter", EXPLORE_MAX_ITER))
            run_here = run_here._replace(ipopt_options={**(run.ipopt_options or {}), "ipopt.max_iter": cap},
                                         retries=False)
        if uphill:  # a lighter objective weight from the same start
            run_here = run_here._replace(ipopt_options={**(run_here.ipopt_options or {}), **LIGHTER_WEIGHT})
        solved = _solve_loop(problem, model, tr, x0, None, run_here, stages, t_start)
        tried.append(solved)
        return solved.plan

    best, record, last = global_solve(problem, model, solve_from, run.say, workers=start_workers(tr.threads))
    plan = best if best is not None else last
    if plan is None:
        return None, record
    # a start made in another process left no transcription here: the same one is built again
    found = next((t for t in tried if t.plan is plan), None) or Solved(plan, _transcription_of(problem, model, plan))
    found.plan.solver["search"] = record
    return found, record


def _transcription_of(problem, model, plan) -> Transcription:
    """The transcription ``plan``'s warm-start point belongs to: the problem's own on the plan's
    mesh, or that of the problem with its pruned burns fixed at zero (:func:`_prune`)."""
    fixed = {int(j) - 1: float(t) for j, t in plan.solver.get("zeroed_epochs_tdb_s", {}).items()}
    return Transcription(_zeroed(problem, fixed) if fixed else problem, model,
                         list(plan.warm["steps"]), plan.warm["segments"])


def _with_search_reason(plan, record):
    """An unverified answer's reason also says what the global search tried and why it failed."""
    if not plan.verified and record is not None:
        plan.reason = f"{plan.reason}; {search_summary(record)}" if plan.reason else search_summary(record)
    return plan


# -- one starting point: NLP, verification, refinement, pruning -----------------------------------
def _solve_loop(problem, model, tr, x0, lam, run, stages, t_start) -> Solved:
    """NLP, verification and per-coast refinement from the starting point ``x0`` of ``tr``; a
    verified plan is then pruned (:func:`_prune`)."""
    log = []
    for attempt in range(problem.mesh.max_refinements + 1):
        run.say(f"NLP: {tr.v.n} variables, {tr.v.ng} constraints, steps per coast {tr.steps}")
        # a cold start is solved first with the limited-memory Hessian (FIRST_PASS); RETRIES
        # follow it (the exact Hessian first)
        cold = lam is None and "ipopt.hessian_approximation" not in (run.ipopt_options or {})
        sol, rec = solve_nlp(tr, x0, lam, {**(run.ipopt_options or {}), **(FIRST_PASS if cold else {})})
        if cold:
            rec["first_pass"] = "limited-memory Hessian"
        rec["build_and_solve_s"] = time.perf_counter() - t_start
        log.append(rec)
        tried = [(sol, rec)]
        for label, retry in RETRIES:
            # A cold start that stalls, or that IPOPT declares locally infeasible, is retried: the
            # verdict is about the iterates' neighbourhood.  Measured: the return-trim-only case
            # of tests/test_primer.py is "infeasible" at weight 0.3 and 1, solved at 0.1 and 0.03.
            if rec["success"] or lam is not None or not run.retries:
                break
            if set(retry) & set(run.ipopt_options or {}):  # the caller chose this setting
                continue
            run.say(f"IPOPT: {rec['status']} after {rec['iterations']} iterations; retrying with {label}")
            sol, rec = solve_nlp(tr, x0, None, {**(run.ipopt_options or {}), **retry})
            rec["retry"] = label
            rec["build_and_solve_s"] = time.perf_counter() - t_start
            log.append(rec)
            tried.append((sol, rec))
        if not rec["success"]:  # none converged: report the first infeasibility verdict, if any
            sol, rec = next((t for t in tried if "Infeasible" in t[1]["status"]), tried[-1])
        x = np.asarray(sol["x"]).ravel()
        lam = (np.asarray(sol["lam_x"]).ravel(), np.asarray(sol["lam_g"]).ravel())
        unpacked = tr.unpack(x)
        run.say(f"IPOPT: {rec['status']} after {rec['iterations']} iterations ({rec['wall_s']:.2f} s)")
        if not rec["success"]:
            why = constraint_violations(tr, x, sol["g"])
            status = "infeasible" if "Infeasible" in rec["status"] else "failed"
            reason = f"IPOPT stopped with {rec['status']}"
            if len(tried) > 1:
                reason += " (retried with " + "; ".join(f"{t[1]['retry']}: {t[1]['status']}" for t in tried[1:]) + ")"
            if why:
                reason += "; largest constraint violations at the last iterate: " + ", ".join(why)
            return Solved(_plan(problem, model, tr, unpacked, status, reason, None, log, x, lam, stages, run), tr)
        claimed = _claimed_events(tr, model, unpacked)
        burns = [make_burn(t, dv, pre) for t, dv, pre in unpacked["burns"]]
        start = unpacked["start"]
        ver = verify(model, problem, start[6], start[:6], burns, claimed, claimed[-1].epoch + 3600.0)
        log[-1]["verify_s"] = time.perf_counter() - t_start - rec["build_and_solve_s"]
        if ver.passed:
            run.say(f"verified: total Δv {sum(b.dv_mps for b in burns):.3f} m/s")
            log[-1]["end_to_end_s"] = time.perf_counter() - t_start
            plan = _plan(problem, model, tr, unpacked, "verified", "", ver, log, x, lam, stages, run)
            return _prune(problem, Solved(plan, tr), model, run)
        run.say("verification failed: " + "; ".join(ver.violations))
        if attempt == problem.mesh.max_refinements:
            break
        errs = _segment_errors(tr, model, unpacked)
        new_steps = [m * 2 if e > SEGMENT_TOL_KM else m for m, e in zip(tr.steps, errs)]
        if new_steps == tr.steps:
            new_steps = [m * 2 for m in tr.steps]
        run.say(f"refining coasts (segment disagreement {', '.join(f'{e:.2g}' for e in errs)} km)")
        tr = Transcription(problem, model, new_steps, problem.mesh.segments)
        x0 = x
    reason = "the re-propagated path disagrees with the optimiser: " + "; ".join(ver.violations)
    return Solved(_plan(problem, model, tr, unpacked, "unverified", reason, ver, log, x, lam, stages, run), tr)


def _prune(problem, solved: Solved, model, run) -> Solved:
    """Re-solve with near-zero burns switched off; keep that plan when it is verified and cheaper.

    A burn whose optimum is zero is a degenerate point of the cone ``sigma^2 >= |dv|^2``: IPOPT
    tends to stop with a few cm/s left in it (measured on the demo abort: 1 cm/s in an optional
    return trim, 0.15 % above the one-burn optimum).  Fixing those burns at zero removes the
    degeneracy; the warm start makes it cheap.
    """
    plan = solved.plan
    small = [j for j, b in enumerate(plan.burns) if b.dv_mps < PRUNE_MPS and problem.burns[j].max_dv_mps > 0]
    if not small:
        return solved
    # the epoch of a zero burn is fixed where it is: free, its cut could slide (a degenerate direction)
    fixed = {j: plan.burns[j].epoch for j in small}
    zeroed = _zeroed(problem, fixed)
    run.say(f"re-solving with burn(s) {', '.join(str(j + 1) for j in small)} (under {PRUNE_MPS} m/s) fixed at zero")
    trial = _design(zeroed, plan, model, run)
    if not (trial.plan.verified and trial.plan.total_dv_mps < plan.total_dv_mps):
        return solved
    trial.plan.problem = run.problem_table(problem)
    # a pruned re-solve may prune again: both sets of burns stay fixed, at the epochs they were
    # fixed at (the problem of the answer's transcription, rebuilt from them by _transcription_of)
    fixed.update({int(j) - 1: t for j, t in trial.plan.solver.get("zeroed_epochs_tdb_s", {}).items()})
    trial.plan.solver["zeroed_burns"] = sorted(j + 1 for j in fixed)
    trial.plan.solver["zeroed_epochs_tdb_s"] = {str(j + 1): fixed[j] for j in sorted(fixed)}
    trial.plan.solver["attempts"] = plan.solver["attempts"] + trial.plan.solver["attempts"]
    return trial


# -- helpers of the chain -------------------------------------------------------------------------
def _zeroed(problem, fixed: dict):
    """``problem`` with the burns of ``fixed`` {index: epoch} fixed at zero at those epochs."""
    return replace(problem, burns=tuple(replace(b, max_dv_mps=0.0, window=(fixed[j],) * 2)
                                       if j in fixed else b for j, b in enumerate(problem.burns)))


def _cheapest_screened(problem, model) -> float | None:
    """Δv (m/s) of the cheapest seed of ``problem`` the global layer's screen finds inside its
    caps, None when there is none, 0 for a parking-orbit start (not screened: always solved).  The
    screen is remembered, so the solve that follows does not repeat it."""
    if is_injection(problem):  # the search screens state starts only
        return 0.0
    model = model or build_model(problem.model, *model_span(problem))
    seeds, _ = screened(problem, model)
    return min((s.dv_mps for s in seeds if s.dv is not None), default=None)


def _with_zero_burns(problem, model, first, burns, kept, steps, start, run):
    """The verified plan ``first`` of the problem without the held burns, as a plan of the whole
    ``problem``: the held burns at zero at their chosen epochs (the path, and so its verification,
    is the same), and a primal warm-start point of the whole layout (of the transcription returned
    with it).  None when the path cannot be cut into the whole layout's coasts."""
    from copy import copy

    try:
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        x = path_guess(problem, model, tr, first.start_epoch, first.start_state, burns, start)
    except SolveError:
        return None
    plan = copy(first)
    plan.burns = [first.burns[kept.index(j)] if j in kept else Burn(float(burns[j][0]), (0.0,) * 3, (0.0,) * 3)
                  for j in range(len(problem.burns))]
    plan.problem = run.problem_table(problem)
    plan.solver = dict(first.solver)
    plan.warm = {"x": list(map(float, x)), "lam_x": [], "lam_g": [], "segments": tr.segments, "steps": tr.steps}
    return Solved(plan, tr)


def _segment_errors(tr: Transcription, model, unpacked) -> list[float]:
    """Largest local disagreement (km) per coast between the NLP nodes and the propagator."""
    errs = []
    for zs in unpacked["phases"]:
        worst = 0.0
        for k in range(zs.shape[1] - 1):
            if zs[6, k + 1] - zs[6, k] <= 1e-6:
                continue
            arc = propagate(model, zs[6, k], zs[:6, k], zs[6, k + 1])
            worst = max(worst, float(np.linalg.norm(arc.y[:3, -1] - zs[:3, k + 1])))
        errs.append(worst)
    return errs


def _claimed_events(tr, model, unpacked):
    zp = unpacked["phases"][tr.perilune_phase][:, -1]
    za = unpacked["phases"][-1][:, -1]
    name = "entry" if tr.problem.arrival.target == "entry" else "perigee"
    return [perilune_record(zp[6], zp[:6], model), arrival_record(name, za[6], za[:6], model)]


def _plan(problem, model, tr, unpacked, status, reason, verification, solver_log, x, lam, stages, run):
    burns = [make_burn(t, dv, pre) for t, dv, pre in unpacked["burns"]]
    nodes = np.hstack([zs if i == 0 else zs[:, 1:] for i, zs in enumerate(unpacked["phases"])])
    return Plan(
        name=problem.name, status=status, reason=reason, model=model.describe(),
        start_epoch=float(unpacked["start"][6]), start_state=tuple(map(float, unpacked["start"][:6])), burns=burns,
        events=_claimed_events(tr, model, unpacked), trajectory_t=nodes[6].copy(), trajectory_y=nodes[:6].T.copy(),
        verification=verification,
        solver={**solver_log[-1], "continuation": list(stages),
                "software": f"slingback {__version__}, CasADi {ca.__version__}, IPOPT",
                "mesh": {"segments": tr.segments, "steps": tr.steps}, "attempts": solver_log},
        problem=run.problem_table(problem),
        warm={"x": list(map(float, x)), "lam_x": list(map(float, lam[0])), "lam_g": list(map(float, lam[1])),
              "segments": tr.segments, "steps": tr.steps},
    )
