"""A reference propagator for the ephemeris model, built on heyoka's Taylor integrator.

Used by ``tests/test_propagate.py`` and ``tests/benchmarks/bench_propagate.py`` as an integrator
independent of scipy's DOP853.  The equations of motion are written here a third time (after the
numpy and the CasADi accelerations of :class:`optimizer.models.EarthCentred`), as heyoka
expressions:

* Earth point mass, plus for the Moon (and the Sun) the direct pull toward the body and the
  indirect term (the body's pull on Earth's centre), plus optionally Earth's J2 about the z axis;
* the Moon and Sun positions are the SAME Chebyshev series the :class:`ChebyshevEphemeris` fit
  holds, summed by a Clenshaw recurrence on heyoka expressions of the normalised time
  ``x = (t - t_mid) / half_span``, with ``t = t_origin + hy.time``.

Heyoka's own time runs from ``t_origin`` (an epoch near the start of the coast), so that the
numbers inside the integrator stay small (a few 1e5 s rather than ~1e9 s past J2000).
"""

from __future__ import annotations

import time as _time

import heyoka as hy
import numpy as np

from optimizer.constants import J2_EARTH, R_EARTH

#: Taylor-method tolerance used for the reference runs.
HEYOKA_TOL = 1e-15


def clenshaw(coeffs, x):
    """Sum_j coeffs[j] T_j(x) as a heyoka expression, by Clenshaw's recurrence.

    Parameters
    ----------
    coeffs : sequence of float, length deg+1
        Chebyshev coefficients of one coordinate, lowest degree first.
    x : heyoka.expression
        Normalised time in [-1, 1].
    """
    c = [float(v) for v in coeffs]
    b1 = b2 = 0.0
    for cj in c[:0:-1]:
        b1, b2 = cj + 2.0 * x * b1 - b2, b1
    return c[0] + x * b1 - b2


def _series(coeffs, x):
    """The three coordinates (expressions) of a (deg+1, 3) coefficient table."""
    coeffs = np.asarray(coeffs, dtype=float)
    return [clenshaw(coeffs[:, k], x) for k in range(3)]


def _third_body(gm, r, b):
    """Direct minus indirect pull of a body at ``b`` on a satellite at ``r`` (lists of 3)."""
    d = [b[k] - r[k] for k in range(3)]
    inv_d3 = hy.sum([d[k] * d[k] for k in range(3)]) ** -1.5
    inv_b3 = hy.sum([b[k] * b[k] for k in range(3)]) ** -1.5
    return [gm * (d[k] * inv_d3 - b[k] * inv_b3) for k in range(3)]


def ephemeris_system(model, t_origin: float):
    """Equations of motion of an ``EarthCentred`` model on a Chebyshev fit, for heyoka.

    Parameters
    ----------
    model : optimizer.models.EarthCentred
        Its ``ephemeris`` must be a :class:`optimizer.ephemeris.ChebyshevEphemeris`.
    t_origin : float
        Epoch (s TDB past J2000) at which heyoka's time variable is zero.

    Returns
    -------
    list of (variable, expression)
        State ``x, y, z, vx, vy, vz`` in km and km/s.
    """
    eph = model.ephemeris
    if not hasattr(eph, "moon_coeffs"):
        raise TypeError("the heyoka reference needs a ChebyshevEphemeris fit as the model's ephemeris")
    mid = 0.5 * (eph.t_start + eph.t_end)
    half = 0.5 * (eph.t_end - eph.t_start)
    x, y, z, vx, vy, vz = hy.make_vars("x", "y", "z", "vx", "vy", "vz")
    r = [x, y, z]
    s = (hy.time - (mid - t_origin)) * (1.0 / half)

    r2 = x * x + y * y + z * z
    inv_r3 = r2 ** -1.5
    acc = [-model.gm_earth * r[k] * inv_r3 for k in range(3)]
    bodies = [(model.gm_moon, eph.moon_coeffs)]
    if model.sun:
        bodies.append((model.gm_sun, eph.sun_coeffs))
    for gm, coeffs in bodies:
        pert = _third_body(gm, r, _series(coeffs, s))
        acc = [acc[k] + pert[k] for k in range(3)]
    if model.j2:
        # Gradient of -mu J2 R^2 P2(z/r) / r^3, written from the potential.
        k = -1.5 * J2_EARTH * model.gm_earth * R_EARTH**2 * r2 ** -2.5
        f = 5.0 * z * z / r2
        acc = [acc[0] + k * x * (1.0 - f), acc[1] + k * y * (1.0 - f), acc[2] + k * z * (3.0 - f)]
    return [(x, vx), (y, vy), (z, vz), (vx, acc[0]), (vy, acc[1]), (vz, acc[2])]


def build_integrator(model, t0: float, y0, *, tol: float = HEYOKA_TOL, compact_mode: bool = True):
    """A ``heyoka.taylor_adaptive`` integrator with heyoka time 0 at epoch ``t0``.

    Returns
    -------
    (integrator, compile_seconds)
        The wall time includes heyoka's decomposition and LLVM JIT compilation.
    """
    start = _time.perf_counter()
    ta = hy.taylor_adaptive(ephemeris_system(model, t0), np.asarray(y0, dtype=float), time=0.0,
                            tol=tol, compact_mode=compact_mode)
    return ta, _time.perf_counter() - start


def propagate_heyoka(ta, t0: float, y0, t1: float):
    """Reset ``ta`` to ``y0`` at epoch ``t0`` (its time origin) and integrate to epoch ``t1``.

    Returns
    -------
    (state, seconds, nsteps)
        Final state (6,), km and km/s; wall time of the integration alone; number of steps.
    """
    ta.state[:] = np.asarray(y0, dtype=float)
    ta.time = 0.0
    start = _time.perf_counter()
    outcome, _, _, nsteps, *_ = ta.propagate_until(float(t1) - float(t0))
    seconds = _time.perf_counter() - start
    if outcome != hy.taylor_outcome.time_limit:
        raise RuntimeError(f"heyoka stopped early: {outcome}")
    return ta.state.copy(), seconds, int(nsteps)
