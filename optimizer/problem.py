"""The design problem as plain dataclasses (what the TOML loader builds and ``solve`` takes).

Units: epochs in TDB seconds past J2000, km, km/s; Δv in m/s; angles in degrees (these are the
values an analyst types, so the dataclasses keep them as written and the transcription converts).

One job: the problem's data.  May import: numpy, the standard library and :mod:`optimizer.constants`
only (no reader, no model, no solver).
"""

from __future__ import annotations

from dataclasses import dataclass, field, asdict

import numpy as np

from .constants import ENTRY_INTERFACE_ALT, R_EARTH, SECONDS_PER_DAY


@dataclass(frozen=True)
class ModelSpec:
    """Which force model, and its settings.

    Attributes
    ----------
    kind : str
        ``"two-body"``, ``"earth-moon"`` (circular Moon), ``"cr3bp"`` or ``"ephemeris"``.
    sun : bool
        Ephemeris model: include the Sun.
    j2 : bool
        Ephemeris model: include Earth's J2.
    moon : dict
        Circular Moon settings (``radius_km``, ``period_days``, ``inclination_deg``, ``raan_deg``,
        ``phase_deg``, ``epoch``): keyword arguments of ``CircularMoon``.
    continuation : tuple of str
        Cheaper models to solve first, in order, each warm-starting the next.
    """

    kind: str = "ephemeris"
    sun: bool = True
    j2: bool = False
    moon: dict = field(default_factory=dict)
    continuation: tuple[str, ...] = ()


@dataclass(frozen=True)
class StateStart:
    """A known spacecraft state on the coast: Earth-centred ICRF, km and km/s, at ``epoch``."""

    epoch: float
    state: tuple[float, float, float, float, float, float]


@dataclass(frozen=True)
class ParkingStart:
    """A circular parking orbit from which the first burn (the injection) departs.

    The injection epoch is free inside ``epoch_window``; the node (RAAN) inside ``raan_window_deg``
    (None: free); the position along the orbit is free.
    """

    altitude_km: float
    inclination_deg: float
    epoch_window: tuple[float, float]
    raan_window_deg: tuple[float, float] | None = None


@dataclass(frozen=True)
class BurnSpec:
    """One impulsive burn.

    Attributes
    ----------
    window : (float, float)
        Earliest and latest epoch.
    max_dv_mps : float
        Largest size allowed.
    direction : str
        ``"free"`` (any 3-D direction), ``"along"`` or ``"against"`` (the velocity before the burn).
    leg : str
        ``"outbound"`` (before perilune) or ``"return"`` (after perilune).
    """

    window: tuple[float, float]
    max_dv_mps: float
    direction: str = "free"
    leg: str = "outbound"


@dataclass(frozen=True)
class LunarPass:
    """Perilune altitude range (km above the mean lunar radius)."""

    altitude_km: tuple[float, float] = (100.0, 10000.0)


@dataclass(frozen=True)
class ReturnSpec:
    """The arrival at Earth.

    Attributes
    ----------
    target : str
        ``"entry"`` (cross ``entry_radius_km`` with the flight-path angle in ``flight_path_deg``) or
        ``"perigee"`` (vacuum perigee altitude inside ``perigee_alt_km``).
    epoch_window : (float, float) or None
        Earliest and latest arrival epoch.
    inclination_deg : (float, float) or None
        Range of the arrival orbit's inclination to the ICRF equator.
    max_duration_days : float or None
        Longest time from the start to the arrival.
    flight_path_margin_deg : float
        Tightens the flight-path corridor on both sides for the solve (bought margin against
        dispersions); the corridor itself, ``flight_path_deg``, is what arrivals are judged by.
    """

    target: str = "entry"
    entry_radius_km: float = R_EARTH + ENTRY_INTERFACE_ALT
    flight_path_deg: tuple[float, float] = (-7.0, -5.5)
    perigee_alt_km: tuple[float, float] = (30.0, 50.0)
    epoch_window: tuple[float, float] | None = None
    inclination_deg: tuple[float, float] | None = None
    max_duration_days: float | None = None
    flight_path_margin_deg: float = 0.0

    @property
    def solve_flight_path_deg(self) -> tuple[float, float]:
        """The corridor the solve must meet: ``flight_path_deg`` tightened by the margin."""
        lo, hi = self.flight_path_deg
        return lo + self.flight_path_margin_deg, hi - self.flight_path_margin_deg


