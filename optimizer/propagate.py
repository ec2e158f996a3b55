"""The independent propagator: adaptive-step DOP853 on the numpy force models.

This module is the referee of every optimum, so it must stay independent of the transcription:
it never imports CasADi nor anything that builds the NLP (a test enforces this).

Epochs and states are in the model's units (km, km/s, TDB seconds past J2000 for the
Earth-centred models).  Burns are impulsive: a velocity change in the model frame at an epoch.

Two engines take the same DOP853 steps: ``"scipy"`` (``solve_ivp`` on the model's numpy
right-hand side; always available) and ``"c"`` (:mod:`optimizer.native`: the whole coast stepped
in a small hand-written C file, the same events found by scipy's own event search on the dense
output; Earth-centred models only, scipy serves the others and machines without a C compiler).
``$SLINGBACK_PROPAGATOR`` chooses the default: ``c`` unless set (it falls back to scipy by itself;
on the out-of-family benchmark's 20 tuning cases run with both engines, the same answers to
1e-6 m/s; the timings are in the README).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np
from scipy.integrate import solve_ivp

#: Tolerances used to verify optima (relative, absolute in model units).
VERIFY_RTOL = 1e-12
VERIFY_ATOL = 1e-12

EVENT_NAMES = ("perilune", "perigee", "entry", "impact_earth", "impact_moon")
ENGINES = ("scipy", "c")


def default_engine() -> str:
    """The engine from ``$SLINGBACK_PROPAGATOR`` (``scipy`` or ``c``; ``c`` if unset, which falls
    back to scipy where it cannot serve)."""
    value = os.environ.get("SLINGBACK_PROPAGATOR", "c").strip().lower() or "c"
    if value not in ENGINES:
        raise ValueError(f"SLINGBACK_PROPAGATOR={value!r}: expected one of {', '.join(ENGINES)}")
    return value


@dataclass(frozen=True)
class Event:
    """An event found by root-finding on the dense output.

    Attributes
    ----------
    name : str
        One of ``EVENT_NAMES``.
    t : float
        Epoch of the event.
    y : ndarray, shape (6,)
        State at the event (model frame).
    """

    name: str
    t: float
    y: np.ndarray


@dataclass
class Arc:
    """One propagated coast.

    Attributes
    ----------
    t : ndarray, shape (N,)
        Accepted step epochs, first = start, last = end (or the terminal event).
    y : ndarray, shape (6, N)
        States at ``t``.
    events : list of Event
        Events in time order.
    status : str
        ``"completed"`` or ``"stopped at <event>"``.
    nfev : int
        Right-hand-side evaluations.
    engine : str
        ``"scipy"`` or ``"c"``: which engine stepped the coast.
    """

    t: np.ndarray
    y: np.ndarray
    events: list[Event]
    status: str
    nfev: int
    sol: object = field(default=None, repr=False)
    engine: str = "scipy"

    def state(self, t):
        """Dense-output state at epoch(s) ``t`` (shape (6,) or (6, M))."""
        return self.sol(t)

    def first(self, name: str) -> Event | None:
        """The first event called ``name``, or None."""
        return next((e for e in self.events if e.name == name), None)


def _length(v) -> float:
    """Euclidean length of a 3-vector: ``sqrt(v . v)``, what numpy's ``norm`` computes for a
    vector, without its per-call overhead (event functions run at every step)."""
    return math.sqrt(float(v @ v))


def _rows(body, ts):
    """A body's position or velocity function at the epochs ``ts`` (N,) as an (N, 3) array (a
    function that ignores the shape of its epoch argument, such as a fixed Earth, is broadcast)."""
    v = np.asarray(body(ts), dtype=float)
    return np.broadcast_to(v.T if v.ndim == 2 else v, (len(ts), 3))


def _lengths(d):
    return np.sqrt(np.einsum("ij,ij->i", d, d))


def _closest_approach(position, velocity, within):
    """Event function whose rising zero is a minimum of distance to a body (``position(t)``,
    ``velocity(t)``); with ``within`` (km) ``max(radial speed, distance - within)``, which cannot
    change sign outside that sphere.  Its ``many(ts, ys)`` gives the values at many step ends at
    once (``ys`` (N, 6)): the C engine's quick test for a sign change between steps."""
    if within is None:
        def f(t, y):
            return float(np.dot(y[:3] - position(t), y[3:] - velocity(t)))

        def many(ts, ys):
            return np.einsum("ij,ij->i", ys[:, :3] - _rows(position, ts), ys[:, 3:] - _rows(velocity, ts))
    else:
        def f(t, y):
            d = y[:3] - position(t)
            dist = _length(d)
            return max(float(np.dot(d, y[3:] - velocity(t))) / dist, dist - within)

        def many(ts, ys):
            d = ys[:, :3] - _rows(position, ts)
            dist = _lengths(d)
            return np.maximum(np.einsum("ij,ij->i", d, ys[:, 3:] - _rows(velocity, ts)) / dist, dist - within)
    f.many = many
    return f


