"""The one validator of a sweep's grid: a ``[sweep]`` table (``docs/sweep-format.md``) or the
arguments of :func:`optimizer.trade.schedule.sweep`, checked at the door, every message naming
the key.

One job: turn a ``[sweep]`` table into a :class:`SweepSpec` and check a grid against its problem
(:func:`check_grid`, used by both the table and the library call).  May import: numpy, the
standard library, :mod:`optimizer.constants`, :mod:`optimizer.inputs`, :mod:`optimizer.problem`,
:mod:`optimizer.timescales`.
Never the trade engine, pandas, plotting or the file layer: reading a problem file imports this.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..constants import SECONDS_PER_DAY
from ..inputs import EPHEMERIS_SPAN, ProblemError, did_you_mean
from ..inputs import show as _short
from ..timescales import format_epoch, parse_epoch

__all__ = ["SweepSpec", "SweepSpecError", "parse_sweep_spec", "check_axis", "check_grid", "SPEC_KEYS",
           "MAX_COUNT", "DEFAULT_MAX_ITER"]

#: IPOPT iteration cap per cell: it bounds the time lost on cells that have no solution.  The
#: benchmark (``tests/benchmarks/bench_trade.py``) prints the iterations of the first attempts.
DEFAULT_MAX_ITER = 100
SPEC_KEYS = ("burn_epochs", "arrival_epochs", "return_durations_days", "arrival_tolerance_hours", "burn",
             "max_iterations", "retry_failed")
MAX_COUNT = 200


class SweepSpecError(ProblemError):
    """A ``[sweep]`` table (or sweep arguments) that cannot be used; the message names the key."""


@dataclass(frozen=True)
class SweepSpec:
    """A parsed ``[sweep]`` table (see ``docs/sweep-format.md``)."""

    burn_epochs: tuple[float, ...]
    arrival_epochs: tuple[float, ...] | None = None
    return_durations_days: tuple[float, ...] | None = None
    arrival_tolerance_s: float = 0.0
    burn_index: int = 0
    max_iter: int = DEFAULT_MAX_ITER
    retry: bool = True


def check_axis(values, key: str, *, positive: bool = False) -> tuple[float, ...]:
    """A grid axis as floats: at least one value, every value a finite number, strictly increasing
    (and above 0 with ``positive``); :class:`SweepSpecError` naming ``key`` otherwise."""
    try:
        arr = np.asarray([float(v) for v in values], dtype=float)
    except (TypeError, ValueError):
        raise SweepSpecError(f"{key}: expected a sequence of numbers, got {_short(values)}") from None
    if arr.size == 0:
        raise SweepSpecError(f"{key}: expected at least one value")
    if not np.all(np.isfinite(arr)):
        raise SweepSpecError(f"{key}: every value must be finite")
    if arr.size > 1 and not np.all(np.diff(arr) > 0):
        raise SweepSpecError(f"{key}: values must increase strictly")
    if positive and arr[0] <= 0:
        raise SweepSpecError(f"{key}: values must be positive, got {arr[0]!r}")
    return tuple(float(v) for v in arr)


def check_grid(problem, burns, arrivals=None, durations=None, tolerance_s: float = 0.0, burn_index: int = 0,
               where: str = "") -> None:
    """Check that a grid narrows ``problem`` (a sweep never widens it); ``where`` prefixes the keys
    (``"problems/x.toml: [sweep]"``)."""
    at = f"{where}." if where else ""
    if not 0 <= burn_index < len(problem.burns):
        raise SweepSpecError(f"{at}burn: the problem has {len(problem.burns)} burn(s), got index {burn_index}")
    lo, hi = problem.burns[burn_index].window
    for i, t in enumerate(burns):
        if not lo - 1e-6 <= t <= hi + 1e-6:
            raise SweepSpecError(f"{at}burn_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) lies outside the window "
                                 f"of [[burn]] {burn_index + 1}, [{format_epoch(lo, 0)}, {format_epoch(hi, 0)}] TDB; "
                                 "a sweep only narrows the problem, so widen the window first")
        if t < problem.start_epoch:
            raise SweepSpecError(f"{at}burn_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) is before the start "
                                 "epoch")
    win = problem.arrival.epoch_window
    if arrivals is not None and win is not None:
        for i, t in enumerate(arrivals):
            if not win[0] - tolerance_s <= t <= win[1] + tolerance_s:
                raise SweepSpecError(f"{at}arrival_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) lies outside "
                                     f"[return].epoch_window [{format_epoch(win[0], 0)}, "
                                     f"{format_epoch(win[1], 0)}] TDB")
    t0 = problem.start_epoch
    for i, t in enumerate(arrivals or ()):
        if not t > max(t0, burns[0]):
            raise SweepSpecError(f"{at}arrival_epochs: {format_epoch(t, 0)} TDB (value {i + 1}) is not after the "
                                 f"start and the first burn epoch ({format_epoch(max(t0, burns[0]), 0)} TDB)")
    key = "arrival_epochs" if arrivals is not None else "return_durations_days"
    if problem.model.kind == "ephemeris" or "ephemeris" in problem.model.continuation:
        last = arrivals[-1] if arrivals is not None else t0 + durations[-1] * SECONDS_PER_DAY
        if last + SECONDS_PER_DAY > EPHEMERIS_SPAN[1]:
            raise SweepSpecError(f"{at}{key}: an arrival at {format_epoch(last, 0)} TDB runs past the DE421 "
                                 f"span of the ephemeris model (ends {format_epoch(EPHEMERIS_SPAN[1], 0)} TDB; "
                                 "the path must end a day before)")
    mx = problem.arrival.max_duration_days
    if durations is not None and mx is not None and durations[-1] > mx + 1e-9:
        raise SweepSpecError(f"{at}return_durations_days: {durations[-1]} exceeds [return].max_duration_days {mx}")


def _spec_axis(spec: dict, key: str, where: str, epochs: bool):
    """A grid axis of a table: ``{start, stop, count}`` or an explicit list."""
    what = ('a list of epochs like ["2027-05-10T06:00:00 TDB", ...]' if epochs else "a list of numbers") + \
        " or a table {start = ..., stop = ..., count = ...}"
    x = spec[key]

    def value(v, k):
        if epochs:
            if not isinstance(v, str):
                raise SweepSpecError(f"{where}.{k}: expected an epoch like \"2027-05-10T06:00:00 TDB\", got {_short(v)}")
            try:
                return parse_epoch(v)
            except ValueError:
                raise SweepSpecError(f"{where}.{k}: expected an ISO-8601 TDB epoch like "
                                     f"\"2027-05-10T06:00:00 TDB\", got {_short(v)}") from None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 < v <= 100:
            raise SweepSpecError(f"{where}.{k}: expected a number of days above 0 and at most 100, got {_short(v)}")
        return float(v)

    if isinstance(x, list):
        if not 1 <= len(x) <= MAX_COUNT:
            raise SweepSpecError(f"{where}.{key}: expected 1 to {MAX_COUNT} values, got {len(x)}")
        return check_axis([value(v, f"{key}[{i}]") for i, v in enumerate(x)], f"{where}.{key}")
    if not isinstance(x, dict):
        raise SweepSpecError(f"{where}.{key}: expected {what}, got {_short(x)}")
    for k in x:
        if k not in ("start", "stop", "count"):
            raise SweepSpecError(f"{where}.{key}.{k}: unknown key{did_you_mean(k, ('start', 'stop', 'count'))}")
    for k in ("start", "stop", "count"):
        if k not in x:
            raise SweepSpecError(f"{where}.{key}.{k}: missing; expected {what}")
    n = x["count"]
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= MAX_COUNT:
        raise SweepSpecError(f"{where}.{key}.count: expected a whole number from 1 to {MAX_COUNT}, got {_short(n)}")
    a, b = value(x["start"], f"{key}.start"), value(x["stop"], f"{key}.stop")
    if n == 1 and a != b:
        raise SweepSpecError(f"{where}.{key}: with count = 1, start and stop must be equal")
    if n > 1 and not b > a:
        raise SweepSpecError(f"{where}.{key}.stop: expected later than {key}.start" if epochs else
                             f"{where}.{key}.stop: expected larger than {key}.start")
    return tuple(float(v) for v in np.linspace(a, b, n))


def parse_sweep_spec(spec: dict, problem=None, source: str = "<sweep>") -> SweepSpec:
    """Check a ``[sweep]`` table and turn it into a :class:`SweepSpec`; with ``problem``, the grid
    is checked against it too (:func:`check_grid`).

    Raises
    ------
    SweepSpecError
        Naming ``source`` and the key, e.g. ``problems/x.toml: [sweep].burn_epochs.count: expected a
        whole number from 1 to 200, got 0``.
    """
    where = f"{source}: [sweep]"
    if not isinstance(spec, dict):
        raise SweepSpecError(f"{where}: expected a table, got {_short(spec)}")
    for k in spec:
        if k not in SPEC_KEYS:
            raise SweepSpecError(f"{where}.{k}: unknown key{did_you_mean(k, SPEC_KEYS)}")
    if "burn_epochs" not in spec:
        raise SweepSpecError(f"{where}.burn_epochs: missing; expected a table {{start = ..., stop = ..., "
                             "count = ...}} or a list of epochs")
    has_e, has_d = "arrival_epochs" in spec, "return_durations_days" in spec
    if has_e == has_d:
        raise SweepSpecError(f"{where}: give exactly one of arrival_epochs and return_durations_days"
                             + (" (both given)" if has_e else ""))
    burns = _spec_axis(spec, "burn_epochs", where, True)
    arrivals = _spec_axis(spec, "arrival_epochs", where, True) if has_e else None
    durations = _spec_axis(spec, "return_durations_days", where, False) if has_d else None
    tol_h = spec.get("arrival_tolerance_hours", 0.0)
    if isinstance(tol_h, bool) or not isinstance(tol_h, (int, float)) or not 0 <= tol_h <= 1000:
        raise SweepSpecError(f"{where}.arrival_tolerance_hours: expected a number from 0 to 1,000, got {_short(tol_h)}")
    if has_d and "arrival_tolerance_hours" in spec:
        raise SweepSpecError(f"{where}.arrival_tolerance_hours: applies to arrival_epochs only")
    burn = spec.get("burn", 1)
    n_burns = len(problem.burns) if problem is not None else 10**6
    if isinstance(burn, bool) or not isinstance(burn, int) or not 1 <= burn <= n_burns:
        raise SweepSpecError(f"{where}.burn: expected a whole number from 1 to {n_burns} (which [[burn]]), "
                             f"got {_short(burn)}")
    it = spec.get("max_iterations", DEFAULT_MAX_ITER)
    if isinstance(it, bool) or not isinstance(it, int) or not 5 <= it <= 3000:
        raise SweepSpecError(f"{where}.max_iterations: expected a whole number from 5 to 3000, got {_short(it)}")
    retry = spec.get("retry_failed", True)
    if not isinstance(retry, bool):
        raise SweepSpecError(f"{where}.retry_failed: expected true or false, got {_short(retry)}")
    out = SweepSpec(burns, arrivals, durations, float(tol_h) * 3600.0, burn - 1, it, retry)
    if problem is not None:  # the grid must narrow the problem: checked here to name the keys
        check_grid(problem, burns, arrivals, durations, out.arrival_tolerance_s, burn - 1, where)
    return out


def grid_of(problem, burn_epochs, arrival_epochs=None, return_durations_days=None, arrival_tolerance_s=0.0,
            burn_index: int = 0):
    """The checked grid of a library call: ``(rows, cols, axis key)``; :class:`SweepSpecError`
    naming the argument for anything :func:`parse_sweep_spec` would refuse in a table."""
    if (arrival_epochs is None) == (return_durations_days is None):
        raise SweepSpecError("give exactly one of arrival_epochs and return_durations_days")
    if not (isinstance(arrival_tolerance_s, (int, float)) and math.isfinite(arrival_tolerance_s)
            and arrival_tolerance_s >= 0):
        raise SweepSpecError(f"arrival_tolerance: expected a number of at least 0, got {_short(arrival_tolerance_s)}")
    rows = check_axis(burn_epochs, "burn_epochs")
    if arrival_epochs is not None:
        axis_key, cols = "arrival_epochs", check_axis(arrival_epochs, "arrival_epochs")
        check_grid(problem, rows, cols, None, arrival_tolerance_s, burn_index)
    else:
        axis_key, cols = "return_durations_days", check_axis(return_durations_days, "return_durations_days",
                                                             positive=True)
        check_grid(problem, rows, None, cols, 0.0, burn_index)
    return rows, cols, axis_key
