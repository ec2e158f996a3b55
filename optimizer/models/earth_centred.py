"""Earth-centred models with the Moon (and optionally the Sun and Earth's J2) as perturbers.

One class serves two named configurations:

* ``"earth-moon"``: Earth and a Moon on a prescribed orbit (usually
  :class:`optimizer.circular_moon.CircularMoon`);
* ``"ephemeris"``: Earth, Moon and Sun at DE421 positions (a
  :class:`optimizer.ephemeris.ChebyshevEphemeris` fit), optional Earth J2.

The frame is Earth-centred, so each third body also carries the indirect term (its pull on
Earth's centre).  J2 acts about the ICRF z axis: the true pole has moved about 0.4 degrees from it
by precession since J2000, a small error on a perturbation that is itself small at lunar distance.

May import constants, the models' base, numpy, and CasADi inside the CasADi methods.
"""

from __future__ import annotations

import math

import numpy as np

from ..constants import GM_EARTH, GM_MOON, GM_SUN, J2_EARTH, R_EARTH, R_MOON
from .base import Body, ForceModel, inv_cube_casadi, point_mass, third_body


class EarthCentred(ForceModel):
    """Earth + Moon (+ Sun, + J2), Earth-centred inertial, km, km/s, TDB seconds past J2000.

    Parameters
    ----------
    ephemeris : object
        Gives ``moon(t)``, ``moon_velocity(t)``, ``moon_casadi(t, par)`` and, when ``sun`` is
        true, ``sun(t)`` and ``sun_casadi(t, par)`` (km, geocentric, ICRF axes), and
        ``casadi_parameters()``.
    sun : bool
        Include the Sun as a third body.
    j2 : bool
        Include Earth's J2 zonal harmonic.
    name : str
        Configuration name written into output files.
    """

    def __init__(self, ephemeris, *, sun: bool = True, j2: bool = False, name: str = "ephemeris",
                 gm_earth: float = GM_EARTH, gm_moon: float = GM_MOON, gm_sun: float = GM_SUN):
        self.ephemeris = ephemeris
        self.sun = bool(sun)
        self.j2 = bool(j2)
        self.name = name
        self.gm_earth, self.gm_moon, self.gm_sun = float(gm_earth), float(gm_moon), float(gm_sun)
        self.earth = Body("earth", self.gm_earth, R_EARTH)
        self.moon = Body("moon", self.gm_moon, R_MOON)

    # -- numpy ---------------------------------------------------------------------------------
    def acceleration(self, t, r, v=None):
        x, y, z = float(r[0]), float(r[1]), float(r[2])
        ax, ay, az = point_mass(self.gm_earth, x, y, z)
        m = self.ephemeris.moon(t)
        px, py, pz = third_body(self.gm_moon, x, y, z, m[0], m[1], m[2])
        ax, ay, az = ax + px, ay + py, az + pz
        if self.sun:
            s = self.ephemeris.sun(t)
            px, py, pz = third_body(self.gm_sun, x, y, z, s[0], s[1], s[2])
            ax, ay, az = ax + px, ay + py, az + pz
        if self.j2:
            r2 = x * x + y * y + z * z
            k = -1.5 * J2_EARTH * self.gm_earth * R_EARTH**2 / (r2 * r2 * math.sqrt(r2))
            f = 5.0 * z * z / r2
            ax, ay, az = ax + k * x * (1.0 - f), ay + k * y * (1.0 - f), az + k * z * (3.0 - f)
        return np.array((ax, ay, az))

    def rhs(self, t, y):
        """Time derivative of ``y`` (shape (6,)); with a Chebyshev ephemeris the Moon and Sun come
        from one evaluation and the sum is written out on floats (the same terms, in the same
        order, as :meth:`acceleration`), which is what the propagator calls ~2,000 times a coast."""
        both = getattr(self.ephemeris, "moon_and_sun", None)
        if both is None or self.j2:
            return super().rhs(t, y)
        x, yy, z, vx, vy, vz = y.tolist()
        mx, my, mz, sx, sy, sz = both(t)
        r2 = x * x + yy * yy + z * z
        k = -self.gm_earth / (r2 * math.sqrt(r2))
        ax, ay, az = k * x, k * yy, k * z
        dx, dy, dz = mx - x, my - yy, mz - z
        d2, b2 = dx * dx + dy * dy + dz * dz, mx * mx + my * my + mz * mz
        kd, kb = self.gm_moon / (d2 * math.sqrt(d2)), self.gm_moon / (b2 * math.sqrt(b2))
        ax, ay, az = ax + (kd * dx - kb * mx), ay + (kd * dy - kb * my), az + (kd * dz - kb * mz)
        if self.sun:
            dx, dy, dz = sx - x, sy - yy, sz - z
            d2, b2 = dx * dx + dy * dy + dz * dz, sx * sx + sy * sy + sz * sz
            kd, kb = self.gm_sun / (d2 * math.sqrt(d2)), self.gm_sun / (b2 * math.sqrt(b2))
            ax, ay, az = ax + (kd * dx - kb * sx), ay + (kd * dy - kb * sy), az + (kd * dz - kb * sz)
        return np.array((vx, vy, vz, ax, ay, az))

    def moon_position(self, t):
        return np.asarray(self.ephemeris.moon(t), dtype=float)

    def moon_velocity(self, t):
        return np.asarray(self.ephemeris.moon_velocity(t), dtype=float)

    # -- CasADi --------------------------------------------------------------------------------
    def casadi_parameters(self):
        """The ephemeris's numbers (window and coefficients, or the circular orbit): see
        :meth:`ForceModel.casadi_parameters`."""
        return np.asarray(self.ephemeris.casadi_parameters(), dtype=float)

    def acceleration_casadi(self, t, r, v=None, par=None):
        import casadi as ca

        def pull(gm, d):  # acceleration toward a body at separation d
            return gm * d * inv_cube_casadi(d)

        acc = -pull(self.gm_earth, r)
        m = self.ephemeris.moon_casadi(t, par)
        acc -= pull(self.gm_moon, r - m) + pull(self.gm_moon, m)  # r - m: the separation the NLP shares
        if self.sun:
            s = self.ephemeris.sun_casadi(t, par)
            acc -= pull(self.gm_sun, r - s) + pull(self.gm_sun, s)
        if self.j2:
            rr = ca.sumsqr(r)
            zz = r[2] ** 2 / rr
            scale = -1.5 * J2_EARTH * self.gm_earth * R_EARTH**2 / ca.power(rr, 2.5)
            acc += scale * ca.vertcat(r[0] * (1 - 5 * zz), r[1] * (1 - 5 * zz), r[2] * (3 - 5 * zz))
        return acc

    def moon_position_casadi(self, t, par=None):
        return self.ephemeris.moon_casadi(t, par)

    def describe(self):
        return {
            "name": self.name,
            "frame": self.frame,
            "bodies": ["earth", "moon"] + (["sun"] if self.sun else []),
            "earth_j2": self.j2,
            "gm_km3_s2": {"earth": self.gm_earth, "moon": self.gm_moon,
                          **({"sun": self.gm_sun} if self.sun else {})},
            "ephemeris": self.ephemeris.describe(),
        }
