"""States of a plan for export, from the independent propagator (never from the optimiser's nodes).

The plan's burns are re-propagated with :func:`optimizer.verify.repropagate` (DOP853 at the
verification tolerances) and the dense output is sampled with a step that shrinks near Earth and
Moon: each sample sweeps at most ``sweep_deg`` of arc as seen from the nearer body, capped at
``max_step_s`` (10 minutes) on the long coast, so the samples are ~10 s apart at the entry
interface and ~15 s apart at a low perilune.  Burn epochs, event epochs and arc ends are
always samples.  Sample epochs are rounded to whole microseconds (what the files print), so every
printed state is the propagated state at exactly the printed epoch.

One job: the states an export prints.  May import: numpy, :mod:`optimizer.timescales`,
:mod:`optimizer.models.factory` and :mod:`optimizer.verify` (the re-propagation); never the
optimiser's nodes or the transcription.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..models.factory import build_model
from ..timescales import format_epoch, parse_epoch
from ..verify import repropagate

__all__ = ["SampledPath", "sample_plan", "propagation_end", "plan_model"]

ARRIVALS = ("entry", "perigee")


@dataclass
class SampledPath:
    """A re-propagated plan, sampled for export.

    Attributes
    ----------
    t : ndarray, shape (N,)
        Epochs, TDB seconds past J2000, non-decreasing (a burn epoch appears twice: the last
        sample of one arc and the first of the next).
    y : ndarray, shape (N, 6)
        Earth-centred ICRF states, km and km/s.
    arc : ndarray of int, shape (N,)
        Coast arc of each sample: 0 before the first burn, k after the k-th burn.
    events : list of EventRecord
        Events found by the independent propagator (perilune, arrival, impacts).
    arcs : list of (int, float, float)
        Each coast arc kept: its number, start and stop epoch.
    status : str
        How the propagation ended (``"completed"`` or ``"stopped at <event>"``).
    """

    t: np.ndarray
    y: np.ndarray
    arc: np.ndarray
    events: list
    arcs: list
    status: str
    moon_r: np.ndarray | None = field(default=None, repr=False)  # (N, 3) km, Moon at each sample
    moon_v: np.ndarray | None = field(default=None, repr=False)

    def event(self, name: str):
        return next((e for e in self.events if e.name == name), None)

    @property
    def arrival(self):
        return next((e for e in self.events if e.name in ARRIVALS), None)


def propagation_end(plan, problem) -> float:
    """Epoch to propagate a plan to: an hour past its claimed arrival, else the problem's latest epoch.

    (The span the solver verifies over; an arrival later than claimed fails the check.)
    """
    claimed = [e.epoch for e in plan.events if e.name in ARRIVALS]
    end = claimed[0] + 3600.0 if claimed else problem.latest_epoch()
    return max(end, *(b.epoch for b in plan.burns)) if plan.burns else end


def plan_model(plan, problem):
    """The problem's force model, valid over the plan's whole span."""
    return build_model(problem.model, min(plan.start_epoch, problem.start_epoch), propagation_end(plan, problem))


def sample_plan(plan, problem, model=None, *, max_step_s: float = 600.0, sweep_deg: float = 1.0,
                min_step_s: float = 1.0) -> SampledPath:
    """Re-propagate a plan's burns and sample the path.

    Parameters
    ----------
    plan : Plan
    problem : Problem
    model : ForceModel, optional
        Earth-centred model to propagate with (default: built from ``problem.model``).
    max_step_s : float
        Largest gap between samples, s (default 600).
    sweep_deg : float
        Largest angle swept about the nearer of Earth and Moon between samples, deg.
    min_step_s : float
        Smallest gap between samples, s.

    Returns
    -------
    SampledPath
        Stopped at the arrival (entry interface or, for a perigee target, the perigee after the
        lunar pass) when there is one.

    Raises
    ------
    ValueError
        If the model is not Earth-centred inertial (e.g. the CR3BP), or a burn lies outside the span.
    """
    model = model or plan_model(plan, problem)
    if getattr(model, "frame", "") != "ECI-ICRF":
        raise ValueError(f"export sampling needs an Earth-centred inertial model, not {model.frame!r}")
    t_end = propagation_end(plan, problem)
    arcs, events = repropagate(model, plan.start_epoch, np.asarray(plan.start_state, float), plan.burns,
                               problem, t_end)
    arrival = next((e for e in events if e.name in ARRIVALS), None)
    stop = arrival.epoch if arrival is not None else math.inf
    events = [e for e in events if e.epoch <= stop]
    has_moon = getattr(model, "moon", None) is not None
    burn_epochs = [b.epoch for b in plan.burns]
    ts, ys, labels, kept = [], [], [], []
    sweep = math.radians(sweep_deg)
    for arc in arcs:
        t0, t1 = float(arc.t[0]), min(float(arc.t[-1]), stop)
        if t1 < t0:
            break
        number = sum(1 for b in burn_epochs if b <= t0) if burn_epochs else 0
        marks = sorted({t0, t1, *(e.epoch for e in events if t0 < e.epoch < t1)})
        grid, t = [t0], t0
        while t < t1:
            y = arc.state(t)
            h = np.linalg.norm(y[:3]) / max(np.linalg.norm(y[3:]), 1e-9)
            if has_moon:
                d = y[:3] - model.moon_position(t)
                h = min(h, np.linalg.norm(d) / max(np.linalg.norm(y[3:] - model.moon_velocity(t)), 1e-9))
            t = min(t + min(max(sweep * h, min_step_s), max_step_s), t1)
            grid.append(t)
        # epochs on the microsecond grid the OEM and CSV files print, so printed states match them
        grid = np.unique([parse_epoch(format_epoch(x, 6)) for x in np.concatenate([grid, marks])])
        ts.append(grid)
        ys.append(np.asarray(arc.state(grid)).T)
        labels.append(np.full(grid.size, number))
        kept.append((number, t0, t1))
        if t1 >= stop:
            break
    t = np.concatenate(ts)
    y = np.concatenate(ys)
    moon_r = moon_v = None
    if has_moon:
        moon_r = np.array([model.moon_position(x) for x in t])
        moon_v = np.array([model.moon_velocity(x) for x in t])
    status = arcs[-1].status if arrival is None else f"stopped at {arrival.name}"
    return SampledPath(t=t, y=y, arc=np.concatenate(labels), events=events, arcs=kept, status=status,
                       moon_r=moon_r, moon_v=moon_v)
