"""Problem files: the shipped demo files load and round-trip, and every broken variant of them is
refused at the door with exit code 2 and a message naming the file and the key, never a traceback.

The broken variants are made by hypothesis from the shipped files: a required key removed, a value
of the wrong type, a value out of range, a misspelt key, or a line that breaks the TOML syntax.
"""

from __future__ import annotations

import contextlib
import copy
import io
import math
import tempfile
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from optimizer.cli import main
from optimizer.constants import GM_EARTH, R_EARTH
from optimizer.frames import kepler_to_cartesian
from optimizer.problem import ParkingStart, Propulsion, StateStart
from optimizer.problem_file import (ProblemError, dumps_toml, load_problem, problem_from_dict,
                                    problem_to_dict)
from optimizer.timescales import format_epoch, parse_epoch

PROBLEMS = Path(__file__).resolve().parent.parent / "problems"
DEMOS = sorted(PROBLEMS.glob("demo-*.toml"))
FAST = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def raw(path: Path) -> dict:
    return tomllib.loads(path.read_text())


def run(argv) -> tuple[int, str, str]:
    """``slingback`` in-process; returns (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def refused(text: str, *words) -> str:
    """Write ``text`` as a problem file, run validate and solve on it, check both refuse it."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "mutant.toml"
        path.write_text(text)
        for argv in (["validate", str(path)], ["solve", str(path), "--out", str(Path(tmp) / "run")]):
            code, _, err = run(argv)
            assert code == 2, (argv, err)
            assert "Traceback" not in err
            assert str(path) in err
            for w in words:
                assert w in err, (w, err)
            assert not (Path(tmp) / "run").exists()
    return err


# --- the shipped files ---------------------------------------------------------------------------
def test_demo_files_exist():
    assert {p.name for p in DEMOS} >= {"demo-abort.toml", "demo-injection.toml", "demo-trade.toml"}


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.stem)
def test_demo_file_loads_and_round_trips(path):
    problem = load_problem(path)
    assert problem.name == path.stem
    assert problem.spacecraft == "Marram-1"
    assert problem_from_dict(problem_to_dict(problem)) == problem
    assert problem_from_dict(tomllib.loads(dumps_toml(problem_to_dict(problem)))) == problem
    code, out, err = run(["validate", str(path)])
    assert code == 0 and "valid" in out and err == ""


def test_demo_abort_values():
    d, p = raw(PROBLEMS / "demo-abort.toml"), load_problem(PROBLEMS / "demo-abort.toml")
    assert isinstance(p.start, StateStart)
    assert p.start.epoch == parse_epoch(d["start"]["epoch"])
    assert p.start.state == tuple(d["start"]["position_km"] + d["start"]["velocity_kms"])
    assert p.arrival.entry_radius_km == pytest.approx(R_EARTH + 121.92, abs=1e-9)
    assert p.min_burn_spacing_s == d["limits"]["min_burn_spacing_hours"] * 3600.0
    assert [b.leg for b in p.burns] == ["outbound", "return"]


def test_demo_injection_is_parking():
    p = load_problem(PROBLEMS / "demo-injection.toml")
    assert isinstance(p.start, ParkingStart)
    assert p.start.raan_window_deg == (0.0, 360.0)
    assert p.burns[0].direction == "along"


def test_elements_start_converts_with_earth_gm():
    d = raw(PROBLEMS / "demo-abort.toml")
    del d["start"]["position_km"], d["start"]["velocity_kms"]
    d["start"]["elements"] = {"a_km": 200000.0, "e": 0.9, "inc_deg": 28.5, "raan_deg": 10.0,
                              "argp_deg": 20.0, "nu_deg": 150.0}
    p = problem_from_dict(d)
    r, v = kepler_to_cartesian(200000.0, 0.9, *(math.radians(x) for x in (28.5, 10.0, 20.0, 150.0)), GM_EARTH)
    assert p.start.state == pytest.approx((*r, *v), rel=1e-15)
    # the table form writes the Cartesian state back
    assert problem_from_dict(problem_to_dict(p)) == p


def test_example_message_from_the_docs():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["return"]["flight_path_deg"] = [-7, 5]
    with pytest.raises(ProblemError) as info:
        problem_from_dict(d, source="problems/x.toml")
    assert str(info.value) == ("problems/x.toml: [return].flight_path_deg: expected two numbers between "
                               "-90 and 0, the first smaller, got [-7, 5]")


