"""The one-page run report (Markdown) and the constraint table it shows.

Constraint rows come from the one evaluator, :mod:`optimizer.judge`, on the independent
re-propagation: the same rows decide the verdict.

One job: the report.  May import: numpy, the package version, :mod:`optimizer.constants`,
:mod:`optimizer.timescales`, :mod:`optimizer.judge`, :mod:`optimizer.plan`,
:mod:`optimizer.propellant`, the global layer's summary of failed starts
(:mod:`optimizer.solve.search`) and, for a re-check, the export layer's ``check``.
"""

from __future__ import annotations

import json

import numpy as np

from .. import __version__
from ..constants import CAUTION, SECONDS_PER_DAY
from ..judge import ACTIVE_TOL, ConstraintRow
from ..plan import solver_record
from ..propellant import G0, finite_burns
from ..solve.search import failed_outcomes
from ..timescales import format_epoch

__all__ = ["ConstraintRow", "constraint_rows", "report_markdown", "ACTIVE_TOL"]


def constraint_rows(plan, problem, sampled=None) -> list[ConstraintRow]:
    """Every constraint of ``problem`` on ``plan``, from the one evaluator (:mod:`optimizer.judge`):
    the rows of the plan's verification, or, when none was recorded (a failed solve, an old plan),
    of a fresh independent re-propagation.  ``sampled`` is accepted for the callers' convenience and
    not needed."""
    if plan.verification is not None and plan.verification.constraints:
        return list(plan.verification.constraints)
    from .check import PlanFileError, recheck

    try:
        return list(recheck(plan, problem).constraints)
    except PlanFileError:
        return []


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


def _search_section(plan, problem) -> list[str]:
    """The global search: how many seeds, which starts were solved, where the answer sits."""
    search = (plan.solver or {}).get("search")
    if not search:
        return []
    seeds = search.get("seeds", [])
    ok = [s for s in seeds if s.get("screened_dv_mps") is not None]
    L = ["## Global search", "",
         f"{len(seeds)} seeds screened (burn epochs across each window, the Moon passed on either side, the "
         f"return passing Earth either way); {len(ok)} met the perilune and arrival ranges within the caps"
         + (f", cheapest {min(s['screened_dv_mps'] for s in ok):.3f} m/s" if ok else "")
         + f". Screening {search.get('screen_s', 0):.1f} s. The figure `search.png` shows Δv against burn epoch.", ""]
    starts = search.get("starts", [])
    if starts:
        L += _table(["start", "burn", "seed epoch (TDB)", "family", "screened m/s", "outcome", "Δv m/s", "chosen"], [
            [i + 1, s["burn"], format_epoch(s["epoch_tdb_s"], 0), s["family"], _fmt(s.get("screened_dv_mps")),
             s.get("status", "—"), _fmt(s.get("total_dv_mps")), "**yes**" if search.get("chosen") == i else ""]
            for i, s in enumerate(starts)])
    for j, b in enumerate(problem.burns):
        burn = plan.burns[j] if j < len(plan.burns) else None
        if burn is None or burn.dv_mps == 0.0:
            continue
        for edge, word in ((b.window[0], "opens"), (b.window[1], "closes")):
            if abs(burn.epoch - edge) <= 1.0:
                L += [f"Burn {j + 1} sits where its window {word}: a wider window may be cheaper.", ""]
    failed = failed_outcomes(seeds)
    if failed:
        L += ["Seeds that did not meet the ranges: " + "; ".join(f"{n} x {why}" for why, n in failed.items()) + ".", ""]
    return L


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

    rows_c = constraint_rows(plan, problem, sampled)
    L += ["## Constraints", "", "Every constraint of the problem, judged on the independent re-propagation "
          "(the same rows decide the verdict); *active* means at a bound within the tolerance shown.", ""]
    L += _table(["constraint", "value", "lower", "upper", "unit", "within", "state"], [
        [c.name, _fmt(c.value, c.unit), _fmt(c.lo, c.unit), _fmt(c.hi, c.unit), "epoch" if c.unit == "s" else c.unit,
         f"{c.tol * {'d': SECONDS_PER_DAY, 'h': 3600.0}[c.unit]:g} s" if c.unit in ("d", "h") else f"{c.tol:g} {c.unit}",
         f"**{c.state}**" if c.state in ("active", "violated", "missing") else c.state]
        for c in rows_c]) if rows_c else ["No constraint could be evaluated (the burns cannot be re-propagated).", ""]
    defaults = [c for c in rows_c if c.name.startswith("time to arrival (default") and c.state == "active"]
    if defaults:
        L += [f"The default longest return ({defaults[0].hi:g} days; no arrival window or `max_duration_days` "
              "given) binds: a longer allowed return may be cheaper.", ""]

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

    L += _search_section(plan, problem)

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
