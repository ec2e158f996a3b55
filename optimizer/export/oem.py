"""CCSDS Orbit Ephemeris Message (OEM), version 2.0, in KVN (CCSDS 502.0-B-2).

One metadata/data segment per coast arc between burns (a burn epoch ends one segment, with the
pre-burn state, and starts the next, with the post-burn state).  States are the independent
re-propagation (see :mod:`optimizer.export.sampling`), Earth-centred, ICRF axes, TDB, km and km/s.

One job: OEM text.  May import: the standard library, the package version,
:mod:`optimizer.constants` and :mod:`optimizer.timescales`; the states are passed in, already
sampled.
"""

from __future__ import annotations

import datetime as dt
import textwrap

from .. import __version__
from ..constants import CAUTION
from ..timescales import format_epoch

__all__ = ["oem_text"]

#: Lagrange interpolation of this degree reproduces the samples' path to well under 1 m.
INTERPOLATION_DEGREE = 7


def _comments(text: str) -> list[str]:
    return [f"COMMENT {line}" for line in textwrap.wrap(text.encode("ascii", "replace").decode(), 96)]


def oem_text(sampled, plan, problem, *, model_name: str | None = None, created: dt.datetime | None = None) -> str:
    """The OEM of a sampled plan as KVN text.

    Parameters
    ----------
    sampled : SampledPath
    plan : Plan
    problem : Problem
        Gives OBJECT_NAME (``problem.spacecraft``, else the case name) and OBJECT_ID (the case name).
    model_name : str, optional
        Force model named in the comments (default ``problem.model.kind``).
    created : datetime, optional
        CREATION_DATE (UTC, as the standard asks); default now.
    """
    created = created or dt.datetime.now(dt.timezone.utc)
    model_name = model_name or problem.model.kind
    lines = ["CCSDS_OEM_VERS = 2.0"]
    lines += _comments(f"Written by slingback {__version__}. Case {problem.name}: plan status "
                       f"{plan.status.upper()}" + ("" if plan.verified else f" (NOT VERIFIED: {plan.reason})")
                       + ".")
    lines += _comments(f"States re-propagated by the independent propagator (scipy DOP853) in the "
                       f"{model_name} force model; total dv {plan.total_dv_mps:.3f} m/s in "
                       f"{len(plan.burns)} impulsive burn(s). Units km and km/s.")
    lines += _comments("CAUTION: " + CAUTION)
    lines += [f"CREATION_DATE = {created.strftime('%Y-%m-%dT%H:%M:%S')}", "ORIGINATOR = SLINGBACK"]
    object_name = (problem.spacecraft or problem.name).encode("ascii", "replace").decode()
    for number, t0, t1 in sampled.arcs:
        rows = sampled.arc == number
        t, y = sampled.t[rows], sampled.y[rows]
        lines += ["", "META_START", f"OBJECT_NAME = {object_name}", f"OBJECT_ID = {problem.name}",
                  "CENTER_NAME = EARTH", "REF_FRAME = ICRF", "TIME_SYSTEM = TDB",
                  f"START_TIME = {format_epoch(t[0], 6)}", f"STOP_TIME = {format_epoch(t[-1], 6)}",
                  "INTERPOLATION = LAGRANGE", f"INTERPOLATION_DEGREE = {INTERPOLATION_DEGREE}",
                  "META_STOP", ""]
        after = "the start state" if number == 0 else f"burn {number}"
        lines += _comments(f"Coast arc {number}: from {after}, {len(t)} states.")
        lines += [f"{format_epoch(ti, 6)} {yi[0]:.6f} {yi[1]:.6f} {yi[2]:.6f} "
                  f"{yi[3]:.9f} {yi[4]:.9f} {yi[5]:.9f}" for ti, yi in zip(t, y)]
    return "\n".join(lines) + "\n"
