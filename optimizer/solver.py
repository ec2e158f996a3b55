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
import time
from dataclasses import replace

import casadi as ca
import numpy as np

from . import __version__
from .models import build_model
from .plan import EventRecord, Plan
from .problem import Problem
from .propagate import propagate
from .seed import circumlunar
from .transcription import Transcription, is_injection
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
    "ipopt.max_iter": 300,
    "ipopt.tol": 1e-9,
    "ipopt.constr_viol_tol": 1e-10,
    "ipopt.acceptable_tol": 1e-7,
    "ipopt.acceptable_constr_viol_tol": 1e-9,
    "ipopt.mu_strategy": "adaptive",
    "ipopt.nlp_scaling_method": "gradient-based",
}
WARM_OPTIONS = {
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
           entry_radius=None, terminal=()):
    return propagate(model, t0, y0, t1, events=events, entry_radius=entry_radius, terminal=terminal,
                     rtol=GUESS_RTOL, atol=1e-9)


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
    return next((e for e in arc.events if e.name == "perilune" and e.t > after), None)


class _Encounter:
    """What linear targeting measures of a coast after a burn: the incoming selenocentric
    angular momentum (its size fixes the osculating perilune radius, and it stays smooth even
    when the pass would hit the Moon) and the return's geocentric angular momentum."""

    def __init__(self, model, t_burn, y, t_end):
        arc = _coast(model, t_burn, y, t_end, events=("perilune",), terminal=("perilune",))
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


def _newton(measure, goal, weight, basis, c0, iters, lower=None):
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
    alt_goal = float(np.clip(first.alt, lo + margin, min(hi, lo + 2000.0) - margin))
    r_p = model.moon.radius + alt_goal
    h_moon_goal = r_p * math.sqrt(max(first.v_inf2, 0.0) + 2 * model.gm_moon / r_p)
    w_moon = h_moon_goal * 1e-3  # 0.1 % of the momentum: ~1 km of perilune

    def perilune_only(c):
        e = encounter(c)
        return None if e is None else np.array([e.h_moon])

    c, _ = _newton(perilune_only, np.array([h_moon_goal]), np.array([w_moon]), basis,
                   np.zeros(basis.shape[1]), iters, lower)
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
            seed = circumlunar(model, t_p, alt, st.altitude_km, ret_alt, guess=(0.0, 2.5),
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
    states, slens = [], []
    for p, a_arc in zip(tr.phases, arcs):
        a, b = cuts[p.index], cuts[p.index + 1]
        if b <= a:  # a burn at the very start: an empty coast
            z = np.r_[a_arc.state(a), a]
            states.append(np.repeat(z[:, None], tr.segments + 1, axis=1))
            slens.append(0.0)
            continue
        zs, slen = sample_phase(model, a_arc, a, b, tr.segments)
        states.append(zs)
        slens.append(slen)
    return states, [dv for _, dv in burns], slens


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
def _solve_nlp(tr: Transcription, x0, lam=None, extra=None):
    opts = dict(IPOPT_OPTIONS)
    opts.update(extra or {})
    if lam is not None:
        opts.update(WARM_OPTIONS)
    solver = ca.nlpsol("slingback", "ipopt", tr.nlp, opts)
    args = dict(x0=x0, lbx=tr.lbx, ubx=tr.ubx, lbg=tr.lbg, ubg=tr.ubg)
    if lam is not None:
        args.update(lam_x0=lam[0], lam_g0=lam[1])
    t0 = time.perf_counter()
    sol = solver(**args)
    wall = time.perf_counter() - t0
    st = solver.stats()
    timing = {k[7:]: round(v, 4) for k, v in st.items() if k.startswith("t_wall_nlp_")}
    return sol, {"timing_s": timing, "status": st["return_status"], "success": bool(st["success"]), "iterations": int(st["iter_count"]),
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
    zeroed = replace(problem, burns=tuple(replace(b, max_dv_mps=0.0) if j in small else b
                                          for j, b in enumerate(problem.burns)))
    say(f"re-solving with burn(s) {', '.join(str(j + 1) for j in small)} (under {PRUNE_MPS} m/s) fixed at zero")
    trial = solve(zeroed, warm=plan, model=model, progress=say, ipopt_options=ipopt_options)
    if not (trial.verified and trial.total_dv_mps < plan.total_dv_mps):
        return plan
    trial.problem = problem_dict(problem)
    trial.solver["zeroed_burns"] = [j + 1 for j in small]
    trial.solver["attempts"] = plan.solver["attempts"] + trial.solver["attempts"]
    return trial


def solve(problem: Problem, *, warm: Plan | None = None, progress=None, model=None,
          ipopt_options: dict | None = None) -> Plan:
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

    Returns
    -------
    Plan
        ``status`` is ``"verified"``, ``"unverified"``, ``"infeasible"`` or ``"failed"``.
    """
    say = progress or (lambda msg: None)
    t_start = time.perf_counter()
    stages = []
    if problem.model.continuation and warm is None and model is None:
        warm, stages = _continuation(problem, say, ipopt_options)
    if model is None:
        model = build_model(problem.model, *model_span(problem))
    steps = [problem.mesh.steps] * (len(problem.burns) + 2)
    lam = None
    if warm is not None and warm.warm.get("x") and warm.warm.get("segments") == problem.mesh.segments \
            and len(warm.warm.get("steps", [])) == len(steps):
        steps = list(warm.warm["steps"])
        tr = Transcription(problem, model, steps, problem.mesh.segments)
        x0 = np.asarray(warm.warm["x"], dtype=float)
        if x0.size != tr.x0.size:
            raise SolveError("the warm-start plan does not match this problem's layout")
        if warm.model.get("name") == problem.model.kind:  # same physics: multipliers carry over too
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
        say("initial guess: targeted coast")
        states, dvs, slens, start = initial_guess(problem, model, tr)
        x0 = tr.guess_vector(states, dvs, slens, start)
    log = []
    for attempt in range(problem.mesh.max_refinements + 1):
        say(f"NLP: {tr.v.n} variables, {tr.v.ng} constraints, steps per coast {tr.steps}")
        sol, rec = _solve_nlp(tr, x0, lam, ipopt_options)
        rec["build_and_solve_s"] = time.perf_counter() - t_start
        log.append(rec)
        if not rec["success"] and "Infeasible" not in rec["status"] and lam is None \
                and "ipopt.hessian_approximation" not in (ipopt_options or {}):
            # measured on the robustness set: where the exact Hessian stalls, a quasi-Newton run
            # from the same start often converges (and the reverse), so try it before giving up
            say(f"IPOPT: {rec['status']} after {rec['iterations']} iterations; retrying with a "
                "limited-memory Hessian")
            sol, rec = _solve_nlp(tr, x0, None, {**(ipopt_options or {}),
                                                 "ipopt.hessian_approximation": "limited-memory"})
            rec["hessian"] = "limited-memory"
            rec["build_and_solve_s"] = time.perf_counter() - t_start
            log.append(rec)
        x = np.asarray(sol["x"]).ravel()
        lam = (np.asarray(sol["lam_x"]).ravel(), np.asarray(sol["lam_g"]).ravel())
        unpacked = tr.unpack(x)
        say(f"IPOPT: {rec['status']} after {rec['iterations']} iterations ({rec['wall_s']:.2f} s)")
        if not rec["success"]:
            why = _violations(tr, x, sol["g"])
            status = "infeasible" if "Infeasible" in rec["status"] else "failed"
            reason = f"IPOPT stopped with {rec['status']}"
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
