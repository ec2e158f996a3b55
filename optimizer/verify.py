"""Independent verification: re-propagate a plan's burns and compare with what the optimiser claims.

Uses only :mod:`optimizer.propagate` and the numpy side of the models.  The verdict compares the
re-propagated path with the optimiser's own path (residuals in physical units) and judges every
constraint of the problem on the re-propagated path alone (:mod:`optimizer.judge`, the one
constraint evaluator; events as :mod:`optimizer.events` defines them).

One job: the verdict.  May import: numpy, :mod:`optimizer.propagate` (which runs the numpy side of the
models), :mod:`optimizer.events`, :mod:`optimizer.judge`, :mod:`optimizer.frames` and
:mod:`optimizer.plan` (its records) only; never CasADi or the transcription.
"""

from __future__ import annotations

import math

import numpy as np

from .events import earth_return, lunar_encounter
from .frames import flight_path_angle, rtn_matrix
from .judge import failed_rows, judge
from .plan import Burn, EventRecord, Verification
from .propagate import VERIFY_ATOL, VERIFY_RTOL, propagate_burns

EVENTS = ("perilune", "perigee", "entry", "impact_earth", "impact_moon")


def arrival_record(name: str, t: float, y: np.ndarray, model) -> EventRecord:
    """An Earth-arrival event record (altitude, flight-path angle, inclination, speed)."""
    r, v = y[:3], y[3:]
    h = np.cross(r, v)
    return EventRecord(name=name, epoch=float(t), altitude_km=float(np.linalg.norm(r) - model.earth.radius),
                       state=tuple(float(x) for x in y),
                       flight_path_deg=math.degrees(flight_path_angle(r, v)),
                       inclination_deg=math.degrees(math.acos(np.clip(h[2] / np.linalg.norm(h), -1, 1))),
                       speed_kms=float(np.linalg.norm(v)))


def perilune_record(t: float, y: np.ndarray, model) -> EventRecord:
    d = y[:3] - model.moon_position(t)
    return EventRecord(name="perilune", epoch=float(t), altitude_km=float(np.linalg.norm(d) - model.moon.radius),
                       state=tuple(float(x) for x in y))


def make_burn(epoch: float, dv: np.ndarray, pre_burn_state: np.ndarray) -> Burn:
    """A Burn with its RTN components computed from the state just before it."""
    dv = np.asarray(dv, dtype=float)
    rtn = rtn_matrix(pre_burn_state[:3], pre_burn_state[3:]) @ dv
    return Burn(float(epoch), tuple(float(x) for x in dv), tuple(float(x) for x in rtn))


def repropagate(model, start_epoch, start_state, burns, problem, t_end, rtol=VERIFY_RTOL, atol=VERIFY_ATOL):
    """Propagate ``burns`` from the start with events; returns (arcs, events as EventRecords).

    The events are the lunar encounter's perilune, the Earth arrival after it (entry interface, or
    the vacuum perigee of the return) and any impact, as :mod:`optimizer.events` defines them.  An
    entry-interface target stops the propagation at the first inbound crossing of the interface; a
    vacuum-perigee target is judged on the vacuum path (the interface does not stop it).
    """
    return _propagate_and_pick(model, start_epoch, start_state, burns, problem, t_end, rtol, atol)[:2]


def _propagate_and_pick(model, start_epoch, start_state, burns, problem, t_end, rtol=VERIFY_RTOL,
                        atol=VERIFY_ATOL):
    """(arcs, chosen event records, every local minimum (name, epoch, altitude), pre-burn states)."""
    ret = problem.arrival
    entry = ret.target == "entry"
    ordered = sorted(burns, key=lambda b: b.epoch)
    arcs = propagate_burns(model, start_epoch, start_state, [(b.epoch, b.dv) for b in ordered], t_end,
                           events=EVENTS if entry else tuple(e for e in EVENTS if e != "entry"),
                           entry_radius=ret.entry_radius_km, terminal=("entry",) if entry else (),
                           rtol=rtol, atol=atol)
    raw = [e for arc in arcs for e in arc.events]
    has_moon = getattr(model, "moon", None) is not None
    records = []
    peri = lunar_encounter(raw, model.moon_position) if has_moon else None
    if peri is not None:
        records.append(perilune_record(peri.t, peri.y, model))
        arr = earth_return(raw, peri.t, ret.target)
        if arr is not None:
            records.append(arrival_record(arr.name, arr.t, arr.y, model))
    for e in raw:
        if e.name.startswith("impact"):
            records.append(EventRecord(name=e.name, epoch=float(e.t), altitude_km=0.0,
                                       state=tuple(float(x) for x in e.y)))
    minima = []
    for e in raw:
        if e.name == "perigee":
            minima.append(("perigee", e.t, float(np.linalg.norm(e.y[:3])) - model.earth.radius))
        elif e.name == "perilune" and has_moon:
            minima.append(("perilune", e.t, float(np.linalg.norm(e.y[:3] - model.moon_position(e.t)))
                           - model.moon.radius))
    pre = []
    for b in ordered:
        arc = next((a for a in arcs if a.t[0] <= b.epoch <= a.t[-1] and a.t[-1] > a.t[0]), None)
        if b.epoch == start_epoch or arc is None:
            pre.append(np.asarray(start_state, dtype=float) if b.epoch == start_epoch else None)
        else:
            pre.append(np.asarray(arc.state(b.epoch), dtype=float))
    return arcs, records, minima, pre


