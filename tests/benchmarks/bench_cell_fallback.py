"""Where a stalled trade cell ends: the figure behind ``FALLBACK_MAX_INFEASIBILITY``.

A trade cell is solved with a limited-memory Hessian from its verified neighbour's answer
(:mod:`optimizer.trade.cells`).  When that attempt reaches the iteration cap, an exact-Hessian
attempt goes on from where it stopped, but only if the stalled attempt ended near-feasible.  This
script solves, for a few rows of two grids, the cell next to a verified one and prints, per cell:
the limited-memory attempt's status, iterations and IPOPT's primal infeasibility at its last
iterate; then, for every stalled cell, what the exact attempt does from there (whatever the gate
says), and whether the gate lets it run.

Grids: the test grid of ``tests/test_trade.py`` (invented: a ballistic free return nudged by
+10 m/s 40 h before perilune; arrivals 0.25 d early, 0.05 d and 0.35 d late) and the invented
``problems/demo-trade.toml`` grid (its fourth arrival column is too early for the perilune range).
A gate is sound on these grids when every stalled cell the exact attempt verifies ended at or
below the threshold, and every stalled cell it cannot verify ended above it (so no feasible cell
is lost and no infeasible one costs a second cap).  Both grids are our own demos: the figure says
how the gate behaves on them, not on every problem.

Run: python tests/benchmarks/bench_cell_fallback.py [--demo-rows 0 5 11] [--test-rows 0 1]
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import tomllib


HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))  # tests/
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))  # the repository

DAY = 86400.0


def attempt(prob, warm, model, exact=False, cap=100):
    from optimizer import solve
    from optimizer.trade import cells

    opts = {**cells.CELL_IPOPT_OPTIONS, "ipopt.max_iter": cap}
    if exact:
        opts.pop("ipopt.hessian_approximation")
    t = time.perf_counter()
    plan = solve(prob, warm=cells.warm_stub(warm) if isinstance(warm, dict) else warm, model=model,
                 ipopt_options=opts)
    a = plan.solver["attempts"][-1]
    inf_pr = a.get("primal_infeasibility")
    print(f"  {prob.name:>12} {'exact' if exact else 'limited-memory':>14}: {plan.status:<10} "
          f"{a['iterations']:>4} it  last primal infeasibility {inf_pr:9.3g}  {time.perf_counter() - t:5.1f} s",
          flush=True)
    return plan, inf_pr


def demo_grid(rows):
    from optimizer import solve
    from optimizer.models import build_model
    from optimizer.problem_file import problem_from_dict
    from optimizer.solve.guess import model_span
    from optimizer.trade import cells, spec as tspec

    path = os.path.join(os.path.dirname(os.path.dirname(HERE)), "problems", "demo-trade.toml")
    with open(path, "rb") as f:
        data = tomllib.load(f)
    sp = data.pop("sweep")
    problem = problem_from_dict(data, source=path)
    s = tspec.parse_sweep_spec(sp, problem, path)
    ref = cells.reference_problem(problem)
    lo, hi = model_span(ref)
    model = build_model(problem.model, lo, hi + 2 * DAY)
    refplan = solve(ref, model=model)
    out = []
    for r in rows:
        tb = s.burn_epochs[r]
        tol = s.arrival_tolerance_s
        probs = {c: cells.cell_problem(problem, tb, (s.arrival_epochs[c] - tol, s.arrival_epochs[c] + tol), None, 0,
                                       name=f"demo r{r:02d}c{c:02d}") for c in (3, 4)}
        p4, _ = attempt(probs[4], refplan, model)
        if p4.verified:
            out.append((probs[3], p4, model))
    return out


def sweep_test_grid(rows):
    import test_trade as tt
    from optimizer import solve
    from optimizer.trade import cells

    t0 = tt.T0
    problem, model = tt.trade_case_problem()
    refplan = solve(problem, model=model)
    t_arr = refplan.event("entry").epoch
    out = []
    for r, tb in enumerate([t0 + 3600.0, t0 + 7 * 3600.0]):
        if r not in rows:
            continue
        probs = {c: cells.cell_problem(problem, tb, (t_arr + d * DAY,) * 2, None, 0, name=f"test r{r}c{c}")
                 for c, d in ((0, -0.25), (1, 0.05), (2, 0.35))}
        p1, _ = attempt(probs[1], refplan, model)
        if p1.verified:
            out += [(probs[0], p1, model), (probs[2], p1, model)]
    return out


def main():
    from optimizer.trade.cells import FALLBACK_MAX_INFEASIBILITY

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--demo-rows", type=int, nargs="*", default=[0, 5, 11])
    ap.add_argument("--test-rows", type=int, nargs="*", default=[0, 1])
    args = ap.parse_args()
    print(f"threshold FALLBACK_MAX_INFEASIBILITY = {FALLBACK_MAX_INFEASIBILITY:g}")
    print("neighbours (warm from the reference):")
    jobs = sweep_test_grid(args.test_rows) + demo_grid(args.demo_rows)
    print("cells (warm from the verified neighbour above):")
    stalled = []
    for prob, warm, model in jobs:
        plan, inf_pr = attempt(prob, warm, model)
        if not plan.verified and "Maximum_Iterations" in plan.reason:
            exact, _ = attempt(prob, plan, model, exact=True)
            stalled.append((prob.name, inf_pr, exact.verified))
    print("stalled cells: name, last primal infeasibility, exact attempt verified, gate lets it run")
    sound = True
    for name, inf_pr, ok in stalled:
        runs = inf_pr is None or inf_pr <= FALLBACK_MAX_INFEASIBILITY
        print(f"  {name:>12}  {inf_pr:9.3g}  {'yes' if ok else 'no ':>3}  {'yes' if runs else 'no'}")
        sound &= runs == ok
    print(f"gate {'SOUND' if sound else 'NOT SOUND'} on these cells (lost feasible or wasted exact attempts: "
          f"{sum(1 for _, p, ok in stalled if (p is None or p <= FALLBACK_MAX_INFEASIBILITY) != ok)})")


if __name__ == "__main__":
    main()
