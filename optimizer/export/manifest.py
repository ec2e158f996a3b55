"""``manifest.json``: what a run folder holds, for the tools that read it.

It carries what the CSV files no longer do in comment lines (software, model, status, the
caution) and, for every file of the folder, its role, media type, size and SHA-256; for every CSV
file, its columns with their units and meanings (:data:`optimizer.export.tables.COLUMNS`).

One job: ``manifest.json``.  May import: the standard library, the package version,
:mod:`optimizer.constants` and the export layer's ``tables`` (the column meanings).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from pathlib import Path

from .. import __version__
from ..constants import CAUTION
from .tables import COLUMNS

__all__ = ["MANIFEST_FORMAT", "manifest_dict", "write_manifest", "file_entries", "unit_of", "write_folder_manifest"]

MANIFEST_FORMAT = "slingback-run-manifest"
MANIFEST_VERSION = 1
MEDIA_TYPES = {".json": "application/json", ".csv": "text/csv", ".toml": "application/toml",
               ".oem": "text/plain", ".opm": "text/plain", ".md": "text/markdown", ".png": "image/png"}


#: Unit by the ending of a column name (our naming rule: units in the names).
SUFFIX_UNITS = (("_tdb_s", "s"), ("_tdb", "ISO-8601 TDB"), ("_mps", "m/s"), ("_kms", "km/s"), ("_km", "km"),
                ("_kg", "kg"), ("_deg", "deg"), ("_days", "d"), ("_s", "s"))


def unit_of(column: str) -> str:
    """The unit a column name states (``dv_mps`` -> ``m/s``), or ``""`` for a unitless column."""
    return next((unit for suffix, unit in SUFFIX_UNITS if column.endswith(suffix)), "")


def _columns(path: Path, name: str) -> list[dict]:
    header = path.read_text(encoding="utf-8").split("\n", 1)[0].split(",")
    known = COLUMNS.get(name, {})
    return [{"name": c, "unit": known.get(c, (unit_of(c), ""))[0], "description": known.get(c, ("", ""))[1]}
            for c in header]


def file_entries(folder, files: dict) -> list[dict]:
    """One entry per file (name -> role): role, media type, size, SHA-256, and a CSV's columns."""
    folder, entries = Path(folder), []
    for name, role in files.items():
        path = folder / name
        data = path.read_bytes()
        entry = {"name": name, "role": role, "media_type": MEDIA_TYPES.get(path.suffix, "application/octet-stream"),
                 "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
        if path.suffix == ".csv":
            entry["columns"] = _columns(path, name)
        entries.append(entry)
    return entries


def write_folder_manifest(folder, head: dict, files: dict) -> None:
    """Write ``manifest.json``: ``head`` (format, software, ...) and the entries of ``files`` and itself."""
    d = {**head, "files": file_entries(folder, files)}
    d["files"].append({"name": "manifest.json", "role": "this list of the folder's files",
                       "media_type": "application/json"})
    (Path(folder) / "manifest.json").write_text(json.dumps(d, indent=1, ensure_ascii=False, default=str) + "\n",
                                                encoding="utf-8")


def manifest_dict(folder, plan, problem, files: dict, *, model_name: str, created=None) -> dict:
    """The manifest of ``folder``.

    Parameters
    ----------
    folder : path-like
        The (staged) run folder holding every file of ``files``.
    plan, problem
    files : dict
        File name -> role, in the order to list them.
    model_name : str
    created : datetime, optional
        Creation time (UTC); default now.
    """
    created = created or dt.datetime.now(dt.timezone.utc)
    entries = file_entries(folder, files)
    v = plan.verification
    return {
        "format": MANIFEST_FORMAT, "format_version": MANIFEST_VERSION,
        "software": {"name": "slingback", "version": __version__},
        "created_utc": created.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "case": problem.name, "spacecraft": problem.spacecraft or None,
        "status": plan.status, "verified": plan.verified, "reason": plan.reason,
        "verification_passed": None if v is None else bool(v.passed),
        "model": model_name, "time_scale": "TDB", "frame": "Earth-centred inertial, ICRF axes",
        "units": "km, km/s and s unless a column says otherwise; Δv in m/s",
        "csv_dialect": "comma-separated, header on line 1, no comment lines, UTF-8, '\\n' line ends",
        "caution": CAUTION,
        "files": entries,
    }


def write_manifest(folder, plan, problem, files: dict, *, model_name: str, created=None) -> None:
    """Write ``manifest.json`` into ``folder`` (listing ``files`` and itself)."""
    d = manifest_dict(folder, plan, problem, {}, model_name=model_name, created=created)
    d.pop("files")
    write_folder_manifest(folder, d, files)
