"""Drawing perturbed executions of a plan and re-propagating them with the independent propagator.

Sample ``i`` of a run with seed ``S`` draws from its own stream,
``numpy.random.default_rng(SeedSequence(S, spawn_key=(i,)))`` (the ``i``-th child that
``SeedSequence(S).spawn`` gives), always in the same order: six standard normals for the start
state, then five per executed burn (proportional size, fixed size, two pointing angles, ignition
time).  A sample is therefore the same whichever worker draws it and however many there are.

The per-sample quantities come from :func:`outcome`, on the arcs of :func:`propagate_burns`: the
perilune is the closest of the perilune events, the arrival the first inbound entry-interface
crossing after it.

One job: one perturbed execution and what it gives.  May import: numpy, :mod:`optimizer.frames` and
:mod:`optimizer.propagate` only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..frames import cartesian_to_kepler, flight_path_angle, rtn_matrix
from ..propagate import propagate_burns

__all__ = ["Nominal", "Draw", "draw", "perturbed", "outcome", "evaluate", "pointing_axes",
           "sample_rng", "navigation_covariance_icrf", "entry_offsets", "DISPERSION_RTOL"]

#: DOP853 tolerances of a dispersed sample, looser than verification's 1e-12: the spread under study
#: is orders of magnitude above the integration error (``tests/benchmarks/bench_dispersion.py``
#: prints the nominal's entry angle at these and at the verification tolerances).
DISPERSION_RTOL = 1e-9
DISPERSION_ATOL = 1e-8
#: The numeric quantities of an :func:`outcome`.
NUMERIC = ("perilune_epoch_tdb_s", "perilune_altitude_km", "entry_epoch_tdb_s", "entry_x_km", "entry_y_km",
           "entry_z_km", "entry_vx_kms", "entry_vy_kms", "entry_vz_kms", "entry_flight_path_deg",
           "entry_speed_kms", "perigee_altitude_km")
EVENTS = ("perilune", "perigee", "entry", "impact_earth", "impact_moon")


@dataclass(frozen=True)
class Nominal:
    """What every sample needs: the plan's start, its executed burns and the corridor.

    ``burns`` holds only burns with a non-zero Δv (a zero burn is not executed), as
    ``(epoch, dv)`` with ``dv`` in km/s, ICRF.
    """

    start_epoch: float
    start_state: tuple
    burns: tuple
    t_end: float
    entry_radius_km: float
    target: str  # "entry" or "perigee"
    corridor: tuple  # flight-path angle (deg) for "entry", perigee altitude (km) for "perigee"
    perilune_range_km: tuple
    earth_gm: float
    earth_radius_km: float
    moon_radius_km: float | None


@dataclass(frozen=True)
class Draw:
    """The perturbations of one sample, in physical units."""

    nav: np.ndarray  # (6,) km, km/s, ICRF
    magnitude_kms: np.ndarray  # (nb,) burn-size error
    pointing_rad: np.ndarray  # (nb, 2) angles about the two axes normal to the burn
    ignition_s: np.ndarray  # (nb,)


def sample_rng(seed: int, index: int) -> np.random.Generator:
    """The stream of sample ``index`` (the ``index``-th spawned child of ``SeedSequence(seed)``)."""
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index),)))


def navigation_covariance_icrf(errors, state) -> np.ndarray:
    """The start-state covariance on ICRF axes (rotated from the RTN of ``state`` if need be)."""
    p = errors.navigation.matrix()
    if errors.navigation.frame == "icrf":
        return p
    c = rtn_matrix(np.asarray(state[:3]), np.asarray(state[3:]))  # ICRF -> RTN
    rot = np.zeros((6, 6))
    rot[:3, :3] = rot[3:, 3:] = c.T
    return rot @ p @ rot.T


def _factor(p: np.ndarray) -> np.ndarray:
    """A square root ``L`` with ``L @ L.T == p`` for a positive semi-definite ``p``."""
    w, v = np.linalg.eigh(p)
    return v * np.sqrt(np.clip(w, 0.0, None))


def draw(rng: np.random.Generator, errors, nominal: Nominal, nav_factor: np.ndarray) -> Draw:
    """The perturbations of one sample from its stream (fixed draw order, see the module text)."""
    z = rng.standard_normal(6)
    nb = len(nominal.burns)
    u = rng.standard_normal((nb, 5)) if nb else np.zeros((0, 5))
    b = errors.burn
    sizes = np.array([np.linalg.norm(dv) for _, dv in nominal.burns])
    magnitude = b.magnitude_sigma_fraction * sizes * u[:, 0] + b.magnitude_sigma_mps / 1000.0 * u[:, 1]
    pointing = math.radians(b.pointing_sigma_deg) * u[:, 2:4]
    ignition = b.ignition_sigma_s * u[:, 4]
    return Draw(nav=nav_factor @ z, magnitude_kms=magnitude, pointing_rad=pointing, ignition_s=ignition)


def pointing_axes(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors normal to the unit vector ``u`` and to each other (e1 in the ICRF equator
    unless ``u`` is nearly along the pole)."""
    ref = np.array([0.0, 0.0, 1.0]) if abs(u[2]) < 0.9 else np.array([1.0, 0.0, 0.0])
    e1 = np.cross(ref, u)
    e1 /= np.linalg.norm(e1)
    return e1, np.cross(u, e1)


