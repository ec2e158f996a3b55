"""Solve a free-return problem: guess, NLP with IPOPT, independent verification, mesh refinement.

``solve(problem) -> Plan`` is the whole loop:

1. **Guess.**  Propagate the coast with the burns at their guessed epochs; correct the first burn
   by linear targeting (Newton steps of least norm on the perilune altitude and the osculating
   return perigee, finite-difference Jacobian on the numpy model) so that the path goes round the
   Moon and comes back to the entry interface; sample each coast at equal steps of the regularised
   variable.  A previous Plan can replace all of this (warm start).
2. **NLP.**  :class:`~optimizer.transcription.Transcription` on the problem's mesh, IPOPT with exact
   derivatives.
3. **Verify.**  Re-propagate the burns with :mod:`optimizer.propagate` (nothing shared with the
   NLP but the physics) and compare.  If a tolerance is missed, the coasts whose segments disagree
   with the propagator get more integration steps and the NLP is re-solved from its last answer.
   A plan that still fails is returned as ``"unverified"`` with the reason, never as an optimum.
"""

from __future__ import annotations

import math
import threading
import time
from dataclasses import replace

import casadi as ca
import numpy as np

from . import __version__, compiled
from .models import build_model
from .plan import Burn, Plan
from .problem import Problem
from .propagate import propagate
from .seed import circumlunar
from .transcription import Transcription, is_injection
from .events import LUNAR_SPHERE_KM, lunar_encounter
from .search import search_summary
from .verify import arrival_record, make_burn, perilune_record, verify

GUESS_RTOL = 1e-9
#: Local disagreement (km) between an NLP segment and the propagator above which a coast is refined.
SEGMENT_TOL_KM = 1e-3
#: Burns below this size (m/s) after a verified solve are tried at exactly zero.
PRUNE_MPS = 0.1

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
    # a targeted guess IPOPT first drives the burn to ~0 and then wanders infeasible.  IPOPT
    # iterations measured (bench_abort.py case; robustness cases 0, 1, 3, 5, 29, 32 of
    # bench_robustness.py), scaling 1: 43; 264, 105, 78, 516, 205, 600 (failed); 0.3: 45; 68, 77,
    # 31, 141, 71, 105; 0.1: 71; 35, 39, 61, 53, 108, 105; 0.01: 224; 20, 12, 15, 32, 26, 34.
    "ipopt.obj_scaling_factor": 0.3,
}
#: Cold starts that stall, or that IPOPT declares locally infeasible, are retried from the same
#: point with, in turn: measured on the robustness set (bench_robustness.py), cases 14 and 26
#: stall at the default objective weight and converge at 0.03 (31 and 50 iterations); where the
#: exact Hessian stalls, a quasi-Newton run from the same start often converges.
RETRIES = (("a lighter objective weight (0.03)", {"ipopt.obj_scaling_factor": 0.03}),
           ("a limited-memory Hessian", {"ipopt.hessian_approximation": "limited-memory"}))
WARM_OPTIONS = {
    # a warm start is near its optimum, with multipliers: the objective keeps its full weight
    # (measured: the shorter-return cell of tests/test_trade.py::test_duration_axis_is_a_relaxation
    # converges at 1 and stalls at the cold starts' 0.3 within the cell's 100 iterations)
    "ipopt.obj_scaling_factor": 1.0,
    "ipopt.warm_start_init_point": "yes",
    "ipopt.warm_start_bound_push": 1e-9,
    "ipopt.warm_start_mult_bound_push": 1e-9,
    "ipopt.mu_init": 1e-6,
}


class SolveError(ValueError):
    """The problem cannot be set up (unsupported option, no lunar pass in the guess...)."""


# -- guess ----------------------------------------------------------------------------------------
def _sundman_rate(model, t, y):
    """omega = sqrt(mu_E/r_E^3 + mu_M/r_M^3) along states ``y`` (6, K) at epochs ``t`` (K,)."""
    re = np.linalg.norm(y[:3], axis=0)
    rm = np.linalg.norm(y[:3] - model.moon_position(t), axis=0)
    return np.sqrt(model.gm_earth / re**3 + model.gm_moon / rm**3)


def sample_phase(model, arc, t_a, t_b, n):
    """Nodes of one coast at equal steps of the regularised variable.

    Returns (states (7, n+1) in km, km/s, TDB s; phase length S in scaled units).
    """
    inside = arc.t[(arc.t > min(t_a, t_b)) & (arc.t < max(t_a, t_b))]
    knots = np.unique(np.r_[t_a, inside, t_b])
    sub = np.linspace(0.0, 1.0, 9)[:-1]
    grid = np.r_[(knots[:-1, None] + np.diff(knots)[:, None] * sub).ravel(), t_b]
    y = arc.state(grid)
    w = _sundman_rate(model, grid, y)
    s = np.r_[0.0, np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(grid))]
    targets = np.linspace(0.0, s[-1], n + 1)
    tn = np.interp(targets, s, grid)
    states = np.vstack([arc.state(tn), tn])
    states[:, 0], states[:, -1] = np.r_[arc.state(t_a), t_a], np.r_[arc.state(t_b), t_b]
    return states, s[-1]  # omega [1/s] x t [s]: the same dimensionless length as in scaled units


def _coast(model, t0, y0, t1, events=("perilune", "perigee", "entry", "impact_earth", "impact_moon"),
           entry_radius=None, terminal=(), perilune_within=None):
    arc = propagate(model, t0, y0, t1, events=events, entry_radius=entry_radius, terminal=terminal,
                    rtol=GUESS_RTOL, atol=1e-9, perilune_within=perilune_within)
    arc.model = model  # for choosing the encounter among the arc's perilunes
    return arc


def _return_momentum(model, t_peri, y_peri):
    """Geocentric angular momentum vector (km^2/s) one day after perilune.

    The osculating perigee radius is about ``h^2 / (2 mu)`` on a near-parabolic return, but as a
    function of the burn it has a flat minimum at ``h = 0`` (a path through Earth's centre) where
    Newton steps fail; ``h`` along a fixed normal is linear there, so that is what is targeted.
    """
    y = _coast(model, t_peri, y_peri, t_peri + 86400.0, events=()).y[:, -1]
    return np.cross(y[:3], y[3:])


