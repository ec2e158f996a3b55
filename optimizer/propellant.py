"""Finite-burn figures of an impulsive plan: propellant, burn duration and ignition epoch.

The optimiser's burns are impulses.  Given the spacecraft's mass, thrust and specific impulse (the
optional ``[spacecraft]`` table, :class:`~optimizer.problem.Propulsion`), each burn gets

* its propellant by the rocket equation, ``m1 = m0 exp(-Δv / (g0 Isp))``;
* its duration at constant thrust, ``(m0 - m1) / mdot`` with ``mdot = F / (g0 Isp)``;
* the ignition epoch of a burn centred on the impulse, ``epoch - duration / 2``;

the mass after one burn being the mass before the next.  These are first estimates: a centred
burn neglects gravity losses, which grow with the burn's duration compared with the local orbital
period.

One job: finite-burn figures.  May import: the standard library only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["G0", "FiniteBurn", "finite_burns"]

#: Standard acceleration of gravity, m/s^2: exact by definition (3rd CGPM, 1901; ISO 80000-3).
G0 = 9.80665


@dataclass(frozen=True)
class FiniteBurn:
    """Finite-burn figures of one impulsive burn (SI units, epochs in TDB seconds past J2000).

    Attributes
    ----------
    mass_before_kg, mass_after_kg : float
        Spacecraft mass at ignition and at cut-off.
    propellant_kg : float
        ``mass_before_kg - mass_after_kg``.
    duration_s : float
        Burn duration at constant thrust.
    ignition_epoch, cutoff_epoch : float
        Ignition and cut-off of a burn centred on the impulse's epoch.
    """

    mass_before_kg: float
    mass_after_kg: float
    propellant_kg: float
    duration_s: float
    ignition_epoch: float
    cutoff_epoch: float


def finite_burns(burns, propulsion) -> list[FiniteBurn] | None:
    """Finite-burn figures of ``burns`` (in plan order), or None without a ``propulsion`` table.

    Parameters
    ----------
    burns : sequence of Burn
        Impulsive burns (``epoch`` in TDB s, ``dv_mps``).
    propulsion : Propulsion or None
        Mass at the start (kg), thrust (N), specific impulse (s).

    Returns
    -------
    list of FiniteBurn, or None
        One entry per burn; a zero burn has zero propellant and duration.
    """
    if propulsion is None:
        return None
    exhaust = G0 * propulsion.isp_s  # effective exhaust speed, m/s
    mdot = propulsion.thrust_n / exhaust  # kg/s
    mass, out = propulsion.mass_kg, []
    for b in burns:
        used = -mass * math.expm1(-b.dv_mps / exhaust)  # m0 (1 - exp(-Δv/c)), exact for small burns
        duration = used / mdot
        out.append(FiniteBurn(mass_before_kg=mass, mass_after_kg=mass - used, propellant_kg=used,
                              duration_s=duration, ignition_epoch=b.epoch - duration / 2.0,
                              cutoff_epoch=b.epoch + duration / 2.0))
        mass -= used
    return out
