"""Checks of the global benchmark's case generator and reference scanner (no IPOPT solve).

The benchmark (``tests/benchmarks/bench_global.py``) holds the solver to two references per case:
a planted bound and a fixed-epoch scan.  These tests check that both are real: the generator gives
the same case for the same seed, the planted plan of every case actually meets that case's
constraints when propagated independently (so the bound is an upper bound of the optimum), and
the single-shooting scanner finds a feasible burn no worse than the planted one at the planted
epoch.  The cases are invented by the generator (no published values involved).
"""

from __future__ import annotations

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "benchmarks"))

import global_cases as gc  # noqa: E402
import global_reference as gr  # noqa: E402

FAST_SEED = 0  # a case whose root-finding takes a few seconds


def _cached(seeds):
    cache = gc._read_json(gc.CASES_FILE)
    out = [gc.case_from_dict(cache[str(s)]) for s in seeds
           if str(s) in cache and cache[str(s)].get("generator") == gc.GENERATOR_VERSION
           and "error" not in cache[str(s)]]
    return out


@pytest.fixture(scope="module")
def fresh():
    return gc.make_case(FAST_SEED)


def test_generator_is_deterministic(fresh):
    """The same seed in the same process and propagator engine gives the same case, bit for bit."""
    again = gc.make_case(FAST_SEED)
    assert again.key == fresh.key
    assert again.problem == fresh.problem
    assert again.planted_epoch == fresh.planted_epoch and again.planted_dv == fresh.planted_dv


def test_generator_agrees_with_its_cached_copy_to_rounding(fresh):
    """Against the copy in ``global_cases.json`` (written by another process, possibly another
    machine or propagator engine): the drawn numbers (epochs, windows, ranges, the planted burn)
    are equal, and the start state, found by root-finding and a back-propagation at 1e-12, agrees to
    rounding.  Measured between the C and scipy engines on this seed: 8e-6 km and 3e-10 km/s; the
    bounds are 1e-3 km and 1e-7 km/s (an error in the generator moves it by kilometres).  The key is a
    hash of the exact numbers, so it is not compared here: a case regenerated elsewhere only costs
    a recomputed reference."""
    cached = _cached([FAST_SEED])
    if not cached:
        pytest.skip("no cached copy of the case")
    other = cached[0]
    a, b = np.asarray(other.problem.start.state), np.asarray(fresh.problem.start.state)
    assert np.max(np.abs(a[:3] - b[:3])) < 1e-3 and np.max(np.abs(a[3:] - b[3:])) < 1e-7
    # every other number of the problem (windows, ranges drawn around the ballistic path's figures)
    # to 1e-9 relative: a figure read off a propagation may differ in its last digits
    da, db = other.problem.to_dict(), fresh.problem.to_dict()
    da["start"]["state"] = db["start"]["state"] = None
    _close(da, db, "problem")
    assert other.planted_epoch == pytest.approx(fresh.planted_epoch, rel=0, abs=1e-3)
    assert np.allclose(other.planted_dv, fresh.planted_dv, rtol=1e-9, atol=0)


def _close(x, y, where):
    if isinstance(x, dict):
        assert sorted(x) == sorted(y), where
        for k in x:
            _close(x[k], y[k], f"{where}.{k}")
    elif isinstance(x, (list, tuple)):
        assert len(x) == len(y), where
        for i, (u, v) in enumerate(zip(x, y)):
            _close(u, v, f"{where}[{i}]")
    elif isinstance(x, float) and isinstance(y, float):
        assert x == pytest.approx(y, rel=1e-9, abs=0), where
    else:
        assert x == y, where


def test_halves_split_by_parity():
    assert all(gc.half_of(s) == "tune" for s in gc.seeds("tune"))
    assert all(gc.half_of(s) == "heldout" for s in gc.seeds("heldout"))
    assert not set(gc.seeds("tune")) & set(gc.seeds("heldout"))


def _check_planted(case):
    p = case.problem
    lo, hi = p.burns[0].window
    assert lo < case.planted_epoch < hi, f"seed {case.seed}: planted epoch outside burn 1's window"
    grid = case.scan_epochs()
    assert np.min(np.abs(grid - case.planted_epoch)) > 0.2 * (grid[1] - grid[0]), \
        f"seed {case.seed}: planted epoch on the scan grid"
    size = float(np.linalg.norm(case.planted_dv) * 1000.0)
    assert size == pytest.approx(case.planted_bound_mps, rel=1e-12)
    assert size <= p.burns[0].max_dv_mps
    s = gc.planted_path(case)
    assert gc.violations(p, s) == [], f"seed {case.seed}: the planted plan breaks its constraints"
    w = max(b.window[1] for b in p.burns)
    assert 2.0 * 3600 <= hi - lo <= 60.0 * 3600 + 1
    assert w < s.arrival_epoch


def test_planted_plan_meets_its_own_constraints(fresh):
    _check_planted(fresh)


def test_every_cached_planted_plan_is_feasible():
    cases = _cached(gc.seeds("all"))
    if not cases:
        pytest.skip("no generated cases cached (run tests/benchmarks/global_reference.py)")
    for case in cases:
        _check_planted(case)
    if len(cases) >= 10:  # the mix the issue asks for (generator version 2 drew only entry targets)
        assert {c.problem.arrival.target for c in cases} == {"entry", "perigee"}
        assert {c.layout for c in cases} == {"1", "2-out", "out+ret"}


def test_scanner_finds_a_burn_no_worse_than_the_planted_one(fresh):
    # one epoch of the scan: the planted epoch itself (the real scan never uses it), where the
    # planted burn is feasible, so the single-shooting optimum is at most the planted size
    case = fresh
    model = gc.model_for(case.problem)
    p = case.problem
    pre = gc.propagate(model, p.start.epoch, np.asarray(p.start.state), case.planted_epoch).y[:, -1]
    shooter = gr.EpochShooter(model, p, case.planted_epoch, pre, case.planted_bound_mps)
    dv, ok = shooter.solve(shooter.newton_guess())
    assert ok
    assert gr._verified(model, case, case.planted_epoch, dv)  # at the verification tolerances
    # its own tolerance: SLSQP ftol 1e-6 on |dv|^2 / bound^2
    assert np.linalg.norm(dv) <= case.planted_bound_mps * (1 + 1e-3)
