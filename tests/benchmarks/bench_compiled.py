"""Compiled NLP functions over a sweep of start epochs: compile time, per-iteration speed-up, and
what a series of problems of one structure gains with each ``SLINGBACK_COMPILE`` mode.

Cells: the invented abort case of ``bench_abort.py`` (a ballistic free return through a 150 km
perilune at 2027-05-13 12:00 TDB, 10 m/s along the velocity added at the start, one burn 1-12 h
later, ephemeris model) picked up at ``--cells`` start epochs one hour apart (46 h, 45 h, ...
before perilune).  Each cell is its own problem: its own start epoch and its own DE421 fit; since
the epoch-dependent numbers are NLP parameters, all cells have one structure and one library.

Passes, each over all cells, in a fresh cache folder (``--cache`` to keep one):

* ``off``: interpreted (CasADi's virtual machine);
* ``wait``: the first cell generates and compiles the library (timed apart), the others load it;
* ``auto`` (with ``--auto``, in another fresh folder): the first cell starts the compiler in the
  background and every cell solves interpreted until the library exists.

Printed: per cell the mode, IPOPT iterations, NLP wall and end-to-end time; per pass the totals;
the compile's wall time; the per-iteration speed-up; the number of cells that repays a compile.
The load average is printed beside the figures (2 cores shared: figures move with it).

Run: python tests/benchmarks/bench_compiled.py [--cells 12] [--auto] [--cflags -O1] [--cache DIR]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))  # tests/
sys.path.insert(0, HERE)

import bench_abort as ba  # noqa: E402
from optimizer import solve  # noqa: E402


def load() -> str:
    return "load " + ", ".join(f"{x:.2f}" for x in os.getloadavg())


def cells(n):
    seed = ba.scenario_model()
    out = []
    for k in range(n):
        t0 = ba.T_PERILUNE - (46 - k) * ba.HOUR
        y = ba.free_return_state(seed, t0)
        out.append(ba.abort_problem(t0, ba.nudge(y, ba.along(y, 10.0))))
    return out


def run_pass(problems, how, cache_dir):
    os.environ["SLINGBACK_COMPILE"] = how
    os.environ["SLINGBACK_CACHE_DIR"] = cache_dir
    rows = []
    t_pass = time.perf_counter()
    for prob in problems:
        t = time.perf_counter()
        plan = solve(prob)
        wall = time.perf_counter() - t
        att = plan.solver["attempts"]
        ev = [a.get("evaluation") or {} for a in att]
        its = sum(a["iterations"] for a in att)
        nlp = sum(a["wall_s"] for a in att)
        comp = sum(e.get("compile_s", 0.0) + e.get("codegen_s", 0.0) for e in ev)
        rows.append({"mode": ev[-1].get("mode"), "its": its, "nlp": nlp, "wall": wall, "compile": comp,
                     "key": ev[-1].get("key"), "dv": plan.total_dv_mps, "verified": plan.verified})
        print(f"  [{how}] {prob.start_epoch:.0f}: {ev[-1].get('mode')}"
              f"{' (' + ev[-1]['reason'] + ')' if ev[-1].get('reason') else ''}, "
              f"{'verified' if plan.verified else 'NOT verified'}, Δv {plan.total_dv_mps:.4f} m/s, "
              f"{its} it, NLP {nlp:.2f} s ({nlp / max(its, 1) * 1e3:.1f} ms/it), "
              f"{'codegen+compile ' + format(comp, '.1f') + ' s, ' if comp else ''}end to end {wall:.2f} s; {load()}",
              flush=True)
    return rows, time.perf_counter() - t_pass


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, default=12)
    ap.add_argument("--auto", action="store_true", help="also a pass with SLINGBACK_COMPILE=auto")
    ap.add_argument("--cflags", default=None, help="optimisation flag (default the library's, -O1)")
    ap.add_argument("--cache", default=None, help="cache folder to use (default: fresh temporary folders)")
    ap.add_argument("--project", type=int, default=12, help="sweep size for the projected totals")
    args = ap.parse_args(argv)
    if args.cflags:
        os.environ["SLINGBACK_CFLAGS"] = args.cflags
    problems = cells(args.cells)
    print(f"{args.cells} cells, start epochs 46 h to {47 - args.cells} h before perilune; {os.cpu_count()} cores; {load()}")
    with tempfile.TemporaryDirectory() as tmp:
        base = args.cache or os.path.join(tmp, "wait")
        off, t_off = run_pass(problems, "off", os.path.join(tmp, "off"))
        wait, t_wait = run_pass(problems, "wait", base)
        passes = [("off", off, t_off), ("wait", wait, t_wait)]
        if args.auto:
            auto, t_auto = run_pass(problems, "auto", os.path.join(tmp, "auto"))
            passes.append(("auto", auto, t_auto))
        keys = {r["key"] for r in wait}
        print(f"\nlibrary keys over the {args.cells} cells (wait pass): {len(keys)}")
        for name, rows, total in passes:
            print(f"pass {name:5s}: total {total:7.1f} s, NLP {sum(r['nlp'] for r in rows):6.1f} s, "
                  f"modes {[r['mode'][0] for r in rows]}, all verified: {all(r['verified'] for r in rows)}")
        i_ms = statistics.median(r["nlp"] / r["its"] for r in off)
        c_rows = [r for r in wait if r["mode"] == "compiled" and not r["compile"]]
        compile_s = sum(r["compile"] for r in wait)
        print(f"compile (code generation + {os.environ.get('SLINGBACK_CFLAGS', '-O1')}): {compile_s:.1f} s wall")
        if c_rows:
            c_ms = statistics.median(r["nlp"] / r["its"] for r in c_rows)
            save = statistics.median(o["wall"] for o in off) - statistics.median(r["wall"] for r in c_rows)
            print(f"per IPOPT iteration: interpreted {i_ms * 1e3:.1f} ms, compiled {c_ms * 1e3:.1f} ms: "
                  f"{i_ms / c_ms:.1f}x; end to end per cell {statistics.median(o['wall'] for o in off):.2f} s -> "
                  f"{statistics.median(r['wall'] for r in c_rows):.2f} s (saves {save:.2f} s)")
            if save > 0:
                print(f"cells that repay one compile: {compile_s / save:.1f}")
            n = args.project
            off_cell = statistics.median(o["wall"] for o in off)
            comp_cell = statistics.median(r["wall"] for r in c_rows)
            print(f"projected {n}-cell sweep from these medians: interpreted {n * off_cell:.0f} s, compiled "
                  f"{compile_s + n * comp_cell:.0f} s including the compile ({n * comp_cell:.0f} s with a cached library)")
        dv = max(abs(a["dv"] - b["dv"]) for a, b in zip(off, wait))
        print(f"largest Δv difference compiled - interpreted over the cells: {dv:.2e} m/s")
        print(load())
    return 0


if __name__ == "__main__":
    sys.exit(main())
