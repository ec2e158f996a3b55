"""The multiple-shooting NLP of a free-return design, built with CasADi.

Reading order (the order the NLP is built in :meth:`Transcription.__init__`):

1. **Phases.** The path is cut at every burn, at the perilune and at the arrival: start ->
   (outbound burns) -> perilune -> (return burns) -> arrival.  Each phase between two cuts is a
   coast.
2. **Regularised time.** A coast is integrated in a Sundman-type variable ``s`` with
   ``dt/ds = 1 / omega``, ``omega^2 = mu_E / r_E^3 + mu_M / r_M^3`` (the local dynamical
   frequency of Earth and Moon).  Equal steps in ``s`` are equal fractions of the local orbital
   time scale, so the steps shrink by themselves near perigee and perilune.  The epoch ``t`` is the
   seventh state and comes out of the integration, so burn, perilune and arrival epochs are
   ordinary node values.
3. **Segments.** Each phase has ``N`` segments of equal ``s``-length ``S_p / N`` (``S_p`` a
   variable); a segment is ``M`` fixed steps of an explicit 8th-order Runge-Kutta scheme (the
   12-stage 8th-order weights of Dormand & Prince's DOP853).  Nodes are variables; defects tie
   them together (multiple shooting).
4. **Burns.** A free burn is a vector ``dv`` with a slack ``sigma >= 0`` and the cone
   ``sigma^2 >= |dv|^2``; the objective sums the slacks, so it is smooth at the optimum even when a
   burn is zero.  A fixed-direction burn is ``+-sigma`` along the pre-burn velocity.
5. **Events.** The perilune is the last node of the outbound coast: radial velocity relative to the
   Moon zero and distance inside the altitude range.  The arrival is the last node: geocentric
   radius at the entry interface with the flight-path angle in its window (or radial velocity zero
   at a perigee in its altitude range).
6. **Bounds.** Burn and arrival epochs are bounds on node epochs; no node comes closer to Earth or
   Moon than the minimum altitude.

Everything inside is in scaled units: length ``LU`` (384400 km), time ``TU`` (so that
``GM_E + GM_M = 1``), epochs measured from the start epoch.  Burn and arrival windows are bounds,
so one built transcription can be re-solved with other windows (trade studies) without rebuilding.

**Parameters.** The numbers that change with the epoch (the start epoch ``t_ref`` and the force
model's ephemeris: Chebyshev window and coefficients, or the circular Moon's orbit) enter the
expressions as a parameter vector ``p`` (``self.p``, value ``self.p_value``), not as constants:
two problems of the same structure (phases, mesh, burn kinds, model kind and series degree) have
the same parametric functions, so one compiled library serves both (``optimizer/compiled.py``).
``self.nlp`` is the parameter-free NLP that nlpsol and the tests use: its segment functions have
the values written in before CasADi builds them (constants folded, the padded series' zero terms
gone); ``self.nlp_parametric`` keeps ``p`` (for the compiled library).  Each is built on first use.

Its exact derivatives, assembled per segment, are the base class in :mod:`optimizer.derivatives`.

May import constants, the models' base, tableau, derivatives, numpy and CasADi; never the
propagator or verifier (they referee it).
"""

from __future__ import annotations

import math
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass

import casadi as ca
import numpy as np

from .constants import EARTH_MOON_DISTANCE, GM_EARTH, GM_MOON, SECONDS_PER_DAY
from .derivatives import MAP_MODE, AssembledDerivatives
from .models.base import inv_cube_casadi
from .tableau import A as _RK_A, B as _RK_B  # Dormand & Prince's 12-stage 8th-order weights

#: Threads of the CasADi map over a coast's segments (``derivatives.MAP_MODE``; two cores on the
#: reference machine): the default; a transcription takes its own (``threads=``, or :func:`map_threads`).
MAP_THREADS = 2
_THREADS = ContextVar("slingback_map_threads", default=None)


@contextmanager
def map_threads(threads: int):
    """Transcriptions built inside this block (in this thread or task) map their segments over
    ``threads`` threads unless given ``threads=`` themselves; nothing global is changed."""
    token = _THREADS.set(max(1, int(threads)))
    try:
        yield
    finally:
        _THREADS.reset(token)


