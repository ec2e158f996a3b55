"""Issue 13, ``slingback check`` as a gate: each tampered plan of the issue is a named test.

The plan is the hand-made export fixture (``tests/export_fixture.py``: a burn-free free return in
the circular-Moon model plus one 0.23 m/s burn, events as the independent propagator finds them),
written with the problem it carries.  Untouched it passes (exit 0); every tampering below must give
exit 3 (a claim the re-derivation contradicts) or exit 2 (a file that cannot be used), with the
reason printed, never a traceback.
"""

from __future__ import annotations

import contextlib
import copy
import io
import json

import pytest

from export_fixture import make_case
from optimizer.cli import main
from optimizer.export import plan_json


@pytest.fixture(scope="module")
def base():
    problem, _, plan = make_case()
    return plan_json(plan, problem)


def check(tmp_path, data=None, raw=None, command="check"):
    path = tmp_path / "plan.json"
    path.write_text(raw if raw is not None else json.dumps(data))
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([command, str(path)] + (["--quiet"] if command == "check" else ["--out", str(tmp_path / "f")]))
    assert "Traceback" not in err.getvalue()
    return code, err.getvalue()


def tampered(base, change):
    d = copy.deepcopy(base)
    change(d)
    return d


def test_untouched_plan_passes(base, tmp_path):
    assert check(tmp_path, base)[0] == 0


@pytest.mark.parametrize("how", ["emptied", "removed"])
def test_events_removed_exit_3(base, tmp_path, how):
    d = tampered(base, lambda d: d.update(events=[]) if how == "emptied" else d.pop("events"))
    code, err = check(tmp_path, d)
    assert code == 3 and "claims no perilune" in err


def test_events_removed_and_burn_changed_by_a_centimetre_per_second_exit_3(base, tmp_path):
    def change(d):
        d["events"] = []
        d["burns"][0]["dv_icrf_mps"][0] += 0.01
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "burns[1].dv_mps" in err and "total_dv_mps" in err


def test_extra_1000_mps_burn_after_the_perigee_exit_3(base, tmp_path):
    def change(d):
        b = copy.deepcopy(d["burns"][0])
        b["epoch_tdb_s"] = d["events"][-1]["epoch_tdb_s"] - 100.0
        del b["epoch_tdb"]
        b["dv_icrf_mps"] = [1000.0, 0.0, 0.0]
        d["burns"].append(b)
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "number of burns 2 outside [1, 1]" in err


def test_extra_zero_burn_exit_3(base, tmp_path):
    def change(d):
        b = copy.deepcopy(d["burns"][0])
        b["epoch_tdb_s"] += 7200.0
        del b["epoch_tdb"]
        b.update(dv_icrf_mps=[0.0, 0.0, 0.0], dv_mps=0.0, dv_rtn_mps=[0.0, 0.0, 0.0])
        d["burns"].append(b)
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "number of burns" in err


def test_start_differing_from_the_problem_exit_3(base, tmp_path):
    def change(d):
        d["start"]["state_km_kms"][2] += 0.1  # 100 m
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "start position difference" in err


@pytest.mark.parametrize("status", ["failed", "unverified", "infeasible"])
def test_status_not_verified_exit_3(base, tmp_path, status):
    code, err = check(tmp_path, tampered(base, lambda d: d.update(status=status)))
    assert code == 3 and f"status: the plan says '{status}'" in err


def test_false_total_dv_exit_3(base, tmp_path):
    code, err = check(tmp_path, tampered(base, lambda d: d.update(total_dv_mps=d["total_dv_mps"] - 0.01)))
    assert code == 3 and "total_dv_mps: claimed" in err


def test_false_burn_size_exit_3(base, tmp_path):
    code, err = check(tmp_path, tampered(base, lambda d: d["burns"][0].update(dv_mps=d["burns"][0]["dv_mps"] + 0.01)))
    assert code == 3 and "burns[1].dv_mps" in err


def test_false_rtn_components_exit_3(base, tmp_path):
    def change(d):
        d["burns"][0]["dv_rtn_mps"][1] += 0.01
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "burns[1].dv_rtn_mps" in err


def test_burn_epoch_text_contradicting_its_seconds_exit_3(base, tmp_path):
    code, err = check(tmp_path, tampered(base, lambda d: d["burns"][0].update(epoch_tdb="2027-05-11T13:00:00 TDB")))
    assert code == 3 and "burns[1].epoch_tdb" in err


@pytest.mark.parametrize("scale", ["UTC", 1e300, None])
def test_time_scale_other_than_tdb_exit_3(base, tmp_path, scale):
    # every epoch of plan.json is TDB (docs/plan-format.md); a file saying otherwise is not the plan checked
    code, err = check(tmp_path, tampered(base, lambda d: d.update(time_scale=scale)))
    assert code == 3 and "time_scale" in err


def test_tolerance_raised_in_the_carried_problem_exit_2(base, tmp_path):
    """The problem inside plan.json is read like a problem file: tolerances above the documented
    limits are refused, so a plan cannot bring its own meaningless tolerances."""
    code, err = check(tmp_path, tampered(base, lambda d: d["problem"]["tolerances"].update(entry_position_km=1e300)))
    assert code == 2 and "[tolerances].entry_position_km" in err


