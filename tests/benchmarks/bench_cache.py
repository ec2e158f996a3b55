"""Build time of an IPOPT solver, fresh against served from the solver cache (``NLPCache``).

The case is ``tests/test_cache.py``'s: the one-burn abort problem of ``tests/test_optimizer.py``
(invented), solved once to fill a cache, then a problem of the same structure with other bounds
solved with that cache and without it.  Prints each solve's first-attempt ``build_s`` (the time
spent getting a built solver) and the ratio; the goal is a cached build under half a fresh one.

Run: python tests/benchmarks/bench_cache.py
"""

from __future__ import annotations

import os
import sys
from dataclasses import replace

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))  # tests/

import test_optimizer as base  # noqa: E402
from optimizer import solve  # noqa: E402
from optimizer.problem import BurnSpec, LunarPass  # noqa: E402
from optimizer.solve.ipopt import NLPCache  # noqa: E402

HOUR = 3600.0


def main():
    model = base.build_model(base.ModelSpec(), base.T_PERILUNE - 6 * base.DAY, base.T_START + 12 * base.DAY)
    problem = base._problem(base._nudged(base._start_on(model, 150.0), 10.0))
    cache = NLPCache()
    solve(problem, model=model, cache=cache)
    other = replace(problem, lunar=LunarPass((1500.0, 5000.0)),
                    burns=(BurnSpec((base.T_START + 3 * HOUR, base.T_START + 12 * HOUR), 300.0),))
    cached = solve(other, model=model, cache=cache)
    fresh = solve(other, model=model, cache=False)
    c, f = cached.solver["attempts"][0]["build_s"], fresh.solver["attempts"][0]["build_s"]
    print(f"machine load average (1 min): {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    print(f"solver build, fresh            {f * 1e3:9.1f} ms")
    print(f"solver build, from the cache   {c * 1e3:9.1f} ms  (cache hits {cache.hits}, misses {cache.misses})")
    print(f"goal: cached under half of fresh: {'MET' if c < 0.5 * f else 'MISSED'} ({c / f:.3f})")


if __name__ == "__main__":
    main()