def _target_radius(problem, model):
    ret = problem.arrival
    if ret.target == "perigee":
        return model.earth.radius + 0.5 * sum(ret.perigee_alt_km)
    gamma = math.radians(0.5 * sum(ret.flight_path_deg))
    return ret.entry_radius_km * math.cos(gamma) ** 2  # near-parabolic arrival


def _first_perilune(arc, after):
    """The lunar encounter's perilune after epoch ``after``: the closest approach to the Moon, not
    the first local minimum of lunar distance (:func:`optimizer.events.lunar_encounter`)."""
    model = getattr(arc, "model", None)
    later = [e for e in arc.events if e.t > after]
    if model is None:
        return next((e for e in later if e.name == "perilune"), None)
    return lunar_encounter(later, model.moon_position)


class _Encounter:
    """What linear targeting measures of a coast after a burn: the incoming selenocentric
    angular momentum (its size fixes the osculating perilune radius, and it stays smooth even
    when the pass would hit the Moon) and the return's geocentric angular momentum."""

    def __init__(self, model, t_burn, y, t_end):
        arc = _coast(model, t_burn, y, t_end, events=("perilune",), terminal=("perilune",),
                     perilune_within=LUNAR_SPHERE_KM)
        self.peri = _first_perilune(arc, t_burn)
        if self.peri is None:
            return
        t_in = max(t_burn, self.peri.t - 6 * 3600.0)
        z = arc.state(t_in)
        d, w = z[:3] - model.moon_position(t_in), z[3:] - model.moon_velocity(t_in)
        self.h_moon = float(np.linalg.norm(np.cross(d, w)))
        self.v_inf2 = float(w @ w - 2 * model.gm_moon / np.linalg.norm(d))
        self.alt = float(np.linalg.norm(self.peri.y[:3] - model.moon_position(self.peri.t)) - model.moon.radius)
        self._model = model
        self._h_earth = None

    @property
    def h_earth(self):
        if self._h_earth is None:
            self._h_earth = _return_momentum(self._model, self.peri.t, self.peri.y)
        return self._h_earth


def _newton(measure, goal, weight, c0, iters, lower=None):
    """Damped least-norm Newton on ``measure(c) = goal`` in the burn coordinates ``c``.

    Returns (c, converged).  ``lower`` bounds the coordinates (fixed-direction burn sizes >= 0).
    """
    c = np.array(c0, dtype=float)
    m = measure(c)
    if m is None:
        return c, False
    for _ in range(iters):
        err = (goal - m) / weight
        if np.abs(err).max() < 1.0:
            return c, True
        jac = np.empty((len(goal), len(c)))
        for k in range(len(c)):
            ck = c.copy()
            ck[k] += 1e-5
            mk = measure(ck)
            if mk is None:
                return c, False
            jac[:, k] = (mk - m) / 1e-5 / weight
        step = np.linalg.lstsq(jac, err, rcond=None)[0]
        for scale in (1.0, 0.5, 0.25, 0.1):
            trial_c = c + scale * step
            if lower is not None:
                trial_c = np.maximum(trial_c, lower)
            trial = measure(trial_c)
            if trial is not None and np.abs((goal - trial) / weight).max() < np.abs(err).max():
                c, m = trial_c, trial
                break
        else:
            return c, False
    return c, bool(np.abs((goal - m) / weight).max() < 1.0)


def linear_targeting(problem, model, t_burn, y_burn, t_end, direction="free", cap_kms=np.inf, iters=12):
    """Least-norm Δv at ``t_burn`` for a perilune in range and the target return perigee.

    First the perilune alone (on the incoming selenocentric angular momentum), then perilune and
    return together (on the geocentric angular momentum along the return's orbit normal, for
    both senses of the normal: the return may pass either side of Earth), keeping the cheaper.
    Returns the Δv (km/s, shape (3,)).  Raises SolveError if the path never passes the Moon.
    """
    lo, hi = problem.lunar.altitude_km
    h_target = math.sqrt(2.0 * model.gm_earth * _target_radius(problem, model))
    if direction == "free":
        basis, lower = np.eye(3), None
    else:
        v = y_burn[3:] / np.linalg.norm(y_burn[3:])
        basis, lower = (v if direction == "along" else -v)[:, None], np.zeros(1)

    def encounter(c):
        y = y_burn.copy()
        y[3:] += basis @ c
        e = _Encounter(model, t_burn, y, t_end)
        return e if e.peri is not None else None

    first = encounter(np.zeros(basis.shape[1]))
    if first is None:
        raise SolveError("the coast never passes the Moon, so no guess can be made from it; "
                         "start closer to the lunar encounter or give a warm start")
    margin = min(50.0, 0.2 * (hi - lo))
    alt_goal = float(np.clip(first.alt, lo + margin, hi - margin))
    r_p = model.moon.radius + alt_goal
    h_moon_goal = r_p * math.sqrt(max(first.v_inf2, 0.0) + 2 * model.gm_moon / r_p)
    w_moon = h_moon_goal * 1e-3  # 0.1 % of the momentum: ~1 km of perilune

    def perilune_only(c):
        e = encounter(c)
        return None if e is None else np.array([e.h_moon])

    c, _ = _newton(perilune_only, np.array([h_moon_goal]), np.array([w_moon]), np.zeros(basis.shape[1]),
                   iters, lower)
    # perilune and return together: each step is the least-norm change that meets the linearised
    # perilune and puts |h_earth| on its target (a small non-convex problem, solved from several
    # directions so that the return may pass either side of Earth)
    e = encounter(c)
    for _ in range(iters if e is not None else 0):
        jm, je = np.empty(len(c)), np.empty((3, len(c)))
        for k in range(len(c)):
            ck = c.copy()
            ck[k] += 1e-5
            ek = encounter(ck)
            if ek is None:
                return basis @ c
            jm[k] = (ek.h_moon - e.h_moon) / 1e-5
            je[:, k] = (ek.h_earth - e.h_earth) / 1e-5
        step = _return_step(e.h_moon, jm, h_moon_goal, e.h_earth, je, h_target, lower, c)
        err0 = max(abs(e.h_moon - h_moon_goal) / w_moon, abs(np.linalg.norm(e.h_earth) - h_target) / (1e-3 * h_target))
        if err0 < 1.0 or step is None:
            break
        for scale in (1.0, 0.5, 0.25):
            trial = encounter(c + scale * step)
            if trial is None:
                continue
            err = max(abs(trial.h_moon - h_moon_goal) / w_moon,
                      abs(np.linalg.norm(trial.h_earth) - h_target) / (1e-3 * h_target))
            if err < err0:
                c, e = c + scale * step, trial
                break
        else:
            break
    dv = basis @ c
    return dv if np.linalg.norm(dv) <= cap_kms else np.zeros(3)