def _crossing(position, radius):
    """Event function of the distance to a body (``position(t)``) minus ``radius``, with ``many``."""
    def f(t, y):
        return _length(y[:3] - position(t)) - radius

    def many(ts, ys):
        return _lengths(ys[:, :3] - _rows(position, ts)) - radius
    f.many = many
    return f


def _event_functions(model, names, entry_radius, terminal, backward=False, perilune_within=None,
                     perigee_within=None):
    """Event functions for solve_ivp; returns (functions, their names).

    Perilune and perigee are minima of distance in time whatever the direction of integration,
    so their sign change is reversed when integrating backwards; radius crossings (entry,
    impacts) are taken in the direction of integration.

    With ``perilune_within`` (km) a perilune is only a minimum of lunar distance inside that
    radius: the function is ``max(radial speed, (distance - radius) / 1 s)``, continuous, positive
    outside the sphere, so a distant minimum (right after injection the lunar distance has one
    ~300,000 km from the Moon) never changes its sign while a closest approach inside does.
    ``perigee_within`` does the same for perigees (a minimum of geocentric distance near the Moon's
    distance after a slow lunar pass is not a return perigee).
    """
    turn = -1.0 if backward else 1.0
    funcs, labels = [], []
    has_moon = getattr(model, "moon", None) is not None

    def add(fn, name, direction, stop):
        fn.direction = direction
        fn.terminal = stop
        funcs.append(fn)
        labels.append(name)

    for name in names:
        if name not in EVENT_NAMES:
            raise ValueError(f"unknown event {name!r}; expected one of {', '.join(EVENT_NAMES)}")
        if name in ("perilune", "impact_moon") and not has_moon:
            continue
        if name == "perilune":
            add(_closest_approach(model.moon_position, model.moon_velocity, perilune_within), name, turn,
                name in terminal)
        elif name == "perigee":
            add(_closest_approach(model.earth_position, model.earth_velocity, perigee_within), name, turn,
                name in terminal)
        elif name == "entry":
            if entry_radius is None:
                raise ValueError("the entry event needs entry_radius")
            add(_crossing(model.earth_position, entry_radius), name, -1.0, "entry" in terminal)
        elif name == "impact_earth":
            add(_crossing(model.earth_position, model.earth.radius), name, -1.0, True)
        elif name == "impact_moon":
            add(_crossing(model.moon_position, model.moon.radius), name, -1.0, True)
    return funcs, labels


