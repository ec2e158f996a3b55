"""Re-verify an exported plan with the independent propagator alone (``slingback check``).

The problem is rebuilt from the table form carried in ``plan.json`` (checked at the door like a
problem file, so its tolerances stay within their documented limits), the force model from its
settings, and :func:`optimizer.verify.verify` re-propagates the plan's burns, judges every
constraint and compares the result with the plan's claimed events.  :func:`claim_differences` then
compares every other figure the file claims (status, total and per-burn Δv, RTN components, the
verdict and its tolerances, epochs given twice) with the one re-derived from the burns.  Nothing of the optimiser is
involved.

May import frames, timescales, plan, problem_file, propellant, propagate, verify and export's sampling; never the solve wing or CasADi.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from ..frames import rtn_matrix
from ..plan import FINITE_BURN_METHOD, Plan
from ..propagate import propagate
from ..propellant import G0, finite_burns
from ..timescales import parse_epoch
from ..problem_file import ProblemError, _is_number, problem_from_dict
from ..verify import arrival_record, perilune_record, verify
from .sampling import plan_model, propagation_end

__all__ = ["PlanFileError", "plan_path", "read_plan", "read_plan_data", "plan_problem", "recheck",
           "claim_differences", "DV_TOL_MPS"]

#: How far a claimed Δv figure (m/s) may differ from the one re-derived from the burn's ICRF
#: components: 1 mm/s plus a part in 10^6 (rounding of the written decimals is far below this).
DV_TOL_MPS = 1e-3
#: Finite-burn figures (mass, propellant in kg; duration in s) follow from the burns and the
#: problem's ``[spacecraft]`` table by closed formulas (:mod:`optimizer.propellant`): a claimed
#: figure may differ from the re-derived one by floating-point rounding only, a part in 10^9 of
#: its size plus 1e-9 of its unit.  Ignition and cut-off epochs: 1 ms, like every epoch compared.
FIGURE_RTOL = 1e-9
#: A residual the file records (``verification.residuals``: the optimiser's events against the
#: re-propagation) is re-derived the same way by ``check``; the two may differ by 1 % of that
#: residual's tolerance (or, for a residual without one, 1e-2 of its unit: 10 ms, 1 cm/s), far below
#: anything that could change the verdict, far above the rounding of two runs of the propagator.
RESIDUAL_SHARE, RESIDUAL_FLOOR = 0.01, 1e-2
#: Residuals the verdict holds to no tolerance, held here to one: a claimed event epoch 1 s from the
#: re-propagated one (11 km along an entry path, beyond the 1 km position tolerance anyway) or an
#: entry speed 1 m/s off is not the path the plan's burns fly.  Our choice, not a published value.
CLAIM_LIMITS = {"perilune_epoch_s": 1.0, "arrival_epoch_s": 1.0, "entry_speed_mps": 1.0}
#: A claimed event's altitude, flight-path angle, inclination and speed must follow from its own
#: state: km, deg, deg, km/s.  Rounding only, except a perilune's altitude, which takes the Moon's
#: position from the ephemeris fit over check's span rather than the solver's (1 cm apart on the
#: shipped demo): 1 m.
EVENT_SELF_TOL = {"altitude_km": 1e-3, "flight_path_deg": 1e-6, "inclination_deg": 1e-6, "speed_kms": 1e-9}
#: What a plan says about how its numbers are to be read (written so by :meth:`Plan.to_dict`).
FIXED_CLAIMS = {"time_scale": "TDB", "frame": "Earth-centred inertial, ICRF axes"}
#: Deepest nesting a plan file may have (the format needs 5 levels).
MAX_DEPTH = 12


class PlanFileError(ValueError):
    """A plan file that cannot be read or used; the message names the file."""


def plan_path(path) -> Path:
    """The plan file named by ``path``: ``path`` itself, or ``path/plan.json`` for a run folder."""
    path = Path(path)
    return path / "plan.json" if path.is_dir() else path


def read_plan(path) -> Plan:
    """Read a ``plan.json`` (or the one in a run folder); raises :class:`PlanFileError` naming the
    file and the problem.  Versions 1 and 2 of the format are read; others are refused."""
    return read_plan_data(path)[0]


def read_plan_data(path) -> tuple[Plan, dict]:
    """:func:`read_plan`, also returning the parsed JSON (the claims :func:`claim_differences` reads)."""
    path = plan_path(path)
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise PlanFileError(f"{path}: cannot read the file ({exc.strerror or exc})") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise PlanFileError(f"{path}: not a JSON file ({exc})") from None
    except RecursionError:
        raise PlanFileError(f"{path}: arrays or objects nested too deeply to read (a plan needs at most "
                            f"{MAX_DEPTH} levels)") from None
    if not isinstance(data, dict):
        raise PlanFileError(f"{path}: expected a JSON object")
    if _depth_exceeds(data, MAX_DEPTH):
        raise PlanFileError(f"{path}: arrays or objects nested more than {MAX_DEPTH} deep (a plan needs at most "
                            f"{MAX_DEPTH} levels)")
    try:
        plan = Plan.from_dict(data)
    except (ValueError, OverflowError) as exc:
        raise PlanFileError(f"{path}: {exc}") from None
    if not (np.all(np.isfinite(plan.start_state)) and math.isfinite(plan.start_epoch)
            and all(math.isfinite(b.epoch) and np.all(np.isfinite(b.dv)) for b in plan.burns)):
        raise PlanFileError(f"{path}: start and burns: expected finite numbers")
    for k, e in enumerate(plan.events, 1):  # the figures verify compares must be numbers
        for key in ("epoch", "altitude_km", "flight_path_deg", "inclination_deg", "speed_kms"):
            x = getattr(e, key)
            if not (_is_number(x) or (x is None and key not in ("epoch", "altitude_km"))):
                name = "epoch_tdb_s" if key == "epoch" else key
                raise PlanFileError(f"{path}: events[{k}].{name}: expected a finite number, got {_short(x)}")
        if not (len(e.state) == 6 and all(_is_number(x) for x in e.state)):
            raise PlanFileError(f"{path}: events[{k}].state_km_kms: expected six finite numbers")
    return plan, data


def _depth_exceeds(x, limit: int) -> bool:
    stack = [(x, 1)]
    while stack:
        x, depth = stack.pop()
        if depth > limit:
            return True
        if isinstance(x, dict):
            stack.extend((v, depth + 1) for v in x.values())
        elif isinstance(x, list):
            stack.extend((v, depth + 1) for v in x if isinstance(v, (dict, list)))
    return False


def plan_problem(plan, source: str = "plan.json"):
    """The problem a plan carries (``plan.problem``, in problem-file table form)."""
    if not plan.problem:
        raise PlanFileError(f"{source}: the plan carries no problem (key 'problem')")
    try:
        return problem_from_dict(plan.problem, source=f"{source} (problem)")
    except ProblemError as exc:
        raise PlanFileError(str(exc)) from None


def recheck(plan, problem=None, model=None, source: str = "plan.json"):
    """Independent verification of a plan.

    Parameters
    ----------
    plan : Plan
    problem : Problem, optional
        Default: the one the plan carries.
    model : ForceModel, optional
        Default: built from the problem's model settings over the plan's span.
    source : str
        Name of the plan file, for messages.

    Returns
    -------
    Verification

    Raises
    ------
    PlanFileError
        If the plan carries no usable problem or its burns cannot be propagated (e.g. out of order).
    """
    problem = problem or plan_problem(plan, source)
    t_end = propagation_end(plan, problem)
    try:
        model = model or plan_model(plan, problem)
        return verify(model, problem, plan.start_epoch, plan.start_state, plan.burns, plan.events, t_end)
    except (ValueError, TypeError) as exc:  # TypeError: a claimed figure of the wrong type
        raise PlanFileError(f"{source}: cannot re-propagate or compare the plan ({exc})") from None


def claim_differences(data: dict, plan, problem, ver, model=None) -> list[str]:
    """Every figure ``plan.json`` claims that differs from the one re-derived from its burns.

    Parameters
    ----------
    data : dict
        The parsed ``plan.json``.
    plan : Plan
        The same file read as a plan (burn epochs and ICRF Δv components are the ground truth).
    problem : Problem
    ver : Verification
        The re-verification (:func:`recheck`).
    model : ForceModel, optional
        For the pre-burn states of the RTN components (default: the problem's).

    Returns
    -------
    list of str
        One sentence per difference; empty when every claim agrees.  Compared: ``status`` with the
        verdict (a plan passes ``check`` only if it says "verified" and is), the verdict and the
        tolerances the file records (they must be the problem's), ``total_dv_mps`` and each burn's ``dv_mps`` with the norm of its ICRF components
        (within :data:`DV_TOL_MPS` + 1e-6 of the value), each burn's ``dv_rtn_mps`` with its ICRF
        components turned into the RTN frame of the re-propagated pre-burn state, and every epoch
        written both as text and as seconds (within 1 ms); ``time_scale`` must be ``TDB``.
    """
    out = []
    if data.get("time_scale") != "TDB":  # every epoch of the file is read as TDB
        out.append(f"time_scale: the file says {_short(data.get('time_scale'))}, the epochs are read as 'TDB'")
    status = data.get("status")
    if status != "verified":
        out.append(f"status: the plan says {status!r}, not 'verified'" +
                   (" (the re-verification passed, but the file does not claim it)" if ver.passed else ""))
    recorded = data.get("verification")
    if isinstance(recorded, dict) and recorded.get("passed") is not ver.passed:
        out.append(f"verification.passed: the file records {recorded.get('passed')!r}, the re-verification "
                   f"{'passed' if ver.passed else 'failed'}")
    if isinstance(recorded, dict) and not _same(recorded.get("tolerances"), ver.tolerances):
        out.append(f"verification.tolerances: the file records {_short(recorded.get('tolerances'))}, the problem's "
                   f"are {_short(ver.tolerances)}")
    if isinstance(recorded, dict):
        _compare_residuals(out, recorded.get("residuals"), ver)
        if not _same(recorded.get("propagator"), ver.propagator):
            out.append(f"verification.propagator: the file records {_short(recorded.get('propagator'))}, the "
                       f"re-verification used {_short(ver.propagator)}")
        if not isinstance(recorded.get("violations"), list) or bool(recorded["violations"]) != bool(ver.violations):
            out.append(f"verification.violations: the file records {_short(recorded.get('violations'))}, the "
                       f"re-verification found {len(ver.violations)}")
    elif recorded is not None or status == "verified":
        out.append(f"verification: expected the recorded verdict (an object), got {_short(recorded)}")
    _compare_finite_burns(out, data, plan, problem)
    for key, meant in FIXED_CLAIMS.items():  # how every number in the file is to be read
        if data.get(key) != meant:
            out.append(f"{key}: the file says {_short(data.get(key))}; a slingback plan's numbers are {meant!r}")
    for key, limit in CLAIM_LIMITS.items():
        if key in ver.residuals and not ver.residuals[key] <= limit:
            out.append(f"{key}: the plan's event is {ver.residuals[key]:.4g} from the re-propagated one "
                       f"(check's limit {limit:g})")
    _compare_event_figures(out, plan, problem, model)
    _compare_event_states(out, plan, ver)
    _compare_model(out, data.get("model"), plan, problem, model)
    total = sum(1000.0 * float(np.linalg.norm(b.dv)) for b in plan.burns)
    _compare(out, "total_dv_mps", data.get("total_dv_mps"), total, DV_TOL_MPS + 1e-6 * total, "m/s")
    raw_burns = data.get("burns", [])
    pre = _pre_burn_states(plan, problem, model)
    for i, (b, raw) in enumerate(zip(plan.burns, raw_burns), 1):
        dv = 1000.0 * np.asarray(b.dv, dtype=float)
        size = float(np.linalg.norm(dv))
        tol = DV_TOL_MPS + 1e-6 * size
        _compare(out, f"burns[{i}].dv_mps", raw.get("dv_mps"), size, tol, "m/s")
        if "dv_rtn_mps" in raw and pre[i - 1] is not None:
            rtn = rtn_matrix(pre[i - 1][:3], pre[i - 1][3:]) @ dv
            claimed = raw["dv_rtn_mps"]
            if not (isinstance(claimed, list) and len(claimed) == 3 and all(_is_number(x) for x in claimed)):
                out.append(f"burns[{i}].dv_rtn_mps: expected three numbers, got {_short(claimed)}")
            elif not np.linalg.norm(np.subtract(claimed, rtn)) <= tol:
                out.append(f"burns[{i}].dv_rtn_mps: claimed {[round(x, 6) for x in claimed]}, re-derived "
                           f"{[round(float(x), 6) for x in rtn]} m/s")
        _compare_epoch(out, f"burns[{i}].epoch_tdb", raw.get("epoch_tdb"), b.epoch)
    start = data.get("start", {})
    _compare_epoch(out, "start.epoch_tdb", start.get("epoch_tdb") if isinstance(start, dict) else None,
                   plan.start_epoch)
    for k, e in enumerate(data.get("events", []) or []):
        if isinstance(e, dict) and _is_number(e.get("epoch_tdb_s")):
            _compare_epoch(out, f"events[{k + 1}].epoch_tdb", e.get("epoch_tdb"), float(e["epoch_tdb_s"]))
    return out


#: Finite-burn figures of each burn in plan.json: key -> attribute of FiniteBurn.
BURN_FIGURES = {"mass_before_kg": "mass_before_kg", "mass_after_kg": "mass_after_kg", "propellant_kg": "propellant_kg",
                "duration_s": "duration_s", "ignition_epoch_tdb_s": "ignition_epoch", "cutoff_epoch_tdb_s": "cutoff_epoch"}


def _compare_finite_burns(out, data, plan, problem):
    """Each burn's finite-burn figures and the ``finite_burns`` summary against
    :func:`optimizer.propellant.finite_burns` of the burns and the problem's ``[spacecraft]`` table
    (none may be claimed without that table, all must be there with it)."""
    raw_burns = [b if isinstance(b, dict) else {} for b in (data.get("burns") or [])]
    figures = finite_burns(plan.burns, problem.propulsion)
    if figures is None:
        claimed = sorted({k for b in raw_burns for k in BURN_FIGURES if k in b} |
                         ({"finite_burns"} if "finite_burns" in data else set()))
        if claimed:
            out.append(f"finite-burn figures ({', '.join(claimed)}): claimed, but the problem has no [spacecraft] "
                       "table to derive them from")
        return
    for i, (f, raw) in enumerate(zip(figures, raw_burns), 1):
        for key, attr in BURN_FIGURES.items():
            derived = getattr(f, attr)
            if key.endswith("epoch_tdb_s"):
                _compare(out, f"burns[{i}].{key}", raw.get(key), derived, 1e-3, "s")
                _compare_epoch(out, f"burns[{i}].{key[:-2]}", raw.get(key[:-2], ""), derived)
            else:
                _compare(out, f"burns[{i}].{key}", raw.get(key), derived,
                         FIGURE_RTOL * (1.0 + abs(derived)), key.rsplit("_", 1)[-1])
    summary = data.get("finite_burns")
    if not isinstance(summary, dict):
        out.append(f"finite_burns: expected the summary object, got {_short(summary)}")
        return
    method = FINITE_BURN_METHOD
    if summary.get("method") != method:
        out.append(f"finite_burns.method: the file says {_short(summary.get('method'))}, the figures are "
                   f"derived by: {method}")
    prop = problem.propulsion
    derived = {"standard_gravity_mps2": G0, "initial_mass_kg": prop.mass_kg, "thrust_n": prop.thrust_n,
               "isp_s": prop.isp_s, "final_mass_kg": figures[-1].mass_after_kg if figures else prop.mass_kg,
               "total_propellant_kg": sum(f.propellant_kg for f in figures)}
    for key, value in derived.items():
        _compare(out, f"finite_burns.{key}", summary.get(key), value, FIGURE_RTOL * (1.0 + abs(value)),
                 key.rsplit("_", 1)[-1])


def _compare_event_figures(out, plan, problem, model=None):
    """Each claimed event's figures against the ones its own state gives (:mod:`optimizer.verify`'s
    records): a figure changed without its state, or a state without its figures, differs."""
    try:
        model = model or plan_model(plan, problem)
    except (ValueError, RuntimeError):
        return
    for k, e in enumerate(plan.events, 1):
        state = np.asarray(e.state, dtype=float)
        if e.name not in ("perilune", "entry", "perigee") or state.shape != (6,) or not np.all(np.isfinite(state)):
            if e.name in ("perilune", "entry", "perigee"):
                out.append(f"events[{k}].state_km_kms: expected six finite numbers")
            continue
        try:
            rec = perilune_record(e.epoch, state, model) if e.name == "perilune" else \
                arrival_record(e.name, e.epoch, state, model)
        except (ValueError, RuntimeError) as exc:
            out.append(f"events[{k}]: its state cannot be evaluated ({exc})")
            continue
        for key, tol in EVENT_SELF_TOL.items():
            derived, claimed = getattr(rec, key), getattr(e, key)
            if derived is None and claimed is None:
                continue
            if derived is None or not _is_number(claimed) or not abs(float(claimed) - derived) <= tol:
                out.append(f"events[{k}].{key}: claimed {_short(claimed)}, its state gives {_short(derived)}")


#: A claimed perilune or arrival state against the re-propagated one: position within the
#: problem's position tolerance (perilune: its altitude tolerance; entry: the entry position one;
#: perigee: its altitude one), velocity within 1 m/s (our choice; 2e-5 m/s apart on the demo).
EVENT_SPEED_TOL_KMS = 1e-3
#: What a plan's ``model`` record says that names the physics (the rest describes the solver's
#: ephemeris fit over its own span: window, degree, fit error, file path).
MODEL_KEYS = ("name", "frame", "bodies", "earth_j2", "gm_km3_s2")


def _compare_event_states(out, plan, ver):
    found = {e.name: e for e in ver.events}
    tol = {"perilune": ver.tolerances.get("perilune_altitude_km"), "entry": ver.tolerances.get("entry_position_km"),
           "perigee": ver.tolerances.get("perigee_altitude_km")}
    for k, e in enumerate(plan.events, 1):
        f = found.get(e.name)
        if f is None or tol.get(e.name) is None:
            continue
        try:
            d = np.subtract(np.asarray(e.state, dtype=float), np.asarray(f.state, dtype=float))
        except (ValueError, TypeError):
            continue  # a malformed state is reported by _compare_event_figures
        if d.shape != (6,):
            continue
        if not np.linalg.norm(d[:3]) <= tol[e.name]:
            out.append(f"events[{k}] ({e.name}): position {np.linalg.norm(d[:3]):.4g} km from the re-propagated "
                       f"one (tolerance {tol[e.name]:g} km)")
        if not np.linalg.norm(d[3:]) <= EVENT_SPEED_TOL_KMS:
            out.append(f"events[{k}] ({e.name}): velocity {1000 * np.linalg.norm(d[3:]):.4g} m/s from the "
                       f"re-propagated one (limit {1000 * EVENT_SPEED_TOL_KMS:g} m/s)")


def _compare_model(out, claimed, plan, problem, model=None):
    try:
        derived = (model or plan_model(plan, problem)).describe()
    except (ValueError, RuntimeError):
        return
    if not isinstance(claimed, dict) or any(not _same(claimed.get(k), derived.get(k)) for k in MODEL_KEYS):
        out.append(f"model: the file records {_short(claimed)}, the problem's model is "
                   f"{_short({k: derived.get(k) for k in MODEL_KEYS})}")


def _compare_residuals(out, claimed, ver):
    """The residuals the file records against the ones re-derived now (same keys, each within
    :data:`RESIDUAL_SHARE` of its tolerance, or :data:`RESIDUAL_FLOOR` without one)."""
    if not isinstance(claimed, dict) or set(claimed) != set(ver.residuals):
        out.append(f"verification.residuals: the file records {_short(claimed)}, the re-verification "
                   f"derives {_short(sorted(ver.residuals))}")
        return
    for key, derived in ver.residuals.items():
        limit = ver.tolerances.get(key)
        tol = RESIDUAL_SHARE * limit if limit else RESIDUAL_FLOOR
        _compare(out, f"verification.residuals.{key}", claimed[key], derived, tol, key.rsplit("_", 1)[-1])


def _same(a, b) -> bool:
    """Equal as JSON values: true is not 1, 1.0 is 1 (Python's == says True == 1.0)."""
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


def _short(x) -> str:
    try:
        text = repr(x)
    except ValueError:
        return "a number too large to show"
    return text if len(text) <= 80 else text[:77] + "..."


def _compare(out, key, claimed, derived, tol, unit):
    if not _is_number(claimed):
        out.append(f"{key}: expected a number, got {_short(claimed)}")
    elif not abs(float(claimed) - derived) <= tol:
        out.append(f"{key}: claimed {float(claimed):.6f} {unit}, re-derived {derived:.6f} {unit}")


def _compare_epoch(out, key, text, seconds):
    """An epoch written as text beside its seconds must name the same instant (within 1 ms)."""
    if text is None:
        return
    try:
        if not isinstance(text, str):
            raise TypeError
        t = parse_epoch(text)
    except (ValueError, TypeError, OverflowError):
        out.append(f"{key}: expected a TDB epoch, got {_short(text)}")
        return
    if not abs(t - seconds) <= 1e-3:
        out.append(f"{key}: {text} differs from the epoch in seconds ({seconds!r} s TDB)")


def _pre_burn_states(plan, problem, model=None) -> list:
    """The re-propagated state just before each burn (None where it cannot be had)."""
    states: list = [None] * len(plan.burns)
    try:
        model = model or plan_model(plan, problem)
        t, y = plan.start_epoch, np.asarray(plan.start_state, dtype=float).copy()
        for i in sorted(range(len(plan.burns)), key=lambda k: plan.burns[k].epoch):
            b = plan.burns[i]
            if b.epoch < t:
                break
            if b.epoch > t:
                arc = propagate(model, t, y, b.epoch, terminal=())
                if arc.status != "completed":
                    break
                t, y = b.epoch, arc.y[:, -1].copy()
            states[i] = y.copy()
            y[3:] += np.asarray(b.dv, dtype=float)
    except (ValueError, RuntimeError):
        pass
    return states
