"""CCSDS Orbit Parameter Message (OPM), version 2.0, in KVN (CCSDS 502.0-B-2): the burn plan.

One message holds a state vector and one maneuver block per non-zero burn.  Two messages are
written per run, identical but for the maneuvers' frame: ``plan.opm`` with ``MAN_REF_FRAME = RTN``
(radial / transverse / normal of the pre-burn state at the impulse's epoch) and ``plan-icrf.opm``
with ``MAN_REF_FRAME = ICRF`` (Earth-centred, ICRF axes).  They are separate files because a
receiving tool executes every maneuver block it reads: one message holding both sets would burn
each Δv twice.

The state is the plan's start state; for a parking-orbit start whose first burn is the injection
at the start epoch, it is the post-injection state (the injection is then described in comments,
not as a maneuver, since the state already contains it).

Maneuvers need the spacecraft's mass: ``MAN_DELTA_MASS`` is mandatory and must be negative, and
``MAN_DURATION`` gives the finite burn.  Both come from the problem's ``[spacecraft]`` table
(:mod:`optimizer.propellant`); without it no OPM can be written.  Burns are centred on the
impulse, so ``MAN_EPOCH_IGNITION`` is half the duration before it.  Numbers are written with all
the digits of the double they come from (``repr``), so they read back equal to ``plan.json``.

One job: OPM text.  May import: numpy, the package version, :mod:`optimizer.constants`,
:mod:`optimizer.problem`, :mod:`optimizer.propellant` and :mod:`optimizer.timescales`.
"""

from __future__ import annotations

import datetime as dt
import textwrap

import numpy as np

from .. import __version__
from ..constants import CAUTION
from ..problem import ParkingStart
from ..propellant import G0, finite_burns
from ..timescales import format_epoch

__all__ = ["opm_text", "opm_state", "OPM_FILES"]

#: File name per maneuver frame.
OPM_FILES = {"RTN": "plan.opm", "ICRF": "plan-icrf.opm"}


def _comments(text: str) -> list[str]:
    return [f"COMMENT {line}" for line in textwrap.wrap(text.encode("ascii", "replace").decode(), 96)]


def _num(x: float) -> str:
    """All the digits of a double (shortest round-trip form), exponent as ``E``."""
    return repr(float(x)).upper()


def opm_state(plan, problem):
    """The OPM's state: ``(epoch, state, burns after it as (index, Burn), injection index or None)``.

    ``index`` is the burn's 0-based position in the plan.  For a parking-orbit start whose first
    burn is at the start epoch, the state is the post-injection state and the injection is left out
    of the maneuvers.
    """
    state = np.asarray(plan.start_state, dtype=float)
    burns = list(enumerate(plan.burns))
    injection = None
    if isinstance(problem.start, ParkingStart) and burns and burns[0][1].epoch == plan.start_epoch:
        injection = 0
        state = state.copy()
        state[3:] += np.asarray(plan.burns[0].dv, dtype=float)
        burns = burns[1:]
    return plan.start_epoch, state, burns, injection


