"""The global layer's starts made at once in forked processes (``search._Ahead``): the answer and
the record must not depend on how many run at once or in which order they finish.

The screen and the NLP are replaced by stand-ins (the bookkeeping is under test, not the
optimiser): each start's answer is a function of its seed and settings only, and some stand-ins
sleep so that a later start finishes before an earlier one.
"""

import os
import threading
import time
from types import SimpleNamespace

import numpy as np
import pytest

from optimizer.solve import search

FAMILIES = ("same side, same sense", "same side, opposite sense", "other side, same sense")


def _seeds(*mps):
    """One seed per family (so each is a basin of its own) at epochs 100, 200, ... s."""
    return [search.Seed(0, 100.0 * (k + 1), FAMILIES[k], np.array([m / 1000.0, 0.0, 0.0]), "screened")
            for k, m in enumerate(mps)]


PROBLEM = SimpleNamespace(burns=[SimpleNamespace(window=(0.0, 1000.0))], start=SimpleNamespace(epoch=0.0))


def _stand_in(answers, sleeps=None, crash_in_child=()):
    """solve_from: start at epoch ``t`` answers ``answers[(t, explore)]`` (None: not verified);
    it sleeps ``sleeps[t]`` seconds first; in a forked process it dies at the epochs of
    ``crash_in_child``."""
    parent = os.getpid()

    def solve_from(burns, explore=False, uphill=False, say=None):
        t = burns[0][0]
        if os.getpid() != parent and t in crash_in_child:
            os._exit(3)
        time.sleep((sleeps or {}).get(t, 0.0))
        say(f"stand-in at {t:g}, exploring {explore}")
        dv = answers[(t, explore)]
        return SimpleNamespace(verified=dv is not None, status="verified" if dv is not None else "failed",
                               total_dv_mps=dv if dv is not None else 99.0,
                               burns=[SimpleNamespace(epoch=t)],
                               solver={"iterations": 10, "pid": os.getpid()})
    return solve_from


def _run(monkeypatch, seeds, solve_from, workers):
    monkeypatch.setattr(search, "screened", lambda problem, model, say=None: (seeds, None))
    lines = []
    best, record, last = search.global_solve(PROBLEM, None, solve_from, lines.append, workers=workers)
    starts = [{k: v for k, v in s.items() if k != "wall_s"} for s in record["starts"]]
    return best, record, starts, lines


ANSWERS = {(100.0, False): 5.0, (200.0, True): 4.9, (200.0, False): 4.95, (300.0, True): 5.2,
           (300.0, False): 5.3}


def test_starts_made_at_once_give_the_answer_and_record_of_starts_made_one_after_another(monkeypatch):
    seeds = _seeds(5.1, 5.2, 5.3)
    # start 1 is the slowest: starts 2 and 3 finish first when made at once
    solve_from = _stand_in(ANSWERS, sleeps={100.0: 0.6})
    one = _run(monkeypatch, seeds, solve_from, 1)
    two = _run(monkeypatch, seeds, solve_from, 2)
    assert one[0].total_dv_mps == two[0].total_dv_mps == 4.9
    assert one[1]["chosen"] == two[1]["chosen"] == 1
    assert one[2] == two[2] and len(one[2]) == 3
    assert one[3] == two[3]  # the same progress lines, in the same order
    assert two[1]["start_workers"] == 2


def test_a_start_begun_on_a_wrong_guess_is_made_again_as_the_rule_says(monkeypatch):
    """Start 1 does not verify, so start 2 must not explore (full budget, retries): the forked
    process that began it exploring is not used."""
    answers = {**ANSWERS, (100.0, False): None}
    seeds = _seeds(5.1, 5.2, 5.3)
    one = _run(monkeypatch, seeds, _stand_in(answers), 1)
    two = _run(monkeypatch, seeds, _stand_in(answers), 2)
    assert [s.get("explore", False) for s in two[2]] == [False, False, True]
    assert one[2] == two[2]
    assert two[0].total_dv_mps == 4.95


def test_later_starts_run_in_other_processes(monkeypatch):
    seeds = _seeds(5.1, 5.2, 5.3)
    best, record, starts, _ = _run(monkeypatch, seeds, _stand_in(ANSWERS), 2)
    assert best.solver["pid"] != os.getpid()


def test_a_start_whose_process_dies_is_made_in_this_one(monkeypatch):
    seeds = _seeds(5.1, 5.2, 5.3)
    solve_from = _stand_in(ANSWERS, crash_in_child=(200.0,))
    one = _run(monkeypatch, seeds, solve_from, 1)
    two = _run(monkeypatch, seeds, solve_from, 2)
    assert one[2] == two[2]
    assert two[0].total_dv_mps == 4.9 and two[0].solver["pid"] == os.getpid()


def test_a_start_the_rule_skips_is_not_begun_early(monkeypatch, tmp_path):
    """Seeds over SKIP_RATIO x the first seed + SKIP_MPS are never begun ahead of the rule (and
    here the rule skips them too).  Every call, in any process, leaves a line in a file."""
    seeds = _seeds(5.1, 20.0)
    calls = tmp_path / "calls"
    inner = _stand_in({(100.0, False): 5.0, (200.0, True): 19.0})

    def solve_from(burns, explore=False, uphill=False, say=None):
        with open(calls, "a") as f:
            f.write(f"{burns[0][0]:g}\n")
        return inner(burns, explore, uphill, say)

    best, record, starts, _ = _run(monkeypatch, seeds, solve_from, 2)
    assert len(starts) == 1 and record["start_workers"] == 1
    assert calls.read_text().split() == ["100"]


def test_start_workers_are_one_off_the_main_thread_and_a_bad_setting_is_named(monkeypatch):
    monkeypatch.setenv("SLINGBACK_START_WORKERS", "3")
    assert search.start_workers() == 3
    seen = []
    worker = threading.Thread(target=lambda: seen.append(search.start_workers()))
    worker.start()
    worker.join()
    assert seen == [1]
    monkeypatch.setenv("SLINGBACK_START_WORKERS", "two")
    with pytest.raises(ValueError, match="SLINGBACK_START_WORKERS"):
        search.start_workers()