def test_typo_gets_a_suggestion():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["lunar"]["perilune_altitude"] = d["lunar"].pop("perilune_altitude_km")
    with pytest.raises(ProblemError, match=r"\[lunar\]\.perilune_altitude: unknown key; did you mean "
                                           r"'perilune_altitude_km'\?"):
        problem_from_dict(d, source="f.toml")
    d = raw(PROBLEMS / "demo-abort.toml")
    d["retrun"] = d.pop("return")
    with pytest.raises(ProblemError, match=r"\[retrun\]: unknown section; did you mean 'return'\?"):
        problem_from_dict(d, source="f.toml")


def test_cross_checks():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["burn"].reverse()
    with pytest.raises(ProblemError, match=r"\[\[burn\]\] #2\.window: expected burns listed in time order"):
        problem_from_dict(d)
    d = raw(PROBLEMS / "demo-abort.toml")
    d["burn"][0]["window"][0] = "2027-05-09T00:00:00 TDB"
    with pytest.raises(ProblemError, match=r"#1\.window: expected a window that opens no earlier than the start"):
        problem_from_dict(d)
    d = raw(PROBLEMS / "demo-trade.toml")
    d["objective"] = {"kind": "earliest"}
    with pytest.raises(ProblemError, match=r"\[objective\]\.dv_budget_mps: missing"):
        problem_from_dict(d)


def test_epochs_must_be_tdb():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["start"]["epoch"] = "2027-05-10T00:00:00 UTC"
    with pytest.raises(ProblemError, match=r"\[start\]\.epoch: expected an ISO-8601 epoch in TDB"):
        problem_from_dict(d)


def test_ephemeris_span_is_checked():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["start"]["epoch"] = "2060-01-01T00:00:00 TDB"
    for b in d["burn"]:
        b["window"] = ["2060-01-02T00:00:00 TDB", "2060-01-03T00:00:00 TDB"]
    with pytest.raises(ProblemError, match=r"\[start\]\.epoch: expected an epoch between .* DE421"):
        problem_from_dict(d)
    # a circular Moon placed through DE421's Moon at the start needs DE421 there too
    d["model"] = {"kind": "earth-moon"}
    with pytest.raises(ProblemError, match=r"\[start\]\.epoch: expected an epoch between 1900-.* and 2049-"):
        problem_from_dict(d)
    d["model"] = {"kind": "cr3bp"}
    with pytest.raises(ProblemError, match=r"\[start\]\.epoch"):
        problem_from_dict(d)
    # a circular Moon given in full needs no ephemeris: fine
    d["model"] = {"kind": "earth-moon", "moon": {"epoch": "2060-01-01T00:00:00 TDB"}}
    assert problem_from_dict(d).start_epoch == parse_epoch("2060-01-01T00:00:00")


def test_model_without_a_moon_is_refused_at_the_door():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["model"] = {"kind": "two-body"}
    with pytest.raises(ProblemError, match=r"\[model\]\.kind: the two-body model has no Moon"):
        problem_from_dict(d)
    d["model"] = {"kind": "ephemeris", "continuation": ["two-body"]}
    with pytest.raises(ProblemError, match=r"\[model\]\.continuation: the two-body model has no Moon"):
        problem_from_dict(d)


def test_unreadable_and_broken_files(tmp_path):
    code, _, err = run(["validate", str(tmp_path / "absent.toml")])
    assert code == 2 and "absent.toml: cannot read the file" in err and "Traceback" not in err
    bad = tmp_path / "bad.toml"
    bad.write_bytes(b"\xff\xfe[case]\n")
    code, _, err = run(["validate", str(bad)])
    assert code == 2 and "not a UTF-8 text file" in err
    bad.write_text("[case]\nname = \"x\n")
    code, _, err = run(["validate", str(bad)])
    assert code == 2 and "invalid TOML" in err and "line 2" in err


@given(epoch=st.floats(6e8, 1.2e9), hours=st.floats(0.0, 1000.0), alt=st.floats(1e-3, 1000.0),
       width=st.floats(1.0, 1e6))
@FAST
def test_round_trip_is_exact(epoch, hours, alt, width):
    """problem_from_dict(problem_to_dict(p)) == p for awkward floats (epochs, hours, altitudes)."""
    d = raw(PROBLEMS / "demo-abort.toml")
    d["start"]["epoch"] = format_epoch(epoch, 9) + " TDB"
    d["model"] = {"kind": "earth-moon", "moon": {"epoch": format_epoch(epoch + 0.1, 9) + " TDB", "period_days": 27.3}}
    d["burn"] = [{"window": [format_epoch(epoch + width, 9), format_epoch(epoch + 2 * width, 9)],
                  "max_dv_mps": 10.0}]
    d["return"]["entry_altitude_km"] = alt
    d["return"]["max_duration_days"] = 20.0  # the burn window opens up to 11.6 days after the start
    d["limits"]["min_burn_spacing_hours"] = hours
    p = problem_from_dict(d)
    assert problem_from_dict(problem_to_dict(p)) == p


