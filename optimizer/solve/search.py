"""The global layer above the local NLP: many seeds, cheap screening, a few IPOPT starts.

One local NLP solve finds the optimum of the basin its starting point lies in; a free burn epoch
gives a Δv landscape with several basins (the two ends of a window, a return passing either side
of Earth, the Moon passed on either side).  This module:

1. **Seeds** every usable burn at :data:`EPOCHS` epochs spread over its window (both ends
   included; outbound burns before the ballistic perilune, return burns after it), in each
   *family*: the lunar pass on the same or the other side of the Moon as the ballistic path
   (outbound burns only) and the return passing Earth in the same or the opposite sense.
2. **Screens** each seed by damped least-norm targeting (:func:`target`): the burn that puts the
   perilune inside its altitude range and the return inside its arrival corridor, measured on the
   independent propagator through two smooth quantities (the incoming selenocentric angular
   momentum along the pass's normal, which fixes the perilune radius, and the geocentric angular
   momentum of the return along its normal, which fixes the conic's entry flight-path angle or
   perigee).  Steps are least-norm solutions of the linearised ranges inside a trust region, so
   they converge from a ballistic return 30 degrees too steep as well as from a near miss.
3. **Solves** the lowest local minima of the screened Δv against epoch (one per basin, cheapest
   first) with the local NLP, and keeps the cheapest verified plan.  A start is skipped when its
   screened Δv is far above the best verified answer (:data:`SKIP_RATIO`).

Every seed and start is recorded (``plan.solver["search"]``) so the report can show the landscape.

May import: constants, problem, models, propagate, events, interrupt, timescales.  Never the wing's
``guess``, ``ipopt`` or ``strategy``: the chain calls :func:`global_solve` with a ``solve_from``
function of its own.
"""

from __future__ import annotations

import math
import multiprocessing
import os
import pickle
import signal
import sys
import threading
import time
from dataclasses import dataclass

import numpy as np

from ..constants import SECONDS_PER_DAY
from ..events import RETURN_RADIUS_KM, encounter_radius
from ..interrupt import WATCHER_NAME
from ..propagate import propagate
from ..timescales import format_epoch

#: Seed epochs per burn window (both ends included).
EPOCHS = 9
#: Screening propagation tolerances (relative; absolute in km, km/s).
SCREEN_RTOL, SCREEN_ATOL = 1e-8, 1e-8
#: Largest number of local NLP starts per problem.
MAX_STARTS = 3
#: A start whose screened Δv exceeds SKIP_RATIO x the best verified Δv + SKIP_MPS is not solved.
SKIP_RATIO, SKIP_MPS = 1.5, 1.0
#: Targeting iterations per seed, of which at most POLISH_ITERS lower the norm of a point that
#: already meets the ranges (the local NLP polishes; screening only ranks), and the first
#: trust-region radius (km/s).
TARGET_ITERS, POLISH_ITERS, FIRST_RADIUS = 25, 3, 0.02
#: Targeting iterations for the families other than the ballistic path's own side and sense.
OTHER_ITERS = 8
#: Finite-difference step of the targeting Jacobian (km/s); targeting stops on a feasible point
#: whose next least-norm step is shorter than STOP_STEP (km/s).
FD_STEP, STOP_STEP = 1e-4, 1e-5
#: Targeting gives up when its trust region shrinks below STALL_RADIUS (km/s); a point whose
#: violation is at most NEAR units (see ``target``) still seeds the NLP.
STALL_RADIUS, NEAR = 1e-5, 5.0
#: A start whose verified answer costs more than UPHILL_RATIO x its screened Δv + SKIP_MPS is
#: solved once more with other settings.  The NLP's answer from a seed that met the ranges is
#: normally at or below the seed's screened Δv (measured on the tuning half of
#: tests/benchmarks/global_cases.py: 0.1-1 % below); tuning-half seed 58 ended at 56.67 m/s from a
#: 36.35 m/s seed (36.27 m/s with the lighter objective weight), after a rounding-level change of
#: the NLP's evaluation.
UPHILL_RATIO = 1.1
HOUR = 3600.0


@dataclass
class Seed:
    """One screened seed: burn ``burn`` (index into the problem's burns) at ``epoch``."""

    burn: int
    epoch: float
    family: str
    dv: np.ndarray | None = None  # km/s, ICRF
    outcome: str = ""
    screen_s: float = 0.0

    @property
    def dv_mps(self) -> float | None:
        return None if self.dv is None else float(np.linalg.norm(self.dv) * 1000.0)

    def record(self) -> dict:
        return {"burn": self.burn + 1, "epoch_tdb_s": self.epoch, "family": self.family,
                "screened_dv_mps": self.dv_mps, "outcome": self.outcome, "screen_s": round(self.screen_s, 3)}


