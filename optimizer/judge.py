"""The one constraint evaluator: every constraint of a problem judged on a propagated path.

The verdict (:func:`optimizer.verify.verify`), ``slingback check`` and the report all read the rows
made here, so a report cannot show a constraint "violated" beside a "passed" verdict.  Each row is
judged on the independent re-propagation (events chosen by :mod:`optimizer.events`), never on the
optimiser's nodes.

A row is *violated* when its value lies beyond a bound by more than its tolerance, *missing* when
the path has no such event (no lunar pass, no arrival), *active* when it lies at a bound (within
the larger of its tolerance and :data:`ACTIVE_TOL`), else *inactive*.

One job: judging constraints.  May import: numpy, the standard library, :mod:`optimizer.constants`
and :mod:`optimizer.frames` only; the path and its events are passed in.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from .constants import SECONDS_PER_DAY
from .frames import cartesian_to_kepler, flight_path_angle

__all__ = ["ConstraintRow", "ACTIVE_TOL", "judge", "failed_rows", "DEFAULT_DURATION_DAYS"]

#: How close to a bound counts as "at" it, per unit.
ACTIVE_TOL = {"s": 1.0, "m/s": 0.01, "deg": 0.01, "km": 1.0, "km/s": 1e-6, "h": 1.0 / 3600.0,
              "d": 1.0 / SECONDS_PER_DAY, "": 0.0}
#: Longest return when a problem gives neither an arrival window nor a longest duration (the
#: span ``Problem.latest_epoch`` allows); the report says when it binds.
DEFAULT_DURATION_DAYS = 12.0


@dataclass(frozen=True)
class ConstraintRow:
    """One constraint: its value, bounds (None: unbounded on that side), unit, tolerance, state."""

    name: str
    value: float | None
    lo: float | None
    hi: float | None
    unit: str
    tol: float
    state: str  # "active", "inactive", "violated" or "missing"

    @property
    def failed(self) -> bool:
        return self.state in ("violated", "missing")

    def describe(self) -> str:
        if self.state == "missing":
            return f"{self.name}: not found on the re-propagated path"
        bounds = f"[{_num(self.lo)}, {_num(self.hi)}]"
        return f"{self.name} {_num(self.value)} {self.unit} outside {bounds} {self.unit}".replace("  ", " ")

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "ConstraintRow":
        return cls(**{k: d.get(k) for k in ("name", "value", "lo", "hi", "unit", "tol", "state")})


def _num(x):
    return "-inf/+inf" if x is None else f"{x:.6g}"


def row(name, value, lo, hi, unit, tol=None) -> ConstraintRow:
    """Judge ``value`` against ``[lo, hi]`` (None: open on that side)."""
    tol = ACTIVE_TOL[unit] if tol is None else float(tol)
    if value is None or not math.isfinite(value):
        return ConstraintRow(name, None, lo, hi, unit, tol, "missing")
    at = max(tol, ACTIVE_TOL.get(unit, 0.0))
    if (lo is not None and value < lo - tol) or (hi is not None and value > hi + tol):
        state = "violated"
    elif (lo is not None and abs(value - lo) <= at) or (hi is not None and abs(value - hi) <= at):
        state = "active"
    else:
        state = "inactive"
    return ConstraintRow(name, float(value), lo, hi, unit, tol, state)


def failed_rows(rows) -> list[str]:
    """Sentences for the rows that fail."""
    return [r.describe() for r in rows if r.failed]


def judge(problem, model, start_epoch, start_state, burns, pre_burn, perilune, arrival, minima,
          impacts) -> list[ConstraintRow]:
    """Every constraint of ``problem`` on a re-propagated path.

    Parameters
    ----------
    problem : Problem
    model : ForceModel (numpy side)
    start_epoch, start_state :
        Where the plan says the path begins.
    burns : list of Burn
        The plan's burns in time order.
    pre_burn : list of ndarray (6,) or None
        Propagated state just before each burn.
    perilune, arrival : EventRecord or None
        The lunar encounter's perilune and the Earth arrival (:mod:`optimizer.events`).
    minima : list of (name, epoch, altitude_km)
        Every local minimum of distance to Earth (``"perigee"``) and Moon (``"perilune"``), for the
        least-altitude constraint.
    impacts : list of EventRecord
        Impact events (the path hits Earth or Moon).
    """
    rows = _start_rows(problem, start_epoch, np.asarray(start_state, dtype=float), model)
    rows.append(row("number of burns", len(burns), len(problem.burns), len(problem.burns), "", 0.0))
    t_peri = perilune.epoch if perilune is not None else None
    for i, (b, spec) in enumerate(zip(burns, problem.burns), 1):
        rows.append(row(f"burn {i} epoch", b.epoch, *spec.window, "s"))
        rows.append(row(f"burn {i} Δv", b.dv_mps, 0.0, spec.max_dv_mps, "m/s", 1e-6 * spec.max_dv_mps + 1e-6))
        v = pre_burn[i - 1] if i - 1 < len(pre_burn) else None
        if spec.direction != "free" and v is not None and b.dv_mps > 1e-6:
            cosang = np.dot(v[3:], b.dv) / np.linalg.norm(v[3:]) / np.linalg.norm(b.dv)
            angle = math.degrees(math.acos(float(np.clip(cosang, -1.0, 1.0))))
            target = 0.0 if spec.direction == "along" else 180.0
            rows.append(row(f"burn {i} angle to velocity ({spec.direction})", angle, target, target, "deg"))
        is_injection = i == 1 and not hasattr(problem.start, "state")
        if t_peri is not None and b.dv_mps > 0 and not is_injection:
            hours = (t_peri - b.epoch if spec.leg == "outbound" else b.epoch - t_peri) / 3600.0
            where = "before" if spec.leg == "outbound" else "after"
            rows.append(row(f"burn {i} ({spec.leg}) {where} the perilune", hours, 0.0, None, "h"))
    if problem.min_burn_spacing_s > 0:
        epochs = sorted(b.epoch for b in burns)
        for k in range(1, len(epochs)):
            rows.append(row(f"spacing of burns {k} and {k + 1} (in time)", (epochs[k] - epochs[k - 1]) / 3600.0,
                            problem.min_burn_spacing_s / 3600.0, None, "h"))
    total = sum(b.dv_mps for b in burns)
    if problem.objective.dv_budget_mps is not None:
        rows.append(row("total Δv (budget)", total, None, problem.objective.dv_budget_mps, "m/s",
                        1e-6 * problem.objective.dv_budget_mps + 1e-6))
    tol = problem.tolerances
    rows.append(row("perilune altitude", perilune.altitude_km if perilune else None, *problem.lunar.altitude_km,
                    "km", tol.perilune_altitude_km))
    a = problem.arrival
    if a.target == "entry":
        rows.append(row("entry flight-path angle", arrival.flight_path_deg if arrival else None, *a.flight_path_deg,
                        "deg", tol.flight_path_deg))
    else:
        rows.append(row("perigee altitude", arrival.altitude_km if arrival else None, *a.perigee_alt_km, "km",
                        tol.perigee_altitude_km))
    t_arr = arrival.epoch if arrival is not None else None
    if a.epoch_window is not None:
        rows.append(row("arrival epoch", t_arr, *a.epoch_window, "s"))
    if a.inclination_deg is not None:
        rows.append(row("arrival inclination", arrival.inclination_deg if arrival else None, *a.inclination_deg,
                        "deg"))
    days = None if t_arr is None else (t_arr - start_epoch) / SECONDS_PER_DAY
    if a.max_duration_days is not None:
        rows.append(row("time to arrival", days, None, a.max_duration_days, "d"))
    elif a.epoch_window is None:
        rows.append(row(f"time to arrival (default limit {DEFAULT_DURATION_DAYS:g} d)", days, None,
                        DEFAULT_DURATION_DAYS, "d"))
    rows += _clearance_rows(problem, model, minima, t_arr, start_epoch, np.asarray(start_state, dtype=float))
    for e in impacts:
        body = e.name.split("_")[1].title()
        rows.append(row(f"path clear of the {body} (impact at {e.epoch:.1f} s)", 1.0, 0.0, 0.0, "", 0.0))
    return rows


def _start_rows(problem, t0, y0, model) -> list[ConstraintRow]:
    """The plan starts where the problem starts: the given state, or on the parking orbit."""
    st = problem.start
    if hasattr(st, "state"):
        ref = np.asarray(st.state, dtype=float)
        return [row("start epoch difference", (t0 - st.epoch) / 3600.0, 0.0, 0.0, "h", 1e-3 / 3600.0),
                row("start position difference", float(np.linalg.norm(y0[:3] - ref[:3])), None, 0.0, "km", 1e-6),
                row("start velocity difference", float(np.linalg.norm(y0[3:] - ref[3:])), None, 0.0, "km/s", 1e-9)]
    r, v = y0[:3], y0[3:]
    rn = float(np.linalg.norm(r))
    h = np.cross(r, v)
    inc = math.degrees(math.acos(float(np.clip(h[2] / np.linalg.norm(h), -1.0, 1.0))))
    rows = [row("injection epoch", t0, *st.epoch_window, "s"),
            row("parking altitude", rn - model.earth.radius, st.altitude_km, st.altitude_km, "km", 1e-3),
            row("parking inclination", inc, st.inclination_deg, st.inclination_deg, "deg", 1e-6),
            row("parking speed minus circular", float(np.linalg.norm(v)) - math.sqrt(model.gm_earth / rn), 0.0, 0.0,
                "km/s", 1e-6),
            row("parking flight-path angle", math.degrees(flight_path_angle(r, v)), 0.0, 0.0, "deg", 1e-6)]
    # the node the solve chose (right ascension of the ascending node), shown even when free; with
    # a window, the angle turned by whole turns to the least value at or above the window's start
    node = math.degrees(cartesian_to_kepler(r, v, model.gm_earth).raan)
    window = st.raan_window_deg
    if window is not None:
        node = window[0] + (node - window[0]) % 360.0
    rows.append(row("parking node (right ascension of the ascending node)", node,
                    *(window if window is not None else (None, None)), "deg", 1e-6))
    return rows


def _clearance_rows(problem, model, minima, t_arr, t0, y0) -> list[ConstraintRow]:
    """Least altitude over Earth before the arrival and over the Moon, from every local minimum."""
    floor = problem.min_altitude_km
    start_alt = float(np.linalg.norm(y0[:3])) - model.earth.radius
    earth = [alt for name, t, alt in minima if name == "perigee" and (t_arr is None or t < t_arr - 1e-6)]
    rows = [row("closest approach to Earth before the arrival", min(earth + [start_alt]), floor, None, "km")]
    moon = [alt for name, _, alt in minima if name == "perilune"]
    if moon:
        rows.append(row("closest approach to the Moon", min(moon), floor, None, "km"))
    return rows
