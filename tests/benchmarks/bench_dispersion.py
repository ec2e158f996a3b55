"""Dispersion of the demo abort: Monte Carlo speed, linear covariance speed, and their agreement.

Goals (issue 15): 1,000 samples in at most 30 s on 2 cores; linear covariance in at most 1 s.
The demo plan is solved first (about 10 s) unless a plan file or run folder is given.  The error
model is the demo's invented ``[dispersion]`` table (problems/demo-abort.toml).

Run: python tests/benchmarks/bench_dispersion.py [PLAN_OR_RUN_FOLDER] [--samples N] [--workers K]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from optimizer.dispersion import (dispersion_model, linear_covariance, load_error_model,  # noqa: E402
                                  nominal_of, run_samples)
from optimizer.dispersion.sampling import evaluate  # noqa: E402
from optimizer.propagate import VERIFY_ATOL, VERIFY_RTOL  # noqa: E402


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("plan", nargs="?")
    ap.add_argument("--samples", type=int, default=1000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    problem_file = ROOT / "problems" / "demo-abort.toml"
    errors = load_error_model(problem_file)
    from optimizer.dispersion.outputs import read_verified_plan

    if args.plan:
        plan, problem, _ = read_verified_plan(args.plan)
    else:
        from optimizer.export import write_run
        from optimizer.problem_file import load_problem
        from optimizer import solve

        problem = load_problem(problem_file)
        tic = time.perf_counter()
        plan = solve(problem)
        print(f"demo solve: {time.perf_counter() - tic:.1f} s, {plan.status}, {plan.total_dv_mps:.3f} m/s")
        tmp = Path(tempfile.mkdtemp()) / "run"
        write_run(plan, problem, tmp)
        plan, problem, _ = read_verified_plan(tmp)
    model = dispersion_model(plan, problem)
    nominal = nominal_of(plan, problem, model)

    y0 = np.asarray(nominal.start_state)
    burns = [(t, np.asarray(dv)) for t, dv in nominal.burns]
    loose = evaluate(model, nominal, y0, burns)
    tight = evaluate(model, nominal, y0, burns, rtol=VERIFY_RTOL, atol=VERIFY_ATOL)
    print(f"nominal entry angle at the dispersion tolerances minus at the verification tolerances: "
          f"{loose['entry_flight_path_deg'] - tight['entry_flight_path_deg']:.2e} deg; perilune "
          f"{loose['perilune_altitude_km'] - tight['perilune_altitude_km']:.2e} km; entry epoch "
          f"{loose['entry_epoch_tdb_s'] - tight['entry_epoch_tdb_s']:.2e} s")
    tic, cpu = time.perf_counter(), time.process_time()
    ev = 20
    for _ in range(ev):
        evaluate(model, nominal, y0, burns)
    per_cpu = (time.process_time() - cpu) / ev
    print(f"one sample (serial): {(time.perf_counter() - tic) / ev * 1000:.1f} ms wall, {per_cpu * 1000:.1f} ms CPU; "
          f"CPU-bound projection for 1000 samples on 2 idle cores: {1000 * per_cpu / 2:.1f} s")

    times = []
    for _ in range(3):
        lin = linear_covariance(model, nominal, errors)
        times.append(lin.seconds)
    print(f"linear covariance: best {min(times):.3f} s, worst {max(times):.3f} s of 3 (goal <= 1 s)")

    load0 = os.getloadavg()[0]
    tic = time.perf_counter()
    df = run_samples(model, nominal, errors, args.samples, args.seed, workers=args.workers)
    wall = time.perf_counter() - tic
    rate = args.samples / wall
    print(f"Monte Carlo: {args.samples} samples on {args.workers} worker(s) in {wall:.1f} s "
          f"(goal <= 30 s for 1000 on 2); {rate:.1f} samples/s, {rate / args.workers:.1f} samples/s per core "
          f"(os.cpu_count() = {os.cpu_count()}; 1-minute load average {load0:.1f} before, "
          f"{os.getloadavg()[0]:.1f} after: other users' work shares these cores)")
    k = int(df["inside"].sum())
    print(f"inside the corridor: {k} of {len(df)}")
    for name, col in (("entry_flight_path_deg", "entry_flight_path_deg"),
                      ("perilune_altitude_km", "perilune_altitude_km"),
                      ("entry_epoch_tdb_s", "entry_epoch_tdb_s")):
        s_mc = float(df[col].std(ddof=1))
        s_lc = lin.sigma[name]
        print(f"  sigma {name}: Monte Carlo {s_mc:.5g}, linear {s_lc:.5g}, ratio {s_mc / s_lc:.3f}")


if __name__ == "__main__":
    main()
