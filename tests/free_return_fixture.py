"""A free-return path built without the optimiser: root-finding on the independent propagator.

The seed builder (:mod:`optimizer.solve.seed`) uses only the propagator and scipy's ``fsolve``: the
path it returns is ballistic by construction and is confirmed by propagation, so it is a known
zero-Δv answer that does not depend on the NLP.
"""

from __future__ import annotations

from optimizer.solve.seed import circumlunar


def build(model, t_p, alt_km=150.0, departure_alt_km=200.0, return_alt_km=40.0, guess=(0.0, 2.5)):
    """Perilune state of a ballistic free return; returns (state, [departure, return] altitudes, params)."""
    seed = circumlunar(model, t_p, alt_km, departure_alt_km, return_alt_km, guess)
    return seed.perilune_state, [seed.departure_alt_km, seed.return_alt_km], None