def perturbed(nominal: Nominal, d: Draw):
    """(start state, burns) of the perturbed execution: the true start state, and each burn of
    size ``|dv| + magnitude`` turned by the pointing angles, at ``epoch + ignition``."""
    y0 = np.asarray(nominal.start_state, dtype=float) + d.nav
    burns = []
    for k, (epoch, dv) in enumerate(nominal.burns):
        dv = np.asarray(dv, dtype=float)
        size = np.linalg.norm(dv)
        u = dv / size
        e1, e2 = pointing_axes(u)
        a, b = d.pointing_rad[k]
        theta = math.hypot(a, b)
        if theta > 0.0:  # exact rotation by theta about the axis normal to u and to a e1 + b e2
            w = (a * e1 + b * e2) / theta
            u = math.cos(theta) * u + math.sin(theta) * w
        burns.append((float(epoch + d.ignition_s[k]), (size + d.magnitude_kms[k]) * u))
    burns.sort(key=lambda x: x[0])
    return y0, burns


def entry_offsets(nominal_state, state) -> tuple[float, float]:
    """Downrange and crossrange (km, on the entry sphere, inertial) of an entry point from the
    nominal one: downrange along the nominal motion, crossrange along the nominal orbit normal."""
    r0, v0 = np.asarray(nominal_state[:3]), np.asarray(nominal_state[3:6])
    rs = np.asarray(state[:3])
    radius = np.linalg.norm(r0)
    rhat = r0 / radius
    h = np.cross(r0, v0)
    h /= np.linalg.norm(h)
    t = np.cross(h, rhat)
    s = rs / np.linalg.norm(rs)
    return float(radius * math.atan2(s @ t, s @ rhat)), float(radius * math.asin(np.clip(s @ h, -1, 1)))


