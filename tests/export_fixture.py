"""A hand-made plan for the export and ``check`` tests (no optimiser involved).

A burn-free free return is built in the circular-Moon model with ``free_return_fixture``; the plan
starts on its outbound coast, adds one small burn and records the events the independent
propagator finds, so the plan is self-consistent and passes verification by construction.
"""

from __future__ import annotations

import numpy as np

from free_return_fixture import build
from optimizer.constants import CAUTION
from optimizer.plan import Plan
from optimizer.problem_file import problem_from_dict
from optimizer.propagate import propagate
from optimizer.timescales import format_epoch, parse_epoch
from optimizer.verify import make_burn, repropagate, verify
from optimizer.models.factory import build_model

T0 = parse_epoch("2027-05-10T00:00:00 TDB")
BURN_DV = np.array([0.2, -0.1, 0.05]) * 1e-3  # km/s, a 0.23 m/s trim
SPACECRAFT = (1200.0, 440.0, 225.0)  # invented: mass kg, thrust N, specific impulse s


def tdb(t):
    return format_epoch(t, 3) + " TDB"


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
    pre = propagate(model, t_start, start, t_burn, terminal=()).y[:, -1]
    burns = [make_burn(t_burn, BURN_DV, pre)]
    t_end = problem.latest_epoch()
    arcs, events = repropagate(model, t_start, start, burns, problem, t_end)
    nodes_t = np.concatenate([np.linspace(a.t[0], a.t[-1], 20) for a in arcs])
    nodes_y = np.concatenate([a.state(np.linspace(a.t[0], a.t[-1], 20)).T for a in arcs])
    ver = verify(model, problem, t_start, start, burns, events, t_end)
    plan = Plan(name=problem.name, status="verified" if ver.passed else "unverified",
                reason="" if ver.passed else "; ".join(ver.violations), model=model.describe(),
                start_epoch=t_start, start_state=tuple(start), burns=burns, events=events,
                trajectory_t=nodes_t, trajectory_y=nodes_y, verification=ver,
                solver={"name": "hand-made", "iterations": 0, "note": CAUTION[:20]})
    return problem, model, plan
