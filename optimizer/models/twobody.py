"""Two-body (Kepler) model about Earth.

May import constants, the models' base, numpy, and CasADi inside the CasADi methods.
"""

from __future__ import annotations

import numpy as np

from ..constants import GM_EARTH, R_EARTH
from .base import Body, ForceModel, point_mass


class TwoBody(ForceModel):
    """Point-mass Earth only, Earth-centred inertial, km and s.

    Parameters
    ----------
    gm : float, optional
        Central gravitational parameter, km^3/s^2 (default DE421 Earth).
    """

    name = "two-body"

    def __init__(self, gm: float = GM_EARTH):
        self.gm = float(gm)
        self.earth = Body("earth", self.gm, R_EARTH)
        self.moon = None  # no Moon in this model: Moon events and constraints do not apply

    def acceleration(self, t, r, v=None):
        return np.array(point_mass(self.gm, r[0], r[1], r[2]))

    def acceleration_casadi(self, t, r, v=None, par=None):
        import casadi as ca

        return -self.gm * r / ca.power(ca.sumsqr(r), 1.5)

    def describe(self):
        return {"name": self.name, "frame": self.frame, "gm_earth_km3_s2": self.gm}