def test_tolerance_raised_in_the_recorded_verification_exit_3(base, tmp_path):
    """The verdict's tolerances recorded in plan.json are claims too: they must be the problem's."""
    code, err = check(tmp_path, tampered(base, lambda d: d["verification"]["tolerances"].update(entry_position_km=1e300)))
    assert code == 3 and "verification.tolerances" in err


def test_recorded_verdict_contradicting_the_re_verification_exit_3(base, tmp_path):
    code, err = check(tmp_path, tampered(base, lambda d: d["verification"].update(passed=False)))
    assert code == 3 and "verification.passed" in err


@pytest.mark.parametrize("command", ["check", "plot"])
@pytest.mark.parametrize("shape", ["[", '{"a":'])
def test_json_200000_deep_exit_2(tmp_path, command, shape):
    close = "]" if shape == "[" else "}"
    raw = shape * 200_000 + ("" if shape == "[" else "1") + close * 200_000
    code, err = check(tmp_path, raw=raw, command=command)
    assert code == 2 and "nested too deeply" in err


# -- finite-burn figures and recorded residuals (issue 13, open points) ---------------------------
# The fixture has a [spacecraft] table (invented: 1,200 kg, 440 N, 225 s), so plan.json carries each
# burn's mass, propellant, duration, ignition and cut-off, re-derived by check with the rocket
# equation (Tsiolkovsky; any astronautics text, e.g. Sutton & Biblarz, Rocket Propulsion Elements,
# 9th ed., eq. 4-6, from memory) and constant thrust; a changed figure must fail.
@pytest.mark.parametrize("key, change", [("propellant_kg", 0.01), ("mass_after_kg", -0.01), ("duration_s", 0.5),
                                         ("ignition_epoch_tdb_s", -10.0), ("cutoff_epoch_tdb_s", 10.0)])
def test_false_finite_burn_figure_exit_3(base, tmp_path, key, change):
    code, err = check(tmp_path, tampered(base, lambda d: d["burns"][0].update({key: d["burns"][0][key] + change})))
    assert code == 3 and f"burns[1].{key}" in err


def test_ignition_text_moved_with_its_seconds_exit_3(base, tmp_path):
    """Both forms of the ignition epoch moved together: consistent with each other, not with the burn."""
    def change(d):
        b = d["burns"][0]
        b["ignition_epoch_tdb_s"] -= 60.0
        b["ignition_epoch_tdb"] = "2027-05-11T11:58:59.687568"
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "burns[1].ignition_epoch_tdb_s" in err


@pytest.mark.parametrize("key", ["total_propellant_kg", "final_mass_kg", "isp_s"])
def test_false_finite_burn_summary_exit_3(base, tmp_path, key):
    code, err = check(tmp_path, tampered(base, lambda d: d["finite_burns"].update({key: d["finite_burns"][key] * 1.01})))
    assert code == 3 and f"finite_burns.{key}" in err


def test_finite_burn_figures_without_a_spacecraft_table_exit_3(base, tmp_path):
    code, err = check(tmp_path, tampered(base, lambda d: d["problem"].pop("spacecraft")))
    assert code == 3 and "no [spacecraft] table" in err


@pytest.mark.parametrize("key, value", [("flight_path_deg", 0.005), ("entry_position_km", 0.5),
                                        ("arrival_epoch_s", 0.5)])
def test_false_recorded_residual_exit_3(base, tmp_path, key, value):
    """A residual under its tolerance, but not the one re-derived (0 for this hand-made plan)."""
    code, err = check(tmp_path, tampered(base, lambda d: d["verification"]["residuals"].update({key: value})))
    assert code == 3 and f"verification.residuals.{key}" in err


def test_event_epoch_and_its_residual_moved_together_exit_3(base, tmp_path):
    """The perilune claimed 100 s late with a residual that agrees: the verdict has no epoch
    tolerance, check holds event epochs to 1 s."""
    def change(d):
        d["events"][0]["epoch_tdb_s"] += 100.0
        del d["events"][0]["epoch_tdb"]
        d["verification"]["residuals"]["perilune_epoch_s"] = 100.0
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "perilune_epoch_s" in err


@pytest.mark.parametrize("key", ["flight_path_deg", "inclination_deg", "speed_kms"])
def test_entry_figure_changed_without_its_state_exit_3(base, tmp_path, key):
    code, err = check(tmp_path, tampered(base, lambda d: d["events"][1].update({key: d["events"][1][key] + 1e-3})))
    assert code == 3 and f"events[2].{key}" in err


def test_perilune_velocity_changed_exit_3(base, tmp_path):
    def change(d):
        d["events"][0]["state_km_kms"][4] += 0.01  # 10 m/s
    code, err = check(tmp_path, tampered(base, change))
    assert code == 3 and "events[1] (perilune): velocity" in err


def test_model_record_naming_other_physics_exit_3(base, tmp_path):
    code, err = check(tmp_path, tampered(base, lambda d: d["model"].update(name="ephemeris")))
    assert code == 3 and "model: the file records" in err
