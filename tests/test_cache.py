"""Reusing a built IPOPT solver across NLPs of the same structure must not change any answer.

The reference is the same problem solved with a solver built afresh (``cache=False``); the problems
differ only in bounds (perilune range, burn window), which is what the cache may share.  That the
cache is used at all is checked on the mechanism (no solver is built for the second problem), not
on a stopwatch; the build time saved is printed by ``tests/benchmarks/bench_cache.py``.
"""

from dataclasses import replace

import pytest

from optimizer.solve import ipopt as solver_module
import test_optimizer as base
from test_optimizer import model, natural  # noqa: F401  (the shared fixtures)
from optimizer import solve
from optimizer.problem import BurnSpec, LunarPass
from optimizer.solve.ipopt import IPOPT_OPTIONS, NLPCache
from optimizer.transcription import Transcription

HOUR = 3600.0


@pytest.fixture(scope="module")
def problem(natural):
    return base._problem(base._nudged(natural, 10.0))


@pytest.fixture(scope="module")
def warm(problem, model):
    """A cache that has served one solve of ``problem``, and that solve."""
    cache = NLPCache()
    first = solve(problem, model=model, cache=cache)
    return cache, first


@pytest.fixture
def builds(monkeypatch):
    """Counts the IPOPT solvers built (every cache miss and every uncached solve builds one)."""
    made = []
    real = solver_module.build_solver

    def counting(tr, opts):
        made.append(tr)
        return real(tr, opts)

    monkeypatch.setattr(solver_module, "build_solver", counting)
    return made


def test_cached_solver_gives_the_fresh_answer_for_other_bounds(problem, model, warm, builds):
    cache, first = warm
    assert first.verified and cache.misses >= 1
    # same structure, other bounds: a higher perilune band and a later burn window
    other = replace(problem, lunar=LunarPass((1500.0, 5000.0)),
                    burns=(BurnSpec((base.T_START + 3 * HOUR, base.T_START + 12 * HOUR), 300.0),))
    hits, misses = cache.hits, cache.misses
    cached = solve(other, model=model, cache=cache)
    assert cache.hits > hits  # the first solve's solver served the second problem ...
    assert cache.misses == misses and builds == []  # ... and none was built for it
    fresh = solve(other, model=model, cache=False)
    assert builds, "an uncached solve must build its solver"  # the counter can see a build
    assert cached.verified and fresh.verified
    assert cached.total_dv_mps == pytest.approx(fresh.total_dv_mps, rel=1e-6)
    assert cached.burns[0].epoch == pytest.approx(fresh.burns[0].epoch, abs=1.0)
    assert cached.total_dv_mps > first.total_dv_mps  # the bounds did take effect


def test_other_structure_is_not_shared(problem, model, monkeypatch):
    """The cache's keying on its own (no IPOPT build, no solve): a problem that differs only in
    bounds is served the solver built for the first; one whose burn has another direction rule
    (same variables, other constraints) gets a solver of its own."""
    built = []

    def fake_build(tr, opts):
        built.append(tr)
        return object()

    monkeypatch.setattr(solver_module, "build_solver", fake_build)
    steps = [problem.mesh.steps] * (len(problem.burns) + 2)  # the layout solve() starts from

    def nlp(p):
        return Transcription(p, model, steps, p.mesh.segments)

    cache = NLPCache()
    first = cache.solver(nlp(problem), IPOPT_OPTIONS)
    other = replace(problem, lunar=LunarPass((1500.0, 5000.0)),
                    burns=(BurnSpec((base.T_START + 3 * HOUR, base.T_START + 12 * HOUR), 300.0),))
    assert cache.solver(nlp(other), IPOPT_OPTIONS) is first and len(built) == 1
    along = replace(problem, burns=(replace(problem.burns[0], direction="along"),))
    assert cache.solver(nlp(along), IPOPT_OPTIONS) is not first and len(built) == 2
    assert (cache.hits, cache.misses) == (1, 2)
