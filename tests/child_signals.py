"""Signal set-up for child processes that a test or benchmark interrupts with SIGINT."""

import signal


def ctrl_c_as_from_a_terminal():
    """Give the child SIGINT as a shell in a terminal would: default disposition, not blocked.

    A test runner started in the background by a non-interactive shell (as CI harnesses may be)
    has SIGINT ignored, and children inherit that: Python then keeps it ignored (rightly: Ctrl-C
    cannot reach such a process) and a test of the Ctrl-C path could not see the interrupt at all.
    For ``subprocess``'s ``preexec_fn``."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})