# -- measurement --------------------------------------------------------------------------------
class _Pass:
    """The smooth quantities targeting measures on a coast that starts just after a burn: the
    selenocentric angular momentum and energy at the encounter's perilune (``|h| = r v`` there, so
    the perilune radius follows exactly from them), and the geocentric angular momentum and energy
    where the return first meets Earth (the entry crossing, or the return perigee), from which the
    conic's flight-path angle at the interface or its perigee follow."""

    def __init__(self, model, t0, y0, t_end, r_enc, moon_needed, problem):
        self.ok = False
        if moon_needed:
            # an Earth impact ends the leg (a path through the Earth would stall the integrator); a
            # pass below the Moon's surface goes on to its closest approach, which keeps the
            # targeting's functions smooth across the surface
            arc = propagate(model, t0, y0, t_end, events=("perilune", "impact_earth"),
                            terminal=("perilune", "impact_earth"),
                            perilune_within=r_enc, rtol=SCREEN_RTOL, atol=SCREEN_ATOL)
            peri = arc.first("perilune")
            if peri is None:
                return
            d, w = peri.y[:3] - model.moon_position(peri.t), peri.y[3:] - model.moon_velocity(peri.t)
            self.h_moon = np.cross(d, w)
            self.energy_moon = float(0.5 * w @ w - model.gm_moon / np.linalg.norm(d))
            t_out, y_out = peri.t, peri.y
        else:
            self.h_moon = self.energy_moon = None
            t_out, y_out = t0, y0
        entry = problem.arrival.target == "entry"
        if t_end > t_out:
            arc = propagate(model, t_out, y_out, t_end,
                            events=("perigee", "entry", "impact_earth") if entry else ("perigee", "impact_earth"),
                            terminal=("perigee", "entry", "impact_earth"), entry_radius=problem.arrival.entry_radius_km,
                            perigee_within=RETURN_RADIUS_KM, rtol=SCREEN_RTOL, atol=SCREEN_ATOL)
            y_ret, t_ret = arc.y[:, -1], float(arc.t[-1])
            reached = arc.status != "completed"
        else:
            y_ret, t_ret, reached = y_out, t_out, False
        r, v = y_ret[:3], y_ret[3:]
        self.h_earth = np.cross(r, v)
        self.energy = float(0.5 * v @ v - model.gm_earth / np.linalg.norm(r))
        # when the return meets Earth only after the latest epoch, its arrival is estimated by the
        # conic's time to perigee (smooth in the burn, so the arrival window can be targeted)
        self.arrival = t_ret if reached else t_ret + _time_to_perigee(r, v, model.gm_earth)
        self.ok = True


def _time_to_perigee(r, v, mu) -> float:
    """Two-body time (s) from the state ``(r, v)`` to the next perigee (inf when it never comes)."""
    rn = float(np.linalg.norm(r))
    energy = 0.5 * float(v @ v) - mu / rn
    e_vec = ((float(v @ v) - mu / rn) * r - float(r @ v) * v) / mu
    e = float(np.linalg.norm(e_vec))
    if e < 1e-9:
        return 0.0
    cos_nu = float(np.clip(e_vec @ r / (e * rn), -1.0, 1.0))
    nu = math.acos(cos_nu)
    if float(r @ v) < 0:
        nu = 2 * math.pi - nu  # inbound
    if energy < 0:
        a = -mu / (2 * energy)
        big_e = 2 * math.atan2(math.sqrt(1 - e) * math.sin(nu / 2), math.sqrt(1 + e) * math.cos(nu / 2))
        mean = (big_e - e * math.sin(big_e)) % (2 * math.pi)
        return (2 * math.pi - mean) / math.sqrt(mu / a**3)
    if float(r @ v) >= 0:
        return math.inf  # outbound on an open orbit
    a = mu / (2 * energy)
    t = math.sqrt((e - 1) / (e + 1)) * math.tan(nu / 2)
    if abs(t) >= 1.0:
        return math.inf
    big_f = 2 * math.atanh(t)
    return -(e * math.sinh(big_f) - big_f) / math.sqrt(mu / a**3)


def _arrival_window(problem):
    """Earliest and latest arrival epochs: the window, the longest duration, the latest epoch."""
    ret = problem.arrival
    lo, hi = -math.inf, problem.latest_epoch()
    if ret.epoch_window is not None:
        lo, hi = max(lo, ret.epoch_window[0] + 600.0), min(hi, ret.epoch_window[1] - 600.0)
    if ret.max_duration_days is not None:
        hi = min(hi, problem.start_epoch + ret.max_duration_days * SECONDS_PER_DAY - 600.0)
    return lo, hi


def _h_moon_range(problem, model, energy):
    """Range of the perilune's angular momentum ``r v`` for a perilune inside its range (with a
    small margin), at the selenocentric energy measured there."""
    lo, hi = problem.lunar.altitude_km
    margin = min(10.0, 0.1 * (hi - lo))
    rs = [model.moon.radius + a for a in (lo + margin, hi - margin)]
    return tuple(r * math.sqrt(max(2.0 * (energy + model.gm_moon / r), 1e-12)) for r in rs)


def _h_earth_range(problem, model, energy):
    """Range of the return's angular momentum that puts its conic inside the arrival corridor."""
    ret, mu = problem.arrival, model.gm_earth
    if ret.target == "entry":
        r = ret.entry_radius_km
        v = math.sqrt(max(2.0 * (energy + mu / r), 1e-12))
        g_lo, g_hi = ret.flight_path_deg
        margin = min(0.02, 0.1 * (g_hi - g_lo))
        # steeper (more negative) angle -> smaller momentum
        return r * v * math.cos(math.radians(g_lo + margin)), r * v * math.cos(math.radians(g_hi - margin))
    lo, hi = ret.perigee_alt_km
    margin = min(1.0, 0.1 * (hi - lo))
    rp = [model.earth.radius + a for a in (lo + margin, hi - margin)]
    return tuple(x * math.sqrt(max(2.0 * (energy + mu / x), 1e-12)) for x in rp)


