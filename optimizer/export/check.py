"""Re-verify an exported plan with the independent propagator alone (``slingback check``).

The problem is rebuilt from the table form carried in ``plan.json`` (checked at the door like a
problem file, so its tolerances stay within their documented limits), the force model from its
settings, and :func:`optimizer.verify.verify` re-propagates the plan's burns, judges every
constraint and compares the result with the plan's claimed events.  :func:`claim_differences` then
compares every other figure the file claims (status, total and per-burn Δv, RTN components, the
verdict and its tolerances, epochs given twice) with the one re-derived from the burns.  Nothing of the optimiser is
involved.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from ..frames import rtn_matrix
from ..plan import Plan
from ..propagate import propagate
from ..timescales import parse_epoch
from ..problem_file import ProblemError, _is_number, problem_from_dict
from ..verify import verify
from .sampling import plan_model, propagation_end

__all__ = ["PlanFileError", "plan_path", "read_plan", "read_plan_data", "plan_problem", "recheck",
           "claim_differences", "DV_TOL_MPS"]

#: How far a claimed Δv figure (m/s) may differ from the one re-derived from the burn's ICRF
#: components: 1 mm/s plus a part in 10^6 (rounding of the written decimals is far below this).
DV_TOL_MPS = 1e-3
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
    if isinstance(recorded, dict) and recorded.get("tolerances") != ver.tolerances:
        out.append(f"verification.tolerances: the file records {_short(recorded.get('tolerances'))}, the problem's "
                   f"are {_short(ver.tolerances)}")
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
        for key in ("ignition_epoch_tdb", "cutoff_epoch_tdb"):  # finite-burn epochs: text against seconds
            if key in raw and _is_number(raw.get(key + "_s")):
                _compare_epoch(out, f"burns[{i}].{key}", raw[key], float(raw[key + "_s"]))
    start = data.get("start", {})
    _compare_epoch(out, "start.epoch_tdb", start.get("epoch_tdb") if isinstance(start, dict) else None,
                   plan.start_epoch)
    for k, e in enumerate(data.get("events", []) or []):
        if isinstance(e, dict) and _is_number(e.get("epoch_tdb_s")):
            _compare_epoch(out, f"events[{k + 1}].epoch_tdb", e.get("epoch_tdb"), float(e["epoch_tdb_s"]))
    return out


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
