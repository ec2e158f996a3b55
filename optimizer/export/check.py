"""Re-verify an exported plan with the independent propagator alone (``slingback check``).

The problem is rebuilt from the table form carried in ``plan.json``, the force model from its
settings, and :func:`optimizer.verify.verify` re-propagates the plan's burns and compares the
result with the plan's claimed events.  Nothing of the optimiser is involved.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..plan import Plan
from ..problem_file import ProblemError, problem_from_dict
from ..verify import verify
from .sampling import plan_model, propagation_end

__all__ = ["PlanFileError", "plan_path", "read_plan", "plan_problem", "recheck"]


class PlanFileError(ValueError):
    """A plan file that cannot be read or used; the message names the file."""


def plan_path(path) -> Path:
    """The plan file named by ``path``: ``path`` itself, or ``path/plan.json`` for a run folder."""
    path = Path(path)
    return path / "plan.json" if path.is_dir() else path


def read_plan(path) -> Plan:
    """Read a ``plan.json`` (or the one in a run folder); raises :class:`PlanFileError` naming the
    file and the problem.  Versions 1 and 2 of the format are read; others are refused."""
    path = plan_path(path)
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise PlanFileError(f"{path}: cannot read the file ({exc.strerror or exc})") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise PlanFileError(f"{path}: not a JSON file ({exc})") from None
    if not isinstance(data, dict):
        raise PlanFileError(f"{path}: expected a JSON object")
    try:
        plan = Plan.from_dict(data)
    except ValueError as exc:
        raise PlanFileError(f"{path}: {exc}") from None
    return plan


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
    except ValueError as exc:
        raise PlanFileError(f"{source}: cannot re-propagate the plan ({exc})") from None
