"""Out-of-family cases for the global benchmark: a documented, deterministic generator.

Results are for design studies only; not flight-certified; flight use goes through the mission's
own independent verification and licensed practice.

Every case is invented here from its integer ``seed`` alone (``numpy.random.default_rng((GENERATOR_ID,
seed))``); nothing is drawn from the shipped demos (``problems/``) or the robustness set
(``bench_robustness.py``).  **Split: even seeds are the tuning half, odd seeds the held-out half**
(``half_of(seed)``); the held-out half is reported apart and is not looked at while tuning.

Construction of one case (a *planted* plan, so the optimum has a known upper bound):

1. Epoch and model.  The perilune epoch ``t_p`` is drawn uniformly inside slot ``seed // 2`` of 32
   equal slots spanning 2025-01-01 .. 2045-01-01 TDB (so each half covers the 20 years, the
   18.6-year cycle of the Moon's declination range, and the monthly swing; the Moon's declination
   at ``t_p`` is recorded).  Model ``"ephemeris"`` (DE421 fit, Earth, Moon, Sun) for 85 % of the
   cases, ``"earth-moon"`` (circular Moon through DE421's Moon at the start epoch) for 15 %.
   Every check below runs in exactly the model the solver builds for the problem
   (``build_model(problem.model, problem.start_epoch, problem.latest_epoch())``).
2. A ballistic circumlunar free return through a perilune of altitude 100-4000 km at ``t_p``:
   departure perigee 180-400 km, return vacuum perigee 5-70 km (entry target) or 25-300 km
   (perigee target), found by ``fsolve`` on the propagator (``optimizer.solve.seed.ballistic``: the
   in-plane angle and the Moon-relative speed at perilune are the unknowns).  In the Moon's plane
   (tilt 0) for 40 % of the cases, otherwise the pass plane tilted by 3-15 degrees either way
   (reached by continuation in steps of at most 0.1 rad from the in-plane solution).
3. The start epoch ``t0``: from 1 h after the departure perigee (right after injection) to 20 h
   before perilune.  Burn 1: an outbound window of 2-60 h (as long as the coast allows) between
   ``t0`` and 2 h before perilune.  Two-burn cases (40 %) add either a second outbound window
   after the first or a return-leg window starting 4-10 h after perilune (2-60 h long, ending at
   least 12 h before the arrival).
4. The planted burn: epoch ``t_b`` inside burn 1's window, never on the reference scan grid (the
   grid is ``N_SCAN`` evenly spaced epochs over the window; ``t_b`` sits between two grid epochs,
   25-75 % of the way), Δv of random direction and size: 1-60 m/s (log-uniform) for the ordinary
   cases (70 %), 0.05-1 m/s for near-ballistic ones (15 %), and 20-60 m/s pointed so that the
   coast without it comes back far too steep (15 %: its osculating perigee below the entry
   interface by at least 500 km, or into the Earth).  The start state is the ballistic state at
   ``t_b`` minus the planted Δv, propagated back to ``t0`` (DOP853 at the verification
   tolerances).
5. Ranges that contain the ballistic path with a margin: perilune altitude
   ``[alt - 20..400 km, alt + 50..3000 km]`` (not below 60 km), entry flight-path angle window
   ``[fpa - 0.2..1.0 deg, fpa + 0.2..1.0 deg]`` at 121.92 km (common practice) or vacuum perigee
   ``[alt - 3..20 km, alt + 3..30 km]``; caps ``max(300, 4 |Δv|)`` m/s.  Burning the planted Δv at
   ``t_b`` is then a feasible plan, so the optimum is at most ``|Δv|``: the **planted bound**.
   ``planted_path`` re-propagates it (the test checks it meets every constraint).

Arrival bookkeeping used everywhere here (``path_summary``): the first perilune of the path inside
``REF_LUNAR_SPHERE_KM`` of the Moon (a minimum of lunar distance farther out, e.g. a dip a few hours
after a start far from the Moon, is not a perilune), then the first entry-interface crossing
(entry target) or first perigee (perigee target) after it, each found by the propagator's events in
two legs (start to perilune, perilune to arrival).
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import fsolve

from optimizer.frames import flight_path_angle
from optimizer.models import build_model
from optimizer.problem import BurnSpec, LunarPass, ModelSpec, Problem, ReturnSpec, StateStart
from optimizer.propagate import VERIFY_ATOL, VERIFY_RTOL, propagate, propagate_burns
from optimizer.solve.seed import ballistic
from optimizer.timescales import parse_epoch

GENERATOR_ID = 10_2026  # part of the rng seed: changing it changes every case
GENERATOR_VERSION = "global-cases-4"
# The Moon's sphere of influence, about 66,000 km (Laplace radius a (m_Moon/m_Earth)^(2/5); value
# from memory, e.g. Curtis, Orbital Mechanics for Engineering Students, table of spheres of
# influence).  Rounded here on its own, not taken from optimizer.events.
REF_LUNAR_SPHERE_KM = 66000.0
HOUR = 3600.0
DAY = 86400.0
N_SCAN = 20  # reference scan epochs per case (evenly spaced over burn 1's window)
N_SLOTS = 32
CASES_PER_HALF = 34  # a few seeds find no case (reported); slots wrap round (seed // 2 mod 32)
EPOCH_LO = parse_epoch("2025-01-01T00:00:00 TDB")
EPOCH_HI = parse_epoch("2045-01-01T00:00:00 TDB")
SEED_RTOL = 1e-10  # root-finding of the ballistic path (re-propagated at 1e-12 afterwards)
STEEP_PERIGEE_KM = -500.0  # "far too steep": osculating perigee this far below the entry interface

# acceptance limits of a re-propagated path: those of the Tolerances dataclass's defaults
TOL_PERILUNE_KM = 1.0
TOL_FPA_DEG = 0.01
TOL_PERIGEE_KM = 1.0


def half_of(seed: int) -> str:
    """``"tune"`` for even seeds, ``"heldout"`` for odd ones."""
    return "tune" if seed % 2 == 0 else "heldout"


@dataclass(frozen=True)
class Case:
    """One generated problem and what is known about its optimum.

    Epochs TDB seconds past J2000; Δv in km/s (``planted_dv``) or m/s (``planted_bound_mps``).
    """

    seed: int
    half: str
    problem: Problem
    kind: str  # "planted", "near-ballistic" or "steep"
    layout: str  # "1", "2-out" or "out+ret"
    planted_epoch: float
    planted_dv: tuple[float, float, float]
    planted_bound_mps: float
    perilune_epoch: float
    moon_declination_deg: float
    tilt_deg: float
    info: dict = field(default_factory=dict)  # ballistic and no-burn coast figures, for the tables

    @property
    def key(self) -> str:
        """Hash of the generator version and everything that defines the case."""
        blob = json.dumps([GENERATOR_VERSION, N_SCAN, self.problem.to_dict(), self.planted_epoch,
                           list(self.planted_dv)], sort_keys=True)
        return hashlib.sha1(blob.encode()).hexdigest()[:16]

    def scan_epochs(self) -> np.ndarray:
        lo, hi = self.problem.burns[0].window
        return np.linspace(lo, hi, N_SCAN)

    def row(self) -> dict:
        p = self.problem
        return {"seed": self.seed, "half": self.half, "kind": self.kind, "layout": self.layout,
                "model": p.model.kind, "target": p.arrival.target, "tilt_deg": round(self.tilt_deg, 1),
                "moon_dec_deg": round(self.moon_declination_deg, 1),
                "start_h": round((self.perilune_epoch - p.start.epoch) / HOUR, 1),
                "window_h": round((p.burns[0].window[1] - p.burns[0].window[0]) / HOUR, 1),
                "planted_mps": self.planted_bound_mps}


def model_for(problem: Problem):
    """The force model the solver builds for ``problem`` (a state start)."""
    return build_model(problem.model, problem.start_epoch, problem.latest_epoch())


def osculating_perigee_alt(model, y) -> float:
    """Two-body perigee altitude (km) of the geocentric orbit through state ``y``."""
    r, v = np.asarray(y[:3]), np.asarray(y[3:])
    mu = model.earth.gm
    h = np.cross(r, v)
    e_vec = np.cross(v, h) / mu - r / np.linalg.norm(r)
    e = np.linalg.norm(e_vec)
    p = float(np.dot(h, h)) / mu
    return p / (1.0 + e) - model.earth.radius


@dataclass(frozen=True)
class Summary:
    """Where a path goes: first perilune, and the arrival after it."""

    perilune_alt_km: float  # nan: no perilune
    perilune_epoch: float
    arrival: str  # "entry", "perigee", "impact_earth", "impact_moon" or "none"
    arrival_epoch: float
    fpa_deg: float  # at the entry interface (nan if not crossed)
    # perigee event altitude (perigee target); osculating perigee at entry or at an Earth impact;
    # without an arrival, the closest approach to Earth after perilune
    perigee_alt_km: float
    stop_state: np.ndarray


def path_summary(model, problem, t, y, rtol=VERIFY_RTOL, atol=VERIFY_ATOL) -> Summary:
    """Propagate ``y`` at ``t`` (after the last burn, before perilune) to the arrival."""
    t_end = problem.latest_epoch()
    leg1 = propagate(model, t, y, t_end, events=("perilune", "impact_earth", "impact_moon"),
                     terminal=("perilune",), rtol=rtol, atol=atol, perilune_within=REF_LUNAR_SPHERE_KM)
    peri = leg1.first("perilune")
    if peri is None:
        return _no_perilune(model, leg1)
    return _arrival(model, problem, peri.t, peri.y, _perilune_alt(model, peri), t_end, rtol, atol)


def _no_perilune(model, arc) -> Summary:
    """Where a path that never reached its perilune ended (impact, or the latest epoch)."""
    nan = float("nan")
    stop = arc.y[:, -1]
    kind = arc.status.replace("stopped at ", "") if arc.status != "completed" else "none"
    return Summary(nan, nan, kind, float(arc.t[-1]), nan, osculating_perigee_alt(model, stop), stop)


def _perilune_alt(model, peri) -> float:
    return float(np.linalg.norm(peri.y[:3] - model.moon_position(peri.t)) - model.moon.radius)


NEAR_EARTH_KM = 150000.0  # a perigee farther than this is a dip of the distance near the Moon


def _arrival(model, problem, tp, yp, alt, t_end, rtol, atol) -> Summary:
    ret = problem.arrival
    target = ret.target
    nan = float("nan")
    t, y = tp, yp
    while True:
        leg2 = propagate(model, t, y, t_end, events=("perigee", "entry", "impact_earth", "impact_moon"),
                         entry_radius=ret.entry_radius_km, terminal=(target,), rtol=rtol, atol=atol)
        ev = leg2.first(target)
        if ev is not None and target == "perigee" and np.linalg.norm(ev.y[:3]) > NEAR_EARTH_KM \
                and ev.t < t_end - 60.0:
            t, y = ev.t + 1.0, leg2.state(ev.t + 1.0)  # not the arrival: go on past it
            continue
        break
    if ev is not None and not (target == "perigee" and np.linalg.norm(ev.y[:3]) > NEAR_EARTH_KM):
        if target == "entry":
            fpa = math.degrees(flight_path_angle(ev.y[:3], ev.y[3:]))
            return Summary(alt, tp, "entry", ev.t, fpa, osculating_perigee_alt(model, ev.y), ev.y)
        per_alt = float(np.linalg.norm(ev.y[:3]) - model.earth.radius)
        return Summary(alt, tp, "perigee", ev.t, nan, per_alt, ev.y)
    stop = leg2.y[:, -1]
    kind = leg2.status.replace("stopped at ", "") if leg2.status != "completed" else "none"
    if kind == "impact_earth":  # below the surface: the osculating perigee says how far
        low = osculating_perigee_alt(model, stop)
    else:  # no arrival: the closest approach to Earth after perilune (events and steps)
        near = [np.linalg.norm(e.y[:3]) for e in leg2.events if e.name == "perigee"]
        low = min(near + [float(np.min(np.linalg.norm(leg2.y[:3], axis=0)))]) - model.earth.radius
    return Summary(alt, tp, kind, float(leg2.t[-1]), nan, low, stop)


def full_path_summary(model, problem, burns, rtol=VERIFY_RTOL, atol=VERIFY_ATOL) -> Summary:
    """Whole path from the problem's start through ``burns`` [(epoch, dv km/s)], burns in any leg."""
    t0, y0 = problem.start.epoch, np.asarray(problem.start.state, dtype=float)
    burns = sorted(((float(e), np.asarray(d, dtype=float)) for e, d in burns), key=lambda b: b[0])
    t_end = problem.latest_epoch()
    arcs = propagate_burns(model, t0, y0, burns, t_end, events=("perilune", "impact_earth", "impact_moon"),
                           terminal=("perilune",), rtol=rtol, atol=atol, perilune_within=REF_LUNAR_SPHERE_KM)
    # propagate_burns stops at the first terminal event; the burns after it are then applied below
    last = arcs[-1]
    peri = next((e for a in arcs for e in a.events if e.name == "perilune"), None)
    if peri is None:
        return _no_perilune(model, last)
    nan = float("nan")
    alt = _perilune_alt(model, peri)
    later = [(e, d) for e, d in burns if e > peri.t]
    if not later:
        return _arrival(model, problem, peri.t, peri.y, alt, t_end, rtol, atol)
    # return-leg burns: coast perilune -> burn(s) -> arrival (no arrival may come before them)
    t, y = peri.t, peri.y.copy()
    for e, d in later:
        arc = propagate(model, t, y, e, events=("impact_earth", "perigee"), terminal=(), rtol=rtol, atol=atol)
        near = [ev for ev in arc.events if ev.name == "perigee" and np.linalg.norm(ev.y[:3]) < NEAR_EARTH_KM]
        if arc.status != "completed" or near:
            stop = arc.y[:, -1]
            return Summary(alt, peri.t, "arrived before a return-leg burn", float(arc.t[-1]), nan,
                           osculating_perigee_alt(model, stop), stop)
        t, y = e, arc.y[:, -1].copy()
        y[3:] += d
    s = _arrival_after(model, problem, t, y, t_end, rtol, atol)
    return replace(s, perilune_alt_km=alt, perilune_epoch=peri.t)


