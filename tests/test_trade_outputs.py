"""The trade wing's boundaries: what reading a sweep file imports, where a sweep's results go when its
trade folder cannot be written, and how the segment-map thread count reaches a transcription.

These are checks of the package's own promises (docs/sweep-format.md, the contributor guide's
layering and bad-input rules), not of numbers: each can fail for exactly the reason in its name.
"""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DEMO_TRADE = ROOT / "problems" / "demo-trade.toml"


def test_reading_a_sweep_file_imports_no_trade_engine_pandas_or_plotting():
    """Reading (and validating) a problem file that carries a ``[sweep]`` table loads the table's
    validator only: not the sweep driver, the export layer, pandas, matplotlib or CasADi.  Run in a
    fresh interpreter, so nothing imported by another test hides an import."""
    code = f"""
import sys
import optimizer.problem_file as f
problem = f.load_problem({str(DEMO_TRADE)!r})
problem2, spec = f.load_sweep_file({str(DEMO_TRADE)!r})
assert len(spec.burn_epochs) == 12, spec
heavy = [m for m in ("pandas", "matplotlib", "casadi", "optimizer.trade.schedule", "optimizer.trade.cells",
                     "optimizer.trade.front", "optimizer.export", "optimizer.solve.strategy") if m in sys.modules]
print(",".join(heavy))
"""
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=ROOT,
                         timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "", f"reading a sweep file imported: {out.stdout.strip()}"


def _sweep_file(tmp_path: Path) -> Path:
    """demo-trade with a 1 x 1 grid (its burn window's first hour, the first arrival epoch)."""
    text = DEMO_TRADE.read_text().split("\n[sweep]")[0]
    path = tmp_path / "one-cell.toml"
    path.write_text(text + '\n[sweep]\nburn_epochs = ["2027-05-11T22:00:00 TDB"]\n'
                    'arrival_epochs = ["2027-05-16T12:00:00 TDB"]\narrival_tolerance_hours = 12.0\n'
                    "max_iterations = 60\n")
    return path


def test_sweep_into_a_path_under_a_file_is_refused_before_solving(tmp_path, monkeypatch, capsys):
    from optimizer import cli
    from optimizer.trade import schedule

    def must_not_run(*args, **kwargs):
        raise AssertionError("the sweep started before the output folder was checked")

    monkeypatch.setattr(schedule, "sweep", must_not_run)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    source = _sweep_file(tmp_path)
    before = sorted(p.name for p in tmp_path.iterdir())
    code = cli.main(["sweep", str(source), "--out", str(blocker / "trade"), "--workers", "1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert str(blocker / "trade") in err and "is a file" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # no folder, no resume store, nothing
    assert blocker.read_text() == "not a folder\n"


def test_unwritable_trade_folder_keeps_the_cells_and_leaves_nothing_half_written(tmp_path, monkeypatch, capsys):
    """A real one-cell sweep whose trade folder fails while being written (the disk fills up after
    the CSV files): exit 2, the message names the folder and the resume folder, no partial folder is
    left, the solved cells are in the resume folder, and a rerun with it writes the folder without
    solving again."""
    from optimizer import cli
    from optimizer.export import trade_folder

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "system-tmp"))
    (tmp_path / "system-tmp").mkdir()
    source = _sweep_file(tmp_path)
    out = tmp_path / "results" / "trade"

    def disk_full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with monkeypatch.context() as m:
        m.setattr(trade_folder, "_figures", disk_full)  # trade.csv and pareto.csv are written by then
        code = cli.main(["sweep", str(source), "--out", str(out), "--workers", "1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert f"the trade folder {out} could not be written" in err and os.strerror(errno.ENOSPC) in err
    assert not out.exists()
    assert [p.name for p in out.parent.iterdir()] == []  # no temporary ".trade.*.partial" folder left
    kept = [p for p in (tmp_path / "system-tmp").iterdir() if p.is_dir()]
    assert len(kept) == 1 and str(kept[0]) in err and f"--resume {kept[0]}" in err
    cells = kept[0] / "cells"
    saved = {p.name: p.stat().st_mtime_ns for p in cells.iterdir()}
    assert sorted(saved) == ["r00c00.json", "reference.json"]
    record = json.loads((cells / "r00c00.json").read_text())["record"]

    code = cli.main(["sweep", str(source), "--out", str(out), "--workers", "1", "--quiet", "--resume",
                     str(kept[0])])
    err = capsys.readouterr().err
    assert code in (0, 3), err  # 3 only if the one cell has no verified answer
    assert {p.name: p.stat().st_mtime_ns for p in cells.iterdir()} == saved  # nothing solved again
    import pandas as pd

    table = pd.read_csv(out / "trade.csv")
    assert table["status"].tolist() == [record["status"]]
    assert table["iterations"].tolist() == [record["iterations"]]


def test_transcription_thread_count_is_passed_in_not_patched():
    """The segment maps of a transcription get the thread count it is given (or the one of the
    enclosing ``map_threads`` block), and the module default is left alone."""
    from optimizer import transcription
    from optimizer.models import build_model
    from optimizer.problem_file import load_problem

    problem = load_problem(ROOT / "problems" / "demo-abort.toml")
    model = build_model(problem.model, problem.start_epoch, problem.latest_epoch())
    default = transcription.MAP_THREADS
    steps = [problem.mesh.steps] * len(transcription.phase_layout(problem))  # as the solver's first mesh
    plain = transcription.Transcription(problem, model, steps, problem.mesh.segments)
    with transcription.map_threads(3):
        inside = transcription.Transcription(problem, model, steps, problem.mesh.segments)
        explicit = transcription.Transcription(problem, model, steps, problem.mesh.segments, threads=1)
    after = transcription.Transcription(problem, model, steps, problem.mesh.segments)
    assert (plain.threads, inside.threads, explicit.threads, after.threads) == (default, 3, 1, default)
    assert transcription.MAP_THREADS == default
    # the built map itself: CasADi names a map over k threads "threadmap<k>_..." (12 segments: k | 12)
    assert problem.mesh.segments % 3 == 0 and problem.mesh.segments % default == 0
    assert str(inside._mapped(steps[0])).startswith("threadmap3_")  # noqa: SLF001
    assert str(plain._mapped(steps[0])).startswith(f"threadmap{default}_")  # noqa: SLF001
