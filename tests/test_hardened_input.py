"""Issue 13, problem files: each reproduction of the issue is a named test here.

Every mutant is written as a file and given to ``slingback validate`` and ``slingback solve`` (both
must refuse it at the door with exit 2, a message naming the file and the key, no traceback and no
run folder); see ``refused`` in ``test_problem_file.py``.  The mutants start from the shipped
``problems/demo-abort.toml``.
"""

from __future__ import annotations

import re
import tomllib

import pytest
import tomli_w

from optimizer.problem_file import dumps_toml, load_problem, problem_from_dict, problem_to_dict
from test_problem_file import PROBLEMS, refused

BASE = (PROBLEMS / "demo-abort.toml").read_text()


def mutant(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new, 1)


def test_arrays_nested_500_deep_exit_2():
    refused(BASE + "\nzz = " + "[" * 500 + "]" * 500 + "\n", "nested")


def test_inline_tables_nested_3000_deep_exit_2():
    refused(BASE + "\nzz = " + "{a=" * 3000 + "1" + "}" * 3000 + "\n", "nested")


def test_nested_dict_given_to_problem_from_dict_is_refused():
    d = tomllib.loads(BASE)
    deep = inner = {}
    for _ in range(5000):
        inner["a"] = {}
        inner = inner["a"]
    d["case"]["zz"] = deep
    with pytest.raises(ValueError, match="nested more than"):
        problem_from_dict(d)


@pytest.mark.parametrize("old, key", [
    ("max_dv_mps = 150.0", "[[burn]] #1.max_dv_mps"),
    ("position_km = [-164794.026", "[start].position_km"),
    ("perilune_altitude_km = [100.0", "[lunar].perilune_altitude_km"),
    ("mass_kg = 21500.0", "[spacecraft].mass_kg"),
])
def test_integer_of_401_digits_exit_2(old, key):
    new = re.sub(r"[-0-9.]+$", "9" * 401, old)
    refused(mutant(old, new), key)


def test_integer_of_401_digits_in_the_moon_table_exit_2():
    text = mutant('kind = "ephemeris"', 'kind = "earth-moon"').replace(
        "j2 = false", "j2 = false\n[model.moon]\nradius_km = " + "9" * 401, 1)
    refused(text, "[model.moon].radius_km")


def test_integer_of_401_digits_in_the_sweep_table_exit_2():
    sweep = ('\n[sweep]\nburn_epochs = {start = "2027-05-11T22:00:00 TDB", stop = "2027-05-12T06:00:00 TDB", '
             'count = 3}\nreturn_durations_days = [' + "9" * 401 + "]\n")
    refused(BASE + sweep, "[sweep].return_durations_days")


@pytest.mark.parametrize("kind", ["cr3bp", "earth-moon"])
@pytest.mark.parametrize("year", ["2100", "1850"])
def test_moon_from_de421_outside_its_span_exit_2(kind, year):
    refused(mutant('kind = "ephemeris"', f'kind = "{kind}"').replace("2027-", f"{year}-"), "[start].epoch",
            "DE421")


def test_sweep_arrival_before_the_start_exit_2():
    sweep = ('\n[sweep]\nburn_epochs = {start = "2027-05-11T22:00:00 TDB", stop = "2027-05-12T06:00:00 TDB", '
             'count = 3}\narrival_epochs = ["2027-05-10T00:00:00 TDB"]\n')
    refused(BASE.replace("max_duration_days = 6.0\n", "") + sweep, "[sweep].arrival_epochs", "not after the start")


def test_sweep_arrival_past_2050_exit_2():
    sweep = ('\n[sweep]\nburn_epochs = {start = "2027-05-11T22:00:00 TDB", stop = "2027-05-12T06:00:00 TDB", '
             'count = 3}\narrival_epochs = ["2051-05-10T00:00:00 TDB"]\n')
    refused(BASE.replace("max_duration_days = 6.0\n", "") + sweep, "[sweep].arrival_epochs", "DE421")


def test_burn_window_ending_2051_names_the_burn_window():
    err = refused(mutant('"2027-05-15T00:00:00 TDB"]', '"2051-05-15T00:00:00 TDB"]'), "[[burn]] #2.window", "DE421")
    assert "[model].kind" not in err


def test_arrival_window_ending_2051_names_the_return_window():
    err = refused(mutant("max_duration_days = 6.0",
                         'epoch_window = ["2027-05-16T00:00:00 TDB", "2051-01-01T00:00:00 TDB"]'),
                  "[return].epoch_window", "DE421")
    assert "[model].kind" not in err


@pytest.mark.parametrize("char", ["\\u0007", "\\r", "\\u001b", "\\u007f"])
def test_control_character_in_a_text_is_refused(char):
    refused(mutant('summary = "Invented', f'summary = "In{char}vented'), "[case].summary", "control characters")