def _arrival_after(model, problem, t, y, t_end, rtol, atol) -> Summary:
    return _arrival(model, problem, t, y, float("nan"), t_end, rtol, atol)


def violations(problem, s: Summary) -> list[str]:
    """Constraints of ``problem`` the summarised path breaks (verification tolerances)."""
    out = []
    lo, hi = problem.lunar.altitude_km
    if not lo - TOL_PERILUNE_KM <= s.perilune_alt_km <= hi + TOL_PERILUNE_KM:
        out.append(f"perilune altitude {s.perilune_alt_km:.3f} km outside [{lo}, {hi}]")
    ret = problem.arrival
    if s.arrival != ret.target:
        out.append(f"arrival is {s.arrival}, not {ret.target}")
    elif ret.target == "entry":
        flo, fhi = ret.flight_path_deg
        if not flo - TOL_FPA_DEG <= s.fpa_deg <= fhi + TOL_FPA_DEG:
            out.append(f"entry flight-path angle {s.fpa_deg:.4f} deg outside [{flo}, {fhi}]")
    else:
        plo, phi = ret.perigee_alt_km
        if not plo - TOL_PERIGEE_KM <= s.perigee_alt_km <= phi + TOL_PERIGEE_KM:
            out.append(f"perigee altitude {s.perigee_alt_km:.3f} km outside [{plo}, {phi}]")
    return out


