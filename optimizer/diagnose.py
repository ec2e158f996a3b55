"""Why a problem found no path, told in the problem's own keys when the burn-free coast shows it.

A failed guess or search says what went wrong inside the solver ("the coast never passes the
Moon"); the cause is often a key of the problem file.  :func:`explain_failure` propagates the
coast from the start without burns (:mod:`optimizer.propagate`, events as :mod:`optimizer.events`
defines them) and compares its lunar pass with the epoch the problem lets the path reach: an
arrival window or a duration that ends before the lunar pass can never be met, since the return
is counted only after the perilune.  Burns move the lunar pass a little, so this is a diagnosis
of the burn-free coast, not a proof; it is offered only when the solver has already failed.

May import constants, problem, timescales, events, the model factory and the propagator; never the solve wing or the NLP.
"""

from __future__ import annotations

from .constants import SECONDS_PER_DAY
from .events import lunar_encounter
from .problem import StateStart
from .propagate import propagate
from .timescales import format_epoch

__all__ = ["explain_failure", "FOLLOW_DAYS"]

#: How far past the problem's latest epoch the burn-free coast is followed to find its lunar pass.
FOLLOW_DAYS = 10.0


def explain_failure(problem, model=None) -> str | None:
    """A sentence naming the key that makes ``problem`` impossible, or None when none is found.

    Parameters
    ----------
    problem : Problem
        Only a start given as a state is examined (a parking-orbit start has no coast before its
        injection burn).
    model : ForceModel, optional
        Default: the problem's model over the start to the latest epoch plus :data:`FOLLOW_DAYS`.

    Returns
    -------
    str or None
        E.g. "[return].epoch_window closes at 2027-05-13T00:00:00.000 TDB, before the lunar pass
        of the coast at 2027-05-13T11:55:29.139 TDB ...".
    """
    if not isinstance(problem.start, StateStart):
        return None
    found = _arrival_end(problem)
    if found is None:
        return None
    end, key = found
    t0 = problem.start.epoch
    horizon = max(problem.latest_epoch(), end) + FOLLOW_DAYS * SECONDS_PER_DAY
    try:
        if model is None:
            from .models.factory import build_model

            model = build_model(problem.model, t0, horizon)
        if getattr(model, "moon", None) is None:
            return None
        arc = propagate(model, t0, problem.start.state, horizon, events=("perilune",), terminal=())
    except (ValueError, RuntimeError):
        return None
    peri = lunar_encounter(arc.events, model.moon_position)
    if peri is None or peri.t <= end:
        return None
    what = "closes" if key == "epoch_window" else "ends the path"
    return (f"[return].{key} {what} at {format_epoch(end, 3)} TDB, before the lunar pass of the coast at "
            f"{format_epoch(peri.t, 3)} TDB (without burns): the return is counted only after the perilune, "
            f"so no path can arrive in time; let the arrival end after the lunar pass")


def _arrival_end(problem) -> tuple[float, str] | None:
    """The latest arrival the problem's ``[return]`` table allows and the key that sets it (None
    when it sets none)."""
    ret, t0 = problem.arrival, problem.start_epoch
    ends = []
    if ret.epoch_window is not None:
        ends.append((ret.epoch_window[1], "epoch_window"))
    if ret.max_duration_days is not None:
        ends.append((t0 + ret.max_duration_days * SECONDS_PER_DAY, f"max_duration_days ({ret.max_duration_days:g} d)"))
    return min(ends) if ends else None
