"""Where slingback finds a C compiler and keeps what it compiles.

One job: the compiler lookup (``$SLINGBACK_CC``, else ``gcc``, else ``cc`` on the PATH) and the
cache folder (``$SLINGBACK_CACHE_DIR``, else ``$XDG_CACHE_HOME/slingback``, else
``~/.cache/slingback``), shared by the compiled NLP functions (``compiled.py``) and the
propagator's C engine (``native.py``), each in its own subfolder.

May import the standard library only (the propagator's engine uses it, and must not load CasADi).
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path


def compiler() -> str | None:
    """The C compiler: ``$SLINGBACK_CC``, else ``gcc``, else ``cc`` on the PATH; None if none."""
    for name in (os.environ.get("SLINGBACK_CC"), "gcc", "cc"):
        if name and shutil.which(name):
            return shutil.which(name)
    return None


def cache_root() -> Path:
    """The folder every compiled artefact of slingback lives under (not created here)."""
    root = os.environ.get("SLINGBACK_CACHE_DIR")
    if not root:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        root = os.path.join(base, "slingback")
    return Path(root)
