"""Problem files: our TOML schema, read and checked at the door (the public door for writing too).

``load_problem`` reads a file, ``problem_from_dict`` builds a :class:`~optimizer.problem.Problem`
from the parsed tables; the writing half (``problem_to_dict``, which gives the same table form
back so that ``problem_from_dict(problem_to_dict(p)) == p``, ``dumps_toml`` and
``describe_problem``) lives in :mod:`optimizer.problem_writer` and is re-exported here.  Every key,
unit and default is documented in ``docs/problem-format.md``.

Every mistake raises :class:`ProblemError` whose message names the file, the key and what was
expected, e.g. ``problems/x.toml: [return].flight_path_deg: expected two numbers between -90
and 0, got [-7, 5]``.  Unknown keys and sections are rejected (with a suggestion), so a typo can
never silently fall back to a default.

One job: reading and checking problem files.  May import: the standard library,
:mod:`optimizer.constants`, :mod:`optimizer.timescales`, :mod:`optimizer.frames`,
:mod:`optimizer.inputs`, :mod:`optimizer.problem`, :mod:`optimizer.problem_writer`, the model kinds
of :mod:`optimizer.models.factory` and, when a file carries those tables, the ``[sweep]`` validator
:mod:`optimizer.trade.spec` and the error-model reader :mod:`optimizer.dispersion.errors`; never the
trade engine, export or plotting.  (A ``[dispersion]`` table loads the dispersion package, whose
``__init__`` imports its runner and with it pandas.)
"""

from __future__ import annotations

import math
import re
from dataclasses import replace

from .constants import ENTRY_INTERFACE_ALT, GM_EARTH, R_EARTH, SECONDS_PER_DAY
from .frames import kepler_to_cartesian
from .inputs import EPHEMERIS_SPAN, MAX_DEPTH, ProblemError, did_you_mean, read_toml
from .inputs import show as _show
from .models.factory import MODEL_KINDS
from .problem import (BurnSpec, LunarPass, Mesh, ModelSpec, Objective, ParkingStart, Problem,
                      Propulsion, ReturnSpec, StateStart, Tolerances)
from .problem_writer import describe_problem, dumps_toml, problem_to_dict  # the writing half, re-exported
from .timescales import format_epoch, parse_epoch

__all__ = ["ProblemError", "load_problem", "load_sweep_file", "problem_from_dict", "problem_to_dict", "dumps_toml",
           "describe_problem", "MODEL_DESCRIPTIONS"]

#: One line per model kind, for ``slingback models`` and the docs.
MODEL_DESCRIPTIONS = {
    "two-body": "Earth as a point mass only (no Moon: for tests and first guesses).",
    "earth-moon": "Earth plus a Moon on a circular orbit set in [model.moon], Earth-centred.",
    "cr3bp": "CR3BP dynamics (Earth and Moon on circular orbits about their barycentre, the Moon on the circle through DE421's Moon at the start) in Earth-centred inertial coordinates.",
    "ephemeris": "Earth, Moon (and Sun, optional Earth J2) at JPL DE421 positions, Earth-centred.",
}

SECTIONS = ("case", "spacecraft", "model", "start", "burn", "lunar", "return", "objective", "tolerances",
            "mesh", "limits", "sweep", "dispersion")
#: Sections read by another layer: a ``[sweep]`` table is checked by :mod:`optimizer.trade.spec`, a
#: ``[dispersion]`` table (the error model) by :mod:`optimizer.dispersion.errors`.
OTHER_LAYERS = ("sweep", "dispersion")
#: The keys each table may hold (checked first, so a typo is reported as a typo).
KEYS = {
    "": SECTIONS,
    "case": ("name", "summary", "spacecraft"),
    "spacecraft": ("mass_kg", "thrust_n", "isp_s"),
    "model": ("kind", "sun", "j2", "continuation", "moon"),
    "model.moon": ("radius_km", "period_days", "inclination_deg", "raan_deg", "phase_deg", "epoch"),
    "start": ("kind", "epoch", "position_km", "velocity_kms", "elements", "altitude_km",
              "inclination_deg", "epoch_window", "raan_window_deg"),
    "start.elements": ("a_km", "e", "inc_deg", "raan_deg", "argp_deg", "nu_deg"),
    "burn": ("window", "max_dv_mps", "direction", "leg"),
    "lunar": ("perilune_altitude_km",),
    "return": ("target", "entry_altitude_km", "flight_path_deg", "perigee_altitude_km", "epoch_window",
               "inclination_deg", "max_duration_days", "flight_path_margin_deg"),
    "objective": ("kind", "dv_budget_mps", "mps_per_day"),
    "tolerances": ("entry_position_km", "flight_path_deg", "perilune_altitude_km", "perigee_altitude_km"),
    "mesh": ("segments", "steps", "max_refinements"),
    "limits": ("min_burn_spacing_hours", "min_altitude_km"),
}
#: Upper limits of the verification tolerances (``[tolerances]``): a looser tolerance would make
#: "verified" meaningless.  Documented in docs/problem-format.md.
TOLERANCE_LIMITS = {"entry_position_km": 100.0, "flight_path_deg": 0.5, "perilune_altitude_km": 100.0,
                    "perigee_altitude_km": 100.0}
