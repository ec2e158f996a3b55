"""Design from a parking orbit: injection, lunar pass, return (problems/demo-injection.toml)."""

from pathlib import Path

import numpy as np
import pytest

from optimizer import solve
from optimizer.constants import GM_EARTH, R_EARTH
from optimizer.problem_file import load_problem
from optimizer.seed import inclination_deg

PROBLEMS = Path(__file__).resolve().parent.parent / "problems"


@pytest.fixture(scope="module")
def design():
    problem = load_problem(PROBLEMS / "demo-injection.toml")
    return problem, solve(problem)


def test_injection_design_is_verified_and_costs_what_the_trade_expects(design):
    problem, plan = design
    assert plan.status == "verified", plan.reason
    injection = plan.burns[0]
    # "An injection from a low parking orbit to the Moon's distance costs a little over 3 km/s"
    # (common practice; ../shared/SOURCES.md).  Patched-conic estimate from 185 km: ~3.13 km/s.
    assert 3000.0 < injection.dv_mps < 3300.0
    lo, hi = problem.start.epoch_window
    assert lo - 1e-3 <= injection.epoch <= hi + 1e-3


def test_the_path_starts_on_the_parking_orbit(design):
    problem, plan = design
    y = np.asarray(plan.start_state)
    r = np.linalg.norm(y[:3])
    assert abs(r - (R_EARTH + problem.start.altitude_km)) < 1e-3  # km
    assert abs(np.linalg.norm(y[3:]) - np.sqrt(GM_EARTH / r)) < 1e-6  # circular speed, km/s
    assert abs(np.dot(y[:3], y[3:])) / (r * np.linalg.norm(y[3:])) < 1e-9  # no radial velocity
    assert abs(inclination_deg(y) - problem.start.inclination_deg) < 1e-6


def test_injection_along_velocity_is_tangential(design):
    problem, plan = design
    if problem.burns[0].direction != "along":
        pytest.skip("the shipped injection is not a fixed-direction burn")
    r, t, n = plan.burns[0].dv_rtn
    assert t > 0 and abs(r) < 1e-9 * abs(t) + 1e-12 and abs(n) < 1e-9 * abs(t) + 1e-12