# -- the least-norm step --------------------------------------------------------------------------
def _least_norm_step(c, a, g, lo, hi, radius, nonneg):
    """Step ``d`` of least ``|c + d|`` with ``lo <= g + a d <= hi`` (rows of ``a``), cut to
    ``|d| <= radius``; rows that cannot all be met are met in the least-squares sense.
    Returns (the cut step, the uncut step)."""
    m = a.shape[0]
    best = None
    for pattern in np.ndindex(*(3,) * m):  # each row inactive (0), at its lower (1) or upper (2) bound
        rows = [i for i in range(m) if pattern[i]]
        if rows:
            ar = a[rows]
            target = np.array([lo[i] if pattern[i] == 1 else hi[i] for i in rows]) - g[rows]
            if not np.all(np.isfinite(target)):
                continue
            gram = ar @ ar.T
            if np.linalg.matrix_rank(gram) < len(rows):
                continue
            d = ar.T @ np.linalg.solve(gram, target + ar @ c) - c
        else:
            d = -c
        if nonneg and np.any(c + d < -1e-15):
            continue
        val = g + a @ d
        if np.all(val >= lo - 1e-9 * np.abs(lo) - 1e-12) and np.all(val <= hi + 1e-9 * np.abs(hi) + 1e-12):
            if best is None or np.linalg.norm(c + d) < np.linalg.norm(c + best):
                best = d
    if best is None:  # infeasible linearisation: least-squares towards the nearest bounds
        best = np.linalg.lstsq(a, np.clip(g, lo, hi) - g, rcond=None)[0]
        best = np.nan_to_num(best)
        if nonneg:
            best = np.maximum(c + best, 0.0) - c
    size = np.linalg.norm(best)
    return (best if size <= radius else best * (radius / size)), best


