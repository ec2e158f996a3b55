"""slingback: minimum-fuel free-return trajectory design, verified by independent propagation.

Results are for design studies only; they are not flight-certified, and flight use goes through the
mission's own independent verification and licensed practice.
"""

__version__ = "0.1.0"


def solve(problem, **kwargs):
    """Design the plan of ``problem``; see :func:`optimizer.solver.solve` (imported lazily, so that
    the propagator and models can be used without loading CasADi)."""
    from .solver import solve as _solve

    return _solve(problem, **kwargs)