def planted_path(case: Case, model=None) -> Summary:
    """Re-propagate the planted plan (burn ``planted_dv`` at ``planted_epoch``) from the start."""
    model = model_for(case.problem) if model is None else model
    return full_path_summary(model, case.problem, [(case.planted_epoch, case.planted_dv)])


def coast_path(case: Case, model=None) -> Summary:
    """The path with no burn at all."""
    model = model_for(case.problem) if model is None else model
    p = case.problem
    return path_summary(model, p, p.start.epoch, np.asarray(p.start.state, dtype=float))


# -- the generator ----------------------------------------------------------------------------------

def _moon_declination(t) -> float:
    from optimizer.ephemeris import DE421
    r = np.asarray(DE421().moon(t), dtype=float)[:3]
    return math.degrees(math.asin(r[2] / np.linalg.norm(r)))


def _free_return(model, t_p, alt, dep_alt, ret_alt, tilt):
    """Ballistic return through the perilune (continuation in the tilt); None when not found."""
    # hyperbolic excess of ~1.02 km/s (a 150 km perilune at 2.5 km/s) at the asked radius
    p = np.array([0.0, math.sqrt(1.05 + 2.0 * model.moon.gm / (model.moon.radius + alt))])
    steps = max(1, int(math.ceil(abs(tilt) / 0.1)))
    for k in range(steps + 1):
        tk = tilt * k / steps

        def f(q):
            s = ballistic(model, t_p, alt, q[0], q[1], tk, rtol=SEED_RTOL)
            return np.array([s.departure_alt_km - dep_alt, s.return_alt_km - ret_alt]) / 1000.0

        p = fsolve(f, p, xtol=1e-12)
        s = ballistic(model, t_p, alt, p[0], p[1], tk, rtol=SEED_RTOL)
        if abs(s.departure_alt_km - dep_alt) > 1.0 or abs(s.return_alt_km - ret_alt) > 1.0:
            return None
    return s