def opm_text(plan, problem, *, frame: str = "RTN", model_name: str | None = None,
             created: dt.datetime | None = None) -> str:
    """The OPM of a plan as KVN text.

    Parameters
    ----------
    plan : Plan
    problem : Problem
        Must carry a ``[spacecraft]`` table (``problem.propulsion``).
    frame : {"RTN", "ICRF"}
        Frame of the maneuvers' Δv components.
    model_name : str, optional
        Force model named in the comments (default ``problem.model.kind``).
    created : datetime, optional
        CREATION_DATE (UTC, as the standard asks); default now.

    Raises
    ------
    ValueError
        Without a ``[spacecraft]`` table, or for an unknown frame.
    """
    if frame not in OPM_FILES:
        raise ValueError(f"frame: expected one of {', '.join(OPM_FILES)}, got {frame!r}")
    if problem.propulsion is None:
        raise ValueError("an OPM needs the problem's [spacecraft] table (MAN_DELTA_MASS is mandatory)")
    created = created or dt.datetime.now(dt.timezone.utc)
    model_name = model_name or problem.model.kind
    figures = finite_burns(plan.burns, problem.propulsion)
    epoch, state, burns, injection = opm_state(plan, problem)
    mass = figures[injection].mass_after_kg if injection is not None else problem.propulsion.mass_kg
    s = problem.propulsion

    lines = ["CCSDS_OPM_VERS = 2.0"]
    lines += _comments(f"Written by slingback {__version__}. Case {problem.name}: plan status "
                       f"{plan.status.upper()}" + ("" if plan.verified else f" (NOT VERIFIED: {plan.reason})")
                       + f". Designed in the {model_name} force model; total dv {plan.total_dv_mps:.3f} m/s "
                       f"in {len(plan.burns)} impulsive burn(s).")
    lines += _comments(
        f"Maneuvers: finite-burn figures of the impulsive plan, rocket equation with g0 = {G0} m/s^2, "
        f"thrust {_num(s.thrust_n)} N, specific impulse {_num(s.isp_s)} s, start mass {_num(s.mass_kg)} kg; "
        "each burn centred on its impulse, gravity losses neglected. MAN_DV in km/s"
        + (", RTN of the pre-burn state at the impulse epoch." if frame == "RTN" else ", ICRF axes.")
        + f" The same plan with the other frame's components: {OPM_FILES['ICRF' if frame == 'RTN' else 'RTN']}.")
    lines += _comments("CAUTION: " + CAUTION)
    lines += [f"CREATION_DATE = {created.strftime('%Y-%m-%dT%H:%M:%S')}", "ORIGINATOR = SLINGBACK", ""]
    object_name = (problem.spacecraft or problem.name).encode("ascii", "replace").decode()
    lines += [f"OBJECT_NAME = {object_name}", f"OBJECT_ID = {problem.name}", "CENTER_NAME = EARTH",
              "REF_FRAME = ICRF", "TIME_SYSTEM = TDB", ""]
    what = "start state" if injection is None else "state just after the injection (burn 1)"
    lines += _comments(f"The plan's {what}, Earth-centred, ICRF axes, km and km/s. Spacecraft mass at "
                       f"this epoch {_num(mass)} kg.")
    lines += [f"EPOCH = {format_epoch(epoch, 6)}"]
    lines += [f"{key} = {_num(x)}" for key, x in zip(("X", "Y", "Z", "X_DOT", "Y_DOT", "Z_DOT"), state)]
    if injection is not None:
        f, b = figures[injection], plan.burns[injection]
        lines += [""] + _comments(
            f"Injection (burn 1, in the state above): dv {_num(b.dv_mps)} m/s at {format_epoch(b.epoch, 6)} TDB, "
            f"propellant {_num(f.propellant_kg)} kg, duration {_num(f.duration_s)} s.")
    for i, b in burns:
        if not b.dv_mps > 0.0:
            continue
        f = figures[i]
        dv = b.dv_rtn if frame == "RTN" else b.dv
        early = epoch - f.ignition_epoch
        lines += [""] + _comments(f"Burn {i + 1}: impulse at {format_epoch(b.epoch, 6)} TDB, "
                                  f"dv {_num(b.dv_mps)} m/s." + (
                                      f" Its centred ignition is {early:.3f} s before EPOCH." if early > 0 else ""))
        lines += [f"MAN_EPOCH_IGNITION = {format_epoch(f.ignition_epoch, 6)}",
                  f"MAN_DURATION = {_num(f.duration_s)}",
                  f"MAN_DELTA_MASS = {_num(-f.propellant_kg)}",
                  f"MAN_REF_FRAME = {frame}"]
        lines += [f"MAN_DV_{k} = {_num(x)}" for k, x in enumerate(dv, 1)]
    return "\n".join(lines) + "\n"
