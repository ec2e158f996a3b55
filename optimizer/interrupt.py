"""Ctrl-C that stops a solve within a second or two.

IPOPT runs in C.  CasADi notices a pending SIGINT at the next IPOPT iteration and stops that solve,
but it consumes the interrupt and returns a failed solve, so the Python code around it would carry
on (retries, the next start, the export).  :func:`honour_ctrl_c` keeps Python's own SIGINT handler
(which CasADi relies on) and watches the signal through a wakeup file descriptor: once Ctrl-C has
been pressed, a watcher thread sets ``KeyboardInterrupt`` as the main thread's pending exception
(raised at its next Python instruction, i.e. as soon as CasADi returns) and interrupts it again every
0.2 s (which stops any further IPOPT solve at its next iteration) until the block ends.

May import the standard library only.
"""

from __future__ import annotations

import _thread
import ctypes
import os
import select
import signal
import sys
import threading
from contextlib import contextmanager

__all__ = ["honour_ctrl_c", "pressed", "WATCHER_NAME"]

#: Seconds between repeated interrupts of the main thread after Ctrl-C.
REPEAT_S = 0.2
#: The watcher thread's name.  It holds no lock while it waits in ``select``, so a process may
#: fork beside it (the global search's starts do); the child has no watcher.
WATCHER_NAME = "slingback-ctrl-c"


@contextmanager
def honour_ctrl_c():
    """Within the block, Ctrl-C ends it with ``KeyboardInterrupt`` even inside an IPOPT solve.

    Only in the main thread (elsewhere signals cannot be handled); the previous wakeup descriptor
    is restored when the block ends.  Exactly one ``KeyboardInterrupt`` leaves the block, however
    early or late the Ctrl-C comes: the watcher thread is started and stopped while a Ctrl-C is
    held back (a ``KeyboardInterrupt`` inside the thread machinery would break its locks), and
    one that lands in the clean-up is raised after it, once.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _pressed[0] = False
    r, w = os.pipe()
    os.set_blocking(w, False)
    os.set_blocking(r, False)
    stop = threading.Event()
    halted = [False]  # set in one step when the block ends: the watcher raises nothing after it
    main_id = ctypes.c_ulong(threading.main_thread().ident)

    def watch():
        while not stop.is_set():
            ready, _, _ = select.select([r], [], [], REPEAT_S)
            if ready and signal.SIGINT in os.read(r, 64):
                _pressed[0] = True
                if halted[0]:
                    return
                ctypes.pythonapi.PyThreadState_SetAsyncExc(main_id, ctypes.py_object(KeyboardInterrupt))
                while not stop.wait(REPEAT_S):
                    if not halted[0]:
                        _thread.interrupt_main()
                return

    watcher = threading.Thread(target=watch, name=WATCHER_NAME, daemon=True)
    previous = _UNSET = object()
    try:
        with _held_back() as held:
            previous = signal.set_wakeup_fd(w, warn_on_full_buffer=False)
            watcher.start()
        if held:
            raise KeyboardInterrupt
        yield
    finally:
        halted[0] = True
        # The clean-up must finish even when an interrupt lands inside it (the watcher raising the
        # Ctrl-C that already stopped the block, or a new one): otherwise the watcher would go on
        # interrupting after the command had handled the first one, and the process would die of a
        # second KeyboardInterrupt (signal -2) instead of exiting 130.  Each step may be repeated.
        late = False
        while True:
            try:
                with _held_back() as held:
                    stop.set()
                    _wake(w)
                    if watcher.ident is not None:
                        watcher.join()
                    ctypes.pythonapi.PyThreadState_SetAsyncExc(main_id, None)  # nothing pending after it
                    if previous is not _UNSET:
                        signal.set_wakeup_fd(previous)
                        previous = _UNSET
                    _pending_signals_run_here()
                    _drain(r)
                late = late or bool(held)
                break
            except KeyboardInterrupt:
                late = True
        os.close(r)
        os.close(w)
        if late and sys.exc_info()[0] is None:  # Ctrl-C during the clean-up of a block that ended well
            raise KeyboardInterrupt


def pressed() -> bool:
    """Whether Ctrl-C was pressed during the last :func:`honour_ctrl_c` block.  An extension module
    interrupted while it loads may turn the interrupt into another error (an ``ImportError``); the
    command still stopped because of the Ctrl-C."""
    return _pressed[0]


_pressed = [False]


def _drain(r: int) -> None:
    try:
        while True:
            data = os.read(r, 64)
            if not data:
                return
            if signal.SIGINT in data:
                _pressed[0] = True
    except BlockingIOError:
        return


@contextmanager
def _held_back():
    """Within the block a Ctrl-C is noted, not raised (when Python's own handler is in place);
    yields the list of noted signals."""
    held: list = []
    if signal.getsignal(signal.SIGINT) is not signal.default_int_handler:
        yield held
        return
    signal.signal(signal.SIGINT, lambda signum, frame: held.append(signum))
    try:
        yield held
    finally:
        signal.signal(signal.SIGINT, signal.default_int_handler)


def _wake(w: int) -> None:
    try:
        os.write(w, b"\0")  # not SIGINT's number: the watcher only looks at its stop flag again
    except OSError:
        pass


def _pending_signals_run_here() -> None:
    """Nothing: entering a Python function lets a signal the watcher raised just before it stopped
    run its handler here, inside the clean-up's ``try``, rather than later in the caller."""