def propagate(model, t0: float, y0, t1: float, *, events=(), entry_radius: float | None = None,
              terminal=("entry",), rtol: float = VERIFY_RTOL, atol: float = VERIFY_ATOL,
              max_step: float = np.inf, perilune_within: float | None = None,
              perigee_within: float | None = None, engine: str | None = None) -> Arc:
    """Propagate a coast with DOP853 and find events on the way.

    Parameters
    ----------
    model : ForceModel
        Numpy side of the force model.
    t0, t1 : float
        Start and end epochs (``t1 < t0`` propagates backwards).
    y0 : array_like, shape (6,)
        Start state.
    events : sequence of str
        Any of ``EVENT_NAMES``.  Impacts always stop the arc; ``terminal`` lists others that do.
    entry_radius : float, optional
        Geocentric radius of the entry interface (model length unit), for the ``entry`` event.
    rtol, atol : float
        DOP853 tolerances (defaults are the verification tolerances).
    perilune_within : float, optional
        Count only perilunes closer than this to the Moon's centre (km); default: every local
        minimum of lunar distance.
    perigee_within : float, optional
        The same for perigees (km from Earth's centre).
    engine : str, optional
        ``"scipy"`` or ``"c"`` (default :func:`default_engine`); ``"c"`` falls back to scipy for
        a model or machine it cannot serve (the arc's ``engine`` says which ran).

    Returns
    -------
    Arc
    """
    y0 = np.asarray(y0, dtype=float)
    if y0.shape != (6,) or not np.all(np.isfinite(y0)):
        raise ValueError(f"y0 must be 6 finite numbers, got {y0!r}")
    if not (np.isfinite(t0) and np.isfinite(t1)) or t0 == t1:
        raise ValueError(f"need two different finite epochs, got t0={t0!r}, t1={t1!r}")
    funcs, labels = _event_functions(model, events, entry_radius, set(terminal), backward=t1 < t0,
                                     perilune_within=perilune_within, perigee_within=perigee_within)
    engine = engine or default_engine()
    if engine not in ENGINES:
        raise ValueError(f"unknown engine {engine!r}; expected one of {', '.join(ENGINES)}")
    if engine == "c":
        from . import native

        engine = "c" if native.supports(model) else "scipy"
    if engine == "c":
        sol = native.integrate(model, t0, y0, t1, rtol=rtol, atol=atol, max_step=max_step, events=funcs or None)
    else:
        sol = solve_ivp(model.rhs, (t0, t1), y0, method="DOP853", rtol=rtol, atol=atol,
                        dense_output=True, events=funcs or None, max_step=max_step)
    if sol.status < 0:
        raise RuntimeError(f"propagation failed at t={sol.t[-1]!r}: {sol.message}")
    found = []
    if funcs:
        for label, te, ye in zip(labels, sol.t_events, sol.y_events):
            found += [Event(label, float(t), np.array(y)) for t, y in zip(te, ye)]
    found.sort(key=lambda e: e.t if t1 > t0 else -e.t)
    status = "completed"
    if sol.status == 1:
        status = "stopped at " + next(
            lbl for lbl, te, fn in zip(labels, sol.t_events, funcs) if fn.terminal and len(te))
    return Arc(sol.t, sol.y, found, status, int(sol.nfev), sol.sol, engine)


def propagate_burns(model, t0: float, y0, burns, t1: float, **kwargs) -> list[Arc]:
    """Propagate through a sequence of impulsive burns.

    Parameters
    ----------
    burns : sequence of (epoch, dv)
        Epochs in ``(t0, t1)`` in time order; ``dv`` shape (3,) in the model frame.
    **kwargs
        Passed to :func:`propagate` for every arc.

    Returns
    -------
    list of Arc
        One arc per coast (``len(burns) + 1`` unless an arc stops early).
    """
    arcs, t, y = [], float(t0), np.asarray(y0, dtype=float).copy()
    for epoch, dv in burns:
        if not t <= epoch <= t1:
            raise ValueError(f"burn epoch {epoch!r} outside the propagation span [{t}, {t1}]")
        if epoch > t:
            arc = propagate(model, t, y, epoch, **kwargs)
            arcs.append(arc)
            if arc.status != "completed":
                return arcs
            y = arc.y[:, -1].copy()
        y[3:] += np.asarray(dv, dtype=float)
        t = float(epoch)
    arcs.append(propagate(model, t, y, t1, **kwargs))
    return arcs
