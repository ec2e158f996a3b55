"""Which propagated events are *the* lunar encounter and *the* Earth return: one definition for the
guess, the verdict, the report and the exports.

The propagator (:mod:`optimizer.propagate`) reports every local minimum of the distance to the Moon
(``perilune``) and to Earth (``perigee``) and every inbound crossing of the entry radius
(``entry``).  Not every such event is the one a problem speaks of:

- right after injection the lunar distance has a local minimum ~300,000 km from the Moon while
  the vehicle swings round Earth; the **perilune** of the lunar encounter is the closest approach
  to the Moon of the whole coast (the smallest of the minima);
- after a slow lunar pass the geocentric distance can have a local minimum near the Moon's
  distance; the **return perigee** is the first minimum after the perilune that lies inside
  :data:`RETURN_RADIUS_KM` of Earth (half the Earth-Moon distance);
- the **entry** is the first inbound crossing of the entry radius after the perilune.

One job: choosing among events.  May import: numpy and :mod:`optimizer.constants` only (nothing that
propagates or optimises).
"""

from __future__ import annotations

import numpy as np

from .constants import EARTH_MOON_DISTANCE, GM_EARTH, GM_MOON

#: Radius of the Moon's sphere of influence, a (m/M)^(2/5) (Laplace; e.g. Curtis, Orbital
#: Mechanics for Engineering Students, section on patched conics; from memory): ~66,200 km.
#: Targeting counts a perilune only inside it (see ``propagate(perilune_within=...)``).
LUNAR_SPHERE_KM = EARTH_MOON_DISTANCE * (GM_MOON / GM_EARTH) ** 0.4
#: A minimum of geocentric distance farther than this is not an Earth return (a local minimum
#: near the Moon's distance after a slow lunar pass is not a perigee of the return).
RETURN_RADIUS_KM = 0.5 * EARTH_MOON_DISTANCE


def encounter_radius(problem) -> float:
    """Radius (km from the Moon's centre) within which a perilune counts as the encounter's: the
    sphere of influence, or more when the problem allows a higher perilune."""
    from .constants import R_MOON

    return max(LUNAR_SPHERE_KM, 1.5 * (R_MOON + problem.lunar.altitude_km[1]))


def lunar_encounter(events, moon_position):
    """The closest approach to the Moon among ``events`` (objects with ``name``, ``t``/``epoch``
    and ``y``/``state``), or None when there is no perilune.  ``moon_position(t)`` in km."""
    best, best_d = None, np.inf
    for e in events:
        if e.name != "perilune":
            continue
        t, y = _ty(e)
        d = float(np.linalg.norm(np.asarray(y[:3]) - moon_position(t)))
        if d < best_d:
            best, best_d = e, d
    return best


def earth_return(events, after: float, target: str):
    """The arrival of the Earth return after epoch ``after``: the first ``entry`` crossing, or for
    ``target == "perigee"`` the first perigee inside :data:`RETURN_RADIUS_KM`."""
    for e in sorted(events, key=lambda e: _ty(e)[0]):
        t, y = _ty(e)
        if t <= after or e.name != target:
            continue
        if target == "perigee" and np.linalg.norm(np.asarray(y[:3])) > RETURN_RADIUS_KM:
            continue
        return e
    return None


def _ty(e):
    if hasattr(e, "t"):
        return float(e.t), e.y
    return float(e.epoch), e.state
