"""Epochs: TDB seconds past J2000, with ISO-8601 strings in and out.

An epoch is a float, the number of TDB seconds since J2000.0 = 2000-01-01T12:00:00 TDB
(JD 2451545.0 TDB).  TDB has no leap seconds, so every day has 86400 s and calendar arithmetic is
exact on the proleptic Gregorian calendar.  A float epoch resolves about 0.24 us within 50 years
of J2000 (one unit in the last place of 1.6e9 s); the conversions below add no error beyond the
final rounding to float.

One job: epochs.  May import: numpy, the standard library and :mod:`optimizer.constants` only.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from fractions import Fraction

import numpy as np

from optimizer.constants import JD_J2000, SECONDS_PER_DAY

_DAY = int(SECONDS_PER_DAY)  # whole seconds: the tick arithmetic below is exact in integers
_J2000_ORDINAL = _dt.date(2000, 1, 1).toordinal()  # the calendar day whose noon is J2000
_EPOCH_RE = re.compile(
    r"(\d{4})-(\d{2})-(\d{2})[T ](\d{2}):(\d{2}):(\d{2})(?:\.(\d+))?(?:\s*TDB)?",
    re.ASCII,
)
_EXPECTED = "expected an ISO-8601 TDB epoch like 2027-03-14T06:30:00 TDB"


def parse_epoch(text: str) -> float:
    """Parse an ISO-8601 calendar date-time in TDB.

    Parameters
    ----------
    text : str
        ``YYYY-MM-DDThh:mm:ss[.fff...]`` with ``T`` or one space between date and time, any number
        of fractional-second digits, and an optional ``TDB`` suffix (with or without a space).
        Surrounding white space is ignored.  Any other time-scale suffix or UTC offset (``Z``,
        ``UTC``, ``TT``, ``+00:00`` ...) is rejected: this function never converts time scales.

    Returns
    -------
    float
        TDB seconds past J2000, the float nearest to the exact value.

    Raises
    ------
    ValueError
        If the text is not of that form or names an impossible date or time (including a leap
        second, which TDB does not have).
    """
    match = _EPOCH_RE.fullmatch(text.strip()) if isinstance(text, str) else None
    if match is None:
        raise ValueError(f"{_EXPECTED}, got {text!r}")
    year, month, day, hour, minute, second = (int(g) for g in match.groups()[:6])
    try:
        ordinal = _dt.date(year, month, day).toordinal()
        _dt.time(hour, minute, second)
    except ValueError as err:
        raise ValueError(f"{_EXPECTED}, got {text!r} ({err})") from None
    fraction = Fraction(int(match[7]), 10 ** len(match[7])) if match[7] else 0
    whole = (ordinal - _J2000_ORDINAL) * _DAY + (hour - 12) * 3600 + minute * 60 + second
    return float(whole + fraction)


def format_epoch(t: float, digits: int = 3) -> str:
    """Write an epoch as an ISO-8601 calendar date-time, without a time-scale suffix.

    Parameters
    ----------
    t : float
        TDB seconds past J2000.
    digits : int, optional
        Number of fractional-second digits, default 3 (milliseconds); 0 gives whole seconds.

    Returns
    -------
    str
        For example ``"2027-03-14T06:30:00.000"``.  The exact value of ``t`` is rounded half to
        even at the last digit, carrying into minutes, hours and days (59.9996 s with
        ``digits=3`` becomes ``00.000`` of the next minute).  Callers add ``" TDB"`` where the
        time scale must be shown.

    Raises
    ------
    ValueError
        If ``t`` is not finite, ``digits`` is negative, or the date falls outside years 1-9999.
    """
    if not math.isfinite(t):
        raise ValueError(f"expected a finite epoch in TDB seconds past J2000, got {t!r}")
    if digits < 0:
        raise ValueError(f"expected digits >= 0, got {digits!r}")
    scale = 10**digits
    ticks = round(Fraction(t) * scale) + 12 * 3600 * scale  # since 2000-01-01T00:00:00
    days, ticks = divmod(ticks, _DAY * scale)
    seconds, frac = divmod(ticks, scale)
    try:
        date = _dt.date.fromordinal(_J2000_ORDINAL + days)
    except (ValueError, OverflowError):
        raise ValueError(f"epoch {t!r} s past J2000 is outside years 1-9999") from None
    hh, rest = divmod(seconds, 3600)
    mm, ss = divmod(rest, 60)
    text = f"{date.isoformat()}T{hh:02d}:{mm:02d}:{ss:02d}"
    return f"{text}.{frac:0{digits}d}" if digits else text


def jd_tdb(t):
    """Julian date in TDB of an epoch.

    Parameters
    ----------
    t : float or array_like
        TDB seconds past J2000, any shape.

    Returns
    -------
    float or numpy.ndarray
        JD (TDB), same shape as ``t``.  A single float Julian date near 2.46e6 d resolves only
        about 40 us; keep epochs in seconds past J2000 for anything finer.
    """
    return JD_J2000 + np.asarray(t, dtype=float) / SECONDS_PER_DAY


def epoch_from_jd_tdb(jd):
    """Epoch of a Julian date in TDB.

    Parameters
    ----------
    jd : float or array_like
        JD (TDB), any shape.

    Returns
    -------
    float or numpy.ndarray
        TDB seconds past J2000, same shape as ``jd``.  The subtraction of JD 2451545.0 is exact
        for dates within a few thousand years, so the only error is the resolution of ``jd``.
    """
    return (np.asarray(jd, dtype=float) - JD_J2000) * SECONDS_PER_DAY