def test_written_problem_toml_reads_back_even_with_control_characters():
    """tomli-w escapes every control character, so whatever reaches the writer reads back."""
    d = problem_to_dict(load_problem(PROBLEMS / "demo-abort.toml"))
    d["case"]["summary"] = "a\x07b\rc\x1bd\x7fe"
    text = dumps_toml(d)
    assert tomllib.loads(text)["case"]["summary"] == d["case"]["summary"]
    assert dumps_toml(d) == tomli_w.dumps(d)


def test_moon_table_under_the_ephemeris_model_is_refused():
    refused(mutant("j2 = false", "j2 = false\n[model.moon]\nradius_km = 1737.4"), "[model].moon", "ignore")


def test_duration_ending_before_a_burn_window_is_refused():
    refused(mutant("max_duration_days = 6.0", "max_duration_days = 0.01"), "[return].max_duration_days",
            "[[burn]] #1")


def test_burn_spacing_longer_than_the_windows_allow_is_refused():
    refused(mutant("min_burn_spacing_hours = 6.0", "min_burn_spacing_hours = 1000"),
            "[limits].min_burn_spacing_hours")


@pytest.mark.parametrize("key, limit", [("entry_position_km", "1e300"), ("flight_path_deg", "5.0"),
                                        ("perilune_altitude_km", "1e6")])
def test_tolerance_above_its_documented_limit_is_refused(key, limit):
    head, tail = BASE.split("[tolerances]\n")
    tail = re.sub(rf"^{key} = .*$", f"{key} = {limit}", tail, count=1, flags=re.M)
    refused(head + "[tolerances]\n" + tail, f"[tolerances].{key}", "at most")


def test_error_inside_start_elements_names_the_elements():
    text = re.sub(r"position_km = .*\nvelocity_kms = .*\n",
                  "[start.elements]\na_km = 3000.0\ne = 0.0\ninc_deg = 0.0\nraan_deg = 0.0\nargp_deg = 0.0\n"
                  "nu_deg = 0.0\n", BASE)
    err = refused(text, "[start].elements")
    assert "position_km" not in err


def test_missing_burn_says_what_is_expected():
    text = re.sub(r"\[\[burn\]\].*?\n\n", "", BASE, flags=re.S)
    assert "[[burn]]" not in text
    refused(text, "[burn]", "one or more [[burn]] tables")


def test_unknown_key_of_a_megabyte_is_not_echoed_whole():
    err = refused(BASE.replace("[case]\n", "[case]\n" + "k" * 1_000_000 + " = 1\n", 1), "unknown key")
    assert len(err) < 2000


def test_unknown_key_of_a_megabyte_in_the_error_model_is_not_echoed_whole():
    err = refused(BASE + "\n" + "k" * 1_000_000 + " = 1\n", "unknown key")
    assert len(err) < 2000


@pytest.mark.parametrize("name, value", [("SLINGBACK_START_WORKERS", "two"), ("SLINGBACK_START_WORKERS", "0"),
                                         ("SLINGBACK_COMPILE", "fast"), ("SLINGBACK_PROPAGATOR", "rk4")])
@pytest.mark.parametrize("command", ["solve", "sweep"])
def test_bad_setting_exit_2_naming_it_before_any_work(tmp_path, monkeypatch, capsys, name, value, command):
    """A SLINGBACK_* setting with a value the package cannot use stops the command at the door:
    exit 2, one line naming the setting, no traceback, nothing written."""
    from pathlib import Path

    from optimizer.cli import main

    root = Path(__file__).resolve().parents[1]
    monkeypatch.setenv(name, value)
    source = root / "problems" / ("demo-abort.toml" if command == "solve" else "demo-trade.toml")
    out = tmp_path / "run"
    code = main([command, str(source), "--out", str(out)] + (["--workers", "1"] if command == "sweep" else []))
    err = capsys.readouterr().err
    assert code == 2 and f"{name}={value!r}" in err and "Traceback" not in err, err
    assert not out.exists()


def test_duration_ending_before_the_arrival_window_opens_is_refused():
    """Found by exploratory testing: validate said "valid" and solve died in CasADi with an
    ill-posed bound (LBX > UBX), exit 1."""
    start = tomllib.loads(BASE)["start"]["epoch"]
    from optimizer.timescales import format_epoch, parse_epoch

    opens = format_epoch(parse_epoch(start) + 4 * 86400.0, 0)
    closes = format_epoch(parse_epoch(start) + 5 * 86400.0, 0)
    text = mutant("max_duration_days = 6.0",
                  f'max_duration_days = 2.0\nepoch_window = ["{opens} TDB", "{closes} TDB"]')
    refused(text, "[return].max_duration_days", "[return].epoch_window")


def test_least_altitude_above_the_whole_perilune_range_is_refused():
    refused(mutant("perilune_altitude_km = [100.0, 5000.0]", "perilune_altitude_km = [0.0, 30.0]"),
            "[limits].min_altitude_km", "[lunar].perilune_altitude_km")