def outcome(arcs, model, nominal: Nominal) -> dict:
    """Perilune, arrival and verdict of one propagated path.

    The perilune is the closest perilune event; the arrival the first entry-interface crossing
    after it.  For an entry target the perigee altitude is the osculating (vacuum, two-body)
    perigee at the entry point, else (no entry, or a perigee target) the first perigee event
    after the perilune.  Returns plain numbers (NaN where an event is missing), ``inside`` and ``reason``.
    """
    events = [e for a in arcs for e in a.events]
    out = {k: math.nan for k in NUMERIC}
    impacts = [e for e in events if e.name.startswith("impact")]
    peri = [e for e in events if e.name == "perilune"]
    best = None
    if peri:
        dist = [np.linalg.norm(e.y[:3] - model.moon_position(e.t)) for e in peri]
        best = peri[int(np.argmin(dist))]
        out["perilune_epoch_tdb_s"] = best.t
        out["perilune_altitude_km"] = float(min(dist) - nominal.moon_radius_km)
    after = best.t if best is not None else math.inf
    entry = next((e for e in events if e.name == "entry" and e.t > after), None)
    perigee = next((e for e in events if e.name == "perigee" and e.t > after), None)
    if entry is not None and nominal.target == "entry":
        r, v = entry.y[:3], entry.y[3:]
        out.update(entry_epoch_tdb_s=entry.t, entry_x_km=r[0], entry_y_km=r[1], entry_z_km=r[2],
                   entry_vx_kms=v[0], entry_vy_kms=v[1], entry_vz_kms=v[2],
                   entry_flight_path_deg=math.degrees(float(flight_path_angle(r, v))),
                   entry_speed_kms=float(np.linalg.norm(v)))
        el = cartesian_to_kepler(r, v, nominal.earth_gm)
        out["perigee_altitude_km"] = float(el.p / (1.0 + el.e) - nominal.earth_radius_km)
    elif perigee is not None:
        out["perigee_altitude_km"] = float(np.linalg.norm(perigee.y[:3]) - nominal.earth_radius_km)
    lo, hi = nominal.corridor
    if impacts and (entry is None or impacts[0].t < entry.t):
        body = impacts[0].name.split("_")[1]
        out["inside"], out["reason"] = False, f"hits the {body.title()}"
    elif best is None:
        out["inside"], out["reason"] = False, "no lunar pass"
    elif nominal.target == "entry":
        g = out["entry_flight_path_deg"]
        if entry is None:
            out["inside"], out["reason"] = False, "no entry-interface crossing after the lunar pass (misses or skips)"
        elif g < lo:
            out["inside"], out["reason"] = False, f"steep: {g:.4f} deg below {lo:g}"
        elif g > hi:
            out["inside"], out["reason"] = False, f"shallow: {g:.4f} deg above {hi:g}"
        else:
            out["inside"], out["reason"] = True, "inside"
    else:
        h = out["perigee_altitude_km"]
        if not math.isfinite(h):
            out["inside"], out["reason"] = False, "no perigee after the lunar pass"
        elif not lo <= h <= hi:
            out["inside"], out["reason"] = False, f"perigee altitude {h:.3f} km outside [{lo:g}, {hi:g}]"
        else:
            out["inside"], out["reason"] = True, "inside"
    out["verdict"] = _verdict(out["reason"])
    a = out["perilune_altitude_km"]
    plo, phi = nominal.perilune_range_km
    out["perilune_in_range"] = bool(math.isfinite(a) and plo <= a <= phi)
    return out


def _verdict(reason: str) -> str:
    """A short class of a reason (``steep``, ``shallow``, ``no entry`` ...), for counting."""
    if reason.startswith(("steep", "shallow")):
        return reason.split(":")[0]
    if reason.startswith("no entry"):
        return "no entry"
    if reason.startswith("perigee altitude"):
        return "perigee outside"
    if reason.startswith("propagation failed"):
        return "propagation failed"
    return reason


def evaluate(model, nominal: Nominal, y0, burns, rtol=DISPERSION_RTOL, atol=DISPERSION_ATOL) -> dict:
    """Propagate one (perturbed) execution and return its :func:`outcome`."""
    # with an entry target, every inbound crossing of the entry radius stops the arc, so the path can
    # never reach Earth's surface: the Earth-impact event is left out (one event function less)
    entry = nominal.target == "entry"
    events = tuple(e for e in EVENTS if not (entry and e == "impact_earth"))
    arcs = propagate_burns(model, nominal.start_epoch, y0, burns, max(nominal.t_end, *(b[0] for b in burns))
                           if burns else nominal.t_end, events=events, entry_radius=nominal.entry_radius_km,
                           terminal=("entry",) if entry else (), rtol=rtol, atol=atol)
    return outcome(arcs, model, nominal)