def _return_step(hm, jm, hm_goal, he, je, h_goal, lower, c):
    """Least-norm step ``d`` with ``hm + jm.d = hm_goal`` and ``|he + je d| = h_goal``."""
    from scipy.optimize import minimize

    cons = [{"type": "eq", "fun": lambda d: np.atleast_1d((hm + jm @ d - hm_goal) / hm_goal)},
            {"type": "eq", "fun": lambda d: np.atleast_1d((np.sum((he + je @ d) ** 2) - h_goal**2) / h_goal**2)}]
    if lower is not None:
        cons.append({"type": "ineq", "fun": lambda d: c + d - lower})
    _, sv, vt = np.linalg.svd(je)
    reach = h_goal / max(sv[0], 1e-12)
    best = None
    for start in [sign * reach * v for v in vt[: min(2, len(vt))] for sign in (1.0, -1.0)]:
        res = minimize(lambda d: d @ d, start, jac=lambda d: 2 * d, constraints=cons, method="SLSQP",
                       options={"maxiter": 100, "ftol": 1e-14})
        if res.success and (best is None or res.fun < best.fun):
            best = res
    return None if best is None else best.x


def injection_guess(problem, model, tr: Transcription):
    """Guess for a parking-orbit start: a ballistic circumlunar seed whose departure perigee is at
    the parking altitude near the middle of the injection window (:mod:`optimizer.seed`)."""
    st = problem.start
    t_mid = 0.5 * sum(st.epoch_window)
    lo, hi = problem.lunar.altitude_km
    alt = min(0.5 * (lo + hi), lo + 300.0)
    ret_alt = _target_radius(problem, model) - model.earth.radius
    t_p, seed = t_mid + 3.0 * 86400.0, None
    for _ in range(3):  # move the perilune so that the departure falls mid-window
        try:
            seed = circumlunar(model, t_p, alt, st.altitude_km, ret_alt,
                               guess=seed.params if seed is not None else (0.0, 2.5),
                               departure_inclination_deg=st.inclination_deg, rtol=GUESS_RTOL)
        except ValueError as exc:
            raise SolveError(f"no injection guess: {exc}") from None
        if abs(seed.departure.t - t_mid) < 600.0:
            break
        t_p += t_mid - seed.departure.t
    t_d, y_d = seed.departure.t, seed.departure.y
    inc = math.radians(st.inclination_deg)
    hvec = np.cross(y_d[:3], y_d[3:])
    raan = math.atan2(hvec[0], -hvec[1])
    pvec = np.array([math.cos(raan), math.sin(raan), 0.0])
    qvec = np.array([-math.cos(inc) * math.sin(raan), math.cos(inc) * math.cos(raan), math.sin(inc)])
    u = math.atan2(y_d[:3] @ qvec, y_d[:3] @ pvec)
    rp = model.earth.radius + st.altitude_km
    v_park = math.sqrt(model.gm_earth / rp) * (-math.sin(u) * pvec + math.cos(u) * qvec)
    if st.raan_window_deg is not None:
        raan = float(np.clip(raan, *np.radians(st.raan_window_deg)))
    arc = _coast(model, t_d, y_d, problem.latest_epoch(), entry_radius=problem.arrival.entry_radius_km)
    burns = [(t_d, y_d[3:] - v_park)]
    burns += [(float(np.clip(t_d + 0.2 * (seed.perilune_epoch - t_d), *b.window)), np.zeros(3))
              for b in problem.burns[1:]]
    start = {"tau_injection": (t_d - tr.sc.t_ref) / tr.sc.tu, "raan": raan, "arg_latitude": u}
    return _sample_phases(problem, model, tr, [arc] * len(tr.phases), burns, t_d) + (start,)


def _sample_phases(problem, model, tr, arcs, burns, t_start):
    """Cut the guessed path into the transcription's coasts and sample each."""
    peri = _first_perilune(arcs[-1], arcs[-1].t[0])
    if peri is None:
        raise SolveError("the guessed path has no perilune")
    arc = arcs[-1]
    arrival = None
    if problem.arrival.target == "entry":
        arrival = next((e for e in arc.events if e.t > peri.t and e.name == "entry"), None)
    if arrival is None:
        arrival = next((e for e in arc.events if e.t > peri.t and e.name == "perigee"
                        and np.linalg.norm(e.y[:3]) < 100000.0), None)
    arrival_t = arrival.t if arrival is not None else min(peri.t + 3.0 * 86400.0, arc.t[-1])
    cuts = [t_start]
    for p in tr.phases:
        if p.end == "burn":
            lo, hi = problem.burns[p.burn].window
            after = peri.t if problem.burns[p.burn].leg == "return" else cuts[-1]
            before = arrival_t if problem.burns[p.burn].leg == "return" else peri.t
            t_b = burns[p.burn][0]
            if not after <= t_b <= before:
                t_b = float(np.clip(after + 0.3 * (before - after), lo, hi))
                burns[p.burn] = (t_b, burns[p.burn][1])
            cuts.append(t_b)
        else:
            cuts.append(peri.t if p.end == "perilune" else arrival_t)
    states, slens = _sample_cuts(model, tr, cuts, lambda p: arcs[p.index])
    return states, [dv for _, dv in burns], slens


