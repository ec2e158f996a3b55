"""Build a force model from a problem's :class:`~optimizer.problem.ModelSpec`."""

from __future__ import annotations

from ..constants import SECONDS_PER_DAY
from .cr3bp import CR3BP
from .earth_centred import EarthCentred
from .twobody import TwoBody

MODEL_KINDS = ("two-body", "earth-moon", "cr3bp", "ephemeris")

#: Margin added on both sides of a problem's time span when fitting the ephemeris.
FIT_MARGIN_S = 1.0 * SECONDS_PER_DAY


def build_model(spec, t_start: float, t_end: float):
    """The force model described by ``spec`` (a ModelSpec), valid over ``[t_start, t_end]``.

    For ``"ephemeris"`` the DE421 positions are fitted over the span plus a one-day margin.
    """
    from ..ephemeris import DE421, ChebyshevEphemeris, CircularMoon

    kind = spec.kind
    if kind == "two-body":
        return TwoBody()
    if kind == "cr3bp":
        return CR3BP()
    if kind == "earth-moon":
        moon = dict(spec.moon)
        if "period_days" in moon:
            moon["period_s"] = moon.pop("period_days") * SECONDS_PER_DAY
        return EarthCentred(CircularMoon(**moon), sun=False, j2=False, name="earth-moon")
    if kind == "ephemeris":
        fit = ChebyshevEphemeris.fit(DE421(), t_start - FIT_MARGIN_S, t_end + FIT_MARGIN_S)
        return EarthCentred(fit, sun=spec.sun, j2=spec.j2, name="ephemeris")
    raise ValueError(f"unknown model kind {kind!r}; expected one of {', '.join(MODEL_KINDS)}")
