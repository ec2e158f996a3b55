"""The resume store: one folder where a long run of independent tasks saves each finished result,
so that a rerun of the same run skips what is saved.  Used by trade studies (one file per grid
cell) and dispersion runs (one file per chunk of samples): the one resume store of the package.

Layout: ``<folder>/<head>`` names the run (its format, the software, a SHA-256 fingerprint of the
run's definition and the definition itself); ``<folder>/<items>/<name>.json`` holds one result,
with the fingerprint.  Every file is written atomically (temporary file, synced, renamed), so an
interrupted run leaves whole files only; a file of another run, or damaged, counts as absent.

One job: that folder.  May import: the standard library, the package version and
:mod:`optimizer.executors` (the atomic write); it knows nothing of what the results mean, so any
runner (the dispersion runs, which must stay free of CasADi) can use it.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path

from .. import __version__
from ..executors import atomic_json

__all__ = ["ResumeStore", "StoreKind", "fingerprint", "read_saved"]


@dataclass(frozen=True)
class StoreKind:
    """What a resume folder holds: file and folder names, format names, and the words of its
    messages (``option`` is the argument that named the folder, ``what`` the kind of run,
    ``changed`` what differs when the folder holds another run)."""

    head: str
    items: str
    head_format: str
    item_format: str
    option: str
    what: str
    changed: str
    format_version: int = 1


def fingerprint(definition: dict) -> str:
    """SHA-256 of a run's definition (as sorted JSON; values JSON cannot hold by their text)."""
    return hashlib.sha256(json.dumps(definition, sort_keys=True, default=str).encode()).hexdigest()


class ResumeStore:
    """A resume folder of ``kind`` for the run ``definition``; ``folder=None`` keeps nothing.

    Raises ``error`` (a bad-input error type, the message naming ``kind.option``) when the folder
    cannot be made or written, or holds another run.
    """

    def __init__(self, folder, definition: dict, kind: StoreKind, error=ValueError):
        self.kind, self.error = kind, error
        self.folder = None if folder is None else Path(folder)
        self.key = fingerprint(definition)
        if self.folder is None:
            return
        items = self.folder / kind.items
        try:
            items.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise error(f"{kind.option}: cannot make the resume folder {items} "
                        f"({exc.strerror or exc})") from None
        if not os.access(items, os.W_OK | os.X_OK):
            raise error(f"{kind.option}: cannot write in the resume folder {items} (no permission)")
        head = self.folder / kind.head
        if head.exists():
            try:
                old = json.loads(head.read_text())
            except (OSError, ValueError) as exc:
                raise error(f"{kind.option}: cannot read {head} ({exc})") from None
            if old.get("fingerprint") != self.key:
                raise error(f"{kind.option}: {self.folder} holds a different {kind.what} ({kind.changed}); "
                            "use an empty folder")
        else:
            atomic_json(head, {"format": kind.head_format, "format_version": kind.format_version,
                               "software": f"slingback {__version__}", "fingerprint": self.key,
                               "definition": definition})

    def path(self, name: str) -> Path | None:
        """The file of result ``name`` (None without a folder)."""
        return None if self.folder is None else self.folder / self.kind.items / f"{name}.json"

    def load(self, name: str) -> dict | None:
        """The saved result ``name`` of this run, or None (not saved, damaged, or of another run)."""
        p = self.path(name)
        if p is None:
            return None
        try:
            d = json.loads(p.read_text())
        except (OSError, ValueError):
            return None  # absent, or damaged (cannot happen with atomic writes): computed again
        return d if isinstance(d, dict) and d.get("fingerprint") == self.key else None

    def save(self, name: str, entry: dict) -> None:
        """Save result ``name`` (a JSON-able dict) atomically; nothing without a folder."""
        p = self.path(name)
        if p is not None:
            atomic_json(p, {"format": self.kind.item_format, "format_version": self.kind.format_version,
                            "fingerprint": self.key, **entry})



def read_saved(folder, kind: StoreKind, name: str) -> dict | None:
    """A saved result read without knowing the run's definition (e.g. a cell's warm start for a
    re-solve after the sweep): the entry when its fingerprint is the folder's own, else None."""
    folder = Path(folder)
    try:
        head = json.loads((folder / kind.head).read_text())
        d = json.loads((folder / kind.items / f"{name}.json").read_text())
    except (OSError, ValueError):
        return None
    return d if isinstance(d, dict) and d.get("fingerprint") == head.get("fingerprint") else None