def _sample_cuts(model, tr, cuts, arc_of):
    """Nodes and lengths of each coast between consecutive ``cuts``, sampled on ``arc_of(phase)``."""
    states, slens = [], []
    for p in tr.phases:
        a, b, arc = cuts[p.index], cuts[p.index + 1], arc_of(p)
        if b <= a:  # a burn at the very start: an empty coast
            z = np.r_[arc.state(a), a]
            states.append(np.repeat(z[:, None], tr.segments + 1, axis=1))
            slens.append(0.0)
            continue
        zs, slen = sample_phase(model, arc, a, b, tr.segments)
        states.append(zs)
        slens.append(slen)
    return states, slens


def initial_guess(problem, model, tr: Transcription):
    """Node states per phase, burn vectors, phase lengths and start variables for ``tr``."""
    if is_injection(problem):
        return injection_guess(problem, model, tr)
    st = problem.start
    t_end = problem.latest_epoch()
    t, y = st.epoch, np.asarray(st.state, dtype=float)
    burns = []
    for j, b in enumerate(problem.burns):
        lo, hi = b.window
        tb = max(lo, t) + 0.1 * (hi - max(lo, t)) if hi > max(lo, t) else max(lo, t)
        burns.append([tb, np.zeros(3)])
    outbound = [j for j, b in enumerate(problem.burns) if b.leg == "outbound"]
    if outbound:
        j = outbound[0]
        tb, spec = burns[j][0], problem.burns[outbound[0]]
        yb = _coast(model, t, y, tb, events=()).y[:, -1] if tb > t else y
        burns[j][1] = linear_targeting(problem, model, tb, yb, t_end, spec.direction, spec.max_dv_mps / 1000.0)
    # propagate the guessed path: one arc per outbound burn, then the rest
    arcs, tt, yy = [], t, y.copy()
    for j in outbound:
        tb, dv = burns[j]
        arcs.append(_coast(model, tt, yy, max(tb, tt + 1e-3), events=()))
        yy = arcs[-1].y[:, -1].copy()
        yy[3:] += dv
        tt = max(tb, tt)
    rest = _coast(model, tt, yy, t_end, entry_radius=problem.arrival.entry_radius_km)
    arcs += [rest] * (len(tr.phases) - len(arcs))
    return _sample_phases(problem, model, tr, arcs, [tuple(b) for b in burns], t) + ({},)


# -- solve loop -----------------------------------------------------------------------------------
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
    solver.slingback_evaluation = record  # read by _solve_nlp into the attempt's record
    return solver


class NLPCache:
    """Built IPOPT solvers, reused by NLPs of the same structure (:func:`structure_key`) and options.

    Building a solver costs ~0.25 s (measured on the bench_abort.py case: most of it generating
    the segments' SX derivatives; ~0.7 s before they were assembled per segment), about a warm
    solve; trade-study cells, the zero-burn re-solve and repeated solves share one structure.  Least recently used entries are dropped beyond
    ``size``; an entry holds its model, so the model's ``id`` in the key cannot be reused.
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


def _active_caches() -> list:
    """This thread's cache stack; its bottom is the cache ``solve`` uses unless given another."""
    if not hasattr(_LOCAL, "stack"):
        _LOCAL.stack = [NLPCache()]
    return _LOCAL.stack


def _solve_nlp(tr: Transcription, x0, lam=None, extra=None):
    opts = {**IPOPT_OPTIONS, **(WARM_OPTIONS if lam is not None else {}), **(extra or {})}
    cache = _active_caches()[-1]
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
    return sol, {"timing_s": timing, "build_s": round(t_build, 4), "evaluation": getattr(solver, "slingback_evaluation", None), "status": st["return_status"], "success": bool(st["success"]), "iterations": int(st["iter_count"]),
                 "wall_s": wall, "objective": float(sol["f"])}


def _violations(tr: Transcription, x, g) -> list[str]:
    """Names of the constraint families most violated at ``x`` (for infeasibility reports)."""
    g = np.asarray(g).ravel()
    viol = np.maximum(tr.lbg - g, 0.0) + np.maximum(g - tr.ubg, 0.0)
    worst = []
    for name, sl in tr.v.gindex.items():
        if sl.stop > sl.start and viol[sl].max() > 1e-6:
            worst.append((viol[sl].max(), name))
    return [f"{name} (scaled violation {val:.2e})" for val, name in sorted(worst, reverse=True)[:4]]


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


def _plan(problem, model, tr, unpacked, status, reason, verification, solver_log, x, lam, stages=()):
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
        problem=problem_dict(problem),
        warm={"x": list(map(float, x)), "lam_x": list(map(float, lam[0])), "lam_g": list(map(float, lam[1])),
              "segments": tr.segments, "steps": tr.steps},
    )


def problem_dict(problem):
    try:
        from .problem_file import problem_to_dict
    except ImportError:  # the file layer is optional for library use
        return problem.to_dict()
    return problem_to_dict(problem)


def _continuation(problem, say, ipopt_options):
    """Solve the problem in each cheaper model of ``problem.model.continuation`` in turn, each
    warm-starting the next; returns (the last usable plan or None, a record per stage)."""
    plan, stages = None, []
    for kind in problem.model.continuation:
        sub = replace(problem, model=replace(problem.model, kind=kind, continuation=()))
        say(f"continuation: solving in the {kind} model first")
        trial = solve(sub, warm=plan, progress=say, ipopt_options=ipopt_options)
        stages.append({"model": kind, "status": trial.status, "iterations": trial.solver.get("iterations"),
                       "wall_s": trial.solver.get("wall_s"), "total_dv_mps": trial.total_dv_mps})
        if trial.status in ("verified", "unverified"):
            plan = trial
    return plan, stages


