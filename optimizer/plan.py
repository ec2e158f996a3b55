"""The result of a design: burns, events, states, verification, solver record; and its JSON form.

A :class:`Plan` is plain data.  ``Plan.to_dict`` gives the documented ``slingback-plan`` JSON
(format version 2, see ``docs/plan-format.md`` and the JSON Schema ``docs/plan.schema.json``) and
``Plan.from_dict`` reads versions 1 and 2 back, so a plan written by one run can warm-start or be
re-checked by another.

The solver record and the warm start are written in our own words (:func:`solver_record`): the
optimisation library's names stay inside the process, its final message is kept under one
``solver_message`` key.

One job: the plan and its JSON form.  May import: numpy, the package version,
:mod:`optimizer.constants`, :mod:`optimizer.timescales`, :mod:`optimizer.judge` (the constraint rows
a plan carries) and :mod:`optimizer.propellant`; never the solver, the transcription or CasADi.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from . import __version__
from .constants import CAUTION
from .judge import ConstraintRow
from .propellant import G0, finite_burns
from .timescales import format_epoch, parse_epoch

FORMAT = "slingback-plan"
FORMAT_VERSION = 2
#: Versions :meth:`Plan.from_dict` reads (version 1: the library's names in the solver record).
READABLE_VERSIONS = (1, 2)

#: How the finite-burn figures of a plan are derived (``finite_burns.method`` in plan.json).
FINITE_BURN_METHOD = ("rocket equation per burn, constant thrust, burn centred on the impulse; "
                      "mass carried from burn to burn; gravity losses neglected")
#: Our names for the optimisation library's timing entries (``timing_s``).
TIMING_NAMES = {"nlp_f": "objective", "nlp_g": "constraints", "nlp_grad_f": "objective_gradient",
                "nlp_grad": "lagrangian_gradient", "nlp_jac_g": "constraint_jacobian",
                "nlp_hess_l": "lagrangian_hessian"}
#: Our names for a run record's keys (a record is a dict with ``timing_s``).
RUN_KEYS = {"status": "solver_message", "success": "converged"}
#: Warm-start entries: in-process name -> name in plan.json.
WARM_NAMES = {"x": "variables", "lam_x": "bound_multipliers", "lam_g": "constraint_multipliers"}


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
        ``perilune_epoch_s``, ``arrival_epoch_s``; ``perigee_altitude_km`` for a vacuum-perigee
        target; see :func:`optimizer.verify.verify`).
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
    def to_dict(self, propulsion=None) -> dict:
        """The ``slingback-plan`` JSON form (version 2).

        Parameters
        ----------
        propulsion : Propulsion, optional
            The problem's ``[spacecraft]`` table; with it every burn carries its finite-burn
            figures (mass, propellant, duration, ignition and cut-off epochs) and the plan a
            ``finite_burns`` summary.  Without it those keys are absent.
        """
        figures = finite_burns(self.burns, propulsion)

        def burn(i: int, b: Burn):
            d = {"epoch_tdb": format_epoch(b.epoch, 6), "epoch_tdb_s": b.epoch, "dv_mps": b.dv_mps,
                 "dv_icrf_mps": [1000.0 * x for x in b.dv], "dv_rtn_mps": [1000.0 * x for x in b.dv_rtn]}
            if figures is not None:
                f = figures[i]
                d.update(mass_before_kg=f.mass_before_kg, mass_after_kg=f.mass_after_kg,
                         propellant_kg=f.propellant_kg, duration_s=f.duration_s,
                         ignition_epoch_tdb=format_epoch(f.ignition_epoch, 6), ignition_epoch_tdb_s=f.ignition_epoch,
                         cutoff_epoch_tdb=format_epoch(f.cutoff_epoch, 6), cutoff_epoch_tdb_s=f.cutoff_epoch)
            return d

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
        summary = {}
        if figures is not None:
            summary["finite_burns"] = {
                "method": FINITE_BURN_METHOD,
                "standard_gravity_mps2": G0, "initial_mass_kg": propulsion.mass_kg,
                "thrust_n": propulsion.thrust_n, "isp_s": propulsion.isp_s,
                "final_mass_kg": figures[-1].mass_after_kg if figures else propulsion.mass_kg,
                "total_propellant_kg": sum(f.propellant_kg for f in figures)}
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
            "burns": [burn(i, b) for i, b in enumerate(self.burns)],
            **summary,
            "events": [event(e) for e in self.events],
            "verification": v,
            "solver": solver_record(self.solver),
            "trajectory": {"epoch_tdb_s": list(self.trajectory_t),
                           "state_km_kms": [list(r) for r in self.trajectory_y]},
            "problem": self.problem,
            "warm_start": {WARM_NAMES.get(k, k): v for k, v in self.warm.items()},
        })

    @classmethod
    def from_dict(cls, d: dict) -> "Plan":
        """Read the JSON form (versions 1 and 2); raises ``ValueError`` naming the first bad key.

        Finite-burn figures are derived data and are not read back (they follow from the burns
        and the problem's ``[spacecraft]`` table).
        """
        if d.get("format") != FORMAT:
            raise ValueError(f"format: expected {FORMAT!r}, got {d.get('format')!r}")
        version = d.get("format_version")
        if isinstance(version, bool) or version not in READABLE_VERSIONS:
            raise ValueError(f"format_version: this slingback {__version__} reads {FORMAT} versions "
                             f"{' and '.join(map(str, READABLE_VERSIONS))}, got {version!r}")
        names = {v: k for k, v in WARM_NAMES.items()}
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
                verification=ver, solver=d.get("solver", {}), problem=_problem_table(d.get("problem", {}), version),
                warm={names.get(k, k): v for k, v in d.get("warm_start", {}).items()})
        except KeyError as exc:
            raise ValueError(f"missing key {exc.args[0]!r}") from None
        except (TypeError, ValueError) as exc:
            raise ValueError(f"malformed plan: {exc}") from None


def _problem_table(problem: dict, version: int) -> dict:
    """A version-1 plan's problem, with its first table in version 2's words
    (``[scenario]`` name, description, vehicle -> ``[case]`` name, summary, spacecraft)."""
    if version != 1 or not isinstance(problem, dict) or not isinstance(problem.get("scenario"), dict):
        return problem
    words = {"name": "name", "description": "summary", "vehicle": "spacecraft"}
    case = {words.get(k, k): v for k, v in problem["scenario"].items()}
    return {"case": case, **{k: v for k, v in problem.items() if k != "scenario"}}


def solver_record(record):
    """A solver record in our own words (idempotent; version-1 records are translated too).

    In every run record (a dict with ``timing_s``) the library's final message goes under
    ``solver_message``, its success flag under ``converged``, and the timing entries get the
    names of :data:`TIMING_NAMES`.
    """
    if isinstance(record, list):
        return [solver_record(x) for x in record]
    if not isinstance(record, dict):
        return record
    run = "timing_s" in record
    out = {}
    for k, v in record.items():
        if run and k in RUN_KEYS:
            out[RUN_KEYS[k]] = v
        elif k == "timing_s" and isinstance(v, dict):
            out[k] = {TIMING_NAMES.get(t, t.removeprefix("nlp_")): x for t, x in v.items()}
        else:
            out[k] = solver_record(v)
    return out


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
