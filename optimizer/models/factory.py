"""Build a force model from a problem's :class:`~optimizer.problem.ModelSpec`.

May import constants, ephemeris, circular_moon and the models' own modules.
"""

from __future__ import annotations

import math

import numpy as np

from ..constants import GM_EARTH, GM_MOON, SECONDS_PER_DAY
from .earth_centred import EarthCentred
from .twobody import TwoBody

MODEL_KINDS = ("two-body", "earth-moon", "cr3bp", "ephemeris")

#: Margin added on both sides of a problem's time span when fitting the ephemeris.
FIT_MARGIN_S = 1.0 * SECONDS_PER_DAY


def build_model(spec, t_start: float, t_end: float):
    """The force model described by ``spec`` (a ModelSpec), valid over ``[t_start, t_end]``.

    For ``"ephemeris"`` the DE421 positions are fitted over the span plus a one-day margin.
    ``"earth-moon"`` without orbit settings and ``"cr3bp"`` put the Moon on the circle through
    DE421's Moon at ``t_start``.  All models built here are Earth-centred inertial (the rotating,
    non-dimensional :class:`~optimizer.models.CR3BP` is for analysis in that frame).
    """
    from ..circular_moon import CircularMoon
    from ..ephemeris import DE421, ChebyshevEphemeris

    kind = spec.kind
    if kind == "two-body":
        return TwoBody()
    if kind == "cr3bp":
        # The CR3BP seen from Earth: Earth and Moon on circular orbits about their barycentre, so
        # the Moon circles Earth at a rate n with n^2 a^3 = GM_E + GM_M; Earth-centred with the
        # indirect term this is exactly the rotating problem of :class:`CR3BP` (a test checks it).
        a = float(np.linalg.norm(DE421().moon(t_start)))
        period = 2.0 * math.pi * math.sqrt(a**3 / (GM_EARTH + GM_MOON))
        return EarthCentred(CircularMoon.matching(DE421(), t_start, period), sun=False, j2=False, name="cr3bp")
    if kind == "earth-moon":
        moon = dict(spec.moon)
        if "period_days" in moon:
            moon["period_s"] = moon.pop("period_days") * SECONDS_PER_DAY
        if not moon:  # no orbit given: the circle through DE421's Moon at the start
            return EarthCentred(CircularMoon.matching(DE421(), t_start), sun=False, j2=False, name="earth-moon")
        return EarthCentred(CircularMoon(**moon), sun=False, j2=False, name="earth-moon")
    if kind == "ephemeris":
        fit = ChebyshevEphemeris.fit(DE421(), t_start - FIT_MARGIN_S, t_end + FIT_MARGIN_S)
        return EarthCentred(fit, sun=spec.sun, j2=spec.j2, name="ephemeris")
    raise ValueError(f"unknown model kind {kind!r}; expected one of {', '.join(MODEL_KINDS)}")
