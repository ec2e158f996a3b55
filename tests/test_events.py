"""Which propagated events are the lunar encounter and the Earth return, and the verdict built on
them (``optimizer.events``, ``optimizer.verify``, ``optimizer.judge``).

The paths are ballistic free returns built by root-finding (``free_return_fixture``: perilune
150 km, departure perigee 200 km, return vacuum perigee 40 km, all design targets of the
root-finding, not outputs of the code under test).  40 km is below the entry interface
(121.92 km, 400,000 ft: common practice), which is what a vacuum-perigee target asks for.
"""

from dataclasses import replace
from types import SimpleNamespace

import numpy as np
import pytest

import free_return_fixture as fr
from optimizer.constants import R_EARTH, R_MOON
from optimizer.events import LUNAR_SPHERE_KM, RETURN_RADIUS_KM, earth_return, lunar_encounter
from optimizer.models import build_model
from optimizer.plan import EventRecord
from optimizer.problem import BurnSpec, LunarPass, ModelSpec, Problem, ReturnSpec, StateStart
from optimizer.propagate import propagate
from optimizer.timescales import parse_epoch
from optimizer.verify import make_burn, verify

HOUR, DAY = 3600.0, 86400.0
T_PERI = parse_epoch("2031-02-03T00:00:00 TDB")


@pytest.fixture(scope="module")
def model():
    return build_model(ModelSpec(kind="earth-moon"), T_PERI - 6 * DAY, T_PERI + 8 * DAY)


@pytest.fixture(scope="module")
def path(model):
    y_peri, alts, _ = fr.build(model, T_PERI)
    assert np.allclose(alts, [200.0, 40.0], atol=1.0)
    start = propagate(model, T_PERI, y_peri, T_PERI - 40 * HOUR, terminal=()).y[:, -1]
    return y_peri, start


# -- choosing among events (synthetic events: the rule itself) -----------------------------------
def _ev(name, t, r):
    return SimpleNamespace(name=name, t=t, y=np.r_[r, 0.0, 0.0, 0.0])


def test_encounter_is_the_closest_approach_not_the_first_minimum():
    moon = lambda t: np.array([384400.0, 0.0, 0.0])  # noqa: E731
    far = _ev("perilune", 7 * HOUR, [384400.0 - 325636.0, 0.0, 0.0])  # a distant minimum, first
    near = _ev("perilune", 60 * HOUR, [384400.0 - 7000.0, 0.0, 0.0])
    assert lunar_encounter([far, near], moon) is near
    assert lunar_encounter([_ev("perigee", 0.0, [7000.0, 0, 0])], moon) is None


def test_return_perigee_is_the_earth_return_not_a_minimum_near_the_moon():
    near_moon = _ev("perigee", 80 * HOUR, [383000.0, 0.0, 0.0])  # after the pass, 377,000 km up
    real = _ev("perigee", 200 * HOUR, [R_EARTH + 45.0, 0.0, 0.0])
    before = _ev("perigee", 1 * HOUR, [R_EARTH + 185.0, 0.0, 0.0])
    assert earth_return([before, near_moon, real], after=60 * HOUR, target="perigee") is real
    assert RETURN_RADIUS_KM < 383000.0 - R_EARTH
    entry_first = _ev("entry", 199 * HOUR, [R_EARTH + 121.92, 0.0, 0.0])
    assert earth_return([real, entry_first], after=60 * HOUR, target="entry") is entry_first


# -- the propagator's sphere-limited perilune ------------------------------------------------------
def test_perilune_within_skips_a_distant_minimum_and_keeps_the_pass(model, path):
    y_peri, start = path
    t0, t1 = T_PERI - 40 * HOUR, T_PERI + 7 * DAY  # past the return: the lunar distance has a far minimum
    every = propagate(model, t0, start, t1, events=("perilune",), terminal=())
    dist = [np.linalg.norm(e.y[:3] - model.moon_position(e.t)) for e in every.events]
    assert len(dist) >= 2 and max(dist) > 300000.0  # the far minimum exists on this coast
    inside = propagate(model, t0, start, t1, events=("perilune",), terminal=(), perilune_within=LUNAR_SPHERE_KM)
    assert len(inside.events) == 1
    e = inside.events[0]
    assert abs(e.t - T_PERI) < 1.0  # the root-finding's perilune epoch
    assert np.linalg.norm(e.y[:3] - model.moon_position(e.t)) - R_MOON == pytest.approx(150.0, abs=0.01)