@dataclass(frozen=True)
class Scaling:
    """Scaled units of the NLP: km = LU * length, s = TU * time, epoch = t_ref + TU * tau."""

    lu: float
    tu: float
    t_ref: float

    @property
    def vu(self) -> float:
        return self.lu / self.tu

    @classmethod
    def earth_moon(cls, t_ref: float) -> "Scaling":
        lu = EARTH_MOON_DISTANCE
        return cls(lu, math.sqrt(lu**3 / (GM_EARTH + GM_MOON)), float(t_ref))


@dataclass(frozen=True)
class Phase:
    """A coast between two cuts; ``end`` is ``"burn"``, ``"perilune"`` or ``"arrival"``."""

    index: int
    end: str
    burn: int | None  # index of the burn at the end of this phase, when end == "burn"


def is_injection(problem) -> bool:
    """True when the path starts in a parking orbit and burn 0 is the injection at the start."""
    return not hasattr(problem.start, "state")


def phase_layout(problem) -> list[Phase]:
    """The coasts of ``problem``, in time order (an injection burn is at the start, not a cut)."""
    first = 1 if is_injection(problem) else 0
    ends = [("burn", j) for j, b in enumerate(problem.burns) if b.leg == "outbound" and j >= first]
    ends.append(("perilune", None))
    ends += [("burn", j) for j, b in enumerate(problem.burns) if b.leg == "return"]
    ends.append(("arrival", None))
    return [Phase(i, e, j) for i, (e, j) in enumerate(ends)]


class _Vars:
    """Collects decision variables with bounds and guesses, and constraints with limits."""

    def __init__(self):
        self.x, self.lbx, self.ubx, self.x0 = [], [], [], []
        self.g, self.lbg, self.ubg = [], [], []
        self.index = {}  # name -> slice into x
        self.pos = {}  # name -> position in the lists (bounds of one variable block)
        self.n = 0
        self.gindex = {}
        self.ng = 0

    def var(self, name, shape, lb=-np.inf, ub=np.inf, guess=0.0):
        sym = ca.MX.sym(name, *shape)
        size = shape[0] * shape[1]
        self.x.append(ca.vec(sym))
        for store, val in ((self.lbx, lb), (self.ubx, ub), (self.x0, guess)):
            store.append(np.broadcast_to(np.asarray(val, dtype=float), shape).ravel(order="F").copy())
        self.index[name] = slice(self.n, self.n + size)
        self.pos[name] = len(self.x) - 1
        self.n += size
        return sym

    def con(self, name, expr, lo, hi):
        expr = ca.vec(expr)
        size = expr.numel()
        self.g.append(expr)
        self.lbg.append(np.broadcast_to(np.asarray(lo, dtype=float), (size,)).copy())
        self.ubg.append(np.broadcast_to(np.asarray(hi, dtype=float), (size,)).copy())
        self.gindex[name] = slice(self.ng, self.ng + size)
        self.ng += size


