"""A free-return path built without the optimiser: root-finding on the independent propagator.

From a perilune state on the Moon's far side (altitude fixed, two free parameters: the in-plane
position angle and the Moon-relative speed), propagate backwards to the departure perigee and
forwards to the return perigee, and solve with scipy for both perigee altitudes.  The result is a
path that goes round the Moon and comes back to Earth with no burn at all: a known zero-Δv answer.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import fsolve

from optimizer.propagate import propagate


def perilune_state(model, t_p, alt_km, angle, speed):
    """Spacecraft state (geocentric) at perilune: in the Moon's orbital plane, far side rotated by
    ``angle`` (rad), moving against the Moon's orbital motion at ``speed`` km/s (Moon-relative)."""
    rm, vm = model.moon_position(t_p), model.moon_velocity(t_p)
    x = rm / np.linalg.norm(rm)
    z = np.cross(rm, vm)
    z /= np.linalg.norm(z)
    y = np.cross(z, x)
    u = np.cos(angle) * x + np.sin(angle) * y
    w = np.cross(z, u)
    rad = model.moon.radius + alt_km
    return np.r_[rm + rad * u, vm - speed * w]


def perigee_altitudes(model, t_p, alt_km, angle, speed, days=5.0):
    y = perilune_state(model, t_p, alt_km, angle, speed)
    out = []
    for sign in (-1.0, 1.0):
        arc = propagate(model, t_p, y, t_p + sign * days * 86400.0, events=("perigee",), terminal=(),
                        rtol=1e-11, atol=1e-11)
        near = [e for e in arc.events if np.linalg.norm(e.y[:3]) < 150000.0]
        out.append(np.linalg.norm(near[0].y[:3]) - model.earth.radius if near else 1e6)
    return np.array(out), y


def build(model, t_p, alt_km=150.0, departure_alt_km=200.0, return_alt_km=40.0, guess=(0.0, 2.5)):
    """Solve for the perilune state; returns (perilune state, departure and return perigee altitudes)."""
    def f(p):
        alts, _ = perigee_altitudes(model, t_p, alt_km, p[0], p[1])
        return (alts - [departure_alt_km, return_alt_km]) / 1000.0

    sol = fsolve(f, guess, xtol=1e-13, full_output=True)
    alts, y = perigee_altitudes(model, t_p, alt_km, *sol[0])
    return y, alts, sol[0]