_CONTROL_RE = re.compile(r"[\x00-\x1f\x7f]")
_NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
_REQUIRED = object()


# ------------------------------------------------------------------------------------------------
# Reading
# ------------------------------------------------------------------------------------------------
def load_problem(path) -> Problem:
    """Read and validate a problem file.

    Parameters
    ----------
    path : str or path-like
        A TOML file in the format of ``docs/problem-format.md``.

    Returns
    -------
    Problem

    Raises
    ------
    ProblemError
        If the file cannot be read, is not valid TOML (the message gives the line), or breaks the
        schema.
    """
    source = str(path)
    data = read_toml(path)
    problem = problem_from_dict(data, source=source)
    if "sweep" in data:  # checked at the door too, though only a trade study uses it
        from .trade.spec import parse_sweep_spec  # the validator alone: no trade engine, pandas or plots

        parse_sweep_spec(data["sweep"], problem, source)
    if "dispersion" in data:  # the error model, checked at the door too
        from .dispersion.errors import error_model_from_table

        error_model_from_table(data["dispersion"], source)
    return problem


def load_sweep_file(path):
    """Read a problem file that carries a ``[sweep]`` table: ``(problem, SweepSpec)``, the problem
    being the file without that table.

    Raises
    ------
    ProblemError
        (:class:`optimizer.trade.spec.SweepSpecError` for the ``[sweep]`` table) naming the file
        and key, for every mistake in the file, and when the table is missing.
    """
    from .trade.spec import SweepSpecError, parse_sweep_spec

    source = str(path)
    data = read_toml(path)
    spec = data.pop("sweep", None)
    if spec is None:
        raise SweepSpecError(f"{source}: [sweep]: missing; a trade study needs a [sweep] table "
                             "(see docs/sweep-format.md)")
    problem = problem_from_dict(data, source=source)
    return problem, parse_sweep_spec(spec, problem, source)


