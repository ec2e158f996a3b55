"""Independent verification: re-propagate a plan's burns and compare with what the optimiser claims.

Uses only :mod:`optimizer.propagate` and the numpy side of the models.  The verdict compares the
re-propagated path with the optimiser's own path (residuals in physical units) and checks every
constraint of the problem on the re-propagated path alone.
"""

from __future__ import annotations

import math

import numpy as np

from .frames import flight_path_angle, rtn_matrix
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
    """Propagate ``burns`` from the start with events; returns (arcs, events as EventRecords)."""
    ret = problem.arrival
    arcs = propagate_burns(model, start_epoch, start_state, sorted(((b.epoch, b.dv) for b in burns), key=lambda e: e[0]), t_end,
                           events=EVENTS, entry_radius=ret.entry_radius_km, terminal=("entry",),
                           rtol=rtol, atol=atol)
    records = []
    seen_perilune = False
    for arc in arcs:
        for e in arc.events:
            if e.name == "perilune" and not seen_perilune:
                records.append(perilune_record(e.t, e.y, model))
                seen_perilune = True
            elif e.name in ("entry", "perigee") and seen_perilune:
                records.append(arrival_record(e.name, e.t, e.y, model))
            elif e.name.startswith("impact"):
                records.append(EventRecord(name=e.name, epoch=float(e.t), altitude_km=0.0,
                                           state=tuple(float(x) for x in e.y)))
    return arcs, records


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
        The optimiser's perilune and arrival.
    t_end : float
        Epoch to propagate to at most (the arrival event stops the propagation).
    """
    tol = problem.tolerances
    _, events = repropagate(model, start_epoch, start_state, burns, problem, t_end)
    claimed = {e.name: e for e in claimed_events}
    found_peri = next((e for e in events if e.name == "perilune"), None)
    target = problem.arrival.target
    found_arr = next((e for e in events if e.name == target), None)
    residuals, violations = {}, []
    limits = {"entry_position_km": tol.entry_position_km, "flight_path_deg": tol.flight_path_deg,
              "perilune_altitude_km": tol.perilune_altitude_km}
    if target == "perigee":
        limits = {"perigee_altitude_km": tol.perigee_altitude_km,
                  "perilune_altitude_km": tol.perilune_altitude_km}

    for e in events:
        if e.name.startswith("impact"):
            violations.append(f"the re-propagated path hits the {e.name.split('_')[1].title()} at "
                              f"epoch {e.epoch:.1f} s")
    if found_peri is None:
        violations.append("the re-propagated path has no perilune")
    elif "perilune" in claimed:
        residuals["perilune_altitude_km"] = abs(found_peri.altitude_km - claimed["perilune"].altitude_km)
        residuals["perilune_epoch_s"] = abs(found_peri.epoch - claimed["perilune"].epoch)
        lo, hi = problem.lunar.altitude_km
        if not lo - tol.perilune_altitude_km <= found_peri.altitude_km <= hi + tol.perilune_altitude_km:
            violations.append(f"perilune altitude {found_peri.altitude_km:.3f} km outside [{lo}, {hi}] km")
    if found_arr is None:
        violations.append(f"the re-propagated path never reaches the {target} after the lunar pass")
    elif target in claimed:
        c = claimed[target]
        residuals["arrival_epoch_s"] = abs(found_arr.epoch - c.epoch)
        if target == "entry":
            residuals["entry_position_km"] = float(np.linalg.norm(np.subtract(found_arr.state[:3], c.state[:3])))
            residuals["entry_speed_mps"] = 1000.0 * abs(found_arr.speed_kms - c.speed_kms)
            residuals["flight_path_deg"] = abs(found_arr.flight_path_deg - c.flight_path_deg)
            lo, hi = problem.arrival.flight_path_deg
            if not lo - tol.flight_path_deg <= found_arr.flight_path_deg <= hi + tol.flight_path_deg:
                violations.append(f"entry flight-path angle {found_arr.flight_path_deg:.4f} deg outside "
                                  f"[{lo}, {hi}] deg")
        else:
            residuals["perigee_altitude_km"] = abs(found_arr.altitude_km - c.altitude_km)
            lo, hi = problem.arrival.perigee_alt_km
            if not lo - tol.perigee_altitude_km <= found_arr.altitude_km <= hi + tol.perigee_altitude_km:
                violations.append(f"perigee altitude {found_arr.altitude_km:.3f} km outside [{lo}, {hi}] km")
        win = problem.arrival.epoch_window
        if win is not None and not win[0] - 1.0 <= found_arr.epoch <= win[1] + 1.0:
            violations.append("arrival epoch outside its window")
        inc = problem.arrival.inclination_deg
        if inc is not None and not inc[0] - 0.01 <= found_arr.inclination_deg <= inc[1] + 0.01:
            violations.append(f"arrival inclination {found_arr.inclination_deg:.3f} deg outside {list(inc)} deg")
    for key, limit in limits.items():
        if key in residuals and not residuals[key] <= limit:
            violations.append(f"{key} residual {residuals[key]:.4g} exceeds {limit}")
    for b, spec in zip(burns, problem.burns):
        if b.dv_mps > spec.max_dv_mps * (1 + 1e-6) + 1e-6:
            violations.append(f"burn at {b.epoch:.1f} s is {b.dv_mps:.3f} m/s, above its cap {spec.max_dv_mps}")
    return Verification(passed=not violations, residuals=residuals,
                        tolerances={**limits, "arrival_epoch_s": None},
                        violations=violations, events=events,
                        propagator={"method": "scipy solve_ivp DOP853", "rtol": VERIFY_RTOL,
                                    "atol": VERIFY_ATOL, "model": model.describe()["name"]})