class Transcription(AssembledDerivatives):
    """The NLP of one problem on one mesh.

    Parameters
    ----------
    problem : Problem
    model : ForceModel
        Earth-centred model (km, s, TDB seconds past J2000) with a CasADi side.
    steps : sequence of int
        RK8 steps per segment, one entry per phase (refined per phase by the solve loop).
    segments : int
        Segments per phase.
    """

    def __init__(self, problem, model, steps, segments, threads: int | None = None):
        self.problem, self.model = problem, model
        #: threads of each mapped segment evaluation (``threads``, else :func:`map_threads`, else MAP_THREADS)
        self.threads = max(1, int(threads if threads is not None else (_THREADS.get() or MAP_THREADS)))
        self.phases = phase_layout(problem)
        self.steps = [int(m) for m in steps]
        self.segments = int(segments)
        self.sc = Scaling.earth_moon(problem.start_epoch)
        self.p_value = np.r_[self.sc.t_ref, np.asarray(model.casadi_parameters(), dtype=float)]
        self.p = ca.MX.sym("p", self.p_value.size)
        self._segments = {}
        self._shots = []  # (phase index, node block, s-length, stand-in W of the segment ends)
        self._body_functions()
        v = self.v = _Vars()
        self._add_start(v)
        self._add_burns(v)
        self._add_phases(v)
        self._link_phases(v)
        self._add_perilune(v)
        self._add_arrival(v)
        self._add_clearance(v)
        self._add_spacing(v)
        self._set_objective(v)
        x, self._g_w = ca.vertcat(*v.x), ca.vertcat(*v.g)
        self._x = x
        self.lbx, self.ubx = np.concatenate(v.lbx), np.concatenate(v.ubx)
        self.x0 = np.concatenate(v.x0)
        self.lbg, self.ubg = np.concatenate(v.lbg), np.concatenate(v.ubg)

    def _g_with_segments(self, parametric: bool):
        """The constraints with every coast's segment ends written in (of the parametric or the
        folded segment functions, :meth:`segment_function`)."""
        ends = [self._mapped(self.steps[k], parametric)(nodes[:, :-1],
                                                        ca.repmat(slen / self.segments, 1, self.segments), self.p)
                for k, nodes, slen, _ in self._shots]
        return ca.substitute([self._g_w], [w for *_, w in self._shots], ends)[0]

    def _nlp(self, parametric: bool) -> dict:
        """The NLP of one flavour (:meth:`segment_function`), built on first use."""
        key = ("nlp", parametric)
        if key not in self._segments:
            g = self._g_with_segments(parametric)
            self._segments[key] = ({"x": self._x, "p": self.p, "f": self.f, "g": g} if parametric else
                                   {"x": self._x, "f": self.f, "g": self.fix_parameters(g)[0]})
        return self._segments[key]

    @property
    def nlp(self) -> dict:
        """The NLP nlpsol solves when its functions are interpreted: the model's numbers written
        in (constants folded).  A compiled library needs only :attr:`nlp_parametric`."""
        return self._nlp(parametric=False)

    @property
    def nlp_parametric(self) -> dict:
        """The NLP with the parameter vector ``p`` kept as an input (for a compiled library shared
        by every epoch of one structure)."""
        return self._nlp(parametric=True)

    def fix_parameters(self, *exprs) -> list:
        """``exprs`` (MX) with the parameter vector replaced by this problem's values, substituted
        together so that the subexpressions they share stay shared (two separate substitutions copy
        the graph twice: measured, the constraint Jacobian then evaluated the segments' Jacobians
        twice, 15.5 ms a call instead of 7.6 ms)."""
        return ca.substitute(list(exprs), [self.p], [ca.MX(ca.DM(self.p_value))])

    # -- dynamics ------------------------------------------------------------------------------
    def _body_functions(self):
        """Scaled Moon position/velocity and the right-hand side in ``s`` (both flavours, see
        below); each takes the parameter vector (start epoch, then the model's numbers) as its
        last input.  The RK8 step is :meth:`_step_function`."""
        sc, model = self.sc, self.model
        par = ca.SX.sym("p", self.p_value.size)
        t_ref, mpar = par[0], (par[1:] if self.p_value.size > 1 else None)
        tau = ca.SX.sym("tau")
        t_phys = t_ref + sc.tu * tau
        rm = model.moon_position_casadi(t_phys, par=mpar) / sc.lu
        vm = ca.jacobian(rm, tau)  # d(rm)/d(tau) is already the scaled velocity
        self.moon_fn = ca.Function("moon", [tau, par], [rm, vm])

        z = ca.SX.sym("z", 7)
        r, vel, tz = z[0:3], z[3:6], z[6]
        t_phys = t_ref + sc.tu * tz
        r_km = r * sc.lu
        acc = model.acceleration_casadi(t_phys, r_km, vel * sc.vu, par=mpar) * (sc.tu**2 / sc.lu)
        # omega^2 from the same separations as the acceleration (physical units, then scaled), so
        # that the common-subexpression pass below evaluates each distance once
        dm = r_km - model.moon_position_casadi(t_phys, par=mpar)
        omega2 = (model.gm_earth * inv_cube_casadi(r_km) + model.gm_moon * inv_cube_casadi(dm)) * sc.tu**2
        dtds = 1.0 / ca.sqrt(omega2)
        self.dtds_fn = ca.Function("dtds", [z, par], [dtds])
        rhs = ca.cse(ca.vertcat(vel * dtds, acc * dtds, dtds))
        # two flavours of the right-hand side: ``p`` kept (a compiled library serves every epoch),
        # or this problem's numbers written in, which lets CasADi fold constants and drop the zero
        # coefficients of the padded series (``ephemeris.PARAMETER_DEGREE_STEP``); the folded
        # flavour is what nlpsol evaluates.  Measured on the demo-trade structure: segment 8,358
        # instructions folded against 9,725, constraint Jacobian 8.3 ms a call against 9.4 ms.
        folded = ca.cse(ca.substitute(rhs, par, ca.DM(self.p_value)))
        self._rhs = {True: ca.Function("rhs", [z, par], [rhs]), False: ca.Function("rhs", [z, par], [folded])}

    def _step_function(self, parametric: bool) -> ca.Function:
        """One RK8 step ``(z, h, p) -> z`` of the parametric or folded right-hand side."""
        key = ("step", parametric)
        if key not in self._segments:
            z, h, par = ca.SX.sym("z", 7), ca.SX.sym("h"), ca.SX.sym("p", self.p_value.size)
            rhs = self._rhs[parametric]
            k = []
            for i in range(12):
                zi = z
                for j in range(i):
                    if _RK_A[i, j] != 0.0:
                        zi = zi + h * _RK_A[i, j] * k[j]
                k.append(rhs(zi, par))
            z_next = z + h * sum(_RK_B[i] * k[i] for i in range(12) if _RK_B[i] != 0.0)
            self._segments[key] = ca.Function("rk8_step", [z, h, par], [z_next])
        return self._segments[key]

    def segment_function(self, steps: int, parametric: bool = False) -> ca.Function:
        """``M`` RK8 steps of length ``h / M``, expanded to SX; one Function per step count and
        flavour, shared by the coasts (CasADi then generates its derivatives once: measured ~2x
        faster build).
        ``parametric``: the model's numbers read from the input ``p`` (else written in; ``p`` is
        then an input the function ignores)."""
        key = ("segment", steps, parametric)
        cached = self._segments.get(key)
        if cached is not None:
            return cached
        z = ca.SX.sym("z", 7)
        h = ca.SX.sym("h")
        par = ca.SX.sym("p", self.p_value.size)
        step = self._step_function(parametric)
        zz = z
        for _ in range(steps):
            zz = step(zz, h / steps, par)
        fn = ca.Function(f"segment{steps}", [z, h, par],
                         [ca.cse(ca.Function("s", [z, h, par], [zz]).expand()(z, h, par))])
        self._segments[key] = fn
        return fn

    def _mapped(self, steps: int, parametric: bool = False) -> ca.Function:
        """The segment function of ``steps`` mapped over a coast's segments (one per step count and
        flavour)."""
        key = ("map", steps, parametric)
        if key not in self._segments:
            seg = self.segment_function(steps, parametric)
            self._segments[key] = seg.map(self.segments, MAP_MODE, self.threads)
        return self._segments[key]

    # -- building blocks -----------------------------------------------------------------------
    def _add_start(self, v):
        """The start: a fixed state, or a point of the parking orbit at a free epoch and node."""
        st, sc, model = self.problem.start, self.sc, self.model
        if not is_injection(self.problem):
            y = np.asarray(st.state, dtype=float)
            self.z_start = ca.DM(np.r_[y[:3] / sc.lu, y[3:] / sc.vu, (st.epoch - sc.t_ref) / sc.tu])
            return
        # the injection happens inside both the parking orbit's window and its own burn window
        t_lo = max(st.epoch_window[0], self.problem.burns[0].window[0])
        t_hi = min(st.epoch_window[1], self.problem.burns[0].window[1])
        lo, hi = ((t - sc.t_ref) / sc.tu for t in (t_lo, max(t_lo, t_hi)))
        tau = v.var("tau_injection", (1, 1), lo, hi, 0.5 * (lo + hi))
        raan_lo, raan_hi = (-4 * math.pi, 4 * math.pi) if st.raan_window_deg is None else \
            (math.radians(a) for a in st.raan_window_deg)
        raan = v.var("raan", (1, 1), raan_lo, raan_hi, 0.5 * (raan_lo + raan_hi))
        u = v.var("arg_latitude", (1, 1), -4 * math.pi, 4 * math.pi, 0.0)
        inc = math.radians(st.inclination_deg)
        rp = (model.earth.radius + st.altitude_km) / sc.lu
        vp = math.sqrt(model.gm_earth * sc.tu**2 / sc.lu**3 / rp)
        pvec = ca.vertcat(ca.cos(raan), ca.sin(raan), 0)
        qvec = ca.vertcat(-math.cos(inc) * ca.sin(raan), math.cos(inc) * ca.cos(raan), math.sin(inc))
        r = rp * (ca.cos(u) * pvec + ca.sin(u) * qvec)
        vel = vp * (-ca.sin(u) * pvec + ca.cos(u) * qvec)
        self.z_start = ca.vertcat(r, vel, tau)

    def _add_burns(self, v):
        self.dv, self.sigma = [], []
        vu_mps = self.sc.vu * 1000.0
        for j, b in enumerate(self.problem.burns):
            cap = b.max_dv_mps / vu_mps
            sig = v.var(f"sigma{j}", (1, 1), 0.0, cap, min(cap, 1e-3))
            self.sigma.append(sig)
            if b.direction == "free":
                dv = v.var(f"dv{j}", (3, 1), -cap, cap, 0.0)
                v.con(f"cone{j}", sig**2 - ca.sumsqr(dv), 0.0, np.inf)
                self.dv.append(dv)
            else:
                self.dv.append(None)  # fixed direction: set once the pre-burn velocity exists

    def _add_phases(self, v):
        sc, n = self.sc, self.segments
        self.nodes, self.slen = [], []
        for p in self.phases:
            nodes = v.var(f"z{p.index}", (7, n + 1))
            slen = v.var(f"S{p.index}", (1, 1), 0.0, 40.0, 1.0)
            # The segment ends enter the constraints through a stand-in symbol W (replaced by the
            # mapped segment function below): the defects are linear in W, which is what lets
            # :meth:`derivative_functions` assemble exact derivatives segment by segment.
            w = ca.MX.sym(f"W{p.index}", 7, n)
            v.con(f"defects{p.index}", w - nodes[:, 1:], 0.0, 0.0)
            self._shots.append((p.index, nodes, slen, w))
            self.nodes.append(nodes)
            self.slen.append(slen)
        # epochs stay inside the ephemeris fit
        t_hi = (self.problem.latest_epoch() - sc.t_ref) / sc.tu
        for p in self.phases:
            k = self._block(p)
            v.lbx[k][6::7] = 0.0
            v.ubx[k][6::7] = t_hi

    def _block(self, p):
        """Position of phase ``p``'s node block in the variable lists."""
        return self.v.pos[f"z{p.index}"]

    def _link_phases(self, v):
        """First node of each phase: the start state, or the previous end plus the burn."""
        problem, sc = self.problem, self.sc
        for p, nodes in zip(self.phases, self.nodes):
            if p.index == 0 and not is_injection(problem):
                k = self._block(p)
                v.lbx[k][:7] = np.asarray(self.z_start).ravel()
                v.ubx[k][:7] = np.asarray(self.z_start).ravel()
                continue
            if p.index == 0:  # the injection burn, at the start
                z_prev, j = self.z_start, 0
            else:
                prev = self.phases[p.index - 1]
                z_prev, j = self.nodes[prev.index][:, -1], prev.burn
                if prev.end == "burn":
                    lo, hi = problem.burns[j].window
                    kp = self._block(prev)
                    v.lbx[kp][-1] = max(v.lbx[kp][-1], (lo - sc.t_ref) / sc.tu)
                    v.ubx[kp][-1] = min(v.ubx[kp][-1], (hi - sc.t_ref) / sc.tu)
            jump = ca.DM.zeros(7)
            if j is not None:
                if self.dv[j] is None:
                    sign = 1.0 if problem.burns[j].direction == "along" else -1.0
                    vel = z_prev[3:6]
                    self.dv[j] = sign * self.sigma[j] * vel / ca.norm_2(vel)
                jump = ca.vertcat(ca.DM.zeros(3), self.dv[j], 0)
            v.con(f"link{p.index}", nodes[:, 0] - (z_prev + jump), 0.0, 0.0)

    def _add_perilune(self, v):
        model, sc = self.model, self.sc
        p = next(p for p in self.phases if p.end == "perilune")
        z = self.nodes[p.index][:, -1]
        rm, vm = self.moon_fn(z[6], self.p)
        d, w = z[0:3] - rm, z[3:6] - vm
        lo, hi = self.problem.lunar.altitude_km
        rho = lambda alt: ((model.moon.radius + alt) / sc.lu) ** 2  # noqa: E731
        v.con("perilune_radial", ca.dot(d, w) / ca.norm_2(d), 0.0, 0.0)
        v.con("perilune_altitude", ca.sumsqr(d), rho(lo), rho(hi))
        # a minimum of distance, not an apolune: v^2 >= mu / r there (two-body: r v^2 / mu > 1
        # exactly when r < a, true at a perilune and false at an apolune)
        mu_m = model.gm_moon * sc.tu**2 / sc.lu**3
        v.con("perilune_minimum", ca.sumsqr(w) * ca.norm_2(d) / mu_m, 1.0, np.inf)
        self.perilune_phase = p.index

    def _add_arrival(self, v):
        problem, model, sc = self.problem, self.model, self.sc
        ret = problem.arrival
        p = self.phases[-1]
        z = self.nodes[p.index][:, -1]
        r, vel = z[0:3], z[3:6]
        if ret.target == "entry":
            v.con("entry_radius", ca.norm_2(r), ret.entry_radius_km / sc.lu, ret.entry_radius_km / sc.lu)
            lo, hi = (math.sin(math.radians(a)) for a in ret.solve_flight_path_deg)
            v.con("entry_flight_path", ca.dot(r, vel) / (ca.norm_2(r) * ca.norm_2(vel)), lo, hi)
        else:
            lo, hi = ((model.earth.radius + a) / sc.lu for a in ret.perigee_alt_km)
            v.con("perigee_radial", ca.dot(r, vel) / ca.norm_2(r), 0.0, 0.0)
            v.con("perigee_radius", ca.norm_2(r), lo, hi)
            mu_e = model.gm_earth * sc.tu**2 / sc.lu**3
            v.con("perigee_minimum", ca.sumsqr(vel) * ca.norm_2(r) / mu_e, 1.0, np.inf)
        if ret.inclination_deg is not None:
            hv = ca.cross(r, vel)
            lo, hi = (math.cos(math.radians(a)) for a in ret.inclination_deg)
            v.con("arrival_inclination", hv[2] / ca.norm_2(hv), hi, lo)
        k = self._block(p)
        t_hi = v.ubx[k][-1]
        t_lo = v.lbx[k][-1]
        if ret.epoch_window is not None:
            t_lo = max(t_lo, (ret.epoch_window[0] - sc.t_ref) / sc.tu)
            t_hi = min(t_hi, (ret.epoch_window[1] - sc.t_ref) / sc.tu)
        if ret.max_duration_days is not None:
            t_hi = min(t_hi, ret.max_duration_days * SECONDS_PER_DAY / sc.tu)
        v.lbx[k][-1], v.ubx[k][-1] = t_lo, t_hi
        self.arrival_tau = z[6]

    def _add_clearance(self, v):
        """No node below the minimum altitude over Earth (but the arrival node) or Moon."""
        model, sc = self.model, self.sc
        alt = self.problem.min_altitude_km
        re2 = ((model.earth.radius + alt) / sc.lu) ** 2
        rm2 = ((model.moon.radius + alt) / sc.lu) ** 2
        for p, nodes in zip(self.phases, self.nodes):
            inner = nodes[:, :-1] if p.end == "arrival" else nodes
            n = inner.shape[1]
            moon = self.moon_fn.map(n)(inner[6, :], self.p)[0]
            v.con(f"clear_earth{p.index}", ca.sum1(inner[0:3, :] ** 2), re2, np.inf)
            v.con(f"clear_moon{p.index}", ca.sum1((inner[0:3, :] - moon) ** 2), rm2, np.inf)

    def _add_spacing(self, v):
        gap = self.problem.min_burn_spacing_s / self.sc.tu
        epochs = [self.burn_tau(j) for j in range(len(self.problem.burns))]
        order = sorted(range(len(epochs)), key=lambda j: self._burn_phase(j))
        for a, b in zip(order, order[1:]):
            v.con(f"spacing{a}_{b}", epochs[b] - epochs[a], gap, np.inf)

    def _burn_phase(self, j):
        """Index of the coast that ends at burn ``j`` (-1: the injection, at the start)."""
        return next((p.index for p in self.phases if p.burn == j), -1)

    def burn_tau(self, j):
        k = self._burn_phase(j)
        return self.z_start[6] if k < 0 else self.nodes[k][6, -1]

    def _set_objective(self, v):
        obj = self.problem.objective
        vu_mps = self.sc.vu * 1000.0
        total = sum(self.sigma) * vu_mps  # m/s
        duration_days = (self.arrival_tau - self.z_start[6]) * self.sc.tu / SECONDS_PER_DAY
        if obj.kind == "min-dv":
            self.f = total / 100.0
        elif obj.kind == "earliest":
            v.con("dv_budget", total, 0.0, obj.dv_budget_mps)
            self.f = duration_days
        elif obj.kind == "weighted":
            self.f = (total + obj.mps_per_day * duration_days) / 100.0
        else:
            raise ValueError(f"unknown objective {obj.kind!r}")
        self.total_dv_mps = total

    # -- guesses and results -------------------------------------------------------------------
    def guess_vector(self, phase_states, burns_dv, slens, start=None) -> np.ndarray:
        """Initial point from physical node states per phase (7 x (N+1): km, km/s, TDB s),
        burn vectors (km/s), phase s-lengths and (injection) start variables by name."""
        sc, v = self.sc, self.v
        x0 = self.x0.copy()
        scale = np.r_[[sc.lu] * 3, [sc.vu] * 3, sc.tu]
        for p, zs in zip(self.phases, phase_states):
            zs = np.array(zs, dtype=float)
            zs[6] -= sc.t_ref
            x0[v.index[f"z{p.index}"]] = (zs / scale[:, None]).ravel(order="F")
            x0[v.index[f"S{p.index}"]] = slens[p.index]
        for name, val in (start or {}).items():
            x0[v.index[name]] = val
        for j, dv in enumerate(burns_dv):
            dv = np.asarray(dv, dtype=float) / sc.vu
            cap = self.ubx[v.index[f"sigma{j}"]][0]
            x0[v.index[f"sigma{j}"]] = min(cap, max(np.linalg.norm(dv) * 1.01, 1e-6))
            if f"dv{j}" in v.index:
                x0[v.index[f"dv{j}"]] = dv
        return x0

    def unpack(self, x) -> dict:
        """Physical quantities from a variable vector."""
        sc, v = self.sc, self.v
        x = np.asarray(x, dtype=float).ravel()
        scale = np.r_[[sc.lu] * 3, [sc.vu] * 3, sc.tu]
        phases = []
        for p in self.phases:
            zs = x[v.index[f"z{p.index}"]].reshape(7, -1, order="F") * scale[:, None]
            zs[6] += sc.t_ref
            phases.append(zs)
        fn = ca.Function("dv", [self._x], [ca.horzcat(*self.dv), self.z_start])
        dvs, z0 = (np.array(a) for a in fn(x))
        dvs *= sc.vu
        start = z0.ravel() * scale
        start[6] += sc.t_ref
        burns = []
        for j in range(len(self.problem.burns)):
            k = self._burn_phase(j)
            zb = start if k < 0 else phases[k][:, -1]
            burns.append((float(zb[6]), dvs[:, j].copy(), zb[:6].copy()))
        slens = [float(x[v.index[f"S{p.index}"]][0]) for p in self.phases]
        return {"phases": phases, "burns": burns, "slens": slens, "start": start}