def relayout(tr_from: Transcription, x, tr_to: Transcription) -> np.ndarray:
    """The point ``x`` of one transcription as a starting point of another with the same coasts
    (e.g. a burn switched between fixed and free direction)."""
    u = tr_from.unpack(x)
    x = np.asarray(x, dtype=float)
    start = {k: float(x[tr_from.v.index[k]][0]) for k in ("tau_injection", "raan", "arg_latitude")
             if k in tr_from.v.index}
    return tr_to.guess_vector(u["phases"], [dv for _, dv, _ in u["burns"]], u["slens"], start)


def model_span(problem) -> tuple[float, float]:
    """Epochs a problem's model must cover (the injection seed looks up to 3 days back)."""
    back = 3.0 * 86400.0 if is_injection(problem) else 0.0
    return problem.start_epoch - back, problem.latest_epoch()


def _prune(problem, plan, model, say, ipopt_options):
    """Re-solve with near-zero burns switched off; keep that plan when it is verified and cheaper.

    A burn whose optimum is zero is a degenerate point of the cone ``sigma^2 >= |dv|^2``: IPOPT
    tends to stop with a few cm/s left in it (measured on the demo abort: 1 cm/s in an optional
    return trim, 0.15 % above the one-burn optimum).  Fixing those burns at zero removes the
    degeneracy; the warm start makes it cheap.
    """
    small = [j for j, b in enumerate(plan.burns) if b.dv_mps < PRUNE_MPS and problem.burns[j].max_dv_mps > 0]
    if not small:
        return plan
    # the epoch of a zero burn is fixed where it is: free, its cut could slide (a degenerate direction)
    zeroed = replace(problem, burns=tuple(replace(b, max_dv_mps=0.0, window=(plan.burns[j].epoch,) * 2)
                                          if j in small else b for j, b in enumerate(problem.burns)))
    say(f"re-solving with burn(s) {', '.join(str(j + 1) for j in small)} (under {PRUNE_MPS} m/s) fixed at zero")
    trial = solve(zeroed, warm=plan, model=model, progress=say, ipopt_options=ipopt_options)
    if not (trial.verified and trial.total_dv_mps < plan.total_dv_mps):
        return plan
    trial.problem = problem_dict(problem)
    trial.solver["zeroed_burns"] = [j + 1 for j in small]
    trial.solver["attempts"] = plan.solver["attempts"] + trial.solver["attempts"]
    return trial


# -- several burns: the primary burn alone, then the primer test -------------------------------------
#: A held-zero burn is proved useless where the primer magnitude |p| stays within 1 + PRIMER_TOL.
PRIMER_TOL = 1e-3
#: Size (m/s) of a released burn in the starting point of the full NLP, along the primer direction.
RELEASE_MPS = 0.5


def _usable_burns(problem) -> list[int]:
    """Indices of the burns allowed a non-zero size."""
    return [j for j, b in enumerate(problem.burns) if b.max_dv_mps > 0]


def held_burns(problem) -> list[int]:
    """Burns solved at zero first in a cold multi-burn solve: every burn after the first usable
    one (for the Δv objectives; a budget objective, where Δv is not priced, is solved whole)."""
    if problem.objective.kind not in ("min-dv", "weighted"):
        return []
    return _usable_burns(problem)[1:]


