"""Ctrl-C that stops a solve within a second or two.

IPOPT runs in C.  CasADi notices a pending SIGINT at the next IPOPT iteration and stops that solve,
but it consumes the interrupt and returns a failed solve, so the Python code around it would carry
on (retries, the next start, the export).  :func:`honour_ctrl_c` keeps Python's own SIGINT handler
(which CasADi relies on) and watches the signal through a wakeup file descriptor: once Ctrl-C has
been pressed, a watcher thread sets ``KeyboardInterrupt`` as the main thread's pending exception
(raised at its next Python instruction, i.e. as soon as CasADi returns) and interrupts it again every
0.2 s (which stops any further IPOPT solve at its next iteration) until the block ends.
"""

from __future__ import annotations

import _thread
import ctypes
import os
import select
import signal
import threading
from contextlib import contextmanager

__all__ = ["honour_ctrl_c"]

#: Seconds between repeated interrupts of the main thread after Ctrl-C.
REPEAT_S = 0.2


@contextmanager
def honour_ctrl_c():
    """Within the block, Ctrl-C ends it with ``KeyboardInterrupt`` even inside an IPOPT solve.

    Only in the main thread (elsewhere signals cannot be handled); the previous wakeup descriptor
    is restored when the block ends.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    r, w = os.pipe()
    os.set_blocking(w, False)
    os.set_blocking(r, False)
    stop = threading.Event()
    main_id = ctypes.c_ulong(threading.main_thread().ident)

    def watch():
        while not stop.is_set():
            ready, _, _ = select.select([r], [], [], REPEAT_S)
            if ready and signal.SIGINT in os.read(r, 64):
                ctypes.pythonapi.PyThreadState_SetAsyncExc(main_id, ctypes.py_object(KeyboardInterrupt))
                while not stop.wait(REPEAT_S):
                    _thread.interrupt_main()
                return

    previous = signal.set_wakeup_fd(w, warn_on_full_buffer=False)
    watcher = threading.Thread(target=watch, name="slingback-ctrl-c", daemon=True)
    watcher.start()
    try:
        yield
    finally:
        stop.set()
        signal.set_wakeup_fd(previous)
        watcher.join()
        ctypes.pythonapi.PyThreadState_SetAsyncExc(main_id, None)  # nothing pending after the block
        os.close(r)
        os.close(w)
