"""Independent references for the global benchmark: a fixed-epoch scan solved by single shooting.

Results are for design studies only; not flight-certified; flight use goes through the mission's
own independent verification and licensed practice.

For each case of ``global_cases.py`` the first burn's epoch is fixed in turn at each of the
``N_SCAN`` (20) evenly spaced epochs of its window (the planted epoch is never one of them, by
construction); **in two-burn cases the second burn is held at zero** (a scan point is then a
feasible plan of the two-burn problem, so it is still an upper bound of its optimum).  At each epoch
the Δv vector alone is found by scipy SLSQP single shooting:

* minimise |Δv|^2 subject to the perilune altitude range, the arrival (entry flight-path angle
  window, or vacuum perigee altitude range) and the cap, each function value a propagation of
  the path from the burn with ``optimizer.propagate`` (DOP853 on the numpy model, ``SCAN_RTOL``),
  constraint derivatives by forward differences (``FD_STEP`` m/s); when the path misses the entry
  interface the flight-path angle is continued past grazing by the osculating perigee height
  (1 degree per 1 % of the interface radius), as ``tests/peer_baseline.py`` does;
* starting points: a least-norm Newton guess (two linearised steps from zero Δv towards the middle
  of the ranges) at the first epoch and every ``COLD_EVERY``-th epoch, and at every epoch where the
  warm start fails; the previous epoch's answer (forward sweep); the next epoch's answer where it
  is cheaper (backward sweep);
* each epoch's answer is then re-propagated from the start of the case at the verification
  tolerances (1e-12) and counts only when it meets every constraint within the verification
  tolerances (1 km, 0.01 degree).

Reference value of a case = min(best feasible scan point, planted bound).  This shares nothing
with the transcription or the solver: only the force model, the propagator and the dataclasses.

Results are cached in ``global_references.json`` keyed by ``Case.key`` (a hash of the generator
version and the case's parameters); ``python tests/benchmarks/global_reference.py --half tune``
computes the missing ones on 2 processes, ``--recompute`` all of them.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
import warnings

import numpy as np
from scipy.optimize import minimize

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

import global_cases as gc  # noqa: E402
from optimizer.propagate import VERIFY_ATOL, VERIFY_RTOL, propagate  # noqa: E402

SCAN_RTOL = 1e-8
FD_STEP = 1e-3  # m/s
COLD_EVERY = 10
REF_FILE = os.path.join(HERE, "global_references.json")
SCANNER_VERSION = "scan-3"  # 3: perilune inside the lunar sphere (global_cases)


class EpochShooter:
    """SLSQP on the Δv (m/s) of one burn at a fixed epoch ``tb`` from pre-burn state ``x``."""

    def __init__(self, model, problem, tb, x, bound_mps, rtol=SCAN_RTOL):
        self.model, self.problem, self.tb, self.x = model, problem, float(tb), np.asarray(x, dtype=float)
        self.rtol = rtol
        self.scale = max(1.0, bound_mps) ** 2
        self.cap = problem.burns[0].max_dv_mps
        self.entry = problem.arrival.target == "entry"
        self.mrange = problem.arrival.flight_path_deg if self.entry else problem.arrival.perigee_alt_km
        self.mscale = 1.0 if self.entry else 10.0
        self._cache = {}
        self.propagations = 0
        self.iterations = self.solves = 0

    def metrics(self, dv) -> np.ndarray:
        """(perilune altitude km, arrival measure: flight-path angle deg or perigee altitude km)."""
        key = tuple(float(v) for v in dv)
        if key in self._cache:
            return self._cache[key]
        y = self.x.copy()
        y[3:] += np.asarray(dv, dtype=float) / 1000.0
        s = gc.path_summary(self.model, self.problem, self.tb, y, rtol=self.rtol, atol=self.rtol)
        self.propagations += 1
        alt = s.perilune_alt_km
        if not np.isfinite(alt):
            alt = -100.0 if s.arrival == "impact_moon" else 1e5
        if self.entry:
            if s.arrival == "entry":
                m = s.fpa_deg
            else:  # continued past grazing by the closest approach's height (Summary.perigee_alt_km)
                r_e = self.problem.arrival.entry_radius_km
                rp = s.perigee_alt_km + self.model.earth.radius
                m = 100.0 * (rp - r_e) / r_e
        else:
            m = s.perigee_alt_km
        out = np.array([alt, m])
        self._cache[key] = out
        return out

    def _cons(self, dv):
        alt, m = self.metrics(dv)
        lo, hi = self.problem.lunar.altitude_km
        mlo, mhi = self.mrange
        return np.array([(alt - lo) / 100.0, (hi - alt) / 100.0, (m - mlo) / self.mscale,
                         (mhi - m) / self.mscale, (self.cap**2 - float(np.dot(dv, dv))) / (2 * self.cap)])

    def _cons_jac(self, dv):
        dv = np.asarray(dv, dtype=float)
        c0 = self._cons(dv)
        jac = np.empty((5, 3))
        for k in range(3):
            d = dv.copy()
            d[k] += FD_STEP
            jac[:, k] = (self._cons(d) - c0) / FD_STEP
        jac[4] = -dv / self.cap
        return jac

    def newton_guess(self, steps=2) -> np.ndarray:
        """Least-norm linearised steps from zero towards the middle of the ranges."""
        dv = np.zeros(3)
        lo, hi = self.problem.lunar.altitude_km
        mlo, mhi = self.mrange
        mid = np.array([lo + 0.3 * (hi - lo), 0.5 * (mlo + mhi)])
        w = np.array([1.0 / 100.0, 1.0 / self.mscale])
        for _ in range(steps):
            m0 = self.metrics(dv)
            jac = np.empty((2, 3))
            for k in range(3):
                d = dv.copy()
                d[k] += 10 * FD_STEP
                jac[:, k] = (self.metrics(d) - m0) / (10 * FD_STEP)
            step = np.linalg.lstsq(jac * w[:, None], (mid - m0) * w, rcond=None)[0]
            n = np.linalg.norm(step)
            if n > 0.5 * self.cap:
                step *= 0.5 * self.cap / n
            dv = dv + step
        return dv

    def solve(self, dv0, maxiter=15):
        dv0 = np.asarray(dv0, dtype=float)
        if not np.any(dv0):
            dv0 = np.full(3, 1e-3)
        obj = lambda d: (float(np.dot(d, d)) / self.scale, 2.0 * d / self.scale)  # noqa: E731
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = minimize(obj, dv0, jac=True, method="SLSQP",
                           constraints=[{"type": "ineq", "fun": self._cons, "jac": self._cons_jac}],
                           bounds=[(-self.cap, self.cap)] * 3, options={"maxiter": maxiter, "ftol": 1e-6})
        self.iterations += int(res.nit)
        self.solves += 1
        c = self._cons(res.x)
        ok = bool(np.all(c[:4] >= -1e-3)) and c[4] >= -1e-9
        return np.asarray(res.x), ok


def _verified(model, case, tb, dv_mps) -> bool:
    s = gc.full_path_summary(model, case.problem, [(tb, np.asarray(dv_mps) / 1000.0)])
    return not gc.violations(case.problem, s) and float(np.linalg.norm(dv_mps)) <= case.problem.burns[0].max_dv_mps


def scan_case(case, say=lambda msg: None) -> dict:
    """The fixed-epoch scan of ``case``; returns the JSON-ready record."""
    t_start = time.perf_counter()
    model = gc.model_for(case.problem)
    p = case.problem
    t0, y0 = p.start.epoch, np.asarray(p.start.state, dtype=float)
    epochs = case.scan_epochs()
    coast = propagate(model, t0, y0, float(epochs[-1]), rtol=VERIFY_RTOL, atol=VERIFY_ATOL)
    pre = [y0 if tb <= t0 else coast.state(float(tb)) for tb in epochs]
    shooters = [EpochShooter(model, p, tb, x, case.planted_bound_mps) for tb, x in zip(epochs, pre)]
    best = [None] * len(epochs)  # (|dv|, dv) of converged points

    def consider(i, dv0):
        dv, ok = shooters[i].solve(dv0)
        if ok and (best[i] is None or np.linalg.norm(dv) < best[i][0]):
            best[i] = (float(np.linalg.norm(dv)), dv)
        return ok

    for i in range(len(epochs)):  # forward sweep
        warm_ok = i > 0 and best[i - 1] is not None and consider(i, best[i - 1][1])
        if i % COLD_EVERY == 0 or not warm_ok:
            consider(i, shooters[i].newton_guess())
    for i in range(len(epochs) - 2, -1, -1):  # backward sweep
        if best[i + 1] is not None and (best[i] is None or best[i + 1][0] < best[i][0] * 0.998):
            consider(i, best[i + 1][1])
    scan = []
    for i, tb in enumerate(epochs):
        if best[i] is None:
            scan.append([float(tb), None, False])
            continue
        scan.append([float(tb), best[i][0], _verified(model, case, tb, best[i][1])])
        if not scan[-1][2] and best[i][0] < case.planted_bound_mps:
            say(f"seed {case.seed}: scan point at +{(tb - t0) / 3600:.2f} h ({best[i][0]:.3f} m/s) "
                f"fails re-propagation; not counted")
    feas = [(v, tb) for tb, v, ok in scan if ok]
    best_v, best_t = min(feas) if feas else (None, None)
    ref = case.planted_bound_mps if best_v is None else min(best_v, case.planted_bound_mps)
    return {"key": case.key, "seed": case.seed, "generator": gc.GENERATOR_VERSION, "scanner": SCANNER_VERSION,
            "reference_mps": ref, "best_scan_mps": best_v, "best_scan_epoch": best_t,
            "planted_bound_mps": case.planted_bound_mps, "scan_feasible": len(feas), "scan_points": len(scan),
            "scan": scan, "propagations": int(sum(s.propagations for s in shooters)),
            "slsqp_solves": int(sum(s.solves for s in shooters)),
            "slsqp_iterations": int(sum(s.iterations for s in shooters)),
            "settings": {"rtol": SCAN_RTOL, "fd_step_mps": FD_STEP, "cold_every": COLD_EVERY,
                         "slsqp_maxiter": 15, "slsqp_ftol": 1e-6},
            "wall_s": round(time.perf_counter() - t_start, 1)}


def _scan_worker(d):
    warnings.simplefilter("ignore")
    case = gc.case_from_dict(d)
    try:
        return case.key, scan_case(case)
    except Exception as exc:  # one broken case is reported, not the end of the run
        return case.key, {"key": case.key, "seed": case.seed, "error": f"{type(exc).__name__}: {exc}"}


def load_references(cases, workers=2, recompute=False, say=print) -> dict:
    """References of ``cases`` by key: from ``global_references.json``, the missing ones computed."""
    cache = gc._read_json(REF_FILE)
    ok = lambda r: r is not None and r.get("scanner") == SCANNER_VERSION and "error" not in r  # noqa: E731
    todo = [c for c in cases if recompute or not ok(cache.get(c.key))]
    if todo:
        say(f"computing {len(todo)} references on {workers} processes (about a minute a case) ...")
        import multiprocessing as mp
        args = [gc.case_to_dict(c) for c in todo]
        with mp.get_context("spawn").Pool(workers) as pool:
            for key, rec in pool.imap_unordered(_scan_worker, args):
                cache = gc._read_json(REF_FILE)
                cache[key] = rec
                gc.write_json_atomic(REF_FILE, cache)  # after each case: an interrupted run keeps its work
                say(f"  seed {rec['seed']}: " + (rec["error"] if "error" in rec else
                    f"reference {rec['reference_mps']:.4f} m/s (scan {rec['best_scan_mps']}, "
                    f"planted {rec['planted_bound_mps']:.4f}), {rec['scan_feasible']}/{rec['scan_points']} "
                    f"feasible, {rec['wall_s']} s"))
    return {c.key: cache.get(c.key) for c in cases}


def _pipeline_worker(seed):
    """Generate the case of ``seed`` (unless cached) and scan it: one job per seed."""
    warnings.simplefilter("ignore")
    cache = gc._read_json(gc.CASES_FILE).get(str(seed))
    if cache is None or cache.get("generator") != gc.GENERATOR_VERSION:
        cache = gc._generate(seed)[1]
    if "error" in cache:
        return seed, cache, None
    return (seed, cache) + (_scan_worker(cache)[1],)


def compute(seed_list, workers=2, recompute=False, say=print) -> None:
    """Cases and references of ``seed_list``, each written to its JSON file as soon as it is done."""
    cases = gc._read_json(gc.CASES_FILE)
    refs = gc._read_json(REF_FILE)

    def done(s):
        d = cases.get(str(s))
        if d is None or d.get("generator") != gc.GENERATOR_VERSION:
            return False
        if "error" in d:
            return True
        r = refs.get(gc.case_from_dict(d).key)
        return r is not None and r.get("scanner") == SCANNER_VERSION and "error" not in r

    todo = [s for s in seed_list if recompute or not done(s)]
    say(f"{len(todo)} of {len(seed_list)} seeds to generate and scan on {workers} processes")
    if not todo:
        return
    import multiprocessing as mp
    with mp.get_context("spawn").Pool(workers) as pool:
        for seed, d, rec in pool.imap_unordered(_pipeline_worker, todo):
            cases = gc._read_json(gc.CASES_FILE)
            cases[str(seed)] = d
            gc.write_json_atomic(gc.CASES_FILE, cases)
            if rec is None:
                say(f"  seed {seed}: no case ({d['error']})")
                continue
            refs = gc._read_json(REF_FILE)
            refs[rec["key"]] = rec
            gc.write_json_atomic(REF_FILE, refs)
            say(f"  seed {seed}: " + (rec["error"] if "error" in rec else
                f"reference {rec['reference_mps']:.4f} m/s (scan {rec['best_scan_mps']}, "
                f"planted {rec['planted_bound_mps']:.4f}), {rec['scan_feasible']}/{rec['scan_points']} "
                f"feasible, {rec['wall_s']} s"))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--half", default="tune", choices=("tune", "heldout", "all"))
    ap.add_argument("--cases", type=int, default=None, help="seeds per half (default 34)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--recompute", action="store_true", help="recompute cases and references")
    args = ap.parse_args(argv)
    compute(gc.seeds(args.half, args.cases), args.workers, args.recompute)
    return 0


if __name__ == "__main__":
    sys.exit(main())
