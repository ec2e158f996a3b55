"""An optional burn that is not needed must come out exactly zero, at the one-burn optimum.

The reference is the same problem with the optional burn removed: a two-burn plan may never cost
more than the best one-burn plan, since switching the second burn off is always allowed.
"""

from dataclasses import replace
from pathlib import Path

from optimizer import solve
from optimizer.problem_file import load_problem

PROBLEMS = Path(__file__).resolve().parent.parent / "problems"


def test_unneeded_return_trim_is_zero_and_costs_nothing():
    two = load_problem(PROBLEMS / "demo-abort.toml")  # outbound abort burn + optional return trim
    assert len(two.burns) == 2 and two.burns[1].leg == "return"
    one = replace(two, burns=two.burns[:1])
    plan_two, plan_one = solve(two), solve(one)
    assert plan_two.verified and plan_one.verified
    assert plan_two.burns[1].dv_mps == 0.0
    assert plan_two.total_dv_mps <= plan_one.total_dv_mps * (1 + 1e-4)
