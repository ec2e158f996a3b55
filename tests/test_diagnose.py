"""Issue 13, misleading reason: an arrival that must come before the lunar pass is named as the
cause (``[return].epoch_window`` or ``max_duration_days``), not "the coast never passes the Moon".

The case is the shipped demo-abort (an invented outbound coast whose file says it is "40 h before
the lunar encounter": 2027-05-11T20:00 + 40 h = 2027-05-13T12:00 TDB) without its return burn.
"""

from __future__ import annotations

import tomllib

import pytest

from optimizer.diagnose import explain_failure
from optimizer.problem_file import problem_from_dict
from optimizer.timescales import parse_epoch
from test_problem_file import PROBLEMS, run

# The demo file's own statement (an invented case): the lunar encounter 40 h after the start.
STATED_PASS = parse_epoch("2027-05-13T12:00:00 TDB")


def early(arrival: dict) -> dict:
    d = tomllib.loads((PROBLEMS / "demo-abort.toml").read_text())
    d["burn"] = d["burn"][:1]  # the outbound burn only: the path ends with the arrival
    d["return"].pop("max_duration_days")
    d["return"].update(arrival)
    return d


def _epochs(text):
    return [parse_epoch(w + " TDB") for w in text.split() if w[:4] == "2027" and "T" in w]


def test_arrival_window_closing_before_the_lunar_pass_is_named():
    window = ["2027-05-12T12:00:00 TDB", "2027-05-13T00:00:00 TDB"]
    why = explain_failure(problem_from_dict(early({"epoch_window": window})))
    assert why is not None and why.startswith("[return].epoch_window closes at 2027-05-13T00:00:00.000 TDB")
    closes, lunar_pass = _epochs(why)
    assert abs(lunar_pass - STATED_PASS) < 3600.0  # the file says 40 h; an hour either way


def test_duration_ending_before_the_lunar_pass_is_named():
    why = explain_failure(problem_from_dict(early({"max_duration_days": 1.0})))
    assert why is not None and why.startswith("[return].max_duration_days (1 d) ends the path")


@pytest.mark.parametrize("arrival", [{"epoch_window": ["2027-05-12T12:00:00 TDB", "2027-05-17T00:00:00 TDB"]},
                                     {"max_duration_days": 6.0}])
def test_arrival_after_the_lunar_pass_is_not_blamed(arrival):
    assert explain_failure(problem_from_dict(early(arrival))) is None


def test_solve_names_the_arrival_window_not_the_coast(tmp_path):
    import tomli_w

    f = tmp_path / "early.toml"
    f.write_text(tomli_w.dumps(early({"epoch_window": ["2027-05-12T12:00:00 TDB", "2027-05-13T00:00:00 TDB"]})))
    code, _, err = run(["solve", str(f), "--out", str(tmp_path / "run"), "--quiet"])
    assert code == 3 and "Traceback" not in err
    assert "[return].epoch_window closes at" in err and "never passes the Moon" not in err
    assert not (tmp_path / "run").exists()
