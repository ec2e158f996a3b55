"""Design from a parking orbit: injection, lunar pass, return (problems/demo-injection.toml)."""

import math
from pathlib import Path

import numpy as np
import pytest

from optimizer import solve
from optimizer.constants import GM_EARTH, R_EARTH
from optimizer.problem_file import load_problem
from optimizer.solve.seed import inclination_deg

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


def test_opm_of_a_parking_start_holds_the_post_injection_state(design, tmp_path):
    """CCSDS OPM (read with ccsds-ndm): the state just after the injection, the injection left out
    of the maneuvers (the state holds it), one maneuver per later non-zero burn; the mass at the
    epoch is what the injection leaves (rocket equation, invented spacecraft figures)."""
    from dataclasses import replace

    from ccsds_ndm.ndm_io import NdmIo

    from optimizer.export import opm_text
    from optimizer.problem import Propulsion
    from optimizer.timescales import parse_epoch

    problem, plan = design
    assert plan.burns[0].epoch == plan.start_epoch  # the injection is the start of the plan
    problem = replace(problem, propulsion=Propulsion(mass_kg=60000.0, thrust_n=900000.0, isp_s=421.0))
    path = tmp_path / "plan.opm"
    path.write_text(opm_text(plan, problem))
    opm = NdmIo().from_path(path).body.segment.data
    sv = opm.state_vector
    assert parse_epoch(sv.epoch) == pytest.approx(plan.start_epoch, abs=1e-6)
    post = np.asarray(plan.start_state[3:]) + np.asarray(plan.burns[0].dv)
    assert [sv.x.value, sv.y.value, sv.z.value] == list(plan.start_state[:3])
    np.testing.assert_array_equal([sv.x_dot.value, sv.y_dot.value, sv.z_dot.value], post)
    later = [b for b in plan.burns[1:] if b.dv_mps > 0]
    assert len(opm.maneuver_parameters) == len(later)
    left = 60000.0 * math.exp(-plan.burns[0].dv_mps / (9.80665 * 421.0))
    assert any(f"{left!r}"[:10] in c for c in sv.comment)
