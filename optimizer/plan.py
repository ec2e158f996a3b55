"""The result of a design: burns, events, states, verification, solver record; and its JSON form.

A :class:`Plan` is plain data.  ``Plan.to_dict`` gives the documented ``slingback-plan`` JSON
(format version 1, see ``docs/plan-format.md``) and ``Plan.from_dict`` reads it back, so a plan
written by one run can warm-start or be re-checked by another.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from . import __version__
from .constants import CAUTION
from .judge import ConstraintRow
from .timescales import format_epoch, parse_epoch

FORMAT = "slingback-plan"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class Burn:
    """An impulsive burn.

    Attributes
    ----------
    epoch : float
        TDB seconds past J2000.
    dv : tuple of 3 float
        Velocity change, km/s, Earth-centred ICRF axes.
    dv_rtn : tuple of 3 float
        The same in the local radial / transverse / normal frame of the pre-burn state, km/s.
    """

    epoch: float
    dv: tuple[float, float, float]
    dv_rtn: tuple[float, float, float]

    @property
    def dv_mps(self) -> float:
        return float(np.linalg.norm(self.dv) * 1000.0)


@dataclass(frozen=True)
class EventRecord:
    """A named event on the path (``perilune``, ``entry`` or ``perigee``).

    ``altitude_km`` is above the mean radius of the body the event refers to; ``flight_path_deg``
    and ``inclination_deg`` are filled for arrivals at Earth.
    """

    name: str
    epoch: float
    altitude_km: float
    state: tuple[float, ...]
    flight_path_deg: float | None = None
    inclination_deg: float | None = None
    speed_kms: float | None = None


@dataclass(frozen=True)
class Verification:
    """The independent re-propagation of a plan.

    Attributes
    ----------
    passed : bool
        Every residual within tolerance and every constraint met by the re-propagated path.
    residuals : dict
        Physical residuals between the optimiser's path and the re-propagated one
        (``entry_position_km``, ``entry_speed_mps``, ``flight_path_deg``, ``perilune_altitude_km``,
        ``entry_epoch_s`` ...).
    tolerances : dict
        The limits each residual was held to.
    violations : list of str
        Constraints the re-propagated path breaks (empty when passed).
    events : list of EventRecord
        Events found by the propagator.
    propagator : dict
        Method and tolerances of the re-propagation.
    constraints : list of ConstraintRow
        Every constraint of the problem judged on the re-propagated path (:mod:`optimizer.judge`).
    """

    passed: bool
    residuals: dict
    tolerances: dict
    violations: list
    events: list
    propagator: dict
    constraints: list = field(default_factory=list)


@dataclass
class Plan:
    """A designed (or attempted) free-return plan.

    ``status`` is ``"verified"`` (optimal and confirmed by re-propagation), ``"unverified"`` (the
    optimiser converged but the re-propagation disagrees; never to be used as an optimum),
    ``"infeasible"`` or ``"failed"``; ``reason`` says why when not verified.
    """

    name: str
    status: str
    reason: str
    model: dict
    start_epoch: float
    start_state: tuple[float, ...]
    burns: list[Burn]
    events: list[EventRecord]
    trajectory_t: np.ndarray  # (N,) TDB s, optimiser's nodes, Earth-centred ICRF
    trajectory_y: np.ndarray  # (N, 6) km, km/s
    verification: Verification | None
    solver: dict
    problem: dict = field(default_factory=dict)
    warm: dict = field(default_factory=dict, repr=False)  # transcription variables, for warm starts

    @property
    def total_dv_mps(self) -> float:
        return float(sum(b.dv_mps for b in self.burns))

    @property
    def verified(self) -> bool:
        return self.status == "verified"

    def event(self, name: str) -> EventRecord | None:
        return next((e for e in self.events if e.name == name), None)

    # -- JSON -------------------------------------------------------------------------------------
    def to_dict(self) -> dict:
        def burn(b: Burn):
            return {"epoch_tdb": format_epoch(b.epoch, 6), "epoch_tdb_s": b.epoch, "dv_mps": b.dv_mps,
                    "dv_icrf_mps": [1000.0 * x for x in b.dv], "dv_rtn_mps": [1000.0 * x for x in b.dv_rtn]}

        def event(e: EventRecord):
            d = {k: v for k, v in asdict(e).items() if v is not None}
            d["state_km_kms"] = list(d.pop("state"))
            d["epoch_tdb_s"] = d.pop("epoch")
            d["epoch_tdb"] = format_epoch(e.epoch, 6)
            return d

        v = None
        if self.verification is not None:
            v = asdict(self.verification)
            v["events"] = [event(e) for e in self.verification.events]
        return _plain({
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "software": {"name": "slingback", "version": __version__},
            "caution": CAUTION,
            "name": self.name,
            "status": self.status,
            "reason": self.reason,
            "time_scale": "TDB",
            "frame": "Earth-centred inertial, ICRF axes",
            "model": self.model,
            "start": {"epoch_tdb": format_epoch(self.start_epoch, 6), "epoch_tdb_s": self.start_epoch,
                      "state_km_kms": list(self.start_state)},
            "total_dv_mps": self.total_dv_mps,
            "burns": [burn(b) for b in self.burns],
            "events": [event(e) for e in self.events],
            "verification": v,
            "solver": self.solver,
            "trajectory": {"epoch_tdb_s": list(self.trajectory_t),
                           "state_km_kms": [list(r) for r in self.trajectory_y]},
            "problem": self.problem,
            "warm_start": self.warm,
        })

    @classmethod
    def from_dict(cls, d: dict) -> "Plan":
        """Read the JSON form; raises ``ValueError`` naming the first bad key."""
        if d.get("format") != FORMAT:
            raise ValueError(f"format: expected {FORMAT!r}, got {d.get('format')!r}")
        if d.get("format_version") != FORMAT_VERSION:
            raise ValueError(f"format_version: expected {FORMAT_VERSION}, got {d.get('format_version')!r}")
        try:
            burns = [Burn(float(b["epoch_tdb_s"]) if "epoch_tdb_s" in b else parse_epoch(b["epoch_tdb"]),
                          tuple(x / 1000.0 for x in b["dv_icrf_mps"]),
                          tuple(x / 1000.0 for x in b.get("dv_rtn_mps", [0.0, 0.0, 0.0])))
                     for b in d["burns"]]
            events = [_event_from(e) for e in d.get("events", [])]
            ver = d.get("verification")
            if ver is not None:
                ver = Verification(**{**ver, "events": [_event_from(e) for e in ver["events"]],
                                      "constraints": [ConstraintRow.from_dict(c) for c in ver.get("constraints", [])]})
            traj = d.get("trajectory", {})
            return cls(
                name=d["name"], status=d["status"], reason=d.get("reason", ""), model=d["model"],
                start_epoch=float(d["start"]["epoch_tdb_s"]),
                start_state=tuple(float(x) for x in d["start"]["state_km_kms"]),
                burns=burns, events=events,
                trajectory_t=np.asarray(traj.get("epoch_tdb_s", []), dtype=float),
                trajectory_y=np.asarray(traj.get("state_km_kms", []), dtype=float).reshape(-1, 6),
                verification=ver, solver=d.get("solver", {}), problem=d.get("problem", {}),
                warm=d.get("warm_start", {}))
        except KeyError as exc:
            raise ValueError(f"missing key {exc.args[0]!r}") from None
        except (TypeError, ValueError) as exc:
            raise ValueError(f"malformed plan: {exc}") from None


def _event_from(e: dict) -> EventRecord:
    return EventRecord(name=e["name"], epoch=float(e["epoch_tdb_s"]), altitude_km=float(e["altitude_km"]),
                       state=tuple(e["state_km_kms"]), flight_path_deg=e.get("flight_path_deg"),
                       inclination_deg=e.get("inclination_deg"), speed_kms=e.get("speed_kms"))


def _plain(x):
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.ndarray):
        return _plain(x.tolist())
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, float) and not np.isfinite(x):
        return None
    return x
