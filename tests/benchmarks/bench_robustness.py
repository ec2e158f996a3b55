"""Robustness: how many perturbed abort cases converge and verify from a cold start.

Invented variants around the ballistic free return of ``bench_abort.py`` (perilune 150 km at
2027-05-13 12:00 TDB): the spacecraft is picked up on it 60 to 16 h before perilune with a
velocity error of 2 to 20 m/s (along, against, radial, normal to the velocity, or a random
direction), and must be brought back to a perilune range and an entry flight-path window
(variants around the common-practice -7.0 to -5.5 degrees at 121.92 km) with one or two burns
(two outbound, or one outbound and one on the return leg), each at most 300 m/s.  The variants
are drawn from a fixed seed, so every run solves the same list.

Each case gets a modest budget: IPOPT at most ``--max-iter`` iterations and ``--max-wall`` seconds
(the solver's own mesh refinements may add attempts).  A case counts as a success only when the
plan is ``verified`` (the independent re-propagation agrees).  Goal: >= 95 %.

Run: python tests/benchmarks/bench_robustness.py [--cases N] [--max-iter K] [--max-wall S]
     [--hessian default|exact|limited-memory] [--csv FILE]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np
import pandas as pd

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))  # tests/
sys.path.insert(0, HERE)

from bench_abort import HOUR, T_PERILUNE, scenario_model  # noqa: E402
import free_return_fixture as fr  # noqa: E402
from optimizer import solve  # noqa: E402
from optimizer.problem import BurnSpec, LunarPass, Problem, ReturnSpec, StateStart  # noqa: E402
from optimizer.propagate import propagate  # noqa: E402

SEED = 20270513
OFFSETS_H = (60.0, 48.0, 40.0, 30.0, 20.0, 16.0)  # start, hours before the natural perilune
SIZES = (2.0, 5.0, 10.0, 20.0)  # m/s
DIRECTIONS = ("along", "against", "radial", "normal", "random")
LUNAR = ((100.0, 5000.0), (100.0, 2000.0), (300.0, 8000.0))
FPA = ((-7.0, -5.5), (-6.8, -5.8), (-7.5, -5.0))
LAYOUTS = ("1", "1", "2-out", "out+ret")  # one burn twice as often as each two-burn layout


def unit(y, kind, rng):
    r, v = y[:3], y[3:]
    if kind == "along":
        u = v
    elif kind == "against":
        u = -v
    elif kind == "radial":
        u = r
    elif kind == "normal":
        u = np.cross(r, v)
    else:
        u = rng.normal(size=3)
    return u / np.linalg.norm(u)


def variants(n, rng):
    rows = []
    for i in range(n):
        rows.append(dict(case=i, start_h=float(rng.choice(OFFSETS_H)), nudge_mps=float(rng.choice(SIZES)),
                         direction=str(rng.choice(DIRECTIONS)), lunar=LUNAR[rng.integers(len(LUNAR))],
                         fpa=FPA[rng.integers(len(FPA))], layout=str(rng.choice(LAYOUTS))))
    return rows


def burns_for(layout, t0, t_peri):
    first = BurnSpec((t0 + 1 * HOUR, t0 + min(12.0, 0.3 * (t_peri - t0) / HOUR) * HOUR), 300.0)
    if layout == "1":
        return (first,)
    if layout == "2-out":
        return (first, BurnSpec((first.window[1] + 2 * HOUR, t_peri - 4 * HOUR), 300.0))
    return (first, BurnSpec((t_peri + 6 * HOUR, t_peri + 48 * HOUR), 300.0, leg="return"))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--cases", type=int, default=36)
    ap.add_argument("--max-iter", type=int, default=200)
    ap.add_argument("--max-wall", type=float, default=30.0)
    ap.add_argument("--hessian", default="default", choices=("default", "exact", "limited-memory"),
                    help="default: the solver's own chain (a cold start's limited-memory first pass, the "
                         "exact Hessian its retry); naming one switches that chain off")
    ap.add_argument("--csv", help="also write the table here")
    args = ap.parse_args(argv)

    model = scenario_model()
    y_peri, _, _ = fr.build(model, T_PERILUNE)
    opts = {"ipopt.max_iter": args.max_iter, "ipopt.max_wall_time": args.max_wall}
    if args.hessian != "default":  # naming the Hessian switches off the solver's own first pass and retry
        opts["ipopt.hessian_approximation"] = args.hessian
    rng = np.random.default_rng(SEED)
    table = []
    print(f"{args.cases} cases, IPOPT budget {args.max_iter} iterations / {args.max_wall:.0f} s, "
          f"Hessian {args.hessian}; load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    for row in variants(args.cases, rng):
        t0 = T_PERILUNE - row["start_h"] * HOUR
        y0 = propagate(model, T_PERILUNE, y_peri, t0).y[:, -1].copy()
        y0[3:] += row["nudge_mps"] * 1e-3 * unit(y0, row["direction"], rng)
        prob = Problem(name=f"case{row['case']}", start=StateStart(t0, tuple(y0)),
                       burns=burns_for(row["layout"], t0, T_PERILUNE), lunar=LunarPass(row["lunar"]),
                       arrival=ReturnSpec(flight_path_deg=row["fpa"]))
        t = time.perf_counter()
        try:
            plan = solve(prob, model=model, ipopt_options=opts)
            status, reason = plan.status, plan.reason
            dv, its = plan.total_dv_mps, sum(a["iterations"] for a in plan.solver["attempts"])
            nlp_s = sum(a["wall_s"] for a in plan.solver["attempts"])
        except Exception as exc:  # a crash is a failure of the case, recorded, not the end of the run
            status, reason, dv, its, nlp_s = "exception", f"{type(exc).__name__}: {exc}", np.nan, 0, np.nan
        wall = time.perf_counter() - t
        out = {**row, "lunar": f"{row['lunar'][0]:.0f}-{row['lunar'][1]:.0f}",
               "fpa": f"{row['fpa'][0]}..{row['fpa'][1]}", "status": status, "dv_mps": dv,
               "iterations": its, "nlp_s": nlp_s, "total_s": wall, "reason": reason[:110]}
        table.append(out)
        print(f"  case {row['case']:2d}: {status:10s} Δv {dv:8.3f} m/s  {its:4d} it  {wall:6.1f} s", flush=True)

    df = pd.DataFrame(table).set_index("case")
    with pd.option_context("display.width", 250, "display.max_colwidth", 110, "display.max_rows", 500):
        print()
        print(df.drop(columns="reason").to_string(float_format=lambda x: f"{x:.3f}"))
        bad = df[df.status != "verified"]
        if len(bad):
            print("\nnot verified:")
            print(bad[["layout", "status", "reason"]].to_string())
    ok = (df.status == "verified").mean() * 100.0
    print(f"\nconverged and verified: {(df.status == 'verified').sum()} / {len(df)} = {ok:.1f} % (goal >= 95 %)")
    print("by layout:", ", ".join(f"{k} {v.eq('verified').sum()}/{len(v)}" for k, v in df.groupby("layout").status))
    good = df[df.status == "verified"]
    if len(good):
        print(f"verified cases: median {good.iterations.median():.0f} iterations, median {good.total_s.median():.1f} s "
              f"(max {good.total_s.max():.1f} s)")
    if args.csv:
        df.to_csv(args.csv)
    return 0


if __name__ == "__main__":
    sys.exit(main())
