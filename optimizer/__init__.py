"""slingback: minimum-fuel free-return trajectory design, verified by independent propagation.

Results are for design studies only; they are not flight-certified, and flight use goes through the
mission's own independent verification and licensed practice.
"""

__version__ = "0.1.0"