@dataclass(frozen=True)
class Objective:
    """What to minimise.

    ``"min-dv"``: total Δv.  ``"earliest"``: arrival epoch, with total Δv within ``dv_budget_mps``.
    ``"weighted"``: total Δv [m/s] + ``mps_per_day`` x (arrival - start) [days].
    """

    kind: str = "min-dv"
    dv_budget_mps: float | None = None
    mps_per_day: float = 0.0


@dataclass(frozen=True)
class Tolerances:
    """Acceptance limits of the independent re-propagation (defaults from the design brief)."""

    entry_position_km: float = 1.0
    flight_path_deg: float = 0.01
    perilune_altitude_km: float = 1.0
    perigee_altitude_km: float = 1.0


@dataclass(frozen=True)
class Propulsion:
    """The optional ``[spacecraft]`` table: what turns impulsive burns into finite-burn figures.

    Attributes
    ----------
    mass_kg : float
        Wet mass at the start of the plan, kg.
    thrust_n : float
        Thrust of the engine used for every burn, N.
    isp_s : float
        Specific impulse of that engine, s (with standard gravity g0 = 9.80665 m/s^2).
    """

    mass_kg: float
    thrust_n: float
    isp_s: float


@dataclass(frozen=True)
class Mesh:
    """Transcription size: segments per phase and fixed RK8 steps per segment."""

    segments: int = 12
    steps: int = 2
    max_refinements: int = 2


@dataclass(frozen=True)
class Problem:
    """A complete free-return design problem."""

    name: str
    start: StateStart | ParkingStart
    burns: tuple[BurnSpec, ...]
    lunar: LunarPass = LunarPass()
    arrival: ReturnSpec = ReturnSpec()
    objective: Objective = Objective()
    model: ModelSpec = ModelSpec()
    min_burn_spacing_s: float = 0.0
    min_altitude_km: float = 50.0  # no node of the path may come closer to Earth or Moon
    tolerances: Tolerances = Tolerances()
    mesh: Mesh = Mesh()
    summary: str = ""  # free text of the [case] table, shown in the report
    spacecraft: str = ""  # spacecraft name written into exports (OEM/OPM OBJECT_NAME)
    propulsion: Propulsion | None = None  # the [spacecraft] table (finite-burn figures)

    @property
    def start_epoch(self) -> float:
        if isinstance(self.start, StateStart):
            return self.start.epoch
        return self.start.epoch_window[0]

    def latest_epoch(self) -> float:
        """Latest epoch the path may reach (for ephemeris windows)."""
        ends = [b.window[1] for b in self.burns]
        if self.arrival.epoch_window is not None:
            ends.append(self.arrival.epoch_window[1])
        if self.arrival.max_duration_days is not None:
            ends.append(self.start_epoch + self.arrival.max_duration_days * SECONDS_PER_DAY)
        if self.arrival.epoch_window is None and self.arrival.max_duration_days is None:
            ends.append(self.start_epoch + 12 * SECONDS_PER_DAY)
        return max(ends)

    def to_dict(self) -> dict:
        """Plain data (JSON-ready) form."""
        d = asdict(self)
        d["start"]["kind"] = "state" if isinstance(self.start, StateStart) else "parking"
        return _plain(d)


def _plain(x):
    if isinstance(x, dict):
        return {k: _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.generic):
        return x.item()
    return x