def verify(model, problem, start_epoch, start_state, burns, claimed_events, t_end) -> Verification:
    """Re-propagate and judge a plan.

    Parameters
    ----------
    model : ForceModel
        The same physical model the optimiser used (numpy side).
    problem : Problem
    start_epoch, start_state :
        Where the path begins (after any injection burn, that burn is in ``burns``).
    burns : list of Burn
    claimed_events : list of EventRecord
        The optimiser's perilune and arrival (their residuals against the re-propagation are
        checked; a claimed event the propagator does not find fails the verdict).
    t_end : float
        Epoch to propagate to at most (an entry-interface arrival stops the propagation).

    Returns
    -------
    Verification
        ``constraints`` holds every constraint of the problem judged on the re-propagated path
        (:func:`optimizer.judge.judge`); ``passed`` means none fails and every residual is within
        its tolerance.
    """
    tol = problem.tolerances
    ordered = sorted(burns, key=lambda b: b.epoch)
    _, events, minima, pre = _propagate_and_pick(model, start_epoch, start_state, ordered, problem, t_end)
    claimed = {e.name: e for e in claimed_events}
    found_peri = next((e for e in events if e.name == "perilune"), None)
    target = problem.arrival.target
    found_arr = next((e for e in events if e.name == target), None)
    by_problem = sorted(burns, key=lambda b: b.epoch) if len(burns) != len(problem.burns) else list(burns)
    rows = judge(problem, model, start_epoch, start_state, by_problem, _pre_in_order(by_problem, ordered, pre),
                 found_peri, found_arr, minima, [e for e in events if e.name.startswith("impact")])
    residuals, violations = {}, failed_rows(rows)
    limits = {"entry_position_km": tol.entry_position_km, "flight_path_deg": tol.flight_path_deg,
              "perilune_altitude_km": tol.perilune_altitude_km}
    if target == "perigee":
        limits = {"perigee_altitude_km": tol.perigee_altitude_km,
                  "perilune_altitude_km": tol.perilune_altitude_km}
    if found_peri is not None and "perilune" in claimed:
        residuals["perilune_altitude_km"] = abs(found_peri.altitude_km - claimed["perilune"].altitude_km)
        residuals["perilune_epoch_s"] = abs(found_peri.epoch - claimed["perilune"].epoch)
    if found_arr is not None and target in claimed:
        c = claimed[target]
        residuals["arrival_epoch_s"] = abs(found_arr.epoch - c.epoch)
        if target == "entry":
            residuals["entry_position_km"] = float(np.linalg.norm(np.subtract(found_arr.state[:3], c.state[:3])))
            residuals["entry_speed_mps"] = 1000.0 * abs(found_arr.speed_kms - c.speed_kms)
            residuals["flight_path_deg"] = abs(found_arr.flight_path_deg - c.flight_path_deg)
        else:
            residuals["perigee_altitude_km"] = abs(found_arr.altitude_km - c.altitude_km)
    for name in ("perilune", target):
        if name not in claimed:
            violations.append(f"the plan claims no {name} to compare with")
    for key, limit in limits.items():
        if key in residuals and not residuals[key] <= limit:
            violations.append(f"{key} residual {residuals[key]:.4g} exceeds {limit}")
    return Verification(passed=not violations, residuals=residuals,
                        tolerances={**limits, "arrival_epoch_s": None},
                        violations=violations, events=events,
                        propagator={"method": "scipy solve_ivp DOP853", "rtol": VERIFY_RTOL,
                                    "atol": VERIFY_ATOL, "model": model.describe()["name"]},
                        constraints=rows)


def _pre_in_order(by_problem, ordered, pre):
    """Pre-burn states listed in the order of ``by_problem`` (``pre`` follows ``ordered``)."""
    out = []
    for b in by_problem:
        k = next(i for i, o in enumerate(ordered) if o is b)
        out.append(pre[k])
    return out