def primer_scan(tr: Transcription, x, lam_g, lam_x=None) -> list[dict]:
    """The primer vector at every node of the NLP, from its multipliers.

    With ``L = f + lam_g . g``, an impulse ``delta`` added to the velocity at a node changes the
    optimal Lagrangian by ``dL/ddelta . delta`` to first order: ``lam`` of the defect that ends at
    that node (the node is the segment's end plus the impulse), minus ``lam`` of the link for the
    first node of a coast, or minus ``lam_x`` of the fixed start state (given ``lam_x``).  The
    impulse also costs ``price * |delta|`` (``price = df/dsigma``), so it pays iff
    ``|p| = |dL/ddelta| / price > 1``, and then along ``-dL/ddelta``.  This is the primer vector
    condition of impulsive optimal control (Lawden 1963; Prussing, "Primer vector theory and
    applications", in Conway (ed.), Spacecraft Trajectory Optimization, 2010; cited from memory),
    read off the discrete adjoint instead of integrating the costate equations.

    Returns one dict per coast: ``phase``, node ``epochs`` (TDB s), ``magnitude`` |p| and unit
    ``direction`` (3, N+1) of the impulse that lowers the cost (ECI).
    """
    g = np.asarray(lam_g, dtype=float).ravel()
    x = np.asarray(x, dtype=float).ravel()
    price = float(ca.Function("price", [tr.nlp["x"]], [ca.gradient(tr.f, tr.sigma[0])])(x))
    unpacked = tr.unpack(x)
    out = []
    for p, zs in zip(tr.phases, unpacked["phases"]):
        n = tr.segments
        dldd = np.full((3, n + 1), np.nan)
        dldd[:, 1:] = g[tr.v.gindex[f"defects{p.index}"]].reshape(7, n, order="F")[3:6]
        if f"link{p.index}" in tr.v.gindex:
            dldd[:, 0] = -g[tr.v.gindex[f"link{p.index}"]][3:6]
        elif lam_x is not None:  # the fixed start state: sensitivity of the optimum to its bounds
            dldd[:, 0] = -np.asarray(lam_x, dtype=float).ravel()[tr.v.index[f"z{p.index}"]][3:6]
        mag = np.linalg.norm(dldd, axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out.append({"phase": p.index, "epochs": zs[6].copy(), "magnitude": mag / price,
                        "direction": -dldd / mag, "gain": -dldd / price, "velocity": zs[3:6].copy()})
    return out


def _release_candidates(problem, epochs, t_peri, scan, j):
    """The node of largest primer magnitude where burn ``j`` may be placed: inside its window and
    leg, between the burns of ``epochs`` (full index -> epoch; in the layout's order) at the
    minimum spacing from them.  Returns (epoch, |p|, unit direction) or None."""
    b = problem.burns[j]
    lo, hi = b.window
    if b.leg == "outbound":
        hi = min(hi, t_peri)
    else:
        lo = max(lo, t_peri)
    gap = problem.min_burn_spacing_s
    order = sorted(set(epochs) | {j}, key=lambda q: (problem.burns[q].leg != "outbound", q))
    k = order.index(j)
    if k > 0:
        lo = max(lo, epochs[order[k - 1]] + gap)
    if k + 1 < len(order):
        hi = min(hi, epochs[order[k + 1]] - gap)
    best = None
    for ph in scan:
        for t, m, d, gain, vel in zip(ph["epochs"], ph["magnitude"], ph["direction"].T, ph["gain"].T,
                                      ph["velocity"].T):
            if b.direction != "free":  # only the component along the burn's fixed direction counts
                u = (1.0 if b.direction == "along" else -1.0) * vel / np.linalg.norm(vel)
                m, d = float(gain @ u), u
            if lo <= t <= hi and np.isfinite(m) and (best is None or m > best[1]):
                best = (float(t), float(m), d.copy())
    return best


def _path_guess(problem, model, tr, t0, y0, burns, start=None):
    """Starting point of ``tr`` from the state ``y0`` at ``t0`` and impulsive ``burns``
    [(epoch, dv km/s)] per burn (a burn at ``t0`` is applied there): the path is propagated
    through every burn and cut into the transcription's coasts."""
    t_end = problem.latest_epoch()
    order = sorted(range(len(burns)), key=lambda j: burns[j][0])
    pieces, t, y = [], t0, np.asarray(y0, dtype=float).copy()
    for j in order:
        tb, dv = burns[j]
        if tb > t:
            pieces.append(_coast(model, t, y, tb, events=("perilune",)))
            y, t = pieces[-1].y[:, -1].copy(), tb
        y[3:] += dv
    pieces.append(_coast(model, t, y, t_end, entry_radius=problem.arrival.entry_radius_km))
    outbound_end = max([burns[j][0] for j, b in enumerate(problem.burns) if b.leg == "outbound"] + [t0])

    def piece_at(tt):
        return next(a for a in reversed(pieces) if a.t[0] <= tt + 1e-6)

    peri = _first_perilune(piece_at(outbound_end), outbound_end)
    if peri is None:
        raise SolveError("the released path has no perilune")
    last = pieces[-1]
    name = "entry" if problem.arrival.target == "entry" else "perigee"
    arrival = next((e for e in last.events if e.t > peri.t and e.name == name), None)
    arrival_t = arrival.t if arrival is not None else min(peri.t + 3.0 * 86400.0, last.t[-1])
    cuts = [t0] + [burns[p.burn][0] if p.end == "burn" else peri.t if p.end == "perilune" else arrival_t
                   for p in tr.phases]
    if np.any(np.diff(cuts) < 0):
        raise SolveError("the burns do not fit between the perilune and the arrival")
    states, slens = _sample_cuts(model, tr, cuts, lambda p: piece_at(cuts[p.index]))
    return tr.guess_vector(states, [dv for _, dv in burns], slens, start)


def _screen_finds_seeds(problem, model) -> bool:
    """Whether the global layer's screen finds any seed of ``problem`` inside its caps (the
    screen is remembered, so the solve that follows does not repeat it)."""
    from .search import screened

    if is_injection(problem):  # the search screens state starts only
        return True
    model = model or build_model(problem.model, *model_span(problem))
    seeds, _ = screened(problem, model)
    return any(s.dv is not None for s in seeds)


def _with_zero_burns(problem, model, first, burns, kept, steps, start):
    """The verified plan ``first`` of the problem without the held burns, as a plan of the whole
    ``problem``: the held burns at zero at their chosen epochs (the path, and so its verification,
    is the same), and a primal warm-start point of the whole layout."""
    from copy import copy

    try:
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        x = _path_guess(problem, model, tr, first.start_epoch, first.start_state, burns, start)
    except SolveError:
        return None
    plan = copy(first)
    plan.burns = [first.burns[kept.index(j)] if j in kept else Burn(float(burns[j][0]), (0.0,) * 3, (0.0,) * 3)
                  for j in range(len(problem.burns))]
    plan.problem = problem_dict(problem)
    plan.solver = dict(first.solver)
    plan.warm = {"x": list(map(float, x)), "lam_x": [], "lam_g": [], "segments": tr.segments, "steps": tr.steps}
    plan._transcription = None
    return plan


def _solve_staged(problem, model, say, ipopt_options, stages, t_start, continued=False) -> Plan:
    """Several burns, cold: solve with one burn alone, test the others (held at zero) with the
    primer vector, then give the whole layout's answer.

    1. The problem with only the first listed usable burn (the next one if that does not verify;
       all burns together if none does) is solved and verified.
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
    usable = _usable_burns(problem)
    alone_plans = []  # (plan, its transcription, held burns, kept burns, the burn alone)
    for alone in usable:  # each usable burn alone; the cheapest verified one goes on
        held = [j for j in usable if j != alone]
        kept = [j for j in range(len(problem.burns)) if j not in held]
        reduced = replace(problem, burns=tuple(problem.burns[j] for j in kept))
        if alone_plans and not _screen_finds_seeds(reduced, model if own is None else own):
            say(f"burn {alone + 1} alone: no screened seed meets the ranges within its cap; not solved")
            continue
        say(f"several burns: solving with burn {alone + 1} alone "
            f"(burn(s) {', '.join(str(j + 1) for j in held)} held at zero)")
        plan = solve(reduced, model=own, progress=say, ipopt_options=ipopt_options, _staged=True)
        tr1 = getattr(plan, "_transcription", None)
        say(f"burn {alone + 1} alone: {plan.status}, {plan.total_dv_mps:.4f} m/s")
        if plan.status == "verified" and tr1 is not None:
            alone_plans.append((plan, tr1, held, kept, alone))
    if not alone_plans:
        say("no burn alone gives a verified plan; solving all burns together")
        return solve(problem, model=own, progress=say, ipopt_options=ipopt_options, _staged=True)
    first, tr1, held, kept, alone = min(alone_plans, key=lambda a: a[0].total_dv_mps)
    alone_record = [{"burn": a[4] + 1, "total_dv_mps": a[0].total_dv_mps} for a in alone_plans]
    scan = primer_scan(tr1, first.warm["x"], first.warm["lam_g"])
    epochs = {j: first.burns[i].epoch for i, j in enumerate(kept)}
    t_peri = first.events[0].epoch
    picks = {j: _release_candidates(problem, epochs, t_peri, scan, j) for j in held}
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
        say(f"primer test: |p| = {p_max:.4f} > 1 for burn {j + 1} at {t_rel - first.start_epoch:.0f} s from "
            "the start: a cheaper path uses it; solving all burns together")
        # measured: from the targeted cold guess the whole problem converges where a small burn
        # released along the primer from the one-burn answer stalls (|p| = 19 case of test_primer)
        direct = solve(problem, model=own, progress=say, ipopt_options=ipopt_options, _staged=True)
        if direct.verified and direct.total_dv_mps < first.total_dv_mps:
            direct.solver["primer"] = {**record, "result": f"|p| = {p_max:.4f} > 1 for burn {j + 1}; "
                                       "solved all burns together"}
            candidates.append(direct)
        else:
            say(f"that solve ended {direct.status}; releasing burn {j + 1} at the primer's peak instead")
            trial = list(burns)
            trial[j] = (t_rel, direction * RELEASE_MPS / 1000.0)
            released = None
            try:
                tr = Transcription(problem, model, steps, problem.mesh.segments)
                x0 = _path_guess(problem, model, tr, first.start_epoch, first.start_state, trial, start)
                released = _solve_loop(problem, model, tr, x0, None, say, ipopt_options, stages, t_start)
            except SolveError as exc:
                say(f"release: no starting point ({exc})")
            if released is not None and released.verified and released.total_dv_mps < first.total_dv_mps:
                released.solver["primer"] = {**record, "result": f"burn {j + 1} released at |p| = {p_max:.4f}"}
                candidates.append(released)
    else:
        say("primer test: no held burn can lower the cost (max |p| "
            f"{max((c[1] for c in picks.values() if c is not None), default=0.0):.4f} <= 1)")
    if not candidates or candidates[0].total_dv_mps > first.total_dv_mps:
        note = ("held burns proved useless (|p| <= 1 + tol in their windows)" if not helpful else
                "|p| > 1 for a held burn, but neither the whole solve nor the release was cheaper; held "
                "burn(s) kept at zero (a cheaper path may exist)")
        plan = _with_zero_burns(problem, model, first, burns, kept, steps, start)
        if plan is not None:
            plan.solver["primer"] = {**record, "result": note}
            candidates.append(plan)
    if not candidates:
        if direct is not None:  # the whole problem was solved already (above)
            return direct
        say("the staged solve did not give a verified whole-layout plan; solving all burns together")
        return solve(problem, model=own, progress=say, ipopt_options=ipopt_options, _staged=True)
    best = min(candidates, key=lambda pl: pl.total_dv_mps)
    best.solver["stages"] = list(best.solver.get("stages", [])) + [
        {"stage": "without the held burns", "status": first.status, "total_dv_mps": first.total_dv_mps,
         "iterations": first.solver.get("iterations")}]
    return best


def solve(problem: Problem, *, warm: Plan | None = None, progress=None, model=None,
          ipopt_options: dict | None = None, cache=None, _staged: bool = False) -> Plan:
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
    cache : NLPCache or False, optional
        Built solvers to reuse (default: one cache per thread, kept between calls); ``False``
        builds every solver afresh.

    Returns
    -------
    Plan
        ``status`` is ``"verified"``, ``"unverified"``, ``"infeasible"`` or ``"failed"``.
    """
    if cache is None:
        return _solve_impl(problem, warm, progress, model, ipopt_options, _staged)
    stack = _active_caches()
    stack.append(cache)
    try:
        return _solve_impl(problem, warm, progress, model, ipopt_options, _staged)
    finally:
        stack.pop()


def _solve_impl(problem, warm, progress, model, ipopt_options, _staged) -> Plan:
    say = progress or (lambda msg: None)
    t_start = time.perf_counter()
    stages = []
    if problem.model.continuation and warm is None and model is None:
        if not _staged and held_burns(problem):
            # staged first, each stage with its own continuation: continuing the whole layout
            # from a cheaper model's plan carries its zero held burns, a degenerate start
            # (measured, problems/demo-injection.toml: 300 + 300 + 137 iterations in the
            # ephemeris stage, where the one-burn layout's own continuation needs 3x fewer)
            model = build_model(problem.model, *model_span(problem))
            return _solve_staged(problem, model, say, ipopt_options, stages, t_start, continued=True)
        warm, stages = _continuation(problem, say, ipopt_options)
    if model is None:
        model = build_model(problem.model, *model_span(problem))
    if warm is None and not _staged and held_burns(problem):
        return _solve_staged(problem, model, say, ipopt_options, stages, t_start)
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
        say("warm start from the given plan" + ("" if lam is not None else " (primal point only)"))
    elif is_injection(problem) and problem.burns[0].direction == "free":
        # A free-direction injection is started from the same design with the injection along the
        # velocity (measured: IPOPT diverges from the raw seed, converges from this point).
        along = replace(problem, burns=(replace(problem.burns[0], direction="along"),) + problem.burns[1:])
        say("free-direction injection: solving with the injection along the velocity first")
        first = solve(along, progress=say, model=model, ipopt_options=ipopt_options)
        if first.status not in ("verified", "unverified"):
            return first
        stages = [{"model": problem.model.kind, "status": first.status, "stage": "injection along velocity",
                   "iterations": first.solver.get("iterations"), "total_dv_mps": first.total_dv_mps}]
        steps = list(first.warm["steps"])
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        x0 = relayout(Transcription(along, model, steps, problem.mesh.segments), first.warm["x"], tr)
    else:
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        searched = record = None
        if not is_injection(problem) and problem.objective.kind in ("min-dv", "weighted"):
            searched, record = _global_search(problem, model, tr, say, ipopt_options, stages, t_start)
            if searched is not None and searched.verified:
                return searched
            say("search: no start gave a verified plan; falling back on the targeted guess")
        say("initial guess: targeted coast")
        try:
            states, dvs, slens, start = initial_guess(problem, model, tr)
        except SolveError as exc:
            if searched is not None:
                return _with_search_reason(searched, record)
            if record is not None:
                raise SolveError(f"{exc}; {search_summary(record)}") from None
            raise
        x0 = tr.guess_vector(states, dvs, slens, start)
        plan = _solve_loop(problem, model, tr, x0, lam, say, ipopt_options, stages, t_start)
        if searched is not None or record is not None:
            plan.solver["search"] = {**(record or {}), "fallback": plan.status}
            plan = _with_search_reason(plan, record)
        return plan
    return _solve_loop(problem, model, tr, x0, lam, say, ipopt_options, stages, t_start)


def _with_search_reason(plan, record):
    """An unverified answer's reason also says what the global search tried and why it failed."""
    if not plan.verified and record is not None:
        plan.reason = f"{plan.reason}; {search_summary(record)}" if plan.reason else search_summary(record)
    return plan


def _global_search(problem, model, tr, say, ipopt_options, stages, t_start):
    """The global layer (:mod:`optimizer.search`): screened seeds over every burn window, the most
    promising solved from their own paths.  Returns (the cheapest verified plan, else the last
    plan tried, else None; the search record), the record also under ``plan.solver["search"]``."""
    from .search import global_solve  # noqa: E402  (the layer above the loop)

    st = problem.start
    tried = []

    def solve_from(burns):
        x0 = _path_guess(problem, model, tr, st.epoch, np.asarray(st.state, dtype=float), burns)
        plan = _solve_loop(problem, model, tr, x0, None, say, ipopt_options, stages, t_start)
        tried.append(plan)
        return plan

    best, record = global_solve(problem, model, solve_from, say)
    plan = best if best is not None else (tried[-1] if tried else None)
    if plan is not None:
        plan.solver["search"] = record
    return plan, record


def _solve_loop(problem, model, tr, x0, lam, say, ipopt_options, stages, t_start) -> Plan:
    """NLP, verification and per-coast refinement from the starting point ``x0`` of ``tr``."""
    log = []
    for attempt in range(problem.mesh.max_refinements + 1):
        say(f"NLP: {tr.v.n} variables, {tr.v.ng} constraints, steps per coast {tr.steps}")
        sol, rec = _solve_nlp(tr, x0, lam, ipopt_options)
        rec["build_and_solve_s"] = time.perf_counter() - t_start
        log.append(rec)
        tried = [(sol, rec)]
        for label, retry in RETRIES:
            # A cold start that stalls, or that IPOPT declares locally infeasible, is retried: the
            # verdict is about the iterates' neighbourhood.  Measured: the return-trim-only case
            # of tests/test_primer.py is "infeasible" at weight 0.3 and 1, solved at 0.1 and 0.03.
            if rec["success"] or lam is not None or set(retry) & set(ipopt_options or {}):
                break
            say(f"IPOPT: {rec['status']} after {rec['iterations']} iterations; retrying with {label}")
            sol, rec = _solve_nlp(tr, x0, None, {**(ipopt_options or {}), **retry})
            rec["retry"] = label
            rec["build_and_solve_s"] = time.perf_counter() - t_start
            log.append(rec)
            tried.append((sol, rec))
        if not rec["success"]:  # none converged: report the first infeasibility verdict, if any
            sol, rec = next((t for t in tried if "Infeasible" in t[1]["status"]), tried[-1])
        x = np.asarray(sol["x"]).ravel()
        lam = (np.asarray(sol["lam_x"]).ravel(), np.asarray(sol["lam_g"]).ravel())
        unpacked = tr.unpack(x)
        say(f"IPOPT: {rec['status']} after {rec['iterations']} iterations ({rec['wall_s']:.2f} s)")
        if not rec["success"]:
            why = _violations(tr, x, sol["g"])
            status = "infeasible" if "Infeasible" in rec["status"] else "failed"
            reason = f"IPOPT stopped with {rec['status']}"
            if len(tried) > 1:
                reason += " (retried with " + "; ".join(f"{t[1]['retry']}: {t[1]['status']}" for t in tried[1:]) + ")"
            if why:
                reason += "; largest constraint violations at the last iterate: " + ", ".join(why)
            return _plan(problem, model, tr, unpacked, status, reason, None, log, x, lam, stages)
        claimed = _claimed_events(tr, model, unpacked)
        burns = [make_burn(t, dv, pre) for t, dv, pre in unpacked["burns"]]
        start = unpacked["start"]
        ver = verify(model, problem, start[6], start[:6], burns, claimed, claimed[-1].epoch + 3600.0)
        log[-1]["verify_s"] = time.perf_counter() - t_start - rec["build_and_solve_s"]
        if ver.passed:
            say(f"verified: total Δv {sum(b.dv_mps for b in burns):.3f} m/s")
            log[-1]["end_to_end_s"] = time.perf_counter() - t_start
            plan = _plan(problem, model, tr, unpacked, "verified", "", ver, log, x, lam, stages)
            plan._transcription = tr  # kept for the primer test of a staged solve (not serialised)
            return _prune(problem, plan, model, say, ipopt_options)
        say("verification failed: " + "; ".join(ver.violations))
        if attempt == problem.mesh.max_refinements:
            break
        errs = _segment_errors(tr, model, unpacked)
        new_steps = [m * 2 if e > SEGMENT_TOL_KM else m for m, e in zip(tr.steps, errs)]
        if new_steps == tr.steps:
            new_steps = [m * 2 for m in tr.steps]
        say(f"refining coasts (segment disagreement {', '.join(f'{e:.2g}' for e in errs)} km)")
        tr = Transcription(problem, model, new_steps, problem.mesh.segments)
        x0 = x
    reason = "the re-propagated path disagrees with the optimiser: " + "; ".join(ver.violations)
    return _plan(problem, model, tr, unpacked, "unverified", reason, ver, log, x, lam, stages)