def problem_from_dict(d: dict, source: str = "<dict>") -> Problem:
    """Build a :class:`Problem` from the table form of a problem file.

    Parameters
    ----------
    d : dict
        Parsed TOML (or the output of :func:`problem_to_dict`).
    source : str
        Name used at the start of error messages (the file path).

    Raises
    ------
    ProblemError
    """
    if not isinstance(d, dict):
        raise ProblemError(f"{source}: expected a table of sections, got {_show(d)}")
    _check_depth(d, source)
    d = {k: v for k, v in d.items() if k not in OTHER_LAYERS}
    top = _Table(source, "", "", d)
    case = _Table.sub(top, "case", required=True)
    name = case.string("name", pattern=_NAME_RE,
                       what="a name of letters, digits, '.', '_' or '-' (at most 64 characters)")
    summary = case.string("summary", "")
    spacecraft = case.string("spacecraft", "", pattern=re.compile(r"[ -~]{0,64}"),
                             what="printable ASCII text of at most 64 characters")
    case.done()
    propulsion = _propulsion(_Table.sub(top, "spacecraft")) if "spacecraft" in d else None

    model = _model(_Table.sub(top, "model"))
    start = _start(_Table.sub(top, "start", required=True))
    burns = _burns(top, start)
    lunar = _Table.sub(top, "lunar")
    lunar_pass = LunarPass(lunar.pair("perilune_altitude_km", LunarPass().altitude_km, lo=0.0, hi=1e6))
    lunar.done()
    arrival = _arrival(_Table.sub(top, "return"), start, burns)
    objective = _objective(_Table.sub(top, "objective"))
    tol = _Table.sub(top, "tolerances")
    defaults = Tolerances()
    tolerances = Tolerances(**{k: tol.number(k, getattr(defaults, k), lo=0.0, lo_open=True, hi=hi)
                               for k, hi in TOLERANCE_LIMITS.items()})
    tol.done()
    mesh_t = _Table.sub(top, "mesh")
    mesh = Mesh(segments=mesh_t.integer("segments", Mesh().segments, 1, 10000),
                steps=mesh_t.integer("steps", Mesh().steps, 1, 1000),
                max_refinements=mesh_t.integer("max_refinements", Mesh().max_refinements, 0, 20))
    mesh_t.done()
    limits = _Table.sub(top, "limits")
    spacing_h = limits.number("min_burn_spacing_hours", 0.0, lo=0.0, hi=1000.0)
    min_alt = limits.number("min_altitude_km", Problem.__dataclass_fields__["min_altitude_km"].default,
                            lo=0.0, hi=1e5)
    for i in range(1, len(burns)):
        reach_h = (burns[i].window[1] - burns[i - 1].window[0]) / 3600.0
        if spacing_h > reach_h:
            raise limits.error("min_burn_spacing_hours", f"at most {reach_h:g} h (burn #{i} and burn #{i + 1} "
                                                         "cannot be that far apart inside their windows)",
                               spacing_h)
    if min_alt > lunar_pass.altitude_km[1]:
        raise limits.error("min_altitude_km", "at most the top of [lunar].perilune_altitude_km "
                                              f"({lunar_pass.altitude_km[1]:g} km): no perilune could meet both",
                           min_alt)
    limits.done()
    problem = Problem(name=name, start=start, burns=burns, lunar=lunar_pass, arrival=arrival,
                      objective=objective, model=model, min_burn_spacing_s=spacing_h * 3600.0,
                      min_altitude_km=min_alt, tolerances=tolerances, mesh=mesh,
                      summary=summary, spacecraft=spacecraft, propulsion=propulsion)
    kinds = (model.kind, *model.continuation)
    if "two-body" in kinds:
        key = "[model].kind" if model.kind == "two-body" else "[model].continuation"
        raise ProblemError(f"{source}: {key}: the two-body model has no Moon, so no free return can be "
                           "designed in it; use earth-moon, cr3bp or ephemeris")
    if "ephemeris" in kinds:
        _check_ephemeris_span(problem, source)
    elif "cr3bp" in kinds or ("earth-moon" in kinds and not model.moon):
        _check_ephemeris_span(problem, source, start_only=True)
    return problem


def _check_ephemeris_span(problem: Problem, source: str, start_only: bool = False):
    """The DE421 ephemeris covers 1900-2050 (with margin for the fit and the injection seed).
    ``start_only``: the model reads DE421 at the start epoch alone (a circular Moon through it)."""
    lo, hi = EPHEMERIS_SPAN
    key = "[start].epoch" if isinstance(problem.start, StateStart) else "[start].epoch_window"
    if not lo <= problem.start_epoch - 4 * SECONDS_PER_DAY <= problem.start_epoch + 4 * SECONDS_PER_DAY <= hi:
        raise ProblemError(f"{source}: {key}: expected an epoch between {format_epoch(lo + 4 * SECONDS_PER_DAY, 0)} and "
                           f"{format_epoch(hi - 4 * SECONDS_PER_DAY, 0)} TDB (the model places the Moon from DE421, "
                           "which covers 1900-2050)")
    if start_only:
        return
    if problem.latest_epoch() + SECONDS_PER_DAY > hi:
        raise ProblemError(f"{source}: {_latest_key(problem)}: the problem runs to "
                           f"{format_epoch(problem.latest_epoch(), 0)} TDB, past the DE421 span of the ephemeris "
                           f"model (ends {format_epoch(hi, 0)} TDB; the path must end a day before)")


