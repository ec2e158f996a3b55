"""slingback: minimum-fuel free-return trajectory design, verified by independent propagation.

Results are for design studies only; they are not flight-certified, and flight use goes through the
mission's own independent verification and licensed practice.
"""

__version__ = "0.1.0"

# ``optimizer.solve`` is both the solve wing (a package) and its entry point.  Importing a
# subpackage sets the parent's attribute only the first time it is imported, so importing it here,
# before anything else can, leaves ``optimizer.solve`` bound to the function for good.  The wing's
# __init__ loads no CasADi: the propagator and models stay usable without it.
from .solve import solve  # noqa: E402

__all__ = ["solve", "__version__"]