# --- hypothesis mutations of the shipped files -----------------------------------------------------
def leaves(d, path=()):
    """(path, value) of every non-table value; paths index into dicts and arrays of tables."""
    for k, v in d.items():
        if isinstance(v, dict):
            yield from leaves(v, path + (k,))
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            for i, item in enumerate(v):
                yield from leaves(item, path + (k, i))
        else:
            yield path + (k,), v


def at(d, path):
    for k in path[:-1]:
        d = d[k]
    return d


def key_words(path):
    """Words the error message must contain: the section and the key."""
    words = [path[0], path[-1]]
    if len(path) > 2 and isinstance(path[1], int):
        words.append(f"#{path[1] + 1}")
    return words


def wrong_types(value):
    if isinstance(value, bool):
        return ["yes", 1, [True]]
    if isinstance(value, (int, float)):
        return ["ten", True, [1.0], {"a": 1}]
    if isinstance(value, str):
        return [7, True, ["x"], {"a": 1}]
    return ["text", 3.0, {"a": 1}]


@given(data=st.data(), path=st.sampled_from(DEMOS))
@FAST
def test_wrong_type_is_refused(data, path):
    d = raw(path)
    key_path, value = data.draw(st.sampled_from(list(leaves(d))))
    at(d, key_path)[key_path[-1]] = data.draw(st.sampled_from(wrong_types(value)))
    refused(dumps_toml(d), *key_words(key_path))


REQUIRED = [("case",), ("case", "name"), ("start",), ("start", "kind"), ("burn",),
            ("burn", 0, "window"), ("burn", 0, "max_dv_mps")]
REQUIRED_STATE = [("start", "epoch"), ("start", "position_km"), ("start", "velocity_kms")]
REQUIRED_PARKING = [("start", "altitude_km"), ("start", "inclination_deg"), ("start", "epoch_window")]


@given(data=st.data(), path=st.sampled_from(DEMOS))
@FAST
def test_missing_required_key_is_refused(data, path):
    d = raw(path)
    extra = REQUIRED_PARKING if d["start"]["kind"] == "parking" else REQUIRED_STATE
    key_path = data.draw(st.sampled_from(REQUIRED + extra))
    del at(d, key_path)[key_path[-1]]
    err = refused(dumps_toml(d), *key_words(key_path))
    assert "missing" in err or "expected one or more [[burn]]" in err


@given(data=st.data(), path=st.sampled_from(DEMOS))
@FAST
def test_removing_any_key_never_crashes(data, path):
    """Optional keys fall back to their defaults; required ones are named in the refusal."""
    d = raw(path)
    key_path, _ = data.draw(st.sampled_from(list(leaves(d))))
    del at(d, key_path)[key_path[-1]]
    with tempfile.TemporaryDirectory() as tmp:
        f = Path(tmp) / "p.toml"
        f.write_text(dumps_toml(d))
        code, _, err = run(["validate", str(f)])
    assert code in (0, 2) and "Traceback" not in err
    if code == 2:
        assert key_path[-1] in err


OUT_OF_RANGE = {
    ("lunar", "perilune_altitude_km"): [[-5.0, 100.0], [500.0, 100.0], [1.0, 2.0, 3.0], [100.0, 2e6]],
    ("return", "flight_path_deg"): [[-7.0, 5.0], [-5.0, -7.0], [-100.0, -5.0], [-6.0]],
    ("return", "entry_altitude_km"): [0.0, -1.0, 5000.0],
    ("return", "max_duration_days"): [0.0, -2.0, 1e4],
    ("return", "epoch_window"): [["2027-05-20T00:00:00 TDB", "2027-05-19T00:00:00 TDB"],
                                 ["2027-05-20T00:00:00 TDB", "2027-05-20T00:00:00 TDB"]],
    ("burn", 0, "max_dv_mps"): [0.0, -3.0, 1e9, math.inf],
    ("burn", 0, "window"): [["2027-05-10T12:00:00 TDB", "2027-05-10T06:00:00 TDB"],
                            ["2027-13-01T00:00:00 TDB", "2027-12-01T00:00:00 TDB"],
                            ["2027-05-10T02:00:00Z", "2027-05-10T06:00:00Z"], ["2027-05-10T02:00:00 TDB"]],
    ("burn", 0, "direction"): ["sideways", "FREE"],
    ("burn", 0, "leg"): ["inbound"],
    ("start", "epoch"): ["2027-05-10T00:00:00 UTC", "yesterday", "2027-05-10"],
    ("start", "position_km"): [[1.0, 2.0], [0.0, 0.0, 100.0], [1e7, 0.0, 0.0], [math.nan, 0.0, 7000.0]],
    ("start", "velocity_kms"): [[0.0, 0.0], [100.0, 0.0, 0.0]],
    ("start", "kind"): ["orbit"],
    ("start", "altitude_km"): [-5.0, 0.0, 2e5],
    ("start", "inclination_deg"): [-1.0, 181.0],
    ("start", "raan_window_deg"): [[10.0, 5.0], [0.0, 400.0]],
    ("mesh", "segments"): [0, 2.5, -4, 10**6],
    ("mesh", "max_refinements"): [-1, 100],
    ("model", "kind"): ["nbody", "Ephemeris"],
    ("model", "continuation"): [["ephemeris"], ["warp"], ["earth-moon", "earth-moon"]],
    ("model", "moon", "epoch"): ["noon"],
    ("objective", "kind"): ["cheapest"],
    ("objective", "mps_per_day"): [-1.0],
    ("tolerances", "flight_path_deg"): [0.0, -1.0],
    ("limits", "min_burn_spacing_hours"): [-1.0, 5000.0],
    ("limits", "min_altitude_km"): [-10.0],
    ("case", "name"): ["", "has space", "../escape", "x" * 80],
    ("case", "spacecraft"): ["tab\there"],
    ("spacecraft", "mass_kg"): [0.0, -5.0, math.nan],
    ("spacecraft", "thrust_n"): [0.0, -1.0],
    ("spacecraft", "isp_s"): [0.0, -300.0, 1e6],
}


