"""Ctrl-C that stops a solve within a second or two.

IPOPT runs in C.  CasADi notices a pending SIGINT at the next IPOPT iteration and stops that solve,
but it swallows the ``KeyboardInterrupt`` and returns a failed solve, so the Python code around it
would carry on (retries, the next start, the export).  :func:`honour_ctrl_c` installs a SIGINT
handler that, besides raising ``KeyboardInterrupt`` as Python's own does, arms a one-shot profile
hook: the next Python call after CasADi returns raises ``KeyboardInterrupt`` again, so the
interrupt reaches the command line whatever caught it inside the library.
"""

from __future__ import annotations

import signal
import sys
import threading
from contextlib import contextmanager

__all__ = ["honour_ctrl_c"]


_armed = [False]


def _raise_on_next_call(frame, event, arg):
    if _armed[0]:
        _armed[0] = False
        raise KeyboardInterrupt


def _handler(signum, frame):
    _armed[0] = True
    sys.setprofile(_raise_on_next_call)
    raise KeyboardInterrupt


@contextmanager
def honour_ctrl_c():
    """Within the block, Ctrl-C ends it with ``KeyboardInterrupt`` even inside an IPOPT solve.

    Only in the main thread (elsewhere signals cannot be handled); the previous handler and
    profile hook are restored when the block ends.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, _handler)
    try:
        yield
    except KeyboardInterrupt:
        _armed[0] = False  # one interrupt, reported once
        raise
    finally:
        _armed[0] = False
        sys.setprofile(None)
        signal.signal(signal.SIGINT, previous)
