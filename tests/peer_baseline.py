"""Peer baseline: single shooting with scipy's SLSQP on the independent propagator.

The textbook alternative to a multiple-shooting NLP, written here so the tests and benchmarks can
hold slingback to it.  One free-direction burn, minimum |Δv|, arrival at the entry interface:

* variables: the burn epoch (hours from the start of its window) and the Δv vector (m/s, ICRF);
* every function value propagates the whole path with :func:`optimizer.propagate.propagate`
  (DOP853, the verification tolerances unless told otherwise);
* constraints: the first perilune's altitude inside the range (the propagator's ``perilune``
  event), the flight-path angle at the first ``entry`` event after it inside the window, and
  |Δv| within the cap;
* derivatives of the constraints by forward differences of the propagated path (SLSQP's own
  default step, 1.5e-8, is below the useful resolution of a 1e-12-tolerance integration, so the
  step is set here); the objective's gradient is exact.

It shares nothing with the transcription or the solver: only the force model, the propagator and
the :class:`~optimizer.problem.Problem` dataclasses.

When the path misses the entry interface, the flight-path "angle" is continued past grazing
(0 degrees) by the osculating perigee's height above the interface, 1 degree per 1 % of the
interface radius, so the constraint stays continuous and says which way to go.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize

from optimizer.frames import flight_path_angle
from optimizer.propagate import VERIFY_ATOL, VERIFY_RTOL, propagate

HOUR = 3600.0


@dataclass(frozen=True)
class BaselineResult:
    """What the baseline found (epochs TDB s past J2000, Δv km/s ICRF)."""

    success: bool
    message: str
    epoch: float
    dv: np.ndarray
    perilune_altitude_km: float
    flight_path_deg: float
    arrival_inclination_deg: float  # of the geocentric orbit at entry to the ICRF equator (nan: no entry)
    iterations: int
    propagations: int
    wall_s: float

    @property
    def dv_mps(self) -> float:
        return float(np.linalg.norm(self.dv) * 1000.0)

    def feasible(self, problem, alt_tol_km=1.0, fpa_tol_deg=0.01) -> bool:
        """Constraints met on the propagated path (the tolerances of ``optimizer.verify``)."""
        lo, hi = problem.lunar.altitude_km
        flo, fhi = problem.arrival.flight_path_deg
        return bool(lo - alt_tol_km <= self.perilune_altitude_km <= hi + alt_tol_km
                    and flo - fpa_tol_deg <= self.flight_path_deg <= fhi + fpa_tol_deg
                    and self.dv_mps <= problem.burns[0].max_dv_mps * (1 + 1e-6))


class SingleShooting:
    """SLSQP single shooting for a one-burn, minimum-Δv, entry-target ``problem``.

    Parameters
    ----------
    model : ForceModel
        Numpy side of the force model (the same one slingback is given).
    problem : Problem
        ``start`` a StateStart, exactly one ``"free"`` burn, ``arrival.target == "entry"``.
    rtol, atol : float
        Propagator tolerances.
    fd_step : float or None
        Forward-difference step, in hours for the epoch and m/s for the Δv components.  None leaves
        the constraint derivatives to SLSQP's own forward differences (scipy's default step): the
        untuned way, kept for comparison.
    """

    def __init__(self, model, problem, rtol=VERIFY_RTOL, atol=VERIFY_ATOL, fd_step=1e-5):
        if len(problem.burns) != 1 or problem.burns[0].direction != "free":
            raise ValueError("the baseline handles exactly one free-direction burn")
        if problem.arrival.target != "entry":
            raise ValueError("the baseline handles the entry target only")
        self.model, self.problem = model, problem
        self.rtol, self.atol, self.fd_step = rtol, atol, fd_step
        self.t0 = problem.start.epoch
        self.y0 = np.asarray(problem.start.state, dtype=float)
        self.window = problem.burns[0].window
        self.t_end = problem.latest_epoch()
        self.propagations = 0
        self._cache = {}

    # -- the path -----------------------------------------------------------------------------
    def epoch(self, x) -> float:
        return self.window[0] + x[0] * HOUR

    def simulate(self, x) -> np.ndarray:
        """(perilune altitude km, entry flight-path angle deg, arrival inclination deg) of the path
        with burn ``x`` (inclination nan when the path does not reach the entry interface)."""
        key = tuple(float(v) for v in x)
        if key in self._cache:
            return self._cache[key]
        model, tb = self.model, self.epoch(x)
        y = self.y0.copy()
        if tb > self.t0:
            y = propagate(model, self.t0, y, tb, rtol=self.rtol, atol=self.atol).y[:, -1].copy()
        y[3:] += np.asarray(x[1:4], dtype=float) / 1000.0
        r_entry = self.problem.arrival.entry_radius_km
        arc = propagate(model, tb, y, self.t_end, events=("perilune", "perigee", "entry"),
                        entry_radius=r_entry, terminal=("entry",), rtol=self.rtol, atol=self.atol)
        self.propagations += 1 + (tb > self.t0)
        peri = arc.first("perilune")
        if peri is None:
            out = np.array([1e6, 90.0, np.nan])
        else:
            alt = float(np.linalg.norm(peri.y[:3] - model.moon_position(peri.t)) - model.moon.radius)
            after = [e for e in arc.events if e.t > peri.t]
            entry = next((e for e in after if e.name == "entry"), None)
            inc = np.nan
            if entry is not None:
                fpa = math.degrees(flight_path_angle(entry.y[:3], entry.y[3:]))
                h = np.cross(entry.y[:3], entry.y[3:])
                inc = math.degrees(math.acos(h[2] / np.linalg.norm(h)))
            else:
                perigee = next((e for e in after if e.name == "perigee"), None)
                rp = np.linalg.norm(perigee.y[:3]) if perigee is not None else 10.0 * r_entry
                fpa = 100.0 * (rp - r_entry) / r_entry  # continued past grazing, see module notes
            out = np.array([alt, fpa, inc])
        self._cache[key] = out
        return out

    # -- the NLP ------------------------------------------------------------------------------
    def _constraints(self, x):
        alt, fpa, _ = self.simulate(x)
        lo, hi = self.problem.lunar.altitude_km
        flo, fhi = self.problem.arrival.flight_path_deg
        cap = self.problem.burns[0].max_dv_mps
        # scaled to order one: 100 km of perilune, 1 degree of flight-path angle, 1 m/s of Δv
        return np.array([(alt - lo) / 100.0, (hi - alt) / 100.0, fpa - flo, fhi - fpa,
                         (cap**2 - float(np.dot(x[1:], x[1:]))) / (2.0 * cap)])

    def _constraints_jac(self, x):
        x = np.asarray(x, dtype=float)
        c0 = self._constraints(x)
        jac = np.empty((c0.size, x.size))
        for k in range(x.size):
            xk = x.copy()
            xk[k] += self.fd_step
            jac[:, k] = (self._constraints(xk) - c0) / self.fd_step
        jac[4] = np.r_[0.0, -x[1:] / self.problem.burns[0].max_dv_mps]
        return jac

    @staticmethod
    def _objective(x):
        n = float(np.linalg.norm(x[1:]))
        return n, np.r_[0.0, x[1:] / n] if n > 0 else np.zeros(4)

    def solve(self, epoch=None, dv=(0.0, 0.0, 0.0), maxiter=200, ftol=1e-10) -> BaselineResult:
        """Run SLSQP from burn ``epoch`` (default: mid-window) and ``dv`` (km/s)."""
        lo, hi = self.window
        epoch = 0.5 * (lo + hi) if epoch is None else epoch
        dv = np.asarray(dv, dtype=float) * 1000.0
        if not np.any(dv):
            dv = np.full(3, 1e-3)  # |dv| has no gradient at zero
        x0 = np.r_[(epoch - lo) / HOUR, dv]
        cap = self.problem.burns[0].max_dv_mps
        bounds = [(0.0, (hi - lo) / HOUR)] + [(-cap, cap)] * 3
        self.propagations = 0
        start = time.perf_counter()
        cons = {"type": "ineq", "fun": self._constraints}
        if self.fd_step is not None:
            cons["jac"] = self._constraints_jac
        res = minimize(self._objective, x0, jac=True, method="SLSQP", bounds=bounds, constraints=[cons],
                       options={"maxiter": maxiter, "ftol": ftol})
        wall = time.perf_counter() - start
        alt, fpa, inc = self.simulate(res.x)
        return BaselineResult(success=bool(res.success), message=str(res.message), epoch=self.epoch(res.x),
                              dv=res.x[1:] / 1000.0, perilune_altitude_km=float(alt),
                              flight_path_deg=float(fpa), arrival_inclination_deg=float(inc),
                              iterations=int(res.nit),
                              propagations=self.propagations, wall_s=wall)


def solve_baseline(model, problem, **kwargs) -> BaselineResult:
    """Shorthand: ``SingleShooting(model, problem).solve(**kwargs)``."""
    init = {k: kwargs.pop(k) for k in ("rtol", "atol", "fd_step") if k in kwargs}
    return SingleShooting(model, problem, **init).solve(**kwargs)
