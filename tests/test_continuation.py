"""Continuation across models: a cheaper model solved first must lead to the same optimum.

The reference is the direct solve of the same problem in the full ephemeris model; both answers
are verified by the independent propagator, so agreement checks the warm-start path itself.
"""

from dataclasses import replace
from pathlib import Path

from optimizer import solve
from optimizer.problem_file import load_problem

PROBLEMS = Path(__file__).resolve().parent.parent / "problems"


def test_cr3bp_continuation_reaches_the_direct_optimum():
    base = load_problem(PROBLEMS / "demo-trade.toml")
    direct = solve(base)
    chained = solve(replace(base, model=replace(base.model, continuation=("cr3bp",))))
    assert direct.status == "verified" and chained.status == "verified"
    stage = chained.solver["continuation"][0]
    assert stage["model"] == "cr3bp" and stage["status"] == "verified"
    # The CR3BP answer itself differs (the real Moon is not on a circle) ...
    assert abs(stage["total_dv_mps"] - direct.total_dv_mps) > 1.0
    # ... but the chained ephemeris answer is the direct one.
    assert abs(chained.total_dv_mps - direct.total_dv_mps) <= 1e-3 * direct.total_dv_mps


def test_several_burns_with_continuation_are_staged_each_stage_continued():
    # demo-trade with a second, useless outbound burn: the staged solve runs first (burn 1 alone,
    # with its own CR3BP stage), the primer test then holds burn 2 at zero in the ephemeris model
    base = load_problem(PROBLEMS / "demo-trade.toml")
    one = solve(base)
    lo, hi = base.burns[0].window
    second = replace(base.burns[0], window=(hi + 2 * 3600.0, hi + 8 * 3600.0))
    two = replace(base, burns=base.burns + (second,), model=replace(base.model, continuation=("cr3bp",)))
    plan = solve(two)
    assert plan.status == "verified", plan.reason
    assert plan.model["name"] == "ephemeris"
    assert plan.solver["continuation"][0]["model"] == "cr3bp"  # the one-burn stage was continued
    assert plan.solver["primer"]["held_burns"] == [2] and plan.burns[1].dv_mps == 0.0
    assert abs(plan.total_dv_mps - one.total_dv_mps) <= 1e-3 * one.total_dv_mps
