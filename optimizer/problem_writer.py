"""Problem files written: the table form of a :class:`~optimizer.problem.Problem`, its TOML text,
and a few lines saying what it asks for.

``problem_to_dict`` gives the table form that :func:`optimizer.problem_file.problem_from_dict`
reads (so a plan can carry its problem and ``problem_from_dict(problem_to_dict(p)) == p``);
``dumps_toml`` writes it as TOML; ``describe_problem`` is what ``slingback validate`` prints.
The keys are documented in ``docs/problem-format.md``.

File-format layer: imports ``constants``, ``timescales`` and ``problem`` (and ``tomli_w``), never
the reader (:mod:`optimizer.problem_file` imports this module, not the other way round).
"""

from __future__ import annotations

import math

import tomli_w

from .constants import R_EARTH
from .problem import Problem, StateStart
from .timescales import format_epoch, parse_epoch

__all__ = ["problem_to_dict", "dumps_toml", "describe_problem"]


def describe_problem(problem: Problem) -> str:
    """A few lines saying what a problem asks for (``slingback validate``)."""
    p, tdb = problem, lambda t: format_epoch(t, 0) + " TDB"
    if isinstance(p.start, StateStart):
        start = f"state at {tdb(p.start.epoch)}, {math.dist(p.start.state[:3], (0, 0, 0)):,.0f} km from Earth"
    else:
        start = (f"parking orbit {p.start.altitude_km:g} km, {p.start.inclination_deg:g} deg, departing "
                 f"{tdb(p.start.epoch_window[0])} to {tdb(p.start.epoch_window[1])}")
    a = p.arrival
    arrive = (f"entry interface {a.entry_radius_km - R_EARTH:g} km, flight-path angle {list(a.flight_path_deg)} deg"
              if a.target == "entry" else f"vacuum perigee {list(a.perigee_alt_km)} km")
    if a.target == "entry" and a.flight_path_margin_deg:
        arrive += f" (solved with a {a.flight_path_margin_deg:g} deg margin on both sides)"
    lines = [f"case       {p.name}" + (f" ({p.spacecraft})" if p.spacecraft else "")]
    if p.propulsion is not None:
        s = p.propulsion
        lines.append(f"spacecraft {s.mass_kg:g} kg, thrust {s.thrust_n:g} N, specific impulse {s.isp_s:g} s")
    lines += [f"model      {p.model.kind}" + (f", continuation {' -> '.join(p.model.continuation)}"
                                             if p.model.continuation else ""),
              f"start      {start}"]
    lines += [f"burn {i:<5d} {b.direction}, {b.leg}, up to {b.max_dv_mps:g} m/s, "
              f"{tdb(b.window[0])} to {tdb(b.window[1])}" for i, b in enumerate(p.burns, 1)]
    lines += [f"perilune   {list(p.lunar.altitude_km)} km", f"arrival    {arrive}",
              f"objective  {p.objective.kind}"]
    return "\n".join(lines)


def problem_to_dict(problem: Problem) -> dict:
    """The table form of a problem (what :func:`problem_from_dict` reads; TOML- and JSON-ready).

    Epochs are written as TDB strings with just enough decimals to read back to the same float,
    so ``problem_from_dict(problem_to_dict(p)) == p``.  Optional settings left at None are omitted.
    """
    p = problem
    case = {"name": p.name}
    if p.summary:
        case["summary"] = p.summary
    if p.spacecraft:
        case["spacecraft"] = p.spacecraft
    model = {"kind": p.model.kind, "sun": p.model.sun, "j2": p.model.j2,
             "continuation": list(p.model.continuation)}
    if p.model.moon:
        model["moon"] = {k: (_epoch_text(v) if k == "epoch" else v) for k, v in p.model.moon.items()}
    if isinstance(p.start, StateStart):
        start = {"kind": "state", "epoch": _epoch_text(p.start.epoch),
                 "position_km": list(p.start.state[:3]), "velocity_kms": list(p.start.state[3:])}
    else:
        start = {"kind": "parking", "altitude_km": p.start.altitude_km,
                 "inclination_deg": p.start.inclination_deg,
                 "epoch_window": [_epoch_text(x) for x in p.start.epoch_window]}
        if p.start.raan_window_deg is not None:
            start["raan_window_deg"] = list(p.start.raan_window_deg)
    burns = [{"window": [_epoch_text(x) for x in b.window], "max_dv_mps": b.max_dv_mps,
              "direction": b.direction, "leg": b.leg} for b in p.burns]
    a = p.arrival
    ret = {"target": a.target, "entry_altitude_km": _short(a.entry_radius_km - R_EARTH,
                                                           lambda x: R_EARTH + x == a.entry_radius_km),
           "flight_path_deg": list(a.flight_path_deg), "perigee_altitude_km": list(a.perigee_alt_km)}
    if a.epoch_window is not None:
        ret["epoch_window"] = [_epoch_text(x) for x in a.epoch_window]
    if a.inclination_deg is not None:
        ret["inclination_deg"] = list(a.inclination_deg)
    if a.max_duration_days is not None:
        ret["max_duration_days"] = a.max_duration_days
    if a.flight_path_margin_deg:
        ret["flight_path_margin_deg"] = a.flight_path_margin_deg
    objective = {"kind": p.objective.kind, "mps_per_day": p.objective.mps_per_day}
    if p.objective.dv_budget_mps is not None:
        objective["dv_budget_mps"] = p.objective.dv_budget_mps
    t = p.tolerances
    head = {"case": case}
    if p.propulsion is not None:
        head["spacecraft"] = {"mass_kg": p.propulsion.mass_kg, "thrust_n": p.propulsion.thrust_n,
                              "isp_s": p.propulsion.isp_s}
    return {
        **head, "model": model, "start": start, "burn": burns,
        "lunar": {"perilune_altitude_km": list(p.lunar.altitude_km)},
        "return": ret, "objective": objective,
        "tolerances": {"entry_position_km": t.entry_position_km, "flight_path_deg": t.flight_path_deg,
                       "perilune_altitude_km": t.perilune_altitude_km,
                       "perigee_altitude_km": t.perigee_altitude_km},
        "mesh": {"segments": p.mesh.segments, "steps": p.mesh.steps,
                 "max_refinements": p.mesh.max_refinements},
        "limits": {"min_burn_spacing_hours": _hours(p.min_burn_spacing_s),
                   "min_altitude_km": p.min_altitude_km},
    }


def _epoch_text(t: float) -> str:
    """Shortest TDB string that parses back to exactly ``t``."""
    for digits in range(0, 13):
        text = format_epoch(t, digits) + " TDB"
        if parse_epoch(text) == t:
            return text
    return text


def _short(x: float, same) -> float:
    """The shortest decimal rounding of ``x`` for which ``same(value)`` holds (else ``x``)."""
    return next((r for r in (round(x, k) for k in range(16)) if same(r)), x)


def _hours(seconds: float) -> float:
    """Hours ``h`` with ``h * 3600.0 == seconds`` exactly (searching the neighbouring floats)."""
    h = seconds / 3600.0
    for candidate in (h, math.nextafter(h, math.inf), math.nextafter(h, -math.inf)):
        if candidate * 3600.0 == seconds:
            return candidate
    return h


def dumps_toml(d: dict) -> str:
    """Write the table form of a problem as TOML (with ``tomli_w``)."""
    return tomli_w.dumps(d)
