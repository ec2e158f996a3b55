"""Circular restricted three-body problem, Earth-Moon, rotating and non-dimensional.

Units: length = Earth-Moon distance, time = 1/(mean motion), mass = Earth + Moon; Earth sits at
``(-mu, 0, 0)`` and the Moon at ``(1 - mu, 0, 0)``; z is along the Moon's orbital angular
momentum.  Time ``t`` is non-dimensional time since the model's epoch.

May import constants, the models' base, numpy, scipy, and CasADi inside the CasADi methods.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq

from ..constants import CR3BP_LENGTH, CR3BP_TIME, MU_EARTH_MOON, R_EARTH, R_MOON
from .base import Body, ForceModel


class CR3BP(ForceModel):
    """Earth-Moon CR3BP in the rotating frame.

    Parameters
    ----------
    mu : float
        Mass parameter ``GM_moon / (GM_earth + GM_moon)``.
    length_km, time_s : float
        Size of the length and time units.
    """

    name = "cr3bp"
    frame = "EM-rotating-nondimensional"

    def __init__(self, mu: float = MU_EARTH_MOON, length_km: float = CR3BP_LENGTH,
                 time_s: float = CR3BP_TIME):
        self.mu = float(mu)
        self.length_unit = float(length_km)
        self.time_unit = float(time_s)
        self.earth = Body("earth", 1.0 - self.mu, R_EARTH / self.length_unit)
        self.moon = Body("moon", self.mu, R_MOON / self.length_unit)

    def acceleration(self, t, r, v=None):
        mu = self.mu
        x, y, z = float(r[0]), float(r[1]), float(r[2])
        vx, vy = float(v[0]), float(v[1])
        d1 = math.sqrt((x + mu) ** 2 + y * y + z * z) ** 3
        d2 = math.sqrt((x - 1 + mu) ** 2 + y * y + z * z) ** 3
        k1, k2 = (1 - mu) / d1, mu / d2
        return np.array((2 * vy + x - k1 * (x + mu) - k2 * (x - 1 + mu),
                         -2 * vx + y - k1 * y - k2 * y,
                         -k1 * z - k2 * z))

    def acceleration_casadi(self, t, r, v=None, par=None):
        import casadi as ca

        mu = self.mu
        earth = ca.vertcat(-mu, 0, 0)
        moon = ca.vertcat(1 - mu, 0, 0)
        grav = -(1 - mu) * (r - earth) / ca.power(ca.sumsqr(r - earth), 1.5) \
            - mu * (r - moon) / ca.power(ca.sumsqr(r - moon), 1.5)
        coriolis_centrifugal = ca.vertcat(2 * v[1] + r[0], -2 * v[0] + r[1], 0)
        return grav + coriolis_centrifugal

    def earth_position(self, t):
        return np.array([-self.mu, 0.0, 0.0])

    def moon_position(self, t):
        return np.array([1.0 - self.mu, 0.0, 0.0])

    def moon_velocity(self, t):
        return np.zeros(3)

    def moon_position_casadi(self, t, par=None):
        import casadi as ca

        return ca.DM([1.0 - self.mu, 0.0, 0.0])

    def jacobi(self, y) -> float | np.ndarray:
        """Jacobi constant ``C = x^2 + y^2 + 2(1-mu)/r1 + 2 mu/r2 - v^2``; ``y`` (6,) or (6,N)."""
        y = np.asarray(y, dtype=float)
        x, yy, z = y[0], y[1], y[2]
        r1 = np.sqrt((x + self.mu) ** 2 + yy**2 + z**2)
        r2 = np.sqrt((x - 1 + self.mu) ** 2 + yy**2 + z**2)
        v2 = y[3] ** 2 + y[4] ** 2 + y[5] ** 2
        return x**2 + yy**2 + 2 * (1 - self.mu) / r1 + 2 * self.mu / r2 - v2

    def lagrange_points(self) -> np.ndarray:
        """The five libration points, shape (5, 3), in the order L1..L5."""
        mu = self.mu

        def dudx(x):  # x-derivative of the effective potential on the x axis
            return x - (1 - mu) * (x + mu) / abs(x + mu) ** 3 - mu * (x - 1 + mu) / abs(x - 1 + mu) ** 3

        eps = 1e-9
        l1 = brentq(dudx, -mu + eps, 1 - mu - eps, xtol=1e-15)
        l2 = brentq(dudx, 1 - mu + eps, 2.0, xtol=1e-15)
        l3 = brentq(dudx, -2.0, -mu - eps, xtol=1e-15)
        h = math.sqrt(3) / 2
        return np.array([[l1, 0, 0], [l2, 0, 0], [l3, 0, 0], [0.5 - mu, h, 0], [0.5 - mu, -h, 0]])

    def describe(self):
        return {"name": self.name, "frame": self.frame, "mu": self.mu,
                "length_unit_km": self.length_unit, "time_unit_s": self.time_unit}
