"""Checks of the optimiser (``optimizer.solve``): known answers, constraint activity, a peer
baseline, infeasibility, honest verification, fixed-direction burns, objectives, warm starts.

The scenarios are invented: a ballistic free return through a 150 km perilune at 2027-05-13 12:00
TDB (departure perigee 200 km, return vacuum perigee 40 km), built by ``free_return_fixture``
with scipy root-finding on the independent propagator, so it is a zero-Δv answer that owes
nothing to the NLP.  The spacecraft is picked up on that path 40 h before perilune; the "abort"
case adds 10 m/s along the velocity there, which spoils the free return, and asks for one burn
1 h to 12 h later that restores it: perilune 100-5000 km, entry flight-path angle -7.0 to -5.5
degrees at 121.92 km (400,000 ft; entry interface and corridor are common practice).

Units: km, km/s, Δv in m/s, epochs TDB seconds past J2000.
"""

import dataclasses
import math

import numpy as np
import pytest

import free_return_fixture as fr
from optimizer import solve
from optimizer.constants import ENTRY_INTERFACE_ALT, R_EARTH
from optimizer.frames import flight_path_angle
from optimizer.models import build_model
from optimizer.problem import (BurnSpec, LunarPass, ModelSpec, Objective, Problem, ReturnSpec,
                               StateStart)
from optimizer.propagate import propagate
from optimizer.timescales import parse_epoch
from optimizer.verify import make_burn, verify
from peer_baseline import SingleShooting

HOUR = 3600.0
DAY = 86400.0
T_PERILUNE = parse_epoch("2027-05-13T12:00:00 TDB")
T_START = T_PERILUNE - 40 * HOUR
WINDOW = (T_START + 1 * HOUR, T_START + 12 * HOUR)
ENTRY_RADIUS = R_EARTH + ENTRY_INTERFACE_ALT


# --- fixtures (module scope: the free-return root-finding takes ~2 s, each solve a few) ----------
@pytest.fixture(scope="module")
def model():
    # covers the fixture's backward leg to the departure perigee and the problems' 12-day span
    return build_model(ModelSpec(), T_PERILUNE - 6 * DAY, T_START + 12 * DAY)


def _start_on(model, alt_km):
    """State 40 h before perilune on the ballistic free return through an ``alt_km`` perilune."""
    y_peri, alts, _ = fr.build(model, T_PERILUNE, alt_km=alt_km)
    assert np.allclose(alts, [200.0, 40.0], atol=1.0)  # the root-finding did its job
    return propagate(model, T_PERILUNE, y_peri, T_START).y[:, -1].copy()


@pytest.fixture(scope="module")
def natural(model):
    return _start_on(model, 150.0)


def _nudged(y, dv_mps):
    y = y.copy()
    y[3:] += dv_mps * 1e-3 * y[3:] / np.linalg.norm(y[3:])
    return y


def _problem(y, **kw):
    base = dict(name="abort", start=StateStart(T_START, tuple(y)), burns=(BurnSpec(WINDOW, 300.0),),
                lunar=LunarPass((100.0, 5000.0)), arrival=ReturnSpec(flight_path_deg=(-7.0, -5.5)))
    base.update(kw)
    return Problem(**base)


@pytest.fixture(scope="module")
def abort_problem(natural):
    return _problem(_nudged(natural, 10.0))


@pytest.fixture(scope="module")
def abort_plan(abort_problem, model):
    plan = solve(abort_problem, model=model)
    assert plan.status == "verified", plan.reason
    return plan


def _arrival(plan):
    return plan.event("entry").epoch


# --- 1. known answer ------------------------------------------------------------------------------
def test_zero_dv_on_a_free_return(model, natural):
    """On the ballistic free return itself the cheapest correction is no burn at all.

    Known answer: 0 m/s, from the fixture's scipy root-finding on the propagator (not from our
    NLP).  The windows are centred on the values the propagator finds on that path, so the
    uncorrected path is feasible.  Tolerance 0.05 m/s: an interior-point solution may keep a
    barrier-sized remnant of the burn (measured ~1 mm/s before the solver learnt to re-solve
    near-zero burns at zero), far below any real correction (the abort case below needs ~7 m/s).
    """
    arc = propagate(model, T_START, natural, T_START + 8 * DAY, events=("perilune", "entry"),
                    entry_radius=ENTRY_RADIUS)
    peri, entry = arc.first("perilune"), arc.first("entry")
    alt = np.linalg.norm(peri.y[:3] - model.moon_position(peri.t)) - model.moon.radius
    fpa = math.degrees(flight_path_angle(entry.y[:3], entry.y[3:]))
    assert abs(alt - 150.0) < 1.0
    prob = _problem(natural, lunar=LunarPass((alt - 50.0, alt + 50.0)),
                    arrival=ReturnSpec(flight_path_deg=(fpa - 0.5, fpa + 0.5)))
    plan = solve(prob, model=model)
    assert plan.status == "verified", plan.reason
    assert plan.total_dv_mps < 0.05


