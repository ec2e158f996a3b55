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
    # a record made in another process says so; the rest must be the same
    starts = [{k: v for k, v in s.items() if k not in ("wall_s", "process")} for s in record["starts"]]
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
    assert "starts at once in other processes" in two[3][0]
    assert one[3] == two[3][1:]  # and then the same progress lines, in the same order
    assert two[1]["start_workers"] == 2
    assert [s.get("process") for s in two[1]["starts"]] == ["forked"] * 3


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
    assert [s.get("process") for s in two[1]["starts"]] == ["forked", None, "forked"]  # start 2 made here


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
    assert any("start 2 failed in another process" in line for line in two[3])


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


def test_start_workers_follow_the_setting_the_cores_and_the_thread_and_name_a_bad_setting(monkeypatch):
    """As many starts as have their threads' cores each (at most MAX_STARTS); one off the main
    thread or beside another thread; the setting wins where forking is sound."""
    monkeypatch.setenv("SLINGBACK_START_WORKERS", "3")
    main = threading.main_thread()
    monkeypatch.setattr(threading, "enumerate", lambda: [main])  # whatever other tests left running
    assert search.start_workers() == 3
    monkeypatch.setattr(threading, "enumerate", lambda: [main, threading.Thread(name="another")])
    assert search.start_workers() == 1
    monkeypatch.undo()
    monkeypatch.setenv("SLINGBACK_START_WORKERS", "3")
    seen = []
    worker = threading.Thread(target=lambda: seen.append(search.start_workers()))
    worker.start()
    worker.join()
    assert seen == [1]
    monkeypatch.delenv("SLINGBACK_START_WORKERS")
    monkeypatch.setattr(threading, "enumerate", lambda: [main])
    for cores, threads, n in ((2, 2, 1), (4, 2, 2), (16, 2, 3), (2, 1, 2), (1, 1, 1)):
        monkeypatch.setattr(os, "sched_getaffinity", lambda pid, c=cores: set(range(c)))
        assert search.start_workers(threads) == n, (cores, threads)
    monkeypatch.setenv("SLINGBACK_START_WORKERS", "two")
    with pytest.raises(ValueError, match="SLINGBACK_START_WORKERS"):
        search.start_workers()


def test_an_uphill_start_solved_again_in_another_process_keeps_its_record_and_choice(monkeypatch):
    """Start 2 (made in a forked process) ends over UPHILL_RATIO x its seed + SKIP_MPS and is
    solved again there with the other settings: both records come back, in order, and the choice
    points at the second."""
    seeds = _seeds(5.1, 5.2)
    calls = {(100.0, False, False): 5.0, (200.0, True, False): 9.9, (200.0, True, True): 4.8}
    parent = os.getpid()

    def solve_from(burns, explore=False, uphill=False, say=None):
        t = burns[0][0]
        return SimpleNamespace(verified=True, status="verified", total_dv_mps=calls[(t, explore, uphill)],
                               burns=[SimpleNamespace(epoch=t)], solver={"iterations": 10, "pid": os.getpid()})

    one = _run(monkeypatch, seeds, solve_from, 1)
    two = _run(monkeypatch, seeds, solve_from, 2)
    assert one[2] == two[2] and [s.get("uphill", False) for s in two[2]] == [False, False, True]
    assert one[1]["chosen"] == two[1]["chosen"] == 2
    assert two[0].total_dv_mps == 4.8 and two[0].solver["pid"] != parent


def test_a_start_that_raises_in_another_process_is_made_here_and_said(monkeypatch):
    parent = os.getpid()
    inner = _stand_in(ANSWERS)

    def solve_from(burns, explore=False, uphill=False, say=None):
        if os.getpid() != parent and burns[0][0] == 300.0:
            raise RuntimeError("stand-in failure")
        return inner(burns, explore, uphill, say)

    seeds = _seeds(5.1, 5.2, 5.3)
    one = _run(monkeypatch, seeds, solve_from, 1)
    two = _run(monkeypatch, seeds, solve_from, 2)
    assert one[2] == two[2]
    assert any("start 3 failed in another process (RuntimeError: stand-in failure)" in line for line in two[3])


def test_a_running_start_the_rule_then_skips_is_ended(monkeypatch):
    """Start 3 is begun early (its seed is within the rule of start 1's screen) but start 2's
    answer makes the rule skip it: its process, still running, is ended before the search
    returns."""
    import multiprocessing

    seeds = _seeds(5.1, 5.2, 8.0)
    answers = {(100.0, False): 5.0, (200.0, True): 4.0, (300.0, True): 7.9}
    best, record, starts, _ = _run(monkeypatch, seeds, _stand_in(answers, sleeps={300.0: 30.0}), 2)
    assert best.total_dv_mps == 4.0 and len(starts) == 2
    assert multiprocessing.active_children() == []


INTERRUPTED_SEARCH = """
import os, sys, time
from types import SimpleNamespace
import numpy as np
from optimizer.interrupt import honour_ctrl_c
from optimizer.solve import search
families = ("same side, same sense", "same side, opposite sense", "other side, same sense")
seeds = [search.Seed(0, 100.0 * (k + 1), f, np.array([0.005, 0.0, 0.0]), "screened") for k, f in enumerate(families)]
search.screened = lambda problem, model, say=None: (seeds, None)
problem = SimpleNamespace(burns=[SimpleNamespace(window=(0.0, 1000.0))], start=SimpleNamespace(epoch=0.0))

def solve_from(burns, explore=False, uphill=False, say=None):
    time.sleep(120)  # a start that would run for two minutes

try:
    with honour_ctrl_c():
        search.global_solve(problem, None, solve_from, workers=2)
except KeyboardInterrupt:
    print("interrupted", flush=True)
    os._exit(130)  # as the command leaves: no clean-up of the interpreter
"""


@pytest.mark.parametrize("to", ["group", "parent"])
def test_ctrl_c_ends_every_start_process(tmp_path, to):
    """A search whose two forked starts would run for minutes, under the command's Ctrl-C guard,
    interrupted once both processes exist (by a terminal: the whole group; by a supervisor: the
    parent alone): exit 130 at once, nothing printed on stderr, and no process of the group left
    running (a child whose parent ended dies with it)."""
    import signal
    import subprocess
    import sys
    from pathlib import Path

    from child_signals import children, ctrl_c_as_from_a_terminal, running_in_group

    root = Path(__file__).resolve().parents[1]
    p = subprocess.Popen([sys.executable, "-c", INTERRUPTED_SEARCH], cwd=tmp_path,
                         env={**os.environ, "PYTHONPATH": str(root)}, stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True, preexec_fn=ctrl_c_as_from_a_terminal,
                         start_new_session=True)
    for _ in range(600):
        if p.poll() is not None or len(children(p.pid)) >= 2:
            break
        time.sleep(0.05)
    assert len(children(p.pid)) == 2, p.communicate(timeout=10)
    if to == "group":
        os.killpg(p.pid, signal.SIGINT)
    else:
        p.send_signal(signal.SIGINT)
    out, err = p.communicate(timeout=60)
    assert p.returncode == 130 and out.strip() == "interrupted", (p.returncode, out, err)
    assert err == ""
    for _ in range(20):
        if not running_in_group(p.pid):
            break
        time.sleep(0.05)
    assert not running_in_group(p.pid), running_in_group(p.pid)
