"""Common base of the force models.

Every model gives the same acceleration twice, written separately: once with numpy (used by the
independent propagator) and once with CasADi operations (used by the transcription).  The tests
compare the two at random points.

State vectors are ``[x, y, z, vx, vy, vz]``.  Earth-centred models work in km, km/s and TDB seconds
past J2000 on ICRF axes; the CR3BP works in its own non-dimensional rotating units.

May import numpy (and CasADi inside the CasADi methods) only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Body:
    """A gravitating body that events and constraints can refer to.

    Attributes
    ----------
    name : str
        ``"earth"`` or ``"moon"``.
    gm : float
        Gravitational parameter in the model's units.
    radius : float
        Mean radius in the model's length unit.
    """

    name: str
    gm: float
    radius: float


class ForceModel:
    """Base class: subclasses define ``acceleration`` (numpy) and ``acceleration_casadi``.

    Attributes
    ----------
    name : str
        Short identifier written into output files.
    frame : str
        Frame of the state vector.
    length_unit, time_unit : float
        Size of the model's length and time units in km and s (1 for dimensional models).
    earth, moon : Body
    """

    name = "base"
    frame = "ECI-ICRF"
    length_unit = 1.0
    time_unit = 1.0

    # -- numpy side ------------------------------------------------------------------------
    def acceleration(self, t: float, r: np.ndarray, v: np.ndarray | None = None) -> np.ndarray:
        """Acceleration, shape (3,), at epoch ``t`` and position ``r`` (shape (3,))."""
        raise NotImplementedError

    def rhs(self, t: float, y: np.ndarray) -> np.ndarray:
        """Time derivative of the state ``y`` (shape (6,)); the form ``solve_ivp`` takes."""
        out = np.empty(6)
        out[:3] = y[3:6]
        out[3:] = self.acceleration(t, y[:3], y[3:6])
        return out

    def earth_position(self, t: float) -> np.ndarray:
        """Earth's centre in the model frame (the origin for Earth-centred models)."""
        return np.zeros(3)

    def earth_velocity(self, t: float) -> np.ndarray:
        return np.zeros(3)

    def moon_position(self, t: float) -> np.ndarray:
        raise NotImplementedError

    def moon_velocity(self, t: float) -> np.ndarray:
        raise NotImplementedError

    # -- CasADi side -----------------------------------------------------------------------
    def casadi_parameters(self) -> np.ndarray:
        """The numbers the CasADi side depends on that change from problem to problem (ephemeris
        window and coefficients, the Moon's orbit), as one vector; empty for models without any.

        ``acceleration_casadi(..., par=P)`` and ``moon_position_casadi(t, par=P)`` with a symbolic
        ``P`` of this length read them from ``P`` (parameters of the NLP, so one compiled library
        serves problems at any epoch); with ``par=None`` the numbers are written into the
        expression.
        """
        return np.zeros(0)

    def acceleration_casadi(self, t, r, v=None, par=None):
        """The same acceleration as a CasADi 3x1 expression of symbols ``t`` and ``r``."""
        raise NotImplementedError

    def moon_position_casadi(self, t, par=None):
        raise NotImplementedError

    def describe(self) -> dict:
        """Plain-data description written into every output file."""
        return {"name": self.name, "frame": self.frame}


def inv_cube_casadi(d):
    """``1 / |d|^3`` of a CasADi 3-vector, written as ``1 / (q sqrt(q))`` with ``q = |d|^2``.

    Cheaper to evaluate and to differentiate than ``power(q, 1.5)``; the transcription builds
    the same expression of the same separation for the regularising frequency, so CasADi's
    common-subexpression pass computes each distance once per right-hand side.
    """
    import casadi as ca

    q = ca.sumsqr(d)
    return 1.0 / (q * ca.sqrt(q))


def point_mass(gm: float, x: float, y: float, z: float) -> tuple[float, float, float]:
    """Acceleration ``-gm * d / |d|^3`` of a point mass at separation ``d = (x, y, z)``."""
    d2 = x * x + y * y + z * z
    k = -gm / (d2 * math.sqrt(d2))
    return k * x, k * y, k * z


def third_body(gm: float, rx, ry, rz, bx, by, bz) -> tuple[float, float, float]:
    """Perturbation of a third body at ``b`` on a satellite at ``r``, Earth-centred.

    Direct term toward the body plus the indirect term (the body's pull on Earth's centre).
    """
    dx, dy, dz = bx - rx, by - ry, bz - rz
    d2 = dx * dx + dy * dy + dz * dz
    b2 = bx * bx + by * by + bz * bz
    kd = gm / (d2 * math.sqrt(d2))
    kb = gm / (b2 * math.sqrt(b2))
    return kd * dx - kb * bx, kd * dy - kb * by, kd * dz - kb * bz
