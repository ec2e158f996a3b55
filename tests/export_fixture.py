"""A hand-made plan for the export and ``check`` tests (no optimiser involved).

A burn-free free return is built in the circular-Moon model with ``free_return_fixture``; the plan
starts on its outbound coast and adds one small burn.  What the plan claims (its nodes, the
perilune and the entry-interface crossing) is computed here with another integrator than the
verifier's: scipy's implicit Radau IIA method (order 5; Hairer & Wanner, Solving ODEs II) at other
tolerances, with the events located on its dense output by bounded Brent minimisation (perilune)
and Brent root-finding (entry interface), and the event figures (altitude, flight-path angle,
inclination, speed) written out below from their definitions.  The verifier's DOP853 propagation
with its own event functions must find the same events within the tolerances, so a wrong event
epoch or state on either side shows as a failed verdict.  Measured: perilune altitude 5e-8 km and epoch 1e-5 s,
entry position 5e-5 km apart (tolerances 1 km, 1 km).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import brentq, minimize_scalar

from free_return_fixture import build
from optimizer.constants import CAUTION
from optimizer.plan import EventRecord, Plan
from optimizer.problem_file import problem_from_dict
from optimizer.propagate import propagate
from optimizer.timescales import format_epoch, parse_epoch
from optimizer.verify import make_burn, verify
from optimizer.models.factory import build_model

T0 = parse_epoch("2027-05-10T00:00:00 TDB")
BURN_DV = np.array([0.2, -0.1, 0.05]) * 1e-3  # km/s, a 0.23 m/s trim
SPACECRAFT = (1200.0, 440.0, 225.0)  # invented: mass kg, thrust N, specific impulse s


RADAU_RTOL, RADAU_ATOL = 1e-11, 1e-9  # not the verifier's 1e-12 / 1e-12 (optimizer.propagate)


def tdb(t):
    return format_epoch(t, 3) + " TDB"


def independent_path(model, t_start, start, t_burn, dv, t_end, entry_radius):
    """(t_entry or None, dense outputs before and after the burn) by scipy's Radau method.

    The arc after the burn stops at the first inbound crossing of ``entry_radius`` (found by
    Brent's method on the dense output of each step, not by solve_ivp's event machinery).
    """
    kw = dict(method="Radau", rtol=RADAU_RTOL, atol=RADAU_ATOL, dense_output=True)
    first = solve_ivp(model.rhs, (t_start, t_burn), np.asarray(start, float), **kw)
    y = first.y[:, -1].copy()
    y[3:] += dv
    second = solve_ivp(model.rhs, (t_burn, t_end), y, **kw)
    radius = np.linalg.norm(second.y[:3], axis=0)
    below = np.nonzero(radius < entry_radius)[0]
    t_entry = None
    if below.size:
        k = below[0]
        t_entry = brentq(lambda t: np.linalg.norm(second.sol(t)[:3]) - entry_radius, second.t[k - 1], second.t[k],
                         xtol=1e-9, rtol=1e-15)
    return t_entry, first.sol, second.sol, second.t


def independent_events(model, sol, steps, t_entry):
    """The perilune (minimum lunar distance) and the entry crossing as EventRecords, computed here."""
    moon_distance = lambda t: np.linalg.norm(sol(t)[:3] - model.moon_position(t))  # noqa: E731
    ts = steps[steps <= t_entry]
    k = int(np.argmin([moon_distance(t) for t in ts]))
    # searched in seconds from the step before: on epochs of ~8.6e8 s the bounded search's relative
    # tolerance alone (sqrt(eps) |x|) would be ~13 s
    t_ref = ts[max(k - 1, 0)]
    best = minimize_scalar(lambda dt: moon_distance(t_ref + dt), bounds=(0.0, ts[min(k + 1, ts.size - 1)] - t_ref),
                           method="bounded", options={"xatol": 1e-4})
    t_p = float(t_ref + best.x)
    peri = EventRecord(name="perilune", epoch=t_p, altitude_km=float(best.fun - model.moon.radius),
                       state=tuple(float(x) for x in sol(t_p)))
    y = sol(t_entry)
    r, v = y[:3], y[3:]
    h = np.cross(r, v)
    # flight-path angle: angle of the velocity above the local horizontal, sin(gamma) = r.v / (|r||v|)
    entry = EventRecord(name="entry", epoch=float(t_entry), altitude_km=float(np.linalg.norm(r) - model.earth.radius),
                        state=tuple(float(x) for x in y),
                        flight_path_deg=math.degrees(math.asin(np.dot(r, v) / (np.linalg.norm(r) * np.linalg.norm(v)))),
                        inclination_deg=math.degrees(math.acos(h[2] / np.linalg.norm(h))),
                        speed_kms=float(np.linalg.norm(v)))
    return [peri, entry]


def make_case():
    """(problem, model, plan) for an invented scenario ``export-case``."""
    spec = {"case": {"name": "export-case", "spacecraft": "Testbird-0", "summary": "invented test case"},
            "spacecraft": {"mass_kg": SPACECRAFT[0], "thrust_n": SPACECRAFT[1], "isp_s": SPACECRAFT[2]},
            "model": {"kind": "earth-moon", "moon": {"epoch": tdb(T0)}}}
    probe = problem_from_dict({**spec, "start": {"kind": "state", "epoch": tdb(T0),
                                                 "position_km": [2e5, 0, 0], "velocity_kms": [0, 1, 0]},
                               "burn": [{"window": [tdb(T0 + 3600), tdb(T0 + 7200)], "max_dv_mps": 1.0}]})
    model = build_model(probe.model, T0, T0 + 12 * 86400)
    t_peri = T0 + 2.5 * 86400
    y_peri, _, _ = build(model, t_peri)
    start = propagate(model, t_peri, y_peri, T0 + 86400, terminal=()).y[:, -1]
    t_start, t_burn = T0 + 86400, T0 + 1.5 * 86400
    problem = problem_from_dict({
        **spec,
        "start": {"kind": "state", "epoch": tdb(t_start), "position_km": list(start[:3]),
                  "velocity_kms": list(start[3:])},
        "burn": [{"window": [tdb(t_burn - 3 * 3600), tdb(t_burn + 3 * 3600)], "max_dv_mps": 5.0}],
        "lunar": {"perilune_altitude_km": [100.0, 400.0]},
        "return": {"flight_path_deg": [-7.5, -5.0], "max_duration_days": 8.0},
    }, source="export-case")
    t_end = problem.latest_epoch()
    t_entry, before, after, steps = independent_path(model, t_start, start, t_burn, BURN_DV, t_end,
                                                     problem.arrival.entry_radius_km)
    burns = [make_burn(t_burn, BURN_DV, before(t_burn))]
    events = independent_events(model, after, steps, t_entry)
    spans = [(t_start, t_burn, before), (t_burn, t_entry, after)]
    nodes_t = np.concatenate([np.linspace(a, b, 20) for a, b, _ in spans])
    nodes_y = np.concatenate([sol(np.linspace(a, b, 20)).T for a, b, sol in spans])
    ver = verify(model, problem, t_start, start, burns, events, t_end)
    plan = Plan(name=problem.name, status="verified" if ver.passed else "unverified",
                reason="" if ver.passed else "; ".join(ver.violations), model=model.describe(),
                start_epoch=t_start, start_state=tuple(start), burns=burns, events=events,
                trajectory_t=nodes_t, trajectory_y=nodes_y, verification=ver,
                solver={"name": "hand-made", "iterations": 0, "note": CAUTION[:20]})
    return problem, model, plan