def _latest_key(problem: Problem) -> str:
    """The key that sets :meth:`Problem.latest_epoch` (the one to change when it runs too late)."""
    a, t0 = problem.arrival, problem.start_epoch
    ends = [(b.window[1], f"[[burn]] #{i}.window") for i, b in enumerate(problem.burns, 1)]
    if a.epoch_window is not None:
        ends.append((a.epoch_window[1], "[return].epoch_window"))
    if a.max_duration_days is not None:
        ends.append((t0 + a.max_duration_days * SECONDS_PER_DAY, "[return].max_duration_days"))
    if a.epoch_window is None and a.max_duration_days is None:
        ends.append((t0 + 12 * SECONDS_PER_DAY, "[return].max_duration_days (default 12 days)"))
    return max(ends, key=lambda e: e[0])[1]


def _check_depth(d, source: str) -> None:
    """Refuse nesting deeper than :data:`MAX_DEPTH` (without recursion, so any depth is safe)."""
    stack = [(d, 1)]
    while stack:
        x, depth = stack.pop()
        if depth > MAX_DEPTH:
            raise ProblemError(f"{source}: arrays or tables nested more than {MAX_DEPTH} deep; a problem file "
                               "needs at most 3 levels")
        if isinstance(x, dict):
            stack.extend((v, depth + 1) for v in x.values())
        elif isinstance(x, list):
            stack.extend((v, depth + 1) for v in x)


def _propulsion(t: "_Table") -> Propulsion:
    """The [spacecraft] table: all three keys, each positive (a partial table is refused)."""
    spec = Propulsion(mass_kg=t.number("mass_kg", lo=0.0, hi=1e7, lo_open=True),
                      thrust_n=t.number("thrust_n", lo=0.0, hi=1e8, lo_open=True),
                      isp_s=t.number("isp_s", lo=0.0, hi=1e5, lo_open=True))
    t.done()
    return spec


def _model(t: "_Table") -> ModelSpec:
    default = ModelSpec()
    kind = t.choice("kind", MODEL_KINDS, default.kind)
    sun = t.boolean("sun", default.sun)
    j2 = t.boolean("j2", default.j2)
    chain = t.get("continuation", [])
    if not (isinstance(chain, list) and all(c in MODEL_KINDS and c != kind for c in chain)
            and len(set(chain)) == len(chain)):
        raise t.error("continuation", f"a list of distinct model kinds other than {kind!r} "
                                      f"(from {', '.join(MODEL_KINDS)})", chain)
    moon = {}
    if "moon" in t.data and kind != "earth-moon":
        raise ProblemError(f"{t.where('moon')}: only the earth-moon model reads a [model.moon] table; "
                           f"kind = {kind!r} places the Moon from DE421 and would ignore it")
    if "moon" in t.data:
        m = _Table.sub(t, "moon")
        for key, lo, hi, lo_open in (("radius_km", 0.0, 1e7, True), ("period_days", 0.0, 1e4, True),
                                     ("inclination_deg", 0.0, 180.0, False),
                                     ("raan_deg", -360.0, 360.0, False), ("phase_deg", -360.0, 360.0, False)):
            value = m.number(key, None, lo=lo, hi=hi, lo_open=lo_open)
            if value is not None:
                moon[key] = value
        if "epoch" in m.data:
            moon["epoch"] = m.epoch("epoch")
        m.done()
    t.done()
    return ModelSpec(kind=kind, sun=sun, j2=j2, moon=moon, continuation=tuple(chain))