# -- targeting ------------------------------------------------------------------------------------
def target(problem, model, t_b, y_b, t_end, *, direction="free", leg="outbound", moon_side=1.0,
           earth_sense=1.0, cap_kms=np.inf, iters=TARGET_ITERS, start=None):
    """Least-norm Δv (km/s, ICRF) at ``t_b`` from the pre-burn state ``y_b`` for a perilune inside
    its range on the given side of the Moon and a return inside the arrival corridor in the given
    sense.

    The perilune is held through the selenocentric angular momentum at the perilune, the return
    through the geocentric one where it meets Earth; each is a range on its component along a
    normal: the current momentum's own direction (so the constraint is on its size, and the plane
    of the pass or return may turn freely) once the momentum lies on the asked side, else the
    fixed normal of the path without a burn, reversed (``moon_side`` / ``earth_sense`` = -1: the
    Moon passed on its other side, the return passing Earth the other way), which drives the
    momentum through zero to that side.

    ``start`` = (dv, jacobian, reference normals) of a neighbouring seed continues from its answer.
    Returns (dv or None, why, state for ``start``).
    """
    if direction == "free":
        basis, nonneg = np.eye(3), False
    else:
        v = y_b[3:] / np.linalg.norm(y_b[3:])
        basis, nonneg = (v if direction == "along" else -v)[:, None], True
    moon = leg == "outbound"
    r_enc = encounter_radius(problem)

    def measure(c):
        y = y_b.copy()
        y[3:] += basis @ c
        p = _Pass(model, t_b, y, t_end, r_enc, moon, problem)
        return p if p.ok else None

    t_lo, t_hi = _arrival_window(problem)

    def vec(p):
        return np.r_[p.h_moon if moon else [], p.h_earth, p.arrival]

    jac, fresh = None, False
    c = np.zeros(basis.shape[1])
    if start is not None:
        c = np.linalg.lstsq(basis, start[0], rcond=None)[0]
        c = np.maximum(c, 0.0) if nonneg else c
        jac = start[1] if start[1] is not None and start[1].shape[1] == len(c) else None
        refs = start[2]
    p = measure(c)
    if p is None:
        return None, "the coast from this burn never passes the Moon", None
    if start is None:
        h = vec(p)
        refs = [h[3 * k:3 * k + 3] / max(np.linalg.norm(h[3 * k:3 * k + 3]), 1e-9) for k in range(len(h) // 3)]
    if not np.isfinite(p.arrival):
        return None, "the coast from this burn never comes back to Earth", None
    signs = ([moon_side] if moon else []) + [earth_sense]

    def projector(h):
        """Rows picking, from the momentum vector(s), the component each constraint holds."""
        rows = np.zeros((len(refs) + 1, len(h)))
        for k, (ref, sign) in enumerate(zip(refs, signs)):
            hk = h[3 * k:3 * k + 3]
            own = hk / max(np.linalg.norm(hk), 1e-9)
            rows[k, 3 * k:3 * k + 3] = own if sign * float(own @ ref) > 0 else sign * ref
        rows[-1, -1] = 1.0  # the arrival epoch
        return rows

    def ranges(p):
        lo, hi = [], []
        if moon:
            a, b = _h_moon_range(problem, model, p.energy_moon)
            lo.append(a), hi.append(b)
        a, b = _h_earth_range(problem, model, p.energy)
        lo.append(a), hi.append(b)
        return np.array(lo + [t_lo]), np.array(hi + [t_hi])

    h = vec(p)
    lo, hi = ranges(p)
    # a unit of violation: 2 % of a range's width, at most 0.1 % of the momentum (about 1 km of
    # perilune, 0.01 degree of a 1-degree entry corridor)
    scale = np.maximum(np.minimum(1e-3 * np.abs(hi), 0.02 * (hi - lo)), 1e-9)
    scale[-1] = 600.0  # the arrival epoch: ten minutes

    def violation(g, lo, hi):
        return float(np.sum((np.maximum(lo - g, 0.0) + np.maximum(g - hi, 0.0)) / scale))

    viol = violation(projector(h) @ h, lo, hi)
    radius = FIRST_RADIUS if start is None else max(FIRST_RADIUS, np.linalg.norm(c))
    polish = 0  # iterations spent lowering the norm of an answer that already meets the ranges
    for it in range(iters):
        if viol <= 1.0:
            polish += 1
            if polish > POLISH_ITERS:
                break
        if jac is None:
            fresh = True
            jac = np.empty((len(h), len(c)))
            for k in range(len(c)):
                ck = c.copy()
                ck[k] += FD_STEP
                pk = measure(ck)
                if pk is None:
                    return None, "a nearby burn loses the lunar pass (targeting stopped)", None
                jac[:, k] = (vec(pk) - h) / FD_STEP
            if not np.all(np.isfinite(jac)):
                return None, "a nearby burn's return never comes back to Earth", None
        proj = projector(h)
        d, full = _least_norm_step(c, proj @ jac, proj @ h, lo, hi, radius, nonneg)
        if np.linalg.norm(full) < STOP_STEP and viol <= 1.0:
            break
        estimate = np.linalg.norm(basis @ (c + full))  # the linearised least-norm answer
        if (np.linalg.norm(basis @ c) > 1.5 * cap_kms or (it == 0 and estimate > 4.0 * cap_kms)
                or (it >= 2 and estimate > 3.0 * cap_kms)):
            return None, f"over the burn's cap ({1000 * cap_kms:g} m/s)", None
        trial = measure(c + d)
        better = False
        if trial is not None and np.isfinite(trial.arrival):
            h_t = vec(trial)
            lo_t, hi_t = ranges(trial)
            v_t = violation(projector(h_t) @ h_t, lo_t, hi_t)
            better = v_t < viol - 1e-9 or (v_t <= 1.0 and np.linalg.norm(c + d) < np.linalg.norm(c) - 1e-9)
        if better:
            fresh = False
            jac = jac + np.outer(h_t - h - jac @ d, d) / float(d @ d)  # Broyden's update
            c, h, lo, hi, viol = c + d, h_t, lo_t, hi_t, v_t
            if np.linalg.norm(d) >= 0.99 * radius:
                radius *= 2.0
        else:
            radius = 0.5 * min(radius, np.linalg.norm(d))
            if not fresh:
                jac = None  # re-linearise where we stand (a fresh Jacobian only shrinks the region)
            if radius < STALL_RADIUS:
                break
    if viol > NEAR:
        return None, "targeting did not meet the perilune and arrival ranges", None
    dv = basis @ c
    if np.linalg.norm(dv) > cap_kms:
        return None, f"over the burn's cap ({1000 * cap_kms:g} m/s)", None
    return dv, "screened" if viol <= 1.0 else "screened (near the ranges: the NLP finishes)", (dv, jac, refs)


# -- seeds ----------------------------------------------------------------------------------------
def ballistic_path(problem, model, t_end):
    """The coast with every burn at zero (the screen's pre-burn states), with its lunar encounter."""
    st = problem.start
    arc = propagate(model, st.epoch, np.asarray(st.state, float), t_end,
                    events=("perilune", "impact_earth"), terminal=("impact_earth",),
                    perilune_within=encounter_radius(problem), rtol=SCREEN_RTOL, atol=SCREEN_ATOL)
    peri = arc.first("perilune")
    return arc, (None if peri is None else peri.t)


def seed_epochs(problem, j, t0, t_peri, t_end, n=EPOCHS):
    """``n`` epochs spread over burn ``j``'s usable window (both ends): outbound burns between the
    start and an hour before the ballistic perilune, return burns between an hour after it and a
    day before the latest epoch."""
    b = problem.burns[j]
    lo, hi = max(b.window[0], t0), min(b.window[1], t_end)
    if b.leg == "outbound" and t_peri is not None:
        hi = min(hi, t_peri - HOUR)
    if b.leg == "return":
        if t_peri is None:
            return []
        lo = max(lo, t_peri + HOUR)
    if hi < lo:
        return []
    if hi - lo < 60.0:
        return [0.5 * (lo + hi)]
    return list(np.linspace(lo, hi, n))


def screen(problem, model, say=lambda m: None) -> tuple[list[Seed], float | None]:
    """Screen every usable burn alone (the others at zero) over its window in every family.

    Within a family the epochs are swept in order, each seed continuing from its neighbour's
    answer (Δv and Jacobian).  Families other than the ballistic path's own side and sense get a
    tighter cap: :data:`SKIP_RATIO` x the cheapest seed so far plus 30 m/s.
    Returns (seeds, ballistic perilune epoch or None)."""
    t_end = problem.latest_epoch()
    arc, t_peri = ballistic_path(problem, model, t_end)
    seeds, cheapest = [], np.inf
    for j, b in enumerate(problem.burns):
        if b.max_dv_mps <= 0:
            continue
        families = [("same side, same sense", 1.0, 1.0), ("same side, opposite sense", 1.0, -1.0)]
        if b.leg == "outbound":
            families += [("other side, same sense", -1.0, 1.0), ("other side, opposite sense", -1.0, -1.0)]
        # burns only while the coast without them is still flying (it may end in an impact)
        epochs = seed_epochs(problem, j, problem.start.epoch, t_peri, min(t_end, float(arc.t[-1])))
        if not epochs:
            continue

        def capped():
            """The burn's cap, or, once a seed met the ranges, what a useful start could cost."""
            cap = b.max_dv_mps / 1000.0
            return cap if not np.isfinite(cheapest) else min(cap, (SKIP_RATIO * cheapest + 30.0) / 1000.0)

        def run(t_b, side, sense, cap, state):
            y_b = np.asarray(arc.state(t_b), dtype=float) if t_b > arc.t[0] else np.asarray(problem.start.state)
            t0 = time.perf_counter()
            primary = side > 0 and sense > 0
            iters = TARGET_ITERS if primary else OTHER_ITERS
            dv, why, new = target(problem, model, t_b, y_b, t_end, direction=b.direction, leg=b.leg,
                                  moon_side=side, earth_sense=sense, cap_kms=cap, start=state, iters=iters)
            if dv is None and state is not None and primary:  # the neighbour's answer led nowhere: from zero
                dv, why, new = target(problem, model, t_b, y_b, t_end, direction=b.direction, leg=b.leg,
                                      moon_side=side, earth_sense=sense, cap_kms=cap, iters=iters)
            return dv, why, new, time.perf_counter() - t0

        # a probe at the window's middle orders the families, cheapest first, so that the later
        # ones are swept under a tighter cap
        mid = epochs[len(epochs) // 2]
        probes = {}
        for name, side, sense in families:
            probes[name] = run(mid, side, sense, capped(), None)
            if probes[name][0] is not None:
                cheapest = min(cheapest, 1000.0 * float(np.linalg.norm(probes[name][0])))
        order = sorted(families, key=lambda f: np.inf if probes[f[0]][0] is None else np.linalg.norm(probes[f[0]][0]))
        for name, side, sense in order:
            cap = capped()
            state = probes[name][2]
            sweep = epochs
            if probes[name][0] is None:  # the probe failed: try the window's ends before the rest
                ends = [epochs[0], epochs[-1]] if len(epochs) > 1 else []
                tried = [(t_b, run(t_b, side, sense, cap, None)) for t_b in ends]
                for t_b, (dv, why, new, wall) in tried:
                    seeds.append(Seed(j, float(t_b), name, dv, why, wall))
                    if dv is not None:
                        cheapest = min(cheapest, 1000.0 * float(np.linalg.norm(dv)))
                seeds.append(Seed(j, float(mid), name, *probes[name][:2], probes[name][3]))
                if all(r[0] is None for _, r in tried):
                    continue
                sweep = [t for t in epochs if t not in ends and t != mid]
                state = next(r[2] for _, r in tried if r[0] is not None)
            if (side, sense) != (1.0, 1.0):  # other families on every other epoch (the ends stay)
                sweep = [t for k, t in enumerate(epochs) if t in sweep and (k % 2 == 0 or k == len(epochs) - 1)]
            for t_b in sweep:
                if t_b == mid:
                    dv, why, new, wall = probes[name]
                else:
                    dv, why, new, wall = run(t_b, side, sense, cap, state)
                    state = new
                seeds.append(Seed(j, float(t_b), name, dv, why, wall))
                if dv is not None:
                    cheapest = min(cheapest, 1000.0 * float(np.linalg.norm(dv)))
    ok = [s for s in seeds if s.dv is not None]
    say(f"search: {len(seeds)} seeds screened, {len(ok)} met the ranges"
        + (f", cheapest {min(s.dv_mps for s in ok):.3f} m/s" if ok else ""))
    return seeds, t_peri


_SCREENS = []  # the last few screens: (problem, model, result), matched by identity and equality


def screened(problem, model, say=lambda m: None):
    """:func:`screen`, remembered for the same problem and model (a staged solve asks whether a
    burn has any seed before solving it, and the solve then uses the same screen)."""
    for prob, mod, result in _SCREENS:
        if mod is model and prob == problem:
            return result
    result = screen(problem, model, say)
    _SCREENS.append((problem, model, result))
    del _SCREENS[:-4]
    return result


def basins(seeds, limit=MAX_STARTS) -> list[Seed]:
    """The cheapest screened seed of each basin: local minima of Δv against epoch within each
    (burn, family), cheapest first."""
    picks = []
    groups = {}
    for s in seeds:
        groups.setdefault((s.burn, s.family), []).append(s)
    for group in groups.values():
        group.sort(key=lambda s: s.epoch)
        vals = [np.inf if s.dv is None else s.dv_mps for s in group]
        for k, s in enumerate(group):
            if s.dv is None:
                continue
            left = vals[k - 1] if k > 0 else np.inf
            right = vals[k + 1] if k + 1 < len(vals) else np.inf
            if vals[k] <= left and vals[k] <= right:
                picks.append(s)
    picks.sort(key=lambda s: s.dv_mps)
    return picks[: 3 * limit]  # room for starts skipped as repeats


# -- the global solve -------------------------------------------------------------------------------
def start_workers(threads_per_start: int = 1) -> int:
    """How many IPOPT starts :func:`global_solve` runs at once: ``$SLINGBACK_START_WORKERS`` if
    set, else as many as have ``threads_per_start`` cores each (the threads of a start's mapped
    segment evaluation), at most :data:`MAX_STARTS`, at least 1.  Measured on 2 cores (README):
    two starts of two threads each gain nothing over one after another; with a core each, the
    cases with several starts took 18 % less time; so starts run at once only on cores of their
    own.  Starts run in forked processes (IPOPT and its linear solver are not thread-safe), so
    only where forking is sound: on Linux, in the main thread of a process that runs no other
    Python thread (but the command's Ctrl-C watcher, :data:`~optimizer.interrupt.WATCHER_NAME`,
    which holds no lock) and is not itself a worker process (a trade study's or dispersion run's
    workers already use the cores).  Anywhere else: 1."""
    text = os.environ.get("SLINGBACK_START_WORKERS", "").strip()
    if text:
        try:
            n = int(text)
        except ValueError:
            n = 0
        if n < 1:
            raise ValueError(f"SLINGBACK_START_WORKERS={text!r}: expected a whole number of at least 1")
    else:
        cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else 1
        n = max(1, min(MAX_STARTS, cores // max(1, int(threads_per_start))))
    main = threading.main_thread()
    alone = all(t is main or t.name == WATCHER_NAME for t in threading.enumerate())
    forkable = (sys.platform.startswith("linux") and multiprocessing.parent_process() is None
                and threading.current_thread() is main and alone)
    return n if forkable else 1


def global_solve(problem, model, solve_from, say=lambda m: None, workers=1):
    """Screen, then solve the most promising starts and keep the cheapest verified plan.

    ``solve_from(burns, explore=, uphill=, say=)`` solves the NLP from the path through ``burns``
    [(epoch, dv km/s) per burn of the problem] and returns a Plan (the solver's loop, verification
    included), its progress lines going to ``say``; ``explore`` is True for a start made after a
    verified plan was found (the chain gives it a smaller budget); ``uphill`` asks for the chain's
    other IPOPT settings (see :data:`UPHILL_RATIO`).

    The starts are the cheapest :data:`MAX_STARTS` distinct basins (:func:`basins`), taken in
    order: a start is made only if its screened Δv is at most :data:`SKIP_RATIO` x the cheapest
    verified Δv of the starts before it + :data:`SKIP_MPS`, and explores once one of them
    verified.  With ``workers`` > 1 the later starts are begun early, in forked processes
    (:class:`_Ahead`), on the guess that an earlier start verifies; a guess that proves wrong
    (no verified plan before it, or a start the rule skips) is thrown away and the start made
    again as the rule says.  So every start is made with the same settings, and the answer and
    the record are the same, whatever ``workers`` is.

    Returns (the cheapest verified Plan or None, the record of every seed and start, the last
    plan any start returned or None); the record's ``"chosen"`` indexes the start of the answer.
    None also when no seed met the ranges (the caller falls back on its own guess).
    """
    t_start = time.perf_counter()
    seeds, t_peri = screened(problem, model, say)
    screen_s = time.perf_counter() - t_start
    record = {"seeds": [s.record() for s in seeds], "starts": [], "screen_s": round(screen_s, 3),
              "ballistic_perilune_tdb_s": t_peri}
    picked = []  # distinct starts (a repeat of a start's burn, family and epoch is skipped)
    for s in basins(seeds):
        if len(picked) < MAX_STARTS and not any(
                p.burn == s.burn and p.family == s.family and abs(p.epoch - s.epoch) < 1.0 for p in picked):
            picked.append(s)

    def job(k, explore, say):
        """Start ``k`` and, if it went uphill, its second solve: (plan, start records, index of
        the plan's record among them); plan None when the seed gave no starting point."""
        s, entries = picked[k], []
        # the seed's burn at its epoch (inside its window by construction); the others at zero in
        # their windows' middle
        burns = [(s.epoch, s.dv) if j == s.burn else (0.5 * sum(b.window), np.zeros(3))
                 for j, b in enumerate(problem.burns)]
        say(f"search: start {k + 1} from burn {s.burn + 1} at "
            f"{(s.epoch - problem.start.epoch) / HOUR:.1f} h ({s.family}), screened {s.dv_mps:.3f} m/s")
        plan = _start(entries, s, solve_from, burns, say, explore=explore)
        chosen = len(entries) - 1
        if plan is not None and plan.verified and plan.total_dv_mps > UPHILL_RATIO * s.dv_mps + SKIP_MPS:
            # the NLP ended far above the screened cost of the point it started from, which already
            # met the ranges: it went uphill into another basin.  Once more from the same start with
            # the chain's other settings; the cheaper verified plan counts.
            say(f"search: start {k + 1} ended at {plan.total_dv_mps:.3f} m/s, over "
                f"{UPHILL_RATIO:g} x its screened {s.dv_mps:.3f} m/s + {SKIP_MPS:g}: solving it again with "
                "other settings")
            again = _start(entries, s, solve_from, burns, say, explore=explore, uphill=True)
            if again is not None and again.verified and again.total_dv_mps < plan.total_dv_mps:
                plan, chosen = again, len(entries) - 1
        return plan, entries, chosen

    best, last = None, None
    # a later start is begun early only if the rule would make it after a verified plan as cheap
    # as the first start's screen (verified answers are normally at or a little below it); the
    # starts are sorted by screened Δv, so these are the first ``hopeful``
    hopeful = sum(s.dv_mps <= SKIP_RATIO * picked[0].dv_mps + SKIP_MPS for s in picked)
    ahead = None
    try:
        if workers > 1 and hopeful > 1:
            say(f"search: up to {min(workers, hopeful)} of {len(picked)} starts at once in other processes; "
                "the progress of each follows when it ends")
            ahead = _Ahead(job, hopeful, workers, say)
        for k, s in enumerate(picked):
            if best is not None and s.dv_mps > SKIP_RATIO * best.total_dv_mps + SKIP_MPS:
                break
            explore = best is not None
            if ahead is not None:
                plan, entries, chosen, lines = ahead.take(k, explore)
                for line in lines:
                    say(line)
            else:
                plan, entries, chosen = job(k, explore, say)
            offset = len(record["starts"])
            record["starts"].extend(entries)
            last = plan if plan is not None else last
            if plan is not None and plan.verified and (best is None or plan.total_dv_mps < best.total_dv_mps - 1e-6):
                best = plan
                record["chosen"] = offset + chosen
    finally:
        if ahead is not None:
            ahead.close()
    record["search_s"] = round(time.perf_counter() - t_start, 3)
    record["start_workers"] = workers if ahead is not None else 1
    return best, record, last


class _Child:
    """``fn()`` run in a forked copy of this process, its result pickled back through a pipe:
    :meth:`result` -> ("ok", value) or ("error", why).

    Ctrl-C: SIGINT is blocked in this thread around the fork, so the copy starts with it blocked;
    the copy then writes no wake-up byte into the parent's Ctrl-C watcher's pipe, takes the
    default action on SIGINT (it ends quietly; the parent reports) and is killed when the parent
    ends (``PR_SET_PDEATHSIG``: a command that leaves through ``os._exit`` runs no clean-up).  An
    interrupt raised in the copy before it is set up (the parent's watcher may have left one
    pending on the forking thread) ends it quietly too.  The copy never returns into the caller's
    code and always leaves through ``os._exit``."""

    def __init__(self, fn):
        self.pid, self.exitcode = None, None
        parent = os.getpid()
        # plain descriptors, no objects with finalisers: the command's Ctrl-C watcher repeats its
        # interrupt, and one landing in a finaliser would be printed as "Exception ignored"
        self.fd, send = os.pipe()
        old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
        try:
            try:
                pid = os.fork()
                if pid == 0:
                    _child_main(fn, parent, old, self.fd, send)
            except BaseException:
                if os.getpid() != parent:  # in the copy, before it was set up
                    os._exit(1)
                raise
            self.pid = pid
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)
            os.close(send)

    def result(self):
        chunks = []
        while True:
            chunk = os.read(self.fd, 1 << 20)
            if not chunk:
                break
            chunks.append(chunk)
        if not chunks:  # the process died without an answer (killed, out of memory)
            self.end()
            return "error", f"its process ended (exit status {self.exitcode})"
        return pickle.loads(b"".join(chunks))

    def end(self):
        """Close the pipe, stop the process if it still runs, and reap it."""
        if self.fd is not None:  # forgotten first: a repeat after an interrupt never closes twice
            fd, self.fd = self.fd, None
            os.close(fd)
        if self.pid is None or self.exitcode is not None:
            return
        try:
            os.kill(self.pid, signal.SIGTERM)
            _, status = os.waitpid(self.pid, 0)
            self.exitcode = os.waitstatus_to_exitcode(status)
        except (ProcessLookupError, ChildProcessError):  # reaped by an earlier call an interrupt cut
            self.exitcode = "unknown"                     # short before it noted the status


def _child_main(fn, parent, mask, receive, send):
    code = 1
    try:
        os.close(receive)
        try:  # killed when the parent ends (Linux), and ended now if it already has
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL), 0, 0, 0)  # PR_SET_PDEATHSIG
        except (OSError, AttributeError):
            pass
        if os.getppid() != parent:
            os._exit(1)
        signal.set_wakeup_fd(-1)
        if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
            signal.signal(signal.SIGINT, signal.SIG_DFL)
        signal.pthread_sigmask(signal.SIG_SETMASK, mask)
        try:
            payload = ("ok", fn())
        except BaseException as exc:  # noqa: BLE001 - the parent makes the start again
            payload = ("error", f"{type(exc).__name__}: {exc}")
        try:
            data = pickle.dumps(payload)
        except Exception as exc:  # noqa: BLE001 - an answer that cannot be pickled
            data = pickle.dumps(("error", f"its result could not be sent back ({exc})"))
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(send, view):]
            code = 0
        except OSError:  # the parent no longer listens (it ended or gave this start up)
            pass
    finally:
        os._exit(code)


class _Ahead:
    """Starts ``0 .. n-1`` run in forked processes (:class:`_Child`), up to ``workers`` at once
    (one fewer while this process makes a start itself), begun in order: start ``k`` > 0 as the
    rule would make it if an earlier start verified (exploring).  :meth:`take` returns it, or
    makes it in this process when it was not begun (past ``n``, or the fork failed), the rule
    says otherwise (no verified plan yet) or its process failed (said on ``say``).  A process's
    progress lines come back with its result and are said then, in the order of the starts; each
    start record made in another process says so (``"process": "forked"``).  :meth:`close` ends
    every process still running, also when interrupted while it does."""

    def __init__(self, job, n, workers, say):
        self.job, self.n, self.workers, self.say = job, n, workers, say
        self.running = {}  # k -> (child, whether it explores)
        self.next = 0
        self._fill(self.workers)

    def _fill(self, limit):
        while self.next < self.n and len(self.running) < limit:
            k = self.next
            self.next += 1
            explore = k > 0  # start 0 has no earlier start: it is made as the rule makes it

            def run(k=k, explore=explore):
                lines = []
                return (*self.job(k, explore, lines.append), lines)

            try:
                self.running[k] = (_Child(run), explore)
            except OSError as exc:  # no process to be had (EAGAIN, ENOMEM): made here instead
                self.say(f"search: start {k + 1} could not be begun in another process ({exc})")

    def take(self, k, explore):
        """Start ``k`` made with ``explore``: (plan, records, chosen, progress lines)."""
        begun = self.running.get(k)
        out = None
        try:
            if begun is not None and begun[1] == explore:
                status, result = begun[0].result()
                if status == "ok":
                    plan, entries, chosen, lines = result
                    out = (plan, [{**e, "process": "forked"} for e in entries], chosen, lines)
                else:
                    self.say(f"search: start {k + 1} failed in another process ({result}); made here")
        finally:
            if begun is not None:  # ended, then forgotten: if an interrupt cuts this short (the
                begun[0].end()     # command's watcher repeats it), close() ends it
                del self.running[k]
        self._fill(self.workers - (out is None))
        if out is None:  # not begun, begun on a wrong guess, or failed there: made here
            lines = []
            out = (*self.job(k, explore, lines.append), lines)
        return out

    def close(self):
        """End every process still running; an interrupt during this is raised after it."""
        interrupted = False
        while self.running:
            k = next(iter(self.running))
            try:
                self.running[k][0].end()
                del self.running[k]
            except KeyboardInterrupt:
                interrupted = True
        if interrupted:
            raise KeyboardInterrupt


def _start(entries, seed, solve_from, burns, say, **how):
    """One NLP start from ``seed`` (``how``: ``solve_from``'s flags), its record appended to
    ``entries``; returns its plan, or None when the seed gave no starting point."""
    t0 = time.perf_counter()
    entry = {**seed.record(), **{k: True for k, v in how.items() if v}}
    try:
        plan = solve_from(burns, say=say, **how)
    except ValueError as exc:  # SolveError: no starting point from this seed
        entries.append({**entry, "status": "no starting point", "reason": str(exc),
                        "wall_s": round(time.perf_counter() - t0, 3)})
        return None
    entries.append({**entry, "status": plan.status, "total_dv_mps": plan.total_dv_mps,
                    "burn_epochs_tdb_s": [b.epoch for b in plan.burns],
                    "iterations": plan.solver.get("iterations"),
                    "wall_s": round(time.perf_counter() - t0, 3)})
    return plan


def failed_outcomes(seeds) -> dict:
    """How many seeds (records) failed for each reason."""
    why = {}
    for s in seeds:
        if s.get("screened_dv_mps") is None:
            why[s["outcome"]] = why.get(s["outcome"], 0) + 1
    return why


def search_summary(record) -> str:
    """One sentence: the seeds tried, why those that failed did, and how each start ended."""
    seeds = record.get("seeds", [])
    why = failed_outcomes(seeds)
    ok = len(seeds) - sum(why.values())
    text = f"the global search screened {len(seeds)} seeds ({ok} met the ranges"
    text += ("; " + ", ".join(f"{n} {w}" for w, n in why.items())) if why else ""
    text += ")"
    if "ballistic_perilune_tdb_s" in record and record["ballistic_perilune_tdb_s"] is None:
        text += ("; the coast without burns passes the Moon nowhere ahead of the start, so no burn "
                 "after a lunar pass could be seeded (is the pass already behind the start?)")
    starts = record.get("starts", [])
    if starts:
        text += "; starts solved: " + ", ".join(
            f"burn {s['burn']} at {format_epoch(s['epoch_tdb_s'], 0)} TDB ({s['family']}): {s.get('status')}"
            for s in starts)
    return text


__all__ = ["Seed", "target", "screen", "basins", "global_solve", "start_workers", "seed_epochs", "ballistic_path"]
