"""slingback: minimum-fuel free-return trajectory design, verified by independent propagation.

Results are for design studies only; they are not flight-certified, and flight use goes through the
mission's own independent verification and licensed practice.

One job: the library's entry point :func:`solve` and ``__version__``.  May import: the solve wing
:mod:`optimizer.solve` (first, see below) and, inside :func:`solve`, the file layer's
:func:`optimizer.problem_file.problem_to_dict` (the table form a plan carries).
"""

__version__ = "0.1.0"

# ``optimizer.solve`` is both the solve wing (a package) and the library's entry point below.
# Importing a subpackage sets the parent's attribute only the first time it is imported, so it is
# imported here, before anything else can, and the name is then bound to the function for good.
# The wing's __init__ loads no CasADi: the propagator and models stay usable without it.
from . import solve as _wing  # noqa: E402


def solve(problem, **kwargs):
    """Design the plan of ``problem``: :func:`optimizer.solve.strategy.solve`, with each plan
    carrying its problem in the problem file's table form (what ``slingback check`` reads back;
    the solve wing itself does not import the file layer)."""
    from .problem_file import problem_to_dict

    kwargs.setdefault("problem_table", problem_to_dict)
    return _wing.solve(problem, **kwargs)


__all__ = ["solve", "__version__"]