def _start(t: "_Table") -> StateStart | ParkingStart:
    kind = t.choice("kind", ("state", "parking"))
    if kind == "parking":
        start = ParkingStart(altitude_km=t.number("altitude_km", lo=0.0, hi=1e5, lo_open=True),
                             inclination_deg=t.number("inclination_deg", lo=0.0, hi=180.0),
                             epoch_window=t.epoch_pair("epoch_window"),
                             raan_window_deg=t.pair("raan_window_deg", None, lo=-360.0, hi=360.0))
        t.done(' with kind = "parking"')
        return start
    epoch = t.epoch("epoch")
    if "elements" in t.data:
        if "position_km" in t.data or "velocity_kms" in t.data:
            raise ProblemError(f"{t.where('elements')}: give either [start.elements] or position_km and "
                               "velocity_kms, not both")
        el = _Table.sub(t, "elements")
        a, e = el.number("a_km"), el.number("e", lo=0.0, hi=100.0)
        if not ((a > 0 and e < 1) or (a < 0 and e > 1)):
            raise el.error("a_km", "a > 0 with e < 1 (ellipse) or a < 0 with e > 1 (hyperbola)",
                           f"a_km = {a}, e = {e}")
        angles = [math.radians(el.number(k, lo=lo, hi=hi)) for k, lo, hi in (
            ("inc_deg", 0.0, 180.0), ("raan_deg", -360.0, 360.0), ("argp_deg", -360.0, 360.0),
            ("nu_deg", -360.0, 360.0))]
        el.done()
        try:
            r, v = kepler_to_cartesian(a, e, *angles, GM_EARTH)
        except ValueError:
            raise el.error("nu_deg", "a true anomaly between the asymptotes of the hyperbola",
                           math.degrees(angles[3])) from None
        state = tuple(float(x) for x in (*r, *v))
    else:
        r = t.vector("position_km")
        v = t.vector("velocity_kms")
        state = r + v
    pos_key, vel_key = ("elements", "elements") if "elements" in t.data else ("position_km", "velocity_kms")
    if not R_EARTH < math.dist(state[:3], (0, 0, 0)) < 2e6:
        raise t.error(pos_key, f"a geocentric position between {R_EARTH} km (Earth's radius) "
                                     "and 2,000,000 km", list(state[:3]))
    if not math.dist(state[3:], (0, 0, 0)) < 50.0:
        raise t.error(vel_key, "a speed below 50 km/s", list(state[3:]))
    t.done(' with kind = "state"' + (" and [start.elements]" if "elements" in t.data else ""))
    return StateStart(epoch=epoch, state=state)


def _burns(top: "_Table", start) -> tuple[BurnSpec, ...]:
    raw = top.get("burn", _REQUIRED, "one or more [[burn]] tables (window, max_dv_mps)")
    if not (isinstance(raw, list) and raw and all(isinstance(b, dict) for b in raw)):
        raise top.error("burn", "one or more [[burn]] tables", raw)
    t0 = start.epoch if isinstance(start, StateStart) else start.epoch_window[0]
    burns, prev, seen_return = [], None, False
    for i, b in enumerate(raw, 1):
        t = _Table(top.source, f"[[burn]] #{i}", "burn", b)
        window = t.epoch_pair("window")
        spec = BurnSpec(window=window, max_dv_mps=t.number("max_dv_mps", lo=0.0, hi=1e4, lo_open=True),
                        direction=t.choice("direction", ("free", "along", "against"), "free"),
                        leg=t.choice("leg", ("outbound", "return"), "outbound"))
        t.done()
        if window[0] < t0:
            raise t.error("window", f"a window that opens no earlier than the start "
                                    f"({format_epoch(t0, 0)} TDB)", _epochs(window))
        if prev is not None and (window[0] < prev.window[0] or window[1] < prev.window[1]):
            raise t.error("window", f"burns listed in time order (this window is earlier than "
                                    f"burn #{i - 1}'s)", _epochs(window))
        if seen_return and spec.leg == "outbound":
            raise t.error("leg", "'return' (an outbound burn cannot follow a return burn)", spec.leg)
        seen_return |= spec.leg == "return"
        burns.append(spec)
        prev = spec
    return tuple(burns)


def _arrival(t: "_Table", start, burns) -> ReturnSpec:
    d = ReturnSpec()
    target = t.choice("target", ("entry", "perigee"), d.target)
    alt = t.number("entry_altitude_km", ENTRY_INTERFACE_ALT, lo=0.0, hi=1000.0, lo_open=True)
    window = t.epoch_pair("epoch_window", None, strict=True)
    t0 = start.epoch if isinstance(start, StateStart) else start.epoch_window[0]
    if window is not None and window[0] < t0:
        raise t.error("epoch_window", "an arrival window that opens after the start", _epochs(window))
    if window is not None and window[1] <= burns[0].window[0]:
        raise t.error("epoch_window", "an arrival window that closes after the first burn window "
                                      "opens", _epochs(window))
    spec = ReturnSpec(
        target=target, entry_radius_km=R_EARTH + alt,
        flight_path_deg=t.pair("flight_path_deg", d.flight_path_deg, lo=-90.0, hi=0.0),
        perigee_alt_km=t.pair("perigee_altitude_km", d.perigee_alt_km, lo=0.0, hi=1e6),
        epoch_window=window,
        inclination_deg=t.pair("inclination_deg", None, lo=0.0, hi=180.0),
        max_duration_days=t.number("max_duration_days", None, lo=0.0, hi=100.0, lo_open=True))
    spec = _flight_path_margin(t, spec)
    if spec.max_duration_days is not None:
        t_last = t0 + spec.max_duration_days * SECONDS_PER_DAY
        if window is not None and t_last <= window[0]:
            raise t.error("max_duration_days", "a duration that reaches past the opening of [return].epoch_window "
                                               f"({format_epoch(window[0], 0)} TDB)", spec.max_duration_days)
        late = next((i for i, b in enumerate(burns, 1) if b.window[0] >= t_last), None)
        if late is not None:
            raise t.error("max_duration_days", f"a duration that reaches past the opening of [[burn]] #{late}'s "
                                               f"window ({format_epoch(burns[late - 1].window[0], 0)} TDB)",
                          spec.max_duration_days)
    t.done()
    return spec