# -- the verdict on a vacuum perigee below the entry interface -------------------------------------
def _problem(start, **kw):
    base = dict(name="events-case", start=StateStart(T_PERI - 40 * HOUR, tuple(start)),
                burns=(BurnSpec((T_PERI - 30 * HOUR, T_PERI - 20 * HOUR), 10.0),),
                lunar=LunarPass((100.0, 500.0)), arrival=ReturnSpec(target="perigee", perigee_alt_km=(30.0, 50.0)),
                model=ModelSpec(kind="earth-moon"))
    base.update(kw)
    return Problem(**base)


def _claims(model, y_peri):
    """What a plan would claim: the root-finding's perilune (150 km at T_PERI) and 40 km perigee."""
    peri = EventRecord("perilune", T_PERI, 150.0, tuple(y_peri))
    ret = propagate(model, T_PERI, y_peri, T_PERI + 5 * DAY, events=("perigee",), terminal=(),
                    perigee_within=RETURN_RADIUS_KM).events[0]
    return [peri, EventRecord("perigee", ret.t, 40.0, tuple(ret.y))]


def test_vacuum_perigee_below_the_interface_verifies(model, path):
    y_peri, start = path
    problem = _problem(start)
    t_b = T_PERI - 25 * HOUR
    pre = propagate(model, problem.start.epoch, start, t_b, terminal=()).y[:, -1]
    claims = _claims(model, y_peri)
    ver = verify(model, problem, problem.start.epoch, start, [make_burn(t_b, np.zeros(3), pre)], claims,
                 claims[1].epoch + HOUR)
    assert ver.passed, ver.violations
    found = {e.name: e for e in ver.events}
    assert found["perigee"].altitude_km == pytest.approx(40.0, abs=1.0)  # below 121.92 km
    assert found["perilune"].altitude_km == pytest.approx(150.0, abs=1.0)
    rows = {r.name: r for r in ver.constraints}
    assert rows["perigee altitude"].state == "inactive" and rows["perilune altitude"].state == "inactive"


def test_verdict_judges_every_constraint_on_the_repropagated_path(model, path):
    y_peri, start = path
    t_b = T_PERI - 25 * HOUR
    pre = propagate(model, T_PERI - 40 * HOUR, start, t_b, terminal=()).y[:, -1]
    claims = _claims(model, y_peri)
    burn = make_burn(t_b, np.zeros(3), pre)

    def violations(problem, burns=(burn,), start_state=start):
        return verify(model, problem, problem.start.epoch, start_state, list(burns), claims,
                      claims[1].epoch + HOUR).violations

    assert not violations(_problem(start))
    # the burn outside its window, an extra burn, a start elsewhere, an arrival window missed,
    # a perilune range missed, a longest duration broken: each named in the verdict
    late = replace(_problem(start), burns=(BurnSpec((T_PERI - 35 * HOUR, T_PERI - 30 * HOUR), 10.0),))
    assert any("burn 1 epoch" in v for v in violations(late))
    extra = make_burn(T_PERI + 2 * DAY, np.array([0.0, 0.0, 0.0]), claims[0].state)
    assert any("number of burns" in v for v in violations(_problem(start), (burn, extra)))
    moved = np.array(start, dtype=float)
    moved[0] += 1.0
    assert any("start position" in v for v in violations(_problem(start), start_state=moved))
    window = replace(_problem(start).arrival, epoch_window=(T_PERI, T_PERI + DAY))
    assert any("arrival epoch" in v for v in violations(replace(_problem(start), arrival=window)))
    assert any("perilune altitude" in v for v in violations(replace(_problem(start), lunar=LunarPass((200.0, 500.0)))))
    short = replace(_problem(start).arrival, max_duration_days=2.0)
    assert any("time to arrival" in v for v in violations(replace(_problem(start), arrival=short)))


# -- `slingback check` refuses a plan that starts anywhere but the problem's start ------------------
def test_check_refuses_a_plan_whose_start_was_moved(tmp_path, capsys):
    import json

    from export_fixture import make_case
    from optimizer.cli import main

    from optimizer.problem_file import problem_to_dict

    problem, model, plan = make_case()
    plan.problem = problem_to_dict(problem)  # what a run folder's plan.json carries
    good = tmp_path / "good.json"
    from optimizer.export import plan_json

    good.write_text(json.dumps(plan_json(plan, problem)))  # the plan with the problem it carries
    assert main(["check", str(good), "--quiet"]) == 0
    data = plan_json(plan, problem)
    data["start"]["state_km_kms"][1] += 0.5  # half a kilometre: the burns still re-propagate
    bad = tmp_path / "moved.json"
    bad.write_text(json.dumps(data))
    assert main(["check", str(bad), "--quiet"]) == 3
    assert "start position difference" in capsys.readouterr().out
