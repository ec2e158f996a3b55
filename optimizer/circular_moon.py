"""A Moon on a circular orbit about Earth's centre, with no Sun: the "earth-moon" model's Moon.

It offers the interface every Moon-and-Sun model shares (described in :mod:`optimizer.ephemeris`):
``moon``/``moon_velocity`` in numpy, ``moon_casadi`` as a CasADi expression, ``casadi_parameters``
and ``describe``; ``sun`` and ``sun_casadi`` return ``None``.  Epochs are TDB seconds past J2000,
positions km, velocities km/s.

One job: the circular Moon.  May import: numpy, the standard library, :mod:`optimizer.constants`
and, inside the CasADi method only, CasADi.
"""

from __future__ import annotations

import math

import numpy as np

from .constants import EARTH_MOON_DISTANCE, SIDEREAL_MONTH

__all__ = ["CircularMoon"]


class CircularMoon:
    """Moon on a circular orbit about Earth's centre; no Sun.

    Position ``R3(-raan) R1(-inc) [a cos u, a sin u, 0]`` with ``u = phase + n (t - epoch)`` and
    ``n = 2 pi / period``: ``raan`` is the node longitude from +x, ``u`` the argument of latitude.

    Parameters
    ----------
    radius_km : float
        Orbit radius a, km.
    period_s : float
        Orbital period, s (default: the sidereal month).
    inclination_deg, raan_deg, phase_deg : float
        Inclination, right ascension of the ascending node, argument of latitude at ``epoch``, deg.
    epoch : float
        Reference epoch, s TDB past J2000.
    """

    def __init__(self, radius_km=EARTH_MOON_DISTANCE, period_s=SIDEREAL_MONTH, inclination_deg=0.0,
                 raan_deg=0.0, phase_deg=0.0, epoch=0.0):
        if not radius_km > 0 or not period_s > 0:
            raise ValueError(f"radius_km and period_s must be positive, got {radius_km}, {period_s}")
        self.radius_km, self.period_s = float(radius_km), float(period_s)
        self.inclination_deg, self.raan_deg = float(inclination_deg), float(raan_deg)
        self.phase_deg, self.epoch = float(phase_deg), float(epoch)
        self.rate = 2.0 * math.pi / self.period_s  # rad/s
        self._phase = math.radians(self.phase_deg)
        ci, si = math.cos(math.radians(inclination_deg)), math.sin(math.radians(inclination_deg))
        cO, sO = math.cos(math.radians(raan_deg)), math.sin(math.radians(raan_deg))
        # Columns: unit vectors of the node line (P) and 90 deg ahead in the orbit plane (Q).
        self._P = np.array([cO, sO, 0.0])
        self._Q = np.array([-sO * ci, cO * ci, si])

    @classmethod
    def matching(cls, source, epoch: float, period_s: float | None = None) -> "CircularMoon":
        """The circular Moon through ``source``'s Moon at ``epoch``: same distance, orbit plane
        (from the position and velocity) and direction; ``period_s`` defaults to the sidereal month.
        """
        r = np.asarray(source.moon(epoch), dtype=float)
        v = np.asarray(source.moon_velocity(epoch), dtype=float)
        h = np.cross(r, v)
        inc = math.degrees(math.acos(h[2] / np.linalg.norm(h)))
        raan = math.atan2(h[0], -h[1])
        node = np.array([math.cos(raan), math.sin(raan), 0.0])
        u = math.atan2(np.dot(np.cross(node, r), h) / np.linalg.norm(h), np.dot(node, r))
        return cls(radius_km=float(np.linalg.norm(r)), period_s=period_s or SIDEREAL_MONTH,
                   inclination_deg=inc, raan_deg=math.degrees(raan), phase_deg=math.degrees(u),
                   epoch=float(epoch))

    def _u(self, t):
        return self._phase + self.rate * (np.asarray(t, dtype=float) - self.epoch)

    def moon(self, t):
        """Geocentric Moon position, km: shape (3,) for scalar ``t``, (3, N) for N epochs."""
        u = self._u(t)
        return self.radius_km * (np.multiply.outer(self._P, np.cos(u))
                                 + np.multiply.outer(self._Q, np.sin(u)))

    def moon_velocity(self, t):
        """Geocentric Moon velocity, km/s, shaped like ``moon(t)``."""
        u = self._u(t)
        return self.radius_km * self.rate * (np.multiply.outer(self._Q, np.cos(u))
                                             - np.multiply.outer(self._P, np.sin(u)))

    def casadi_parameters(self) -> np.ndarray:
        """The numbers of :meth:`moon_casadi`: radius, rate, phase, epoch, then P and Q (3 each)."""
        return np.r_[self.radius_km, self.rate, self._phase, self.epoch, self._P, self._Q]

    def moon_casadi(self, t, par=None):
        """Moon position, km, as a CasADi 3x1 expression of ``t`` (SX/MX scalar or float); with
        ``par`` (symbols shaped like :meth:`casadi_parameters`) the orbit is read from it."""
        import casadi as ca

        if par is not None:
            u = par[2] + par[1] * (t - par[3])
            return par[0] * (par[4:7] * ca.cos(u) + par[7:10] * ca.sin(u))
        u = self._phase + self.rate * (t - self.epoch)
        return self.radius_km * (ca.DM(self._P) * ca.cos(u) + ca.DM(self._Q) * ca.sin(u))

    def sun(self, t):
        """No Sun in this model: ``None``."""
        return None

    def sun_casadi(self, t, par=None):
        """No Sun in this model: ``None``."""
        return None

    def describe(self) -> dict:
        """JSON-serialisable description of the model and its settings."""
        return {
            "model": "circular Moon about Earth's centre (no Sun)",
            "radius_km": self.radius_km,
            "period_s": self.period_s,
            "inclination_deg": self.inclination_deg,
            "raan_deg": self.raan_deg,
            "phase_deg": self.phase_deg,
            "epoch_tdb_s": self.epoch,
            "frame": "Earth-centred inertial",
            "units": "km, km/s",
        }