class GenerationError(RuntimeError):
    pass


def make_case(seed: int) -> Case:
    """The case of ``seed`` (deterministic).  Raises GenerationError when no draw works (rare)."""
    rng = np.random.default_rng((GENERATOR_ID, int(seed)))
    slot = (seed // 2) % N_SLOTS
    span = (EPOCH_HI - EPOCH_LO) / N_SLOTS
    for attempt in range(6):
        t_p = EPOCH_LO + (slot + rng.uniform(0.05, 0.95)) * span
        case = _try_case(seed, rng, float(round(t_p)))
        if case is not None:
            return case
    raise GenerationError(f"seed {seed}: no case after 6 draws")


def _try_case(seed, rng, t_p):
    model_kind = "earth-moon" if rng.uniform() < 0.15 else "ephemeris"
    target = "entry" if rng.uniform() < 0.5 else "perigee"
    alt = float(rng.uniform(100.0, 4000.0))
    dep_alt = float(rng.uniform(180.0, 400.0))
    ret_alt = float(rng.uniform(5.0, 70.0) if target == "entry" else rng.uniform(25.0, 300.0))
    tilt = 0.0 if rng.uniform() < 0.4 else float(rng.choice([-1, 1]) * math.radians(rng.uniform(3.0, 15.0)))
    u = rng.uniform()
    kind = "planted" if u < 0.70 else ("near-ballistic" if u < 0.85 else "steep")
    u = rng.uniform()
    layout = "1" if u < 0.6 else ("2-out" if u < 0.8 else "out+ret")
    start_frac, win_len_h = rng.uniform(), float(rng.uniform(2.0, 60.0))
    fracs = rng.uniform(size=8)
    direction = rng.normal(size=3)
    direction /= np.linalg.norm(direction)
    size = {"planted": math.exp(rng.uniform(0.0, math.log(60.0))),
            "near-ballistic": rng.uniform(0.05, 1.0), "steep": rng.uniform(20.0, 60.0)}[kind]

    # the generation model: wide span, so the backward leg to the departure perigee is covered;
    # for the circular Moon the circle is fixed by the start epoch, so a first pass finds the
    # departure epoch and the start, then the path is rebuilt in the problem's own model
    spec = ModelSpec(kind=model_kind)
    gen = build_model(ModelSpec(kind="ephemeris"), t_p - 6 * DAY, t_p + 8 * DAY)
    s = _free_return(gen, t_p, alt, dep_alt, ret_alt, tilt)
    if s is None or s.departure is None:
        return None
    first = s.departure.t + 1.0 * HOUR
    last = t_p - 20.0 * HOUR
    if last <= first:
        return None
    t0 = float(round(first + start_frac * (last - first)))
    if model_kind == "earth-moon":
        model_em = build_model(spec, t0, t0 + 12 * DAY)
        s = _free_return(model_em, t_p, alt, dep_alt, ret_alt, tilt)
        if s is None or s.departure is None or s.departure.t + HOUR > t0:
            return None

    # burn windows
    w_lo, w_top = t0 + 0.25 * HOUR, t_p - 2.0 * HOUR
    avail = (w_top - w_lo) / HOUR
    length = min(win_len_h, avail)
    if length < 2.0:
        return None
    w0 = w_lo + fracs[0] * (avail - length) * HOUR
    w1 = w0 + length * HOUR
    w0, w1 = float(round(w0)), float(round(w1))
    step = (w1 - w0) / (N_SCAN - 1)
    k = int(fracs[1] * (N_SCAN - 1)) % (N_SCAN - 1)
    t_b = w0 + (k + 0.25 + 0.5 * fracs[2]) * step
    cap = float(max(300.0, math.ceil(4.0 * size)))
    burns = [BurnSpec((w0, w1), cap)]

    problem0 = Problem(name=f"global-{seed}", start=StateStart(t0, (0.0,) * 6), burns=tuple(burns),
                       arrival=ReturnSpec(target=target), model=spec)
    model = model_for(problem0)
    y_p = s.perilune_state
    y_b = propagate(model, t_p, y_p, t_b).y[:, -1]
    summary = path_summary(model, problem0, t_b, y_b)
    if summary.arrival != target or not np.isfinite(summary.perilune_alt_km):
        return None

    # second window
    if layout == "2-out":
        lo2 = w1 + 1.0 * HOUR
        room = (w_top - lo2) / HOUR
        if room >= 2.0:
            l2 = min(2.0 + fracs[3] * 58.0, room)
            burns.append(BurnSpec((float(round(lo2)), float(round(lo2 + l2 * HOUR))), cap))
        else:
            layout = "out+ret"
    if layout == "out+ret":
        lo2 = summary.perilune_epoch + (4.0 + 6.0 * fracs[4]) * HOUR
        room = (summary.arrival_epoch - 12.0 * HOUR - lo2) / HOUR
        if room < 2.0:
            return None
        l2 = min(2.0 + fracs[5] * 58.0, room)
        burns.append(BurnSpec((float(round(lo2)), float(round(lo2 + l2 * HOUR))), cap, leg="return"))

    # the planted Δv, and the start state it implies
    dv = size * direction / 1000.0
    y0 = None
    for trial in range(4 if kind == "steep" else 1):
        candidates = [dv, -dv] if kind == "steep" else [dv]
        best = None
        for d in candidates:
            pre = y_b.copy()
            pre[3:] -= d
            y_start = propagate(model, t_b, pre, t0).y[:, -1]
            coast = path_summary(model, problem0, t0, y_start)
            if best is None or coast.perigee_alt_km < best[2].perigee_alt_km:
                best = (d, y_start, coast)
        dv, y0, coast = best
        if kind != "steep" or coast.perigee_alt_km - 121.92 < STEEP_PERIGEE_KM or coast.arrival == "impact_earth":
            break
        dv = dv * min(60.0, 1.5 * size) / size if trial < 1 else rng.normal(size=3)
        if trial >= 1:
            dv = dv / np.linalg.norm(dv) * size / 1000.0
        size = float(np.linalg.norm(dv) * 1000.0)
    else:
        return None
    size = float(np.linalg.norm(dv) * 1000.0)

    # ranges around the ballistic path
    p_alt = summary.perilune_alt_km
    lunar = (float(round(max(60.0, p_alt - (20.0 + 380.0 * fracs[6])), 1)),
             float(round(p_alt + 50.0 + 2950.0 * fracs[7], 1)))
    if target == "entry":
        f = summary.fpa_deg
        a, b = rng.uniform(0.2, 1.0, size=2)
        arrival = ReturnSpec(target="entry", flight_path_deg=(float(round(f - a, 3)), float(round(f + b, 3))))
    else:
        pa = summary.perigee_alt_km
        a, b = rng.uniform(3.0, 20.0), rng.uniform(3.0, 30.0)
        arrival = ReturnSpec(target="perigee", perigee_alt_km=(float(round(max(10.0, pa - a), 1)),
                                                              float(round(pa + b, 1))))
    problem = Problem(name=f"global-{seed}", start=StateStart(t0, tuple(float(x) for x in y0)),
                      burns=tuple(burns), lunar=LunarPass(lunar), arrival=arrival, model=spec,
                      summary=f"generated by tests/benchmarks/global_cases.py ({GENERATOR_VERSION}), "
                                  f"seed {seed}; invented")
    info = {"ballistic_perilune_km": p_alt, "ballistic_fpa_deg": summary.fpa_deg,
            "ballistic_perigee_km": summary.perigee_alt_km, "coast_arrival": coast.arrival,
            "coast_perigee_km": coast.perigee_alt_km, "coast_fpa_deg": coast.fpa_deg,
            "coast_perilune_km": coast.perilune_alt_km}
    return Case(seed=seed, half=half_of(seed), problem=problem, kind=kind, layout=layout,
                planted_epoch=float(t_b), planted_dv=tuple(float(x) for x in dv), planted_bound_mps=size,
                perilune_epoch=float(summary.perilune_epoch), moon_declination_deg=_moon_declination(t_p),
                tilt_deg=math.degrees(tilt), info=info)


def seeds(half: str, n: int | None = None) -> list[int]:
    """Seeds of a half (``tune``: 0, 2, 4 ...; ``heldout``: 1, 3, 5 ...; ``all``), ``n`` of each."""
    n = CASES_PER_HALF if n is None else n
    if half == "tune":
        return [2 * i for i in range(n)]
    if half == "heldout":
        return [2 * i + 1 for i in range(n)]
    if half == "all":
        return [s for i in range(n) for s in (2 * i, 2 * i + 1)]
    raise ValueError(f"--half must be tune, heldout or all, got {half!r}")


# -- a cache of generated cases (generation costs ~5-30 s a case: root-finding on the propagator) --

CASES_FILE = __import__("os").path.join(__import__("os").path.dirname(__file__), "global_cases.json")


def case_to_dict(case: Case) -> dict:
    return {"generator": GENERATOR_VERSION, "seed": case.seed, "half": case.half,
            "problem": case.problem.to_dict(), "kind": case.kind, "layout": case.layout,
            "planted_epoch": case.planted_epoch, "planted_dv": list(case.planted_dv),
            "planted_bound_mps": case.planted_bound_mps, "perilune_epoch": case.perilune_epoch,
            "moon_declination_deg": case.moon_declination_deg, "tilt_deg": case.tilt_deg,
            "info": {k: (None if v is None or (isinstance(v, float) and math.isnan(v)) else
                         (float(v) if not isinstance(v, str) else v)) for k, v in case.info.items()}}


def case_from_dict(d: dict) -> Case:
    p = d["problem"]
    tup = lambda x: None if x is None else tuple(x)  # noqa: E731
    arr = dict(p["arrival"])
    for k in ("flight_path_deg", "perigee_alt_km", "epoch_window", "inclination_deg"):
        arr[k] = tup(arr.get(k))
    m = dict(p["model"])
    m["continuation"] = tuple(m.get("continuation", ()))
    problem = Problem(name=p["name"], start=StateStart(p["start"]["epoch"], tuple(p["start"]["state"])),
                      burns=tuple(BurnSpec(tuple(b["window"]), b["max_dv_mps"], b["direction"], b["leg"])
                                  for b in p["burns"]),
                      lunar=LunarPass(tuple(p["lunar"]["altitude_km"])), arrival=ReturnSpec(**arr),
                      model=ModelSpec(**m), summary=p.get("summary", p.get("description", "")))
    info = {k: (float("nan") if v is None else v) for k, v in d["info"].items()}
    return Case(seed=d["seed"], half=d["half"], problem=problem, kind=d["kind"], layout=d["layout"],
                planted_epoch=d["planted_epoch"], planted_dv=tuple(d["planted_dv"]),
                planted_bound_mps=d["planted_bound_mps"], perilune_epoch=d["perilune_epoch"],
                moon_declination_deg=d["moon_declination_deg"], tilt_deg=d["tilt_deg"], info=info)


def _read_json(path) -> dict:
    import os
    if not os.path.exists(path):
        return {}
    with open(path) as f:
        return json.load(f)


def write_json_atomic(path, data) -> None:
    """Write ``data`` to ``path`` through a temporary file (never half-written)."""
    import os
    import tempfile
    fd, tmp = tempfile.mkstemp(dir=os.path.dirname(path), prefix=".tmp-", suffix=".json")
    with os.fdopen(fd, "w") as f:
        json.dump(data, f, indent=1, sort_keys=True)
    os.replace(tmp, path)


def _generate(seed):
    import warnings
    warnings.simplefilter("ignore")  # fsolve's progress warnings; failure is checked on the result
    try:
        return seed, case_to_dict(make_case(seed))
    except GenerationError as exc:
        return seed, {"generator": GENERATOR_VERSION, "error": str(exc)}
    except RuntimeError as exc:  # a drawn geometry the propagator cannot follow (e.g. into a body)
        return seed, {"generator": GENERATOR_VERSION, "error": f"propagation failed: {exc}"}


def load_cases(seed_list, workers=2, recompute=False, say=print) -> list[Case]:
    """The cases of ``seed_list``, from ``global_cases.json`` when generated by this version, else
    generated (in ``workers`` processes) and added to the file.  Seeds without a case are skipped
    and reported."""
    cache = _read_json(CASES_FILE)
    want = [s for s in seed_list if recompute or cache.get(str(s), {}).get("generator") != GENERATOR_VERSION]
    if want:
        say(f"generating {len(want)} cases on {workers} processes ...")
        if workers > 1:
            import multiprocessing as mp
            with mp.get_context("spawn").Pool(workers) as pool:
                done = pool.map(_generate, want, chunksize=1)
        else:
            done = [_generate(s) for s in want]
        cache = _read_json(CASES_FILE)
        for s, d in done:
            cache[str(s)] = d
        write_json_atomic(CASES_FILE, cache)
    out = []
    for s in seed_list:
        d = cache[str(s)]
        if "error" in d:
            say(f"seed {s}: no case ({d['error']})")
            continue
        out.append(case_from_dict(d))
    return out
