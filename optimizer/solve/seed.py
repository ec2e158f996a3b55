"""Circumlunar seed paths built with the propagator and scipy root-finding (no NLP involved).

From a perilune state on the Moon's far side at a chosen epoch (altitude fixed; free: the in-plane
position angle and the Moon-relative speed), propagate backwards to the departure perigee and
forwards to the return perigee, and solve for both perigee altitudes.  The result is a ballistic
free return: the seed of injection designs, and a known zero-Δv answer for the tests.

May import: constants, models, propagate and scipy.  Nothing of the NLP.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import fsolve

from ..constants import SECONDS_PER_DAY
from ..propagate import Event, propagate

SEED_RTOL = 1e-11


@dataclass(frozen=True)
class Seed:
    """A ballistic circumlunar path: perilune, departure and return perigees (may be None)."""

    perilune_epoch: float
    perilune_state: np.ndarray
    departure: Event | None
    arrival: Event | None
    departure_alt_km: float
    return_alt_km: float
    params: tuple = ()  # (angle, speed[, tilt]) of the perilune state: a start for a nearby seed


def perilune_state(model, t_p, alt_km, angle, speed, tilt=0.0):
    """Geocentric state at perilune: on the Moon's far side rotated by ``angle`` (rad) in the
    Moon's orbital plane, moving against the Moon's orbital motion at ``speed`` km/s
    (Moon-relative), the plane of the pass tilted by ``tilt`` (rad) about the perilune direction."""
    rm, vm = model.moon_position(t_p), model.moon_velocity(t_p)
    x = rm / np.linalg.norm(rm)
    z = np.cross(rm, vm)
    z /= np.linalg.norm(z)
    u = np.cos(angle) * x + np.sin(angle) * np.cross(z, x)
    w = np.cos(tilt) * np.cross(z, u) + np.sin(tilt) * z
    return np.r_[rm + (model.moon.radius + alt_km) * u, vm - speed * w]


def _near_perigee(model, t_p, y, days, sign, rtol=SEED_RTOL):
    # the first perigee ends the arc: from a far-side perilune the distance to Earth falls until
    # the perigee wanted (a path whose first perigee is far never comes near Earth in time)
    arc = propagate(model, t_p, y, t_p + sign * days * SECONDS_PER_DAY, events=("perigee",), terminal=("perigee",),
                    rtol=rtol, atol=rtol)
    near = [e for e in arc.events if np.linalg.norm(e.y[:3]) < 150000.0]
    return near[0] if near else None


def ballistic(model, t_p, alt_km, angle, speed, tilt=0.0, days=5.0, rtol=SEED_RTOL) -> Seed:
    """Propagate both ways from a perilune state and report the two perigees."""
    y = perilune_state(model, t_p, alt_km, angle, speed, tilt)
    dep = _near_perigee(model, t_p, y, days, -1.0, rtol)
    arr = _near_perigee(model, t_p, y, days, 1.0, rtol)
    alt = lambda e: np.linalg.norm(e.y[:3]) - model.earth.radius if e is not None else 1e6  # noqa: E731
    return Seed(t_p, y, dep, arr, alt(dep), alt(arr), (float(angle), float(speed), float(tilt)))


def inclination_deg(y) -> float:
    """Inclination of a geocentric state's orbit to the ICRF equator, degrees."""
    h = np.cross(y[:3], y[3:])
    return float(np.degrees(np.arccos(h[2] / np.linalg.norm(h))))


def circumlunar(model, t_p, alt_km=150.0, departure_alt_km=200.0, return_alt_km=40.0,
                guess=(0.0, 2.5), departure_inclination_deg=None, rtol=SEED_RTOL) -> Seed:
    """The ballistic free return with the given perilune, departure and return perigee altitudes
    (and, when given, the inclination of the departure orbit: the pass plane is then tilted too).

    Raises ValueError when the root-finding does not reach both altitudes within 1 km.
    """
    def f(p):
        s = ballistic(model, t_p, alt_km, *p, rtol=rtol)
        out = [s.departure_alt_km - departure_alt_km, s.return_alt_km - return_alt_km]
        if departure_inclination_deg is not None:
            inc = inclination_deg(s.departure.y) if s.departure is not None else 180.0
            out.append(100.0 * (inc - departure_inclination_deg))
        return np.array(out) / 1000.0

    start = list(guess[:2])
    if departure_inclination_deg is not None:  # the pass plane's tilt is a third unknown
        start.append(guess[2] if len(guess) > 2 else 0.0)
    p = fsolve(f, start, xtol=max(1e-13, rtol * 10))
    seed = ballistic(model, t_p, alt_km, *p, rtol=rtol)
    if abs(seed.departure_alt_km - departure_alt_km) > 1.0 or abs(seed.return_alt_km - return_alt_km) > 1.0 \
            or (departure_inclination_deg is not None
                and abs(inclination_deg(seed.departure.y) - departure_inclination_deg) > 0.01):
        raise ValueError(f"no ballistic free return found through a {alt_km} km perilune at epoch {t_p:.0f} s "
                         f"with the departure orbit asked for "
                         f"(reached departure {seed.departure_alt_km:.0f} km, return {seed.return_alt_km:.0f} km)")
    return seed