# --- 2. constraint activity -----------------------------------------------------------------------
def test_abort_burns_as_early_as_allowed(abort_plan, abort_problem, model):
    """A correction costs less the earlier it is made, so the optimal burn sits on the window's
    earliest bound (to 1 s); a window opening 5 h later must then cost more (checked by solving)."""
    assert abs(abort_plan.burns[0].epoch - WINDOW[0]) < 1.0
    later = dataclasses.replace(abort_problem, burns=(BurnSpec((WINDOW[0] + 5 * HOUR, WINDOW[1]), 300.0),))
    plan = solve(later, model=model)
    assert plan.status == "verified", plan.reason
    assert abs(plan.burns[0].epoch - later.burns[0].window[0]) < 1.0
    assert plan.total_dv_mps > 1.01 * abort_plan.total_dv_mps


# --- 3. peer baseline -----------------------------------------------------------------------------
def test_no_worse_than_single_shooting_slsqp(abort_plan, abort_problem, model):
    """scipy SLSQP single shooting on the independent propagator (``peer_baseline``), started
    mid-window, is the peer; slingback's optimum may not cost more than the peer's + 0.5 %.

    The peer runs at rtol = atol = 1e-10 with 1e-4 forward-difference steps here to keep the test
    short (the benchmark runs it at the verification tolerances); its answer must itself meet the
    constraints on the propagated path, or the comparison means nothing.
    """
    peer = SingleShooting(model, abort_problem, rtol=1e-10, atol=1e-10, fd_step=1e-4).solve(maxiter=100)
    assert peer.success, peer.message
    assert peer.feasible(abort_problem)
    assert abort_plan.total_dv_mps <= 1.005 * peer.dv_mps
    # the two methods agree on where the burn goes (the earliest bound, see the test above)
    assert abs(peer.epoch - abort_plan.burns[0].epoch) < 600.0


# --- 4. infeasible --------------------------------------------------------------------------------
def test_unreachable_perilune_is_reported_not_raised(natural, model):
    """With a 1 m/s cap the 150 km perilune cannot be lifted to 8000-9000 km (the 10 m/s nudge
    only lifts it to ~1240 km): no verified plan, a status that says so, and a reason naming the
    perilune-altitude constraint family.  (A 1 h burn window: IPOPT's infeasibility detection takes
    ~80 iterations on it, ~160 on the 11 h window.)"""
    prob = _problem(natural, burns=(BurnSpec((WINDOW[0], WINDOW[0] + HOUR), 1.0),),
                    lunar=LunarPass((8000.0, 9000.0)))
    plan = solve(prob, model=model)
    assert plan.status in ("infeasible", "failed")
    assert "perilune_altitude" in plan.reason


# --- 5. verification is honest --------------------------------------------------------------------
def test_verification_rejects_a_perturbed_burn(abort_plan, abort_problem, model):
    """Re-verifying the plan's own burns passes; the same burn 0.5 m/s off (radially) fails: the
    entry moves far beyond the 1 km / 0.01 degree tolerances."""
    b = abort_plan.burns[0]
    pre = propagate(model, T_START, np.asarray(abort_problem.start.state), b.epoch).y[:, -1]
    t_end = _arrival(abort_plan) + HOUR
    ok = verify(model, abort_problem, T_START, np.asarray(abort_problem.start.state), abort_plan.burns,
                abort_plan.events, t_end)
    assert ok.passed, ok.violations
    radial = pre[:3] / np.linalg.norm(pre[:3])
    bad = make_burn(b.epoch, np.asarray(b.dv) + 0.5e-3 * radial, pre)
    ver = verify(model, abort_problem, T_START, np.asarray(abort_problem.start.state), [bad],
                 abort_plan.events, t_end)
    assert not ver.passed
    assert ver.violations


# --- 6. fixed-direction burns ---------------------------------------------------------------------
@pytest.fixture(scope="module")
def high_pass(model):
    """Start on a second ballistic free return, through a 1500 km perilune (room to lower it)."""
    return _start_on(model, 1500.0)


