"""The solve wing: from a :class:`~optimizer.problem.Problem` to a verified :class:`~optimizer.plan.Plan`.

Modules, bottom up (each imports only those before it, and the layers below the wing: problem,
models, ephemeris, propagate, events, judge, verify, transcription, compiled):

* ``base``: the error type (:class:`SolveError`) and the burn bookkeeping shared by the stages;
* ``seed``: ballistic circumlunar paths (propagator and scipy root-finding);
* ``search``: the global layer (seeds over every burn window and family, targeting screen);
* ``guess``: starting points of the NLP (targeting, the injection seed, paths cut into coasts);
* ``ipopt``: IPOPT options, retries and the per-thread solver cache;
* ``primer``: the primer-vector test of held burns;
* ``strategy``: the chain (search or guess, NLP, verification, refinement, pruning, staging,
  continuation) behind :func:`solve`.

The wing never imports the file formats, the trade engine, export or the CLI (the form of the
problem a plan carries is passed in: ``problem_table``).  Importing this
package loads no CasADi: :func:`solve` and the names below are looked up in their modules when
first used, so the propagator, seeds and search stay usable without it.

(The package shares its name with its entry point: ``optimizer/__init__.py`` imports this package
first and binds the attribute ``optimizer.solve`` to the function.  So write
``from optimizer.solve import strategy`` or ``from optimizer.solve.strategy import ...``; the
attribute forms ``import optimizer.solve.strategy as s`` and ``optimizer.solve.strategy`` fail.)
"""

from __future__ import annotations

from importlib import import_module

from .base import SolveError

#: Public names defined in the wing's modules (loaded on first use).
_LAZY = {"NLPCache": "ipopt", "IPOPT_OPTIONS": "ipopt", "initial_guess": "guess", "model_span": "guess",
         "primer_scan": "primer"}


def solve(problem, **kwargs):
    """Design the plan of ``problem``; see :func:`optimizer.solve.strategy.solve` (imported when
    called, so that this package can be imported without loading CasADi)."""
    from .strategy import solve as _solve

    return _solve(problem, **kwargs)


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = ["solve", "SolveError", *_LAZY]
