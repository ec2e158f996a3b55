"""How fast Ctrl-C stops `slingback solve` (prints figures; not collected by pytest).

Starts `slingback solve problems/demo-abort.toml` in a subprocess, sends SIGINT after each delay and
prints the time from the signal to the end of the process, its exit code and whether anything was
left in the output location.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests"))

from child_signals import ctrl_c_as_from_a_terminal  # noqa: E402


def once(delay: float) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "run"
        p = subprocess.Popen([sys.executable, "-m", "optimizer.cli", "solve", str(ROOT / "problems/demo-abort.toml"),
                              "--out", str(out)], cwd=tmp, env={**os.environ, "PYTHONPATH": str(ROOT)},
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                             preexec_fn=ctrl_c_as_from_a_terminal)
        time.sleep(delay)
        if p.poll() is not None:
            print(f"delay {delay:5.1f} s: the solve had already ended (exit {p.returncode})")
            return
        t = time.perf_counter()
        p.send_signal(signal.SIGINT)
        _, err = p.communicate()
        dt = time.perf_counter() - t
        left = sorted(x.name for x in Path(tmp).iterdir())
        last = err.strip().splitlines()[-1] if err.strip() else ""
        print(f"delay {delay:5.1f} s: stopped {dt:5.2f} s after SIGINT, exit {p.returncode}, left {left}, "
              f"traceback {'Traceback' in err}; last line: {last}")


if __name__ == "__main__":
    for d in (float(x) for x in (sys.argv[1:] or ["2", "4", "6", "8", "10", "12"])):
        once(d)