def _flight_path_margin(t: "_Table", spec: ReturnSpec) -> ReturnSpec:
    """``[return].flight_path_margin_deg``: tightens the corridor on both sides for the solve."""
    lo, hi = spec.flight_path_deg
    margin = t.number("flight_path_margin_deg", 0.0, lo=0.0, hi=90.0)
    if 2.0 * margin >= hi - lo:
        raise t.error("flight_path_margin_deg", f"a margin below half the corridor width ({(hi - lo) / 2:g} deg)",
                      margin)
    return replace(spec, flight_path_margin_deg=margin)


def _objective(t: "_Table") -> Objective:
    kind = t.choice("kind", ("min-dv", "earliest", "weighted"), Objective().kind)
    budget = t.number("dv_budget_mps", None, lo=0.0, hi=1e5, lo_open=True)
    rate = t.number("mps_per_day", 0.0, lo=0.0, hi=1e5)
    if kind == "earliest" and budget is None:
        raise t.error("dv_budget_mps", "a Δv budget in m/s (kind = \"earliest\" needs one)")
    if kind == "weighted" and "mps_per_day" not in t.data:
        raise t.error("mps_per_day", "a weight in m/s per day (kind = \"weighted\" needs one)")
    t.done()
    return Objective(kind=kind, dv_budget_mps=budget, mps_per_day=rate)


def _epochs(pair):
    return [format_epoch(x, 0) + " TDB" for x in pair]