@given(data=st.data(), path=st.sampled_from(DEMOS))
@FAST
def test_out_of_range_is_refused(data, path):
    d = raw(path)
    present = [p for p in OUT_OF_RANGE if _has(d, p)]
    key_path = data.draw(st.sampled_from(present))
    at(d, key_path)[key_path[-1]] = copy.deepcopy(data.draw(st.sampled_from(OUT_OF_RANGE[key_path])))
    refused(dumps_toml(d), *key_words(key_path), "expected")


def _has(d, path):
    try:
        return path[-1] in at(d, path)
    except (KeyError, IndexError, TypeError):
        return False


@given(data=st.data(), path=st.sampled_from(DEMOS))
@FAST
def test_misspelt_key_is_refused(data, path):
    d = raw(path)
    key_path, value = data.draw(st.sampled_from(list(leaves(d))))
    table, key = at(d, key_path), key_path[-1]
    i = data.draw(st.integers(0, len(key) - 1))
    edit = data.draw(st.sampled_from(["drop", "double", "upper"]))
    typo = {"drop": key[:i] + key[i + 1:], "double": key[:i] + key[i] + key[i:],
            "upper": key[:i] + key[i].upper() + key[i + 1:]}[edit]
    if not typo or typo == key or typo in table or typo in ("epoch", "kind", "j2", "sun", "e"):
        return
    table[typo] = table.pop(key)
    err = refused(dumps_toml(d), typo)
    assert "unknown key" in err or "missing" in err


BREAKERS = ["key_without_value =", "[[burn]", "= 3", "name = \"unterminated", "[case]",
            "x = [1, 2", "y = 1979-05-27T07:32:00Zz", "z = 'a' 'b'"]


@given(data=st.data(), path=st.sampled_from(DEMOS))
@FAST
def test_broken_toml_is_refused_with_its_line(data, path):
    lines = path.read_text().splitlines()
    n = data.draw(st.integers(0, len(lines)))
    lines.insert(n, data.draw(st.sampled_from(BREAKERS)))
    err = refused("\n".join(lines) + "\n", "invalid TOML", "line")


# --- our own vocabulary: [case] and the optional [spacecraft] table ------------------------------
def test_validate_speaks_of_the_case_and_its_spacecraft():
    code, out, err = run(["validate", str(PROBLEMS / "demo-abort.toml")])
    assert code == 0, err
    assert "case       demo-abort (Marram-1)" in out
    assert "spacecraft 21500 kg, thrust 27000 N, specific impulse 316 s" in out
    assert "scenario" not in out.lower() and "vehicle" not in out.lower()
    assert load_problem(PROBLEMS / "demo-abort.toml").propulsion == Propulsion(21500.0, 27000.0, 316.0)
    assert load_problem(PROBLEMS / "demo-injection.toml").propulsion is None


def test_old_table_name_and_partial_spacecraft_table_are_refused():
    d = raw(PROBLEMS / "demo-abort.toml")
    d["scenario"] = d.pop("case")
    refused(dumps_toml(d), "[scenario]", "unknown section")
    d = raw(PROBLEMS / "demo-abort.toml")
    del d["spacecraft"]["isp_s"]
    refused(dumps_toml(d), "[spacecraft].isp_s", "missing")
