"""Write a run folder: plan.json, problem.toml, CSV tables, CCSDS OEM and OPM, figures, report.md
and manifest.json.

An OEM and an OPM are written only for a verified plan (other tools ingest them without reading
the report); the OPM also needs the problem's ``[spacecraft]`` table.
Everything is written into a temporary folder beside the destination and moved into place only
when complete, so a run folder is either whole or absent.  An existing folder is replaced only
with ``force=True`` (new folder written, old one moved aside, new one moved in, old one deleted).

One job: the run folder.  May import: the export layer's other modules, the package version,
:mod:`optimizer.constants`, :mod:`optimizer.timescales` and the file layer's writer
(``problem.toml``, through :mod:`optimizer.problem_file`).
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import tempfile
import uuid
from contextlib import contextmanager
from pathlib import Path

from .. import __version__
from ..constants import CAUTION
from ..problem_file import dumps_toml, problem_to_dict
from ..timescales import format_epoch
from .figures import FIGURES, write_figures, write_search_figure
from .manifest import write_manifest
from .oem import oem_text
from .opm import OPM_FILES, opm_text
from .report import report_markdown
from .sampling import plan_model, sample_plan
from .tables import burns_frame, nodes_frame, trajectory_frame, write_csv

__all__ = ["write_run", "plan_json", "write_plot_files", "run_summary", "OutputPathError", "check_writable",
           "refuse_existing", "save_rescued_plan"]


class OutputPathError(ValueError):
    """An output folder that cannot be made or written (a file in its way, no write permission)."""

FILES = {
    "plan.json": "the plan (slingback-plan format, version 2; schema docs/plan.schema.json) with its problem",
    "problem.toml": "the problem as solved (reusable with `slingback solve`)",
    "burns.csv": "burns: epoch (TDB), Δv and its ICRF and RTN components in m/s; finite-burn figures "
                 "with a [spacecraft] table",
    "trajectory.csv": "independently re-propagated states, Earth-centred ICRF, km and km/s",
    "nodes.csv": "the optimiser's own nodes (what was compared with the re-propagation)",
    "trajectory.oem": "CCSDS OEM 2.0 (KVN), one segment per coast arc, ICRF, TDB",
    "plan.opm": "CCSDS OPM 2.0 (KVN): the state and one maneuver per non-zero burn, Δv in RTN",
    "plan-icrf.opm": "CCSDS OPM 2.0 (KVN): the same maneuvers with Δv on ICRF axes",
    "report.md": "the run report",
    "manifest.json": "every file with its role; columns and units of the CSV files",
}
FILES.update({f: FIGURES[f] for f in FIGURES})


def plan_json(plan, problem) -> dict:
    """The plan's JSON form carrying its problem in table form (what ``slingback check`` reads),
    with finite-burn figures when the problem has a ``[spacecraft]`` table."""
    d = plan.to_dict(propulsion=problem.propulsion)
    d["problem"] = problem_to_dict(problem)
    return d


def run_summary(plan, out_dir=None) -> dict:
    """A short machine-readable summary of a plan (what ``slingback --json`` prints)."""
    v = plan.verification
    return {
        "software": f"slingback {__version__}", "name": plan.name, "status": plan.status,
        "verified": plan.verified, "reason": plan.reason, "total_dv_mps": plan.total_dv_mps,
        "burns": [{"epoch_tdb": format_epoch(b.epoch, 3), "dv_mps": b.dv_mps,
                   "dv_rtn_mps": [1000.0 * x for x in b.dv_rtn]} for b in plan.burns],
        "events": [{"name": e.name, "epoch_tdb": format_epoch(e.epoch, 3), "altitude_km": e.altitude_km,
                    "flight_path_deg": e.flight_path_deg} for e in plan.events],
        "verification": None if v is None else {"passed": v.passed, "residuals": v.residuals,
                                                "violations": v.violations},
        "out": None if out_dir is None else str(out_dir), "caution": CAUTION}


def write_run(plan, problem, out_dir, *, force: bool = False, model=None, created=None) -> Path:
    """Write the complete run folder of a plan.

    Parameters
    ----------
    plan : Plan
        Any status; an unverified or failed plan still gets its diagnostics, marked NOT VERIFIED.
    problem : Problem
    out_dir : str or path-like
        Destination folder (created; its parent too).
    force : bool
        Replace an existing ``out_dir``.
    model : ForceModel, optional
        Model to re-propagate with (default: built from ``problem.model`` over the plan's span).
    created : datetime, optional
        Creation date written into the OEM (default now, UTC).

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    FileExistsError
        If ``out_dir`` exists and ``force`` is false (nothing is written).
    """
    out = Path(out_dir)
    with staged_folder(out, force) as tmp:
        _write_contents(plan, problem, tmp, model, created)
    return out


@contextmanager
def staged_folder(out: Path, force: bool):
    """A temporary folder beside ``out`` to write into; moved into place whole when the block
    ends, removed (leaving ``out`` as it was) when the block raises."""
    refuse_existing(out, force)  # checked here too: the Python API may come straight here
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent))
    try:
        os.chmod(tmp, 0o755)
        yield tmp
        move_into_place(tmp, out, force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def refuse_existing(out: Path, force: bool):
    """Refuse an output folder before any work is done.

    Raises FileExistsError if ``out`` exists (as anything but a folder, or at all without force),
    :class:`OutputPathError` if it could not be made or written (:func:`check_writable`).
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise FileExistsError(f"{out} exists and is not a folder")
    if out.exists() and not force:
        raise FileExistsError(f"{out} already exists; use --force (force=True) to replace it")
    check_writable(out.parent if not out.exists() else out, folder_of=out)


def check_writable(folder, folder_of=None):
    """Raise :class:`OutputPathError` unless ``folder`` is, or can be made as, a writable folder.

    The nearest existing ancestor must be a folder (not a file) that we may write into.  With
    ``folder_of``, the message speaks of that output path.
    """
    folder = Path(folder)
    what = Path(folder_of) if folder_of is not None else folder
    probe = folder
    while not probe.exists():
        if probe.is_symlink():
            raise OutputPathError(f"{what}: {probe} is a broken link")
        if probe.parent == probe:
            break
        probe = probe.parent
    probe = probe if probe.exists() else Path(".")
    if not probe.is_dir():
        raise OutputPathError(f"{what}: cannot be made, {probe} is a file, not a folder")
    denied = _write_denied(probe)
    if denied:
        raise OutputPathError(f"{what}: cannot be written, {denied} {probe}")
    if folder_of is not None and Path(folder_of).exists():
        denied = _write_denied(Path(folder_of).parent)
        if denied:
            raise OutputPathError(f"{what}: cannot be replaced, {denied} {Path(folder_of).parent}")


def _write_denied(folder: Path) -> str | None:
    """Why nothing can be written in ``folder`` (e.g. "no permission to write in"), or None.

    Mode bits alone (``os.access``) do not decide it: the superuser passes them, and a read-only
    or special file system (/proc, /sys) still refuses.  So a file is made there and removed.
    """
    if not os.access(folder, os.W_OK | os.X_OK):
        return "no permission to write in"
    try:
        fd, name = tempfile.mkstemp(prefix=".slingback-probe-", dir=folder)
    except OSError as exc:
        if exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
            return "no permission to write in"
        return f"nothing can be written ({exc.strerror or exc}) in"
    os.close(fd)
    try:
        os.unlink(name)
    except OSError:
        pass
    return None


def save_rescued_plan(plan, problem, out: Path) -> Path | None:
    """After a failed write of ``out``: keep the plan (``plan.json`` with its problem) in the system's
    temporary folder so the solve is not lost; returns the file, or None if that fails too."""
    try:
        fd, name = tempfile.mkstemp(prefix=f"slingback-{Path(out).name}-", suffix=".plan.json")
        with os.fdopen(fd, "w") as f:
            f.write(json.dumps(plan_json(plan, problem), indent=1) + "\n")
        return Path(name)
    except OSError:
        return None


def move_into_place(tmp: Path, out: Path, force: bool):
    """Move the finished folder ``tmp`` to ``out``; with force, the old ``out`` is kept until then."""
    refuse_existing(out, force)
    if not out.exists():
        os.rename(tmp, out)  # fails, rather than merges, if a folder appeared meanwhile
        return
    old = out.with_name(f".{out.name}.old-{uuid.uuid4().hex[:8]}")
    os.rename(out, old)
    try:
        os.rename(tmp, out)
    except BaseException:
        os.rename(old, out)
        raise
    shutil.rmtree(old, ignore_errors=True)


def _model_name(plan, problem) -> str:
    return (plan.model or {}).get("name") or problem.model.kind


def write_plot_files(plan, problem, out_dir, *, model=None, sampled=None) -> list[str]:
    """Re-propagate a plan and draw its figures into ``out_dir``; returns the file names."""
    model = model or plan_model(plan, problem)
    if sampled is None:
        sampled = sample_plan(plan, problem, model)
    moon = getattr(model, "moon", None)
    return write_figures(sampled, plan, problem, out_dir, earth_radius_km=model.earth.radius,
                         moon_radius_km=moon.radius if moon is not None else None,
                         model_name=_model_name(plan, problem)) + \
        write_search_figure(plan, problem, out_dir, model_name=_model_name(plan, problem))


def _write_contents(plan, problem, folder: Path, model, created):
    name = _model_name(plan, problem)
    notes, files, figures = [], ["plan.json", "problem.toml", "burns.csv"], []
    (folder / "plan.json").write_text(json.dumps(plan_json(plan, problem), indent=1) + "\n")
    mark = "" if plan.verified else f"# NOT VERIFIED: this run's plan is {plan.status}; do not use it as a result.\n"
    (folder / "problem.toml").write_text(
        f"# Problem of the slingback {__version__} run {plan.name!r} (status {plan.status}).\n{mark}"
        f"# {CAUTION}\n\n" + dumps_toml(problem_to_dict(problem)))
    write_csv(burns_frame(plan, problem), folder / "burns.csv")
    if len(plan.trajectory_t):
        write_csv(nodes_frame(plan), folder / "nodes.csv")
        files.append("nodes.csv")
    sampled = None
    try:
        model = model or plan_model(plan, problem)
        sampled = sample_plan(plan, problem, model)
    except (ValueError, RuntimeError) as exc:
        if plan.verified:
            raise
        notes.append(f"the plan could not be re-propagated for export ({exc}); no trajectory, OEM or figures")
    if sampled is not None:
        moon = getattr(model, "moon", None)
        write_csv(trajectory_frame(sampled, model.earth.radius, moon.radius if moon is not None else None),
                  folder / "trajectory.csv")
        files.append("trajectory.csv")
        if plan.verified:  # an OEM is what other tools ingest: only ever for a verified plan
            (folder / "trajectory.oem").write_text(oem_text(sampled, plan, problem, model_name=name,
                                                            created=created))
            files.append("trajectory.oem")
        else:
            notes.append("no trajectory.oem is written for a plan that is not verified")
        figures = [(f, FIGURES[f]) for f in write_plot_files(plan, problem, folder, model=model, sampled=sampled)]
    if not plan.verified:
        notes.append("no plan.opm is written for a plan that is not verified")
    elif problem.propulsion is None:
        notes.append("no plan.opm: the problem has no [spacecraft] table, and a CCSDS OPM maneuver needs "
                     "its mass change (MAN_DELTA_MASS)")
    else:
        for frame, opm in OPM_FILES.items():
            (folder / opm).write_text(opm_text(plan, problem, frame=frame, model_name=name, created=created))
            files.append(opm)
    files += ["report.md", "manifest.json"]
    text = report_markdown(plan, problem, sampled=sampled, figures=figures,
                           files=[(f, FILES[f]) for f in files], notes=notes, model_name=name)
    (folder / "report.md").write_text(text)
    written = {f: FILES[f] for f in files if f != "manifest.json"}
    written.update({f: FILES[f] for f, _ in figures})
    write_manifest(folder, plan, problem, written, model_name=name, created=created)
