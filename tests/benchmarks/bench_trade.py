"""Trade study: a 12 x 12 sweep of burn epoch x arrival epoch, its wall time, the warm-start speed-up
and the share of feasible cells it solves and verifies.

Invented scenario (the abort case of ``bench_abort.py``): a ballistic free return through a 150 km
perilune at 2027-05-13 12:00 TDB, found by root-finding on the propagator; 40 h before perilune
the spacecraft gains 10 m/s along its velocity.  One free burn, at most 300 m/s; perilune
100-5000 km; entry interface 121.92 km (400,000 ft) at -7.0 to -5.5 degrees (common practice).
Ephemeris model (DE421 fit, Earth, Moon, Sun).  Grid: burn epochs 1 h to 12 h after the start,
hourly; arrival epochs from 0.65 d before to 0.45 d after the unconstrained optimum's, every
0.1 d, each held exactly.  Arriving half a day early or more needs a perilune below 100 km, so
the early columns have no solution: the sweep must mark them, and not lose time on them.

``--problem FILE`` sweeps a problem file instead (its ``[sweep]`` table, or the default grid:
burn epochs across the first burn's window, arrivals as ``--arrivals``).

Figures:
* wall time of the whole sweep (reference solve included) on this machine, and per cell;
* warm-start speed-up: a subset of cells (``--cold N``, spread over the grid) solved again cold,
  at the same iteration cap; total wall time and iterations cold / warm on that subset, and how
  many of them the cold start solves at all;
* a second opinion that shares nothing with the sweep's solver: scipy SLSQP single shooting on
  the independent propagator (``tests/peer_baseline.py``, with the cell's arrival window added as
  a constraint on the propagated entry epoch) at ``--peer N`` cells: about half verified cells
  (spread over the grid) and half cells without a verified answer that border verified ones.
  Each is started from the burn of the nearest *other* verified cell (its RTN Δv turned into
  ICRF at this cell's burn epoch).  Printed per cell: the sweep's status and Δv, SLSQP's, the
  difference.  A verified cell that SLSQP solves cheaper than the sweep is flagged; a cell without
  a verified answer that SLSQP solves feasibly is counted as feasible but missed;
* share of feasible cells solved and verified: verified / (verified + missed) -- the missed cells
  are only those SLSQP checked, so the share is an upper bound.

Goals (from the issue): 12 x 12 in < 90 s on 2 cores; share >= 95 %.

Run: python tests/benchmarks/bench_trade.py [--rows 12] [--cols 12] [--arrivals -0.65 0.45]
     [--workers N] [--cold 12] [--peer 6] [--out DIR] [--problem FILE]
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
import tomllib

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))  # tests/

DAY, HOUR = 86400.0, 3600.0


def scenario():
    import free_return_fixture as fr
    from optimizer.models import build_model
    from optimizer.problem import BurnSpec, LunarPass, ModelSpec, Problem, ReturnSpec, StateStart
    from optimizer.propagate import propagate
    from optimizer.timescales import parse_epoch

    t_peri = parse_epoch("2027-05-13T12:00:00 TDB")
    t0 = t_peri - 40 * HOUR
    fit = build_model(ModelSpec(), t_peri - 6 * DAY, t_peri + 6 * DAY)
    y_peri, _, _ = fr.build(fit, t_peri)
    y0 = propagate(fit, t_peri, y_peri, t0).y[:, -1]
    y0[3:] += 10e-3 * y0[3:] / np.linalg.norm(y0[3:])
    return Problem(name="trade-bench", start=StateStart(t0, tuple(y0)),
                   burns=(BurnSpec((t0 + HOUR, t0 + 12 * HOUR), 300.0),), lunar=LunarPass((100.0, 5000.0)),
                   arrival=ReturnSpec(flight_path_deg=(-7.0, -5.5)),
                   summary="Invented benchmark: one burn 1-12 h into an outbound coast nudged by +10 m/s.")


def load(path):
    from optimizer.problem_file import problem_from_dict

    with open(path, "rb") as f:
        data = tomllib.load(f)
    spec = data.pop("sweep", None)
    return problem_from_dict(data, source=path), spec


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=12)
    ap.add_argument("--cols", type=int, default=12)
    ap.add_argument("--workers", type=int, default=None, help="local processes (default: every core)")
    ap.add_argument("--cold", type=int, default=12, help="cells solved again cold (0: none)")
    ap.add_argument("--peer", type=int, default=6, help="cells checked by SLSQP single shooting (0: none)")
    ap.add_argument("--arrivals", type=float, nargs=2, default=(-0.65, 0.45), metavar=("FIRST", "LAST"),
                    help="arrival epochs, days from the optimum's (default -0.65 0.45)")
    ap.add_argument("--problem", help="a problem file to sweep instead of the built-in scenario")
    ap.add_argument("--out", help="write the trade folder here (default: a temporary folder, removed)")
    args = ap.parse_args()

    from optimizer import solve, trade
    from optimizer.export.trade_folder import write_trade_folder
    from optimizer.trade.cells import reference_problem
    from optimizer.models import build_model
    from optimizer.solve.guess import model_span
    from optimizer.timescales import format_epoch

    cores = os.cpu_count()
    print(f"machine: {cores} cores; load average before {os.getloadavg()[0]:.2f} (other processes slow "
          "every figure here)")
    t_setup = time.perf_counter()
    spec = None
    if args.problem:
        problem, spec = load(args.problem)
    else:
        problem = scenario()
    ref_problem = reference_problem(problem)
    # one model over the whole span the grid can reach
    lo, hi = model_span(ref_problem)
    model = build_model(problem.model, lo, hi + 2 * DAY)
    print(f"scenario {problem.name}: set-up {time.perf_counter() - t_setup:.1f} s")

    t0 = time.perf_counter()
    reference = solve(ref_problem, model=None if problem.model.continuation else model)
    t_ref = time.perf_counter() - t0
    print(f"reference (unconstrained minimum Δv): {reference.status}, {reference.total_dv_mps:.3f} m/s, "
          f"{t_ref:.1f} s (handed to the sweep; counted in its wall time below)")
    if not reference.verified:
        sys.exit(f"the reference did not verify: {reference.reason}")
    t_arr = reference.event(problem.arrival.target).epoch
    if spec is not None:
        s = trade.parse_sweep_spec(spec, problem, args.problem)
        kwargs = dict(burn_epochs=s.burn_epochs, arrival_epochs=s.arrival_epochs,
                      return_durations_days=s.return_durations_days, arrival_tolerance_s=s.arrival_tolerance_s,
                      burn_index=s.burn_index, max_iter=s.max_iter, retry=s.retry)
    else:
        w0, w1 = problem.burns[0].window
        burns = np.linspace(w0, w1, args.rows)
        a, b = args.arrivals
        arrivals = t_arr + np.linspace(a, b, args.cols) * DAY
        win = problem.arrival.epoch_window
        if win is not None:
            arrivals = np.clip(arrivals, *win)
        kwargs = dict(burn_epochs=burns, arrival_epochs=arrivals)

    last = [0.0]

    def show(p):
        if time.perf_counter() - last[0] > 10.0 or p.done == p.total:
            last[0] = time.perf_counter()
            eta = "-" if p.eta_s is None else f"{p.eta_s:.0f} s"
            print(f"  {p.stage}: {p.done}/{p.total} cells, {p.failed} without a verified answer, "
                  f"{p.elapsed_s:.0f} s elapsed, about {eta} left", flush=True)

    resume = tempfile.mkdtemp(prefix="bench-trade-resume-")
    t0 = time.perf_counter()
    df = trade.sweep(problem, workers=args.workers, model=model, progress=show, reference=reference,
                     resume_dir=resume, **kwargs)
    wall = time.perf_counter() - t0 + t_ref
    n = len(df)
    ok = df[df["verified"]]
    print(f"\nsweep {df['row'].nunique()} x {df['col'].nunique()} = {n} cells on {args.workers or cores} workers: "
          f"wall {wall:.1f} s (goal < 90 s for 12 x 12 on 2 cores); load average after {os.getloadavg()[0]:.2f}")
    print(f"  per cell: wall {df['wall_s'].mean():.2f} s mean, {df['wall_s'].median():.2f} s median; "
          f"IPOPT iterations {df['iterations'].mean():.1f} mean; summed cell wall {df['wall_s'].sum():.0f} s, "
          f"CPU {df['cpu_s'].sum():.0f} s (CPU / cores = {df['cpu_s'].sum() / (args.workers or cores):.0f} s: "
          "the wall time to expect on idle cores)")
    bad = df[~df["verified"]]
    if not bad.empty:
        print(f"  cells without a verified answer: {len(bad)}, {bad['cpu_s'].sum():.0f} s CPU "
              f"({100 * bad['cpu_s'].sum() / df['cpu_s'].sum():.0f} % of the total)")
    print("  status: " + ", ".join(f"{k} {v}" for k, v in df["status"].value_counts().items())
          + f"; rescued by a retry {int(((df['attempts'] == 2) & df['verified']).sum())}")
    if not ok.empty:
        print(f"  Δv {ok['total_dv_mps'].min():.3f} to {ok['total_dv_mps'].max():.3f} m/s; "
              f"reference {reference.total_dv_mps:.3f} m/s; cells below it: "
              f"{int((ok['total_dv_mps'] < reference.total_dv_mps - 0.01).sum())}")
        print(f"  Pareto set: {len(trade.pareto(df))} cells")

    # warm against cold on a subset
    if args.cold:
        pick = np.unique(np.linspace(0, n - 1, min(args.cold, n)).round().astype(int))
        cw = ci = ww = wi = cc = wc = 0.0
        cold_ok = warm_ok = 0
        for i in pick:
            row = df.iloc[i]
            win = None
            if np.isfinite(row["arrival_window_open_tdb_s"]):
                win = (row["arrival_window_open_tdb_s"], row["arrival_window_close_tdb_s"])
            dur = row["max_return_duration_days"] if np.isfinite(row["max_return_duration_days"]) else None
            cp = trade.cell_problem(problem, row["burn_epoch_tdb_s"], win, dur, kwargs.get("burn_index", 0))
            t, c = time.perf_counter(), time.process_time()
            cap = int(kwargs.get("max_iter", trade.DEFAULT_MAX_ITER))
            options = {**trade.CELL_IPOPT_OPTIONS, "ipopt.max_iter": cap}
            plan = solve(cp, model=model, ipopt_options=options)
            cw += time.perf_counter() - t
            cc += time.process_time() - c
            wc += row["cpu_s"]
            ci += sum(a["iterations"] for a in plan.solver["attempts"])
            ww += row["wall_s"]
            wi += row["iterations"]
            cold_ok += plan.verified
            warm_ok += bool(row["verified"])
        print(f"\nwarm start against cold, on {len(pick)} cells spread over the grid (cold: one at a time in this "
              "process, same options and iteration cap; warm: the sweep's own figures, retries included, "
              "two workers at once):")
        print(f"  cold: {cw:.1f} s wall, {cc:.1f} s CPU, {ci:.0f} iterations, {cold_ok}/{len(pick)} verified")
        print(f"  warm: {ww:.1f} s wall, {wc:.1f} s CPU, {wi:.0f} iterations, {warm_ok}/{len(pick)} verified")
        print(f"  speed-up cold / warm: CPU {cc / max(wc, 1e-9):.2f}x, iterations {ci / max(wi, 1):.2f}x, "
              f"wall {cw / max(ww, 1e-9):.2f}x (wall is unfair to warm: its cells shared the cores)")

    # second opinion: SLSQP single shooting on the independent propagator
    if args.peer:
        _peer_check(problem, model, df, args.peer, kwargs.get("burn_index", 0), trade)

    out = args.out or tempfile.mkdtemp(prefix="bench-trade-")
    target = os.path.join(out, "trade") if not args.out else out
    write_trade_folder(df, target, problem=problem, force=bool(args.out))
    print(f"\ntrade folder written to {target}" + ("" if args.out else " (temporary)"))
    import shutil

    shutil.rmtree(resume, ignore_errors=True)
    if not args.out:
        shutil.rmtree(out, ignore_errors=True)


def _peer_cells(df, n):
    """About n // 2 verified cells spread over the grid and the rest from the cells without a
    verified answer next to a verified one (nearest first); filled up from either."""
    ok, bad = df[df["verified"]], df[~df["verified"]]
    if ok.empty:
        return []

    def gap(row):
        return float(((ok["row"] - row["row"]) ** 2 + (ok["col"] - row["col"]) ** 2).min())

    bad = bad.assign(gap=[gap(r) for _, r in bad.iterrows()]).sort_values(["gap", "row", "col"])
    n_bad = min(len(bad), n - min(len(ok), (n + 1) // 2))
    n_ok = min(len(ok), n - n_bad)
    spread = np.unique(np.linspace(0, len(ok) - 1, n_ok).round().astype(int)) if n_ok else []
    return [ok.iloc[i] for i in spread] + [r for _, r in bad.head(n_bad).iterrows()]


def _peer_check(problem, model, df, n, burn_index, trade):
    """SLSQP single shooting at a few cells; prints the comparison and the feasible share."""
    from peer_baseline import SingleShooting

    from optimizer.frames import rtn_matrix
    from optimizer.propagate import propagate

    ok = df[df["verified"]]
    cells = _peer_cells(df, n)
    if not cells:
        print("\nsecond opinion: no verified cell to start from")
        return
    if len(problem.burns) != 1 or problem.arrival.target != "entry" or problem.burns[0].direction != "free":
        print("\nsecond opinion: SLSQP single shooting handles one free burn to the entry interface only")
        return
    print(f"\nsecond opinion: SLSQP single shooting on the independent propagator at {len(cells)} cells "
          "(started from the nearest other verified cell's burn):")
    print(f"  {'cell':7s} {'sweep':>10s} {'sweep Δv':>10s} {'SLSQP':>9s} {'SLSQP Δv':>10s} {'diff':>9s} {'wall':>7s}"
          "  SLSQP iterations, propagations, message", flush=True)
    y0 = np.asarray(problem.start.state, dtype=float)
    missed, cheaper, agree, t_all = [], [], [], time.perf_counter()
    for row in cells:
        others = ok[ok["cell"] != row["cell"]]
        if others.empty:
            continue
        src = others.loc[((others["row"] - row["row"]) ** 2 + (others["col"] - row["col"]) ** 2).idxmin()]
        cp = _cell(problem, row, {"burn_index": burn_index}, trade)
        tb = float(row["burn_epoch_tdb_s"])
        y = y0 if tb <= problem.start.epoch else propagate(model, problem.start.epoch, y0, tb).y[:, -1]
        dv_rtn = np.array([src["dv_r_mps"], src["dv_t_mps"], src["dv_n_mps"]]) / 1000.0
        dv = rtn_matrix(y[:3], y[3:]).T @ dv_rtn
        peer = _CellShooting(model, cp, SingleShooting)
        t = time.perf_counter()
        res = peer.solve(epoch=tb, dv=dv, maxiter=100)
        feasible = res.feasible(cp) and peer.arrival_ok(res)
        wall = time.perf_counter() - t
        sweep_dv = row["total_dv_mps"] if row["verified"] else float("nan")
        diff = res.dv_mps - sweep_dv if feasible and row["verified"] else float("nan")
        print(f"  {row['cell']:7s} {row['status']:>10s} {sweep_dv:10.3f} {'feasible' if feasible else 'no':>9s} "
              f"{res.dv_mps if feasible else float('nan'):10.3f} {diff:+9.1e} {wall:6.0f}s  {res.iterations}, "
              f"{res.propagations}, {res.message}", flush=True)
        if feasible and not row["verified"]:
            missed.append(row["cell"])
        elif feasible and diff < -0.01:
            cheaper.append(row["cell"])
        elif feasible:
            agree.append(abs(diff))
    checked_ok = sum(1 for r in cells if r["verified"])
    print(f"  verified cells checked {checked_ok}: SLSQP feasible and not cheaper (by > 0.01 m/s) on "
          f"{len(agree)}" + (f", largest |difference| {max(agree):.2e} m/s" if agree else "")
          + (f"; SLSQP CHEAPER on {', '.join(cheaper)} (the sweep's optimum is not the best there)" if cheaper
             else ""))
    feasible = len(ok) + len(missed)
    print(f"  feasible share: {len(ok)} verified by the sweep of {feasible} known feasible = "
          f"{100 * len(ok) / feasible:.1f} % (goal >= 95 %; only {len(cells) - checked_ok} of {len(df) - len(ok)} "
          f"cells without a verified answer were checked, so this is an upper bound); "
          f"{time.perf_counter() - t_all:.0f} s")
    if missed:
        print(f"  feasible but missed by the sweep: {', '.join(missed)}")


def _CellShooting(model, cp, base):
    """``peer_baseline.SingleShooting`` with the cell's arrival limits as constraints on the
    propagated entry epoch (window bounds, and the longest return duration), in hours."""

    class CellShooting(base):
        def __init__(self):
            super().__init__(model, cp)
            ret = cp.arrival
            self.lo = ret.epoch_window[0] if ret.epoch_window is not None else -np.inf
            self.hi = ret.epoch_window[1] if ret.epoch_window is not None else np.inf
            if ret.max_duration_days is not None:
                self.hi = min(self.hi, cp.start_epoch + ret.max_duration_days * DAY)
            self._epochs = {}
            # propagate a day past the cell's latest arrival: with an exact arrival the span would
            # end at the very epoch of the entry, and a path a second late would find none
            self.t_end = max(self.t_end, self.hi if np.isfinite(self.hi) else self.t_end) + DAY

        def simulate(self, x):
            """The baseline's (perilune altitude, entry flight-path angle, inclination), and the
            arrival epoch from the same propagation: the first entry after the perilune, else its
            perigee, else the end of the span (continuous enough to say which way to go)."""
            key = tuple(float(v) for v in x)
            if key in self._cache:
                return self._cache[key]
            from optimizer.frames import flight_path_angle
            from optimizer.propagate import propagate

            model, tb, r_entry = self.model, self.epoch(x), cp.arrival.entry_radius_km
            y = self.y0.copy()
            if tb > self.t0:
                y = propagate(model, self.t0, y, tb, rtol=self.rtol, atol=self.atol).y[:, -1].copy()
            y[3:] += np.asarray(x[1:4], dtype=float) / 1000.0
            arc = propagate(model, tb, y, self.t_end, events=("perilune", "perigee", "entry"),
                            entry_radius=r_entry, terminal=("entry",), rtol=self.rtol, atol=self.atol)
            self.propagations += 1 + (tb > self.t0)
            peri = arc.first("perilune")
            if peri is None:
                out, t_arr = np.array([1e6, 90.0, np.nan]), self.t_end
            else:
                alt = float(np.linalg.norm(peri.y[:3] - model.moon_position(peri.t)) - model.moon.radius)
                after = [e for e in arc.events if e.t > peri.t]
                entry = next((e for e in after if e.name == "entry"), None)
                perigee = next((e for e in after if e.name == "perigee"), None)
                if entry is not None:
                    h = np.cross(entry.y[:3], entry.y[3:])
                    out = np.array([alt, math.degrees(flight_path_angle(entry.y[:3], entry.y[3:])),
                                    math.degrees(math.acos(h[2] / np.linalg.norm(h)))])
                    t_arr = entry.t
                else:  # the baseline's continuation past grazing (tests/peer_baseline.py)
                    rp = np.linalg.norm(perigee.y[:3]) if perigee is not None else 10.0 * r_entry
                    out = np.array([alt, 100.0 * (rp - r_entry) / r_entry, np.nan])
                    t_arr = perigee.t if perigee is not None else self.t_end
            self._cache[key] = out
            self._epochs[key] = t_arr
            return out

        def arrival_epoch(self, x):
            self.simulate(x)
            return self._epochs[tuple(float(v) for v in x)]

        def _constraints(self, x):
            t = self.arrival_epoch(x)
            rows = [c for c in ((t - self.lo) / HOUR, (self.hi - t) / HOUR) if np.isfinite(c)]
            return np.r_[super()._constraints(x), rows]

        def arrival_ok(self, res, tol_s=1.0):
            x = np.r_[(res.epoch - self.window[0]) / HOUR, res.dv * 1000.0]
            t = self.arrival_epoch(x)
            return bool(self.lo - tol_s <= t <= self.hi + tol_s)

    return CellShooting()


def _cell(problem, row, kwargs, trade):
    win = None
    if np.isfinite(row["arrival_window_open_tdb_s"]):
        win = (row["arrival_window_open_tdb_s"], row["arrival_window_close_tdb_s"])
    dur = row["max_return_duration_days"] if np.isfinite(row["max_return_duration_days"]) else None
    return trade.cell_problem(problem, row["burn_epoch_tdb_s"], win, dur, kwargs.get("burn_index", 0))


if __name__ == "__main__":
    main()
