"""Signal set-up for child processes that a test or benchmark interrupts with SIGINT, and what
the tests look at afterwards (a process's children, the live processes of a group)."""

import signal
import subprocess
from pathlib import Path


def ctrl_c_as_from_a_terminal():
    """Give the child SIGINT as a shell in a terminal would: default disposition, not blocked.

    A test runner started in the background by a non-interactive shell (as CI harnesses may be)
    has SIGINT ignored, and children inherit that: Python then keeps it ignored (rightly: Ctrl-C
    cannot reach such a process) and a test of the Ctrl-C path could not see the interrupt at all.
    For ``subprocess``'s ``preexec_fn``."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})


def children(pid: int) -> list[str]:
    """The process ids of ``pid``'s children (Linux lists them under /proc); [] once it ended."""
    try:
        return Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
    except OSError:
        return []


def running_in_group(pgid: int) -> list[str]:
    """``ps`` lines of the processes of group ``pgid`` that are not dead (a child whose parent
    ended waits, as a zombie, for the machine's init to reap it: it runs no more)."""
    ps = subprocess.run(["ps", "-o", "stat=,pid=,cmd=", "-g", str(pgid)], capture_output=True, text=True)
    return [line for line in ps.stdout.splitlines() if line.strip() and not line.lstrip().startswith("Z")]
