"""The one-page run report (Markdown) and the constraint table it shows.

Constraint values come from the independent re-propagation when there is one (else from the
optimiser's own events, and the report says so).  A constraint is *active* when its value lies at
a bound within :data:`ACTIVE_TOL`, *violated* when beyond a bound by more than that, else
*inactive*.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np

from .. import __version__
from ..constants import CAUTION
from ..plan import solver_record
from ..propellant import G0, finite_burns
from ..timescales import format_epoch

__all__ = ["ConstraintRow", "constraint_rows", "report_markdown", "ACTIVE_TOL"]

#: How close to a bound counts as "at" it, per unit.
ACTIVE_TOL = {"s": 1.0, "m/s": 0.01, "deg": 0.01, "km": 1.0, "h": 1.0 / 3600.0, "d": 1.0 / 86400.0}


@dataclass(frozen=True)
class ConstraintRow:
    """One constraint: its value, bounds (None: unbounded on that side), unit and state."""

    name: str
    value: float | None
    lo: float | None
    hi: float | None
    unit: str
    tol: float
    state: str  # "active", "inactive", "violated" or "not evaluated"


def _row(name, value, lo, hi, unit, tol=None) -> ConstraintRow:
    tol = ACTIVE_TOL[unit] if tol is None else tol
    if value is None or not math.isfinite(value):
        return ConstraintRow(name, None, lo, hi, unit, tol, "not evaluated")
    if (lo is not None and value < lo - tol) or (hi is not None and value > hi + tol):
        state = "violated"
    elif (lo is not None and abs(value - lo) <= tol) or (hi is not None and abs(value - hi) <= tol):
        state = "active"
    else:
        state = "inactive"
    return ConstraintRow(name, float(value), lo, hi, unit, tol, state)


def _events(plan, sampled):
    """Events to judge constraints by, and where they come from."""
    if sampled is not None:
        return sampled.events, "independent re-propagation"
    if plan.verification is not None:
        return plan.verification.events, "independent re-propagation (verification record)"
    return plan.events, "optimiser's events (no re-propagation available)"


def constraint_rows(plan, problem, sampled=None) -> list[ConstraintRow]:
    """Every constraint of ``problem`` evaluated on ``plan``."""
    events, _ = _events(plan, sampled)
    ev = {}
    for e in events:
        ev.setdefault(e.name, e)
    rows = []
    for i, (b, spec) in enumerate(zip(plan.burns, problem.burns), 1):
        rows.append(_row(f"burn {i} epoch", b.epoch, *spec.window, "s"))
        rows.append(_row(f"burn {i} Δv", b.dv_mps, 0.0, spec.max_dv_mps, "m/s"))
        v = _pre_burn_velocity(plan, sampled, i)
        if spec.direction != "free" and v is not None and b.dv_mps > 0:
            angle = math.degrees(math.acos(np.clip(np.dot(v, b.dv) / np.linalg.norm(v) / np.linalg.norm(b.dv), -1, 1)))
            target = 0.0 if spec.direction == "along" else 180.0
            rows.append(_row(f"burn {i} angle to velocity ({spec.direction})", angle, target, target, "deg"))
    if problem.min_burn_spacing_s > 0:
        for i in range(1, len(plan.burns)):
            gap = (plan.burns[i].epoch - plan.burns[i - 1].epoch) / 3600.0
            rows.append(_row(f"spacing of burns {i} and {i + 1}", gap, problem.min_burn_spacing_s / 3600.0, None, "h"))
    peri = ev.get("perilune")
    rows.append(_row("perilune altitude", peri.altitude_km if peri else None, *problem.lunar.altitude_km, "km",
                     problem.tolerances.perilune_altitude_km))
    a = problem.arrival
    arr = ev.get(a.target)
    if a.target == "entry":
        rows.append(_row("entry flight-path angle", arr.flight_path_deg if arr else None, *a.flight_path_deg,
                         "deg", problem.tolerances.flight_path_deg))
    else:
        rows.append(_row("perigee altitude", arr.altitude_km if arr else None, *a.perigee_alt_km, "km",
                         problem.tolerances.perigee_altitude_km))
    if a.epoch_window is not None:
        rows.append(_row("arrival epoch", arr.epoch if arr else None, *a.epoch_window, "s"))
    if a.inclination_deg is not None:
        rows.append(_row("arrival inclination", arr.inclination_deg if arr else None, *a.inclination_deg, "deg"))
    if a.max_duration_days is not None:
        rows.append(_row("time to arrival", (arr.epoch - plan.start_epoch) / 86400.0 if arr else None,
                         None, a.max_duration_days, "d"))
    if problem.objective.dv_budget_mps is not None:
        rows.append(_row("total Δv (budget)", plan.total_dv_mps, None, problem.objective.dv_budget_mps, "m/s"))
    if sampled is not None:
        rows += _clearances(sampled, problem)
    return rows


def _pre_burn_velocity(plan, sampled, i):
    """Velocity just before burn ``i`` (1-based): end of the coast before it, or the start state."""
    if sampled is not None:
        rows = np.flatnonzero(sampled.arc == i - 1)
        if rows.size and abs(sampled.t[rows[-1]] - plan.burns[i - 1].epoch) < 1e-3:
            return sampled.y[rows[-1], 3:]
    if abs(plan.burns[i - 1].epoch - plan.start_epoch) < 1e-3:
        return np.asarray(plan.start_state[3:], dtype=float)
    return None


def _clearances(sampled, problem) -> list[ConstraintRow]:
    """Closest approach to Earth (before the final descent to the arrival) and to the Moon."""
    from ..constants import R_EARTH, R_MOON

    alt = np.linalg.norm(sampled.y[:, :3], axis=1) - R_EARTH
    end = alt.size
    if sampled.arrival is not None:  # drop the final, monotonic descent to the arrival
        while end > 1 and alt[end - 2] > alt[end - 1]:
            end -= 1
    rows = [_row("closest approach to Earth (before the final descent)",
                 float(alt[:end].min()) if end > 1 else None, problem.min_altitude_km, None, "km")]
    if sampled.moon_r is not None:
        alt_m = np.linalg.norm(sampled.y[:, :3] - sampled.moon_r, axis=1) - R_MOON
        rows.append(_row("closest approach to the Moon", float(alt_m.min()), problem.min_altitude_km, None, "km"))
    return rows


# ------------------------------------------------------------------------------------------------
def _fmt(x, unit=""):
    if x is None:
        return "—"
    if unit == "s":
        return format_epoch(x, 3) + " TDB"
    if isinstance(x, float):
        return f"{x:.6g}" if abs(x) < 1e-3 or abs(x) >= 1e6 else f"{x:.4f}".rstrip("0").rstrip(".")
    return str(x)


def _table(header, rows) -> list[str]:
    out = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    out += ["| " + " | ".join(str(c).replace("|", "\\|") for c in r) + " |" for r in rows]
    return out + [""]


def _short_json(v, limit=120):
    text = v if isinstance(v, str) else json.dumps(v, default=str)
    return text if len(text) <= limit else text[:limit - 3] + "..."


def report_markdown(plan, problem, *, sampled=None, figures=(), files=(), notes=(), model_name=None) -> str:
    """The run report as Markdown.

    Parameters
    ----------
    plan : Plan
    problem : Problem
    sampled : SampledPath, optional
        The independent re-propagation (constraints are judged on it).
    figures : sequence of (file name, caption)
    files : sequence of (file name, description)
    notes : sequence of str
        Anything that went wrong while exporting (shown under Diagnostics).
    model_name : str, optional
    """
    model_name = model_name or problem.model.kind
    ok = plan.verified
    L = [f"# slingback run: {plan.name}", ""]
    if not ok:
        L += [f"> **NOT VERIFIED** — status `{plan.status}`. {plan.reason or 'No reason recorded.'}",
              "> Nothing on this page is a usable design: the burns are the optimiser's last iterate.", ""]
    L += [f"> **Caution.** {CAUTION}", ""]

    L += ["## Case", ""]
    if problem.summary:
        L += [problem.summary, ""]
    start = ("state at " + format_epoch(plan.start_epoch, 3) + " TDB" if hasattr(problem.start, "state")
             else f"parking orbit {problem.start.altitude_km:g} km, {problem.start.inclination_deg:g} deg")
    r0 = np.linalg.norm(plan.start_state[:3])
    L += _table(["item", "value"], [
        ["spacecraft", problem.spacecraft or "—"], ["status", f"**{plan.status.upper()}**"],
        ["start", f"{start}, {r0:,.0f} km from Earth"],
        ["force model", f"{model_name}" + (f" (continuation: {', '.join(problem.model.continuation)})"
                                           if problem.model.continuation else "")],
        ["objective", problem.objective.kind + (f", {problem.objective.mps_per_day:g} m/s per day"
                                                if problem.objective.kind == "weighted" else "")],
        ["total Δv", f"{plan.total_dv_mps:.3f} m/s in {len(plan.burns)} burn(s)"],
        ["frames", "Earth-centred inertial (ICRF axes); burn components also in RTN of the pre-burn state"],
        ["time scale", "TDB"]])

    L += ["## Burns" + ("" if ok else " (last iterate — NOT VERIFIED)"), ""]
    L += _table(["#", "epoch (TDB)", "Δv m/s", "R m/s", "T m/s", "N m/s", "window (TDB)", "cap m/s"], [
        [i, format_epoch(b.epoch, 3), f"{b.dv_mps:.4f}", *(f"{1000 * c:.4f}" for c in b.dv_rtn),
         (f"{format_epoch(s.window[0], 0)} – {format_epoch(s.window[1], 0)}" if s else "—"),
         f"{s.max_dv_mps:g}" if s else "—"]
        for i, (b, s) in enumerate(zip(plan.burns, list(problem.burns) + [None] * len(plan.burns)), 1)])

    figures_fb = finite_burns(plan.burns, problem.propulsion)
    if figures_fb is not None:
        sc = problem.propulsion
        L += ["## Finite burns" + ("" if ok else " (last iterate — NOT VERIFIED)"), "",
              f"Spacecraft {problem.spacecraft or problem.name}: {sc.mass_kg:g} kg at the start, thrust "
              f"{sc.thrust_n:g} N, specific impulse {sc.isp_s:g} s (g0 = {G0} m/s²). Propellant by the rocket "
              "equation, mass carried from burn to burn; each burn centred on its impulse at constant thrust "
              "(gravity losses neglected: a first estimate).", ""]
        L += _table(["#", "ignition (TDB)", "duration s", "mass before kg", "propellant kg", "mass after kg"], [
            [i, format_epoch(f.ignition_epoch, 3), f"{f.duration_s:.3f}", f"{f.mass_before_kg:.3f}",
             f"{f.propellant_kg:.3f}", f"{f.mass_after_kg:.3f}"] for i, f in enumerate(figures_fb, 1)])
        total = sum(f.propellant_kg for f in figures_fb)
        L += [f"Total propellant {total:.3f} kg; final mass "
              f"{(figures_fb[-1].mass_after_kg if figures_fb else sc.mass_kg):.3f} kg.", ""]

    L += ["## Events", ""]
    rows = []
    indep = sampled.events if sampled is not None else (plan.verification.events if plan.verification else [])
    for source, evs in (("optimiser", plan.events), ("re-propagated", indep)):
        for e in evs:
            rows.append([e.name, source, format_epoch(e.epoch, 3), f"{e.altitude_km:.3f}",
                         _fmt(e.flight_path_deg), _fmt(e.inclination_deg), _fmt(e.speed_kms)])
    L += _table(["event", "source", "epoch (TDB)", "altitude km", "flight-path deg", "inclination deg",
                 "speed km/s"], rows) if rows else ["No events.", ""]

    _, source = _events(plan, sampled)
    L += ["## Constraints", "", f"Values from the {source}; *active* means at a bound within "
          "the tolerance shown.", ""]
    L += _table(["constraint", "value", "lower", "upper", "unit", "within", "state"], [
        [c.name, _fmt(c.value, c.unit), _fmt(c.lo, c.unit), _fmt(c.hi, c.unit), "epoch" if c.unit == "s" else c.unit,
         f"{c.tol * {'d': 86400.0, 'h': 3600.0}[c.unit]:g} s" if c.unit in ("d", "h") else f"{c.tol:g} {c.unit}",
         f"**{c.state}**" if c.state in ("active", "violated") else c.state]
        for c in constraint_rows(plan, problem, sampled)])

    L += ["## Verification", ""]
    v = plan.verification
    if v is None:
        L += ["**NOT VERIFIED**: no independent re-propagation was recorded.", ""]
    else:
        L += [f"Verdict: **{'PASSED' if v.passed else 'FAILED — NOT VERIFIED'}** "
              f"({_short_json(v.propagator, 200)}).", ""]
        L += _table(["residual", "value", "tolerance", "within"], [
            [k, f"{val:.4g}", "—" if v.tolerances.get(k) is None else f"{v.tolerances[k]:g}",
             "—" if v.tolerances.get(k) is None else ("yes" if val <= v.tolerances[k] else "**no**")]
            for k, val in v.residuals.items()])
        if v.violations:
            L += ["Violations:", ""] + [f"- {x}" for x in v.violations] + [""]

    pr = plan.solver.get("primer") if plan.solver else None
    if pr:
        peaks = ", ".join(f"burn {k}: {'—' if v is None else f'{v:.4f}'}" for k, v in pr.get("max_primer", {}).items())
        L += ["## Held burns (primer test)", "",
              f"Solved first without burn(s) {', '.join(map(str, pr.get('held_burns', [])))} "
              f"(total Δv {pr.get('without_held_dv_mps', float('nan')):.4f} m/s); largest primer magnitude "
              f"|p| in each held burn's window: {peaks} (|p| <= 1 + {pr.get('tolerance')}: the burn cannot "
              f"lower the cost). Outcome: {pr.get('result')}.", ""]

    L += ["## Solver record", ""]
    L += _table(["key", "value"], [[k, _short_json(val)] for k, val in solver_record(plan.solver).items()]) \
        if plan.solver else ["No solver record.", ""]

    if not ok or notes:
        L += ["## Diagnostics" + ("" if ok else " (NOT VERIFIED)"), ""]
        if not ok:
            L += [f"- status: `{plan.status}`", f"- reason: {plan.reason or '—'}",
                  f"- last iterate: {len(plan.burns)} burn(s), total {plan.total_dv_mps:.3f} m/s, "
                  f"{len(plan.trajectory_t)} optimiser nodes (in `plan.json` and `nodes.csv`)"]
            if v is not None:
                L += [f"- residual {k}: {val:.4g}" for k, val in v.residuals.items()]
        L += [f"- {n}" for n in notes] + [""]

    if figures:
        L += ["## Figures", ""]
        L += [f"![{cap}]({name})" for name, cap in figures] + [""]
    if files:
        L += ["## Files", ""] + [f"- `{name}`: {what}" for name, what in files] + [""]
    L += ["---", "", f"Written by slingback {__version__}; force model {model_name}; verification "
          f"tolerances {_short_json(plan.verification.tolerances if v else {}, 300)}.", "",
          f"**Caution.** {CAUTION}", ""]
    return "\n".join(L)