class _Table:
    """One TOML table being read: typed getters that remember which keys were used."""

    def __init__(self, source: str, label: str, name: str, data: dict):
        self.source, self.label, self.name, self.data, self.used = source, label, name, data, set()
        for key in data:
            if key not in KEYS[name]:
                raise self.error_unknown(key, KEYS[name], section=not name)

    @classmethod
    def sub(cls, parent: "_Table", key: str, required: bool = False) -> "_Table":
        value = parent.get(key, _REQUIRED if required else {}, "a table")
        label = f"{parent.label[:-1]}.{key}]" if parent.label else f"[{key}]"
        if not isinstance(value, dict):
            raise parent.error(key, "a table", value)
        return cls(parent.source, label, f"{parent.name}.{key}" if parent.name else key, value)

    # -- errors ------------------------------------------------------------------------------
    def where(self, key: str) -> str:
        key = _short_key(key)
        if not self.label:
            return f"{self.source}: [{key}]"
        return f"{self.source}: {self.label}.{key}"

    def error(self, key: str, expected: str, got=_REQUIRED) -> ProblemError:
        if got is _REQUIRED:
            return ProblemError(f"{self.where(key)}: missing; expected {expected}")
        return ProblemError(f"{self.where(key)}: expected {expected}, got {_show(got)}")

    def error_unknown(self, key, known, section=False) -> ProblemError:
        hint = did_you_mean(key, known)
        kind = "unknown section" if section else "unknown key"
        return ProblemError(f"{self.where(key)}: {kind}{hint}")

    # -- getters -----------------------------------------------------------------------------
    def get(self, key, default=_REQUIRED, expected="a value"):
        self.used.add(key)
        if key in self.data:
            return self.data[key]
        if default is _REQUIRED:
            raise self.error(key, expected)
        return default

    def done(self, context: str = ""):
        """Reject valid keys that this variant of the table does not use."""
        for key in self.data:
            if key not in self.used:
                raise ProblemError(f"{self.where(key)}: not used here{context}; expected only "
                                   f"{', '.join(sorted(self.used))}")

    def number(self, key, default=_REQUIRED, lo=-math.inf, hi=math.inf, lo_open=False):
        what = _range_text("a number", lo, hi, lo_open)
        x = self.get(key, default, what)
        if x is default and key not in self.data:
            return x
        if not _is_number(x) or not (lo < x if lo_open else lo <= x) or not x <= hi:
            raise self.error(key, what, x)
        return float(x)

    def integer(self, key, default, lo, hi):
        what = f"a whole number from {lo} to {hi}"
        x = self.get(key, default, what)
        if isinstance(x, bool) or not isinstance(x, int) or not lo <= x <= hi:
            raise self.error(key, what, x)
        return x

    def boolean(self, key, default):
        x = self.get(key, default, "true or false")
        if not isinstance(x, bool):
            raise self.error(key, "true or false", x)
        return x

    def string(self, key, default=_REQUIRED, pattern=None, what="a string"):
        x = self.get(key, default, what)
        if not isinstance(x, str) or (pattern is not None and not pattern.fullmatch(x)):
            raise self.error(key, what, x)
        if _CONTROL_RE.search(x):
            raise self.error(key, f"{what} without control characters (tab, carriage return, escape ...)", x)
        if len(x) > 2000:
            raise self.error(key, f"{what} of at most 2,000 characters", x)
        return x

    def choice(self, key, options, default=_REQUIRED):
        what = "one of " + ", ".join(f'"{o}"' for o in options)
        x = self.get(key, default, what)
        if x not in options or not isinstance(x, str):
            raise self.error(key, what, x)
        return x

    def vector(self, key):
        x = self.get(key, _REQUIRED, "three numbers")
        if not (isinstance(x, list) and len(x) == 3 and all(_is_number(v) for v in x)):
            raise self.error(key, "three numbers", x)
        return tuple(float(v) for v in x)

    def pair(self, key, default, lo=-math.inf, hi=math.inf):
        what = _range_text("two numbers", lo, hi) + ", the first smaller"
        x = self.get(key, default, what)
        if x is default and key not in self.data:
            return x
        if not (isinstance(x, list) and len(x) == 2 and all(_is_number(v) and lo <= v <= hi for v in x)
                and x[0] < x[1]):
            raise self.error(key, what, x)
        return float(x[0]), float(x[1])

    def epoch(self, key):
        x = self.get(key, _REQUIRED, "an epoch like \"2027-05-10T00:00:00 TDB\"")
        try:
            return parse_epoch(x)
        except ValueError:
            raise self.error(key, "an ISO-8601 epoch in TDB like \"2027-05-10T00:00:00 TDB\"", x) from None

    def epoch_pair(self, key, default=_REQUIRED, strict=False):
        order = "the first earlier" if strict else "the first no later"
        what = f"two epochs like [\"2027-05-10T00:00:00 TDB\", \"2027-05-11T00:00:00 TDB\"], {order}"
        x = self.get(key, default, what)
        if x is default and key not in self.data:
            return x
        try:
            if not (isinstance(x, list) and len(x) == 2):
                raise ValueError
            lo, hi = parse_epoch(x[0]), parse_epoch(x[1])
        except ValueError:
            raise self.error(key, what, x) from None
        if lo > hi or (strict and lo == hi):
            raise self.error(key, what, x)
        return lo, hi


def _is_number(x) -> bool:
    """A finite int or float (an integer too large for a float is not a number here)."""
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return False
    try:
        return math.isfinite(float(x))
    except OverflowError:
        return False


def _short_key(key) -> str:
    text = str(key)
    return text if len(text) <= 60 else text[:57] + "..."


def _range_text(what, lo, hi, lo_open=False):
    """``"a number from 0 to 180"``, ``"two numbers between -90 and 0"``, ``"a number above 0"`` ..."""
    if lo == -math.inf and hi == math.inf:
        return what + " (finite)"
    if hi == math.inf:
        return f"{what} {'above' if lo_open else 'of at least'} {_num(lo)}"
    if lo == -math.inf:
        return f"{what} of at most {_num(hi)}"
    if what != "a number":
        return f"{what} between {_num(lo)} and {_num(hi)}"
    return (f"a number above {_num(lo)} and at most {_num(hi)}" if lo_open
            else f"a number from {_num(lo)} to {_num(hi)}")


def _num(x: float) -> str:
    return f"{x:,.0f}" if x == int(x) and abs(x) >= 1e4 else f"{x:g}"
