"""Reusing a built IPOPT solver across NLPs of the same structure must not change any answer.

The reference is the same problem solved with a solver built afresh (``cache=False``); the problems
differ only in bounds (perilune range, burn window), which is what the cache may share.
"""

from dataclasses import replace

import pytest

import test_optimizer as base
from test_optimizer import model, natural  # noqa: F401  (the shared fixtures)
from optimizer import solve
from optimizer.problem import BurnSpec, LunarPass
from optimizer.solve.ipopt import NLPCache

HOUR = 3600.0


@pytest.fixture(scope="module")
def problem(natural):
    return base._problem(base._nudged(natural, 10.0))


def test_cached_solver_gives_the_fresh_answer_for_other_bounds(problem, model):
    cache = NLPCache()
    first = solve(problem, model=model, cache=cache)
    assert first.verified and cache.misses >= 1
    # same structure, other bounds: a higher perilune band and a later burn window
    other = replace(problem, lunar=LunarPass((1500.0, 5000.0)),
                    burns=(BurnSpec((base.T_START + 3 * HOUR, base.T_START + 12 * HOUR), 300.0),))
    hits = cache.hits
    cached = solve(other, model=model, cache=cache)
    assert cache.hits > hits  # the first solve's solver served the second problem
    fresh = solve(other, model=model, cache=False)
    assert cached.verified and fresh.verified
    assert cached.total_dv_mps == pytest.approx(fresh.total_dv_mps, rel=1e-6)
    assert cached.burns[0].epoch == pytest.approx(fresh.burns[0].epoch, abs=1.0)
    assert cached.total_dv_mps > first.total_dv_mps  # the bounds did take effect
    assert cached.solver["attempts"][0]["build_s"] < 0.5 * fresh.solver["attempts"][0]["build_s"]


def test_other_structure_is_not_shared(problem, model):
    cache = NLPCache()
    solve(problem, model=model, cache=cache)
    misses = cache.misses
    along = replace(problem, burns=(replace(problem.burns[0], direction="along"),))
    solve(along, model=model, cache=cache)
    assert cache.misses > misses
