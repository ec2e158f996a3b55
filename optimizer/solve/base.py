"""The bottom of the solve wing: its error type and the burn bookkeeping every stage shares.

Imports nothing of the wing (and nothing that loads CasADi): guess, ipopt, primer and strategy all
import from here, never the other way round.
"""

from __future__ import annotations


class SolveError(ValueError):
    """The problem cannot be set up (unsupported option, no lunar pass in the guess...)."""


def usable_burns(problem) -> list[int]:
    """Indices of the burns allowed a non-zero size."""
    return [j for j, b in enumerate(problem.burns) if b.max_dv_mps > 0]


def held_burns(problem) -> list[int]:
    """Burns solved at zero first in a cold multi-burn solve: every burn after the first usable
    one (for the Δv objectives; a budget objective, where Δv is not priced, is solved whole)."""
    if problem.objective.kind not in ("min-dv", "weighted"):
        return []
    return usable_burns(problem)[1:]