@pytest.mark.parametrize("direction, nudge", [("along", -5.0), ("against", +5.0)])
def test_fixed_direction_burn(direction, nudge, high_pass, model):
    """A 5 m/s nudge against (along) the velocity is repaired by a burn along (against) it; the
    burn found must be parallel (anti-parallel) to the pre-burn velocity of the re-propagated
    path to 1e-9 in the cosine, and of a size comparable with the nudge (within a factor 2)."""
    prob = _problem(_nudged(high_pass, nudge), burns=(BurnSpec(WINDOW, 300.0, direction=direction),))
    plan = solve(prob, model=model)
    assert plan.status == "verified", plan.reason
    b = plan.burns[0]
    pre = propagate(model, T_START, np.asarray(prob.start.state), b.epoch).y[:, -1]
    cos = np.dot(b.dv, pre[3:]) / (np.linalg.norm(b.dv) * np.linalg.norm(pre[3:]))
    assert cos == pytest.approx(1.0 if direction == "along" else -1.0, abs=1e-9)
    assert 0.5 * abs(nudge) < b.dv_mps < 2.0 * abs(nudge)


# --- 7. objectives --------------------------------------------------------------------------------
def test_earliest_arrival_within_budget(abort_plan, abort_problem, model):
    """Earliest arrival with 10 m/s to spend: verified, within the budget, and home earlier than
    the minimum-Δv plan (which spends ~6.8 m/s); arriving earlier costs Δv, so the budget is used
    up (to 1 %) unless another constraint stops it first (none does here)."""
    budget = 10.0
    prob = dataclasses.replace(abort_problem, objective=Objective("earliest", dv_budget_mps=budget))
    plan = solve(prob, model=model)
    assert plan.status == "verified", plan.reason
    assert plan.total_dv_mps <= budget * (1 + 1e-6) + 1e-6  # the cap slack optimizer.verify allows
    assert plan.total_dv_mps >= 0.99 * budget
    assert _arrival(plan) < _arrival(abort_plan) - HOUR


def test_weighted_objective_trades_dv_for_time(abort_plan, abort_problem, model):
    """Δv + 5 m/s per day of flight.  The minimum-Δv plan is feasible for this problem, so the
    weighted optimum can be no worse on the weighted cost, and no cheaper in Δv: hence it arrives
    no later.  (IPOPT is a local solver; on this case it must not stop on a worse branch.
    Tolerances 1 mm/s and 1 s: solver precision.)"""
    rate = 5.0
    prob = dataclasses.replace(abort_problem, objective=Objective("weighted", mps_per_day=rate))
    plan = solve(prob, model=model)
    assert plan.status == "verified", plan.reason

    def cost(p):
        return p.total_dv_mps + rate * (_arrival(p) - T_START) / DAY

    assert cost(plan) <= cost(abort_plan) + 1e-3
    assert plan.total_dv_mps >= abort_plan.total_dv_mps - 1e-3
    assert _arrival(plan) <= _arrival(abort_plan) + 1.0


# --- 8. warm start --------------------------------------------------------------------------------
def test_warm_start_converges_fast(abort_plan, abort_problem, model):
    """Solving the same problem again from its plan: the same optimum (to 1 mm/s) in at most half
    the IPOPT iterations of the cold solve."""
    plan = solve(abort_problem, model=model, warm=abort_plan)
    assert plan.status == "verified", plan.reason
    assert plan.total_dv_mps == pytest.approx(abort_plan.total_dv_mps, abs=1e-3)
    assert plan.solver["iterations"] <= abort_plan.solver["iterations"] // 2


# --- the plan's JSON form of a real solve ----------------------------------------------------------
def test_plan_json_of_a_solve_fits_the_schema_in_our_own_words(abort_plan, abort_problem):
    """The solver's record goes into plan.json without the optimisation library's names (its final
    message kept under solver_message), and the whole plan validates against docs/plan.schema.json."""
    import json

    from plan_schema import validator
    from optimizer.export import plan_json
    from optimizer.plan import Plan

    data = plan_json(abort_plan, abort_problem)
    assert not [e.message for e in validator().iter_errors(data)]
    text = json.dumps({k: data[k] for k in ("solver", "warm_start")})
    for word in ("nlp_", "lam_x", "lam_g", '"success"', '"return_status"'):
        assert word not in text, word
    assert data["solver"]["solver_message"] == "Solve_Succeeded" and data["solver"]["converged"] is True
    keys = set(data["solver"]["timing_s"])
    assert {"objective", "constraint_jacobian"} <= keys
    # the Hessian's timing when the run used the exact Hessian (a cold start's first pass does not)
    assert ("lagrangian_hessian" in keys) == ("nlp_hess_l" in abort_plan.solver["timing_s"])
    back = Plan.from_dict(json.loads(json.dumps(data)))
    np.testing.assert_array_equal(back.warm["lam_g"], abort_plan.warm["lam_g"])
