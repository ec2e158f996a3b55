"""Starting points of the NLP: linear targeting, the injection seed, guessed paths cut into coasts.

Everything here runs on the independent propagator and scipy; nothing calls IPOPT, so a guess can
be tested on its own.  ``initial_guess`` corrects the first burn by least-norm Newton steps on the
perilune and the return's angular momentum (finite differences on the numpy model) and samples
each coast at equal steps of the regularised variable; ``path_guess`` cuts a path through given
burns into the transcription's coasts; ``relayout`` carries a point from one layout to another.

May import: constants/time/frames, problem, models, ephemeris, propagate, events, verify,
transcription, and the wing's ``base`` and ``seed``.  Never ``ipopt``, ``primer`` or ``strategy``.
"""

from __future__ import annotations

import math

import numpy as np

from ..constants import SECONDS_PER_DAY
from ..events import LUNAR_SPHERE_KM, lunar_encounter
from ..propagate import propagate
from ..transcription import Transcription, is_injection
from .base import SolveError
from .seed import circumlunar

GUESS_RTOL = 1e-9


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
    y = _coast(model, t_peri, y_peri, t_peri + SECONDS_PER_DAY, events=()).y[:, -1]
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
    the parking altitude near the middle of the injection window (:mod:`optimizer.solve.seed`)."""
    st = problem.start
    t_mid = 0.5 * sum(st.epoch_window)
    lo, hi = problem.lunar.altitude_km
    alt = min(0.5 * (lo + hi), lo + 300.0)
    ret_alt = _target_radius(problem, model) - model.earth.radius
    t_p, seed = t_mid + 3.0 * SECONDS_PER_DAY, None
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
        raan = into_window(raan, *np.radians(st.raan_window_deg))
    arc = _coast(model, t_d, y_d, problem.latest_epoch(), entry_radius=problem.arrival.entry_radius_km)
    burns = [(t_d, y_d[3:] - v_park)]
    burns += [(float(np.clip(t_d + 0.2 * (seed.perilune_epoch - t_d), *b.window)), np.zeros(3))
              for b in problem.burns[1:]]
    start = {"tau_injection": (t_d - tr.sc.t_ref) / tr.sc.tu, "raan": raan, "arg_latitude": u}
    return _sample_phases(problem, model, tr, [arc] * len(tr.phases), burns, t_d) + (start,)


def into_window(angle: float, lo: float, hi: float) -> float:
    """``angle`` (rad) moved by whole turns into ``[lo, hi]`` when a turn fits, else the bound
    nearest to it on the circle.  (An angle from ``atan2`` lies in (-pi, pi]: clipping it into a
    window given as [0, 360] deg sent every negative node to 0, a far worse start.)"""
    turn = 2.0 * math.pi
    inside = angle + turn * math.ceil((lo - angle) / turn)  # the least equivalent angle >= lo
    if inside <= hi:
        return float(inside)
    gap = lambda bound: abs((angle - bound + math.pi) % turn - math.pi)  # noqa: E731
    return float(min((lo, hi), key=gap))


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
    arrival_t = arrival.t if arrival is not None else min(peri.t + 3.0 * SECONDS_PER_DAY, arc.t[-1])
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


def path_guess(problem, model, tr, t0, y0, burns, start=None):
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
    arrival_t = arrival.t if arrival is not None else min(peri.t + 3.0 * SECONDS_PER_DAY, last.t[-1])
    cuts = [t0] + [burns[p.burn][0] if p.end == "burn" else peri.t if p.end == "perilune" else arrival_t
                   for p in tr.phases]
    if np.any(np.diff(cuts) < 0):
        raise SolveError("the burns do not fit between the perilune and the arrival")
    states, slens = _sample_cuts(model, tr, cuts, lambda p: piece_at(cuts[p.index]))
    return tr.guess_vector(states, [dv for _, dv in burns], slens, start)


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
    back = 3.0 * SECONDS_PER_DAY if is_injection(problem) else 0.0
    return problem.start_epoch - back, problem.latest_epoch()
