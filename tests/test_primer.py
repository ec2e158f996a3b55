"""The primer vector read off the NLP's multipliers, and the staged multi-burn solve it drives.

Theory (Lawden, Optimal Trajectories for Space Navigation, 1963; Prussing, "Primer vector theory
and applications", in Conway (ed.), Spacecraft Trajectory Optimization, 2010 -- from memory): on
an optimal impulsive path, a coast point where the primer magnitude |p| exceeds 1 is one where an
added impulse lowers the total Δv; |p| <= 1 along the coast means no added burn helps.

Checks that do not lean on the multipliers themselves:
1. Envelope theorem: nudging the start velocity by ``delta`` changes the optimal total Δv by
   ``-1000 p . delta`` m/s (delta in km/s) to first order; measured by central differences of
   re-solved optima.
2. A second burn that cannot help (|p| <= 1) comes back exactly zero at the one-burn optimum.
3. Where |p| > 1 in a burn's window of an expensive answer, that burn alone is indeed far cheaper;
   and a multi-burn solve, which solves each burn alone first, keeps the cheap one.
"""

from dataclasses import replace

import numpy as np
import pytest

import test_optimizer as base
from test_optimizer import model, natural  # noqa: F401  (the shared fixtures)
from optimizer import solve
from optimizer.problem import BurnSpec, LunarPass
from optimizer.solve.primer import primer_scan
from optimizer.transcription import Transcription

HOUR = 3600.0


@pytest.fixture(scope="module")
def one_burn(model, natural):
    prob = base._problem(base._nudged(natural, 10.0))
    plan = solve(prob, model=model)
    assert plan.verified, plan.reason
    return prob, plan


def _scan(prob, plan, model):
    tr = Transcription(prob, model, plan.warm["steps"], plan.warm["segments"])
    return primer_scan(tr, plan.warm["x"], plan.warm["lam_g"], plan.warm["lam_x"])


def test_primer_at_the_start_predicts_the_optimum_sensitivity(one_burn, model):
    prob, plan = one_burn
    p = _scan(prob, plan, model)[0]["gain"][:, 0]  # primer vector at the start node
    assert np.all(np.isfinite(p)) and 0.05 < np.linalg.norm(p) < 5.0
    y0 = np.asarray(prob.start.state)
    e1 = p / np.linalg.norm(p)
    e2 = np.cross(e1, y0[:3])
    e2 /= np.linalg.norm(e2)
    h = 0.2e-3  # km/s (0.2 m/s)
    for e in (e1, e2):
        dj = []
        for sign in (1.0, -1.0):
            y = y0.copy()
            y[3:] += sign * h * e
            pl = solve(replace(prob, start=replace(prob.start, state=tuple(y))), warm=plan, model=model)
            assert pl.verified, pl.reason
            dj.append(pl.total_dv_mps)
        measured = (dj[0] - dj[1]) / 2.0
        predicted = -1000.0 * (p @ e) * h
        assert measured == pytest.approx(predicted, abs=0.02 * 1000.0 * np.linalg.norm(p) * h)


def test_unhelpful_second_burn_is_proved_useless(one_burn, natural, model):
    prob, plan1 = one_burn
    second = BurnSpec((base.WINDOW[1] + 2 * HOUR, base.T_PERILUNE - 4 * HOUR), 300.0)
    two = replace(prob, burns=prob.burns + (second,))
    plan2 = solve(two, model=model)
    assert plan2.verified, plan2.reason
    assert len(plan2.burns) == 2 and plan2.burns[1].dv_mps == 0.0
    assert plan2.total_dv_mps == pytest.approx(plan1.total_dv_mps, rel=1e-4)
    rec = plan2.solver["primer"]
    assert rec["max_primer"]["2"] <= 1.0 + rec["tolerance"]
    # the report says what the primer test found
    from optimizer.export.report import report_markdown

    text = report_markdown(plan2, two)
    assert "## Held burns (primer test)" in text and f"burn 2: {rec['max_primer']['2']:.4f}" in text
    # and the plan warm-starts the whole two-burn problem
    again = solve(two, warm=plan2, model=model)
    assert again.verified and again.total_dv_mps <= plan2.total_dv_mps * (1 + 1e-4)


def _trim_and_outbound(natural):
    # a return-leg trim, which can fix the entry angle only expensively (~15 m/s), listed first;
    # an outbound burn that does it for ~0.5 m/s, listed second
    trim = BurnSpec((base.T_PERILUNE + 6 * HOUR, base.T_PERILUNE + 30 * HOUR), 300.0, leg="return")
    outbound = BurnSpec(base.WINDOW, 300.0)
    prob = base._problem(base._nudged(natural, 0.6), lunar=LunarPass((50.0, 8000.0)), burns=(trim, outbound))
    return prob, trim, outbound


def test_each_burn_alone_is_solved_and_the_cheapest_goes_on(natural, model):
    prob, trim, outbound = _trim_and_outbound(natural)
    plan = solve(prob, model=model)
    assert plan.verified, plan.reason
    rec = plan.solver["primer"]
    alone = {a["burn"]: a["total_dv_mps"] for a in rec["each_burn_alone"]}
    assert alone[2] < 0.5 * alone[1]  # whatever the listing order, the cheap burn is found
    assert rec["held_burns"] == [1] and rec["max_primer"]["1"] <= 1.0 + rec["tolerance"]
    only_outbound = solve(replace(prob, burns=(outbound,)), model=model)
    assert only_outbound.verified
    assert plan.total_dv_mps <= only_outbound.total_dv_mps * (1 + 1e-3)


def test_primer_of_the_expensive_answer_points_at_the_cheaper_burn(natural, model):
    # Read off the trim-alone optimum, |p| > 1 somewhere in the outbound burn's window: the
    # theory says an outbound impulse there lowers the cost.  The independent fact it must agree
    # with: the outbound burn alone is far cheaper than the trim alone.
    prob, trim, outbound = _trim_and_outbound(natural)
    trim_only = replace(prob, burns=(trim,))
    plan = solve(trim_only, model=model)
    assert plan.verified, plan.reason
    scan = _scan(trim_only, plan, model)
    lo, hi = outbound.window
    peak = max(float(m) for ph in scan for t, m in zip(ph["epochs"], ph["magnitude"])
               if lo <= t <= hi and np.isfinite(m))
    assert peak > 1.0
    only_outbound = solve(replace(prob, burns=(outbound,)), model=model)
    assert only_outbound.verified and only_outbound.total_dv_mps < 0.5 * plan.total_dv_mps
