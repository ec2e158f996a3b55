"""Run folders: the OEM read back by an independent reader, CSV columns, plan.json round trip,
atomic writing, the report, and ``slingback check`` / ``plot`` / ``solve`` on a written plan.

The plan is hand-made (``export_fixture``): a free return in the circular-Moon model plus one small
burn, with the events the independent propagator finds, so it passes verification by construction.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import sys
import types
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from ccsds_ndm.ndm_io import NdmIo

from export_fixture import make_case
from optimizer.cli import main
from optimizer.constants import CAUTION
from optimizer.export import read_plan, recheck, sample_plan, write_run
from optimizer.plan import Plan
from optimizer.problem_file import dumps_toml, problem_from_dict, problem_to_dict
from optimizer.propagate import propagate_burns
from optimizer.timescales import parse_epoch


def run(argv):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def case():
    return make_case()


@pytest.fixture(scope="module")
def folder(case, tmp_path_factory):
    problem, model, plan = case
    return write_run(plan, problem, tmp_path_factory.mktemp("runs") / "export-case", model=model)


def test_folder_contents(folder):
    assert sorted(os.listdir(folder)) == sorted([
        "plan.json", "problem.toml", "burns.csv", "nodes.csv", "trajectory.csv", "trajectory.oem",
        "report.md", "path-inertial.png", "path-rotating.png", "altitude.png", "burns.png"])
    assert not [p for p in os.listdir(folder.parent) if p.startswith(".")]  # no temporary left


# --- CCSDS OEM ----------------------------------------------------------------------------------
def test_oem_read_by_independent_reader(case, folder):
    """CCSDS 502.0-B-2 OEM, read back with the ccsds-ndm package (an independent KVN reader)."""
    problem, model, plan = case
    oem = NdmIo().from_path(folder / "trajectory.oem")
    assert oem.header.originator == "SLINGBACK"
    assert any("CAUTION" in c for c in oem.header.comment)
    segments = oem.body.segment
    assert len(segments) == len(plan.burns) + 1  # one per coast arc
    for seg in segments:
        meta = seg.metadata
        assert (meta.object_name, meta.object_id) == ("Testbird-0", "export-case")
        assert (meta.center_name, meta.ref_frame, meta.time_system) == ("EARTH", "ICRF", "TDB")
        assert meta.start_time == seg.data.state_vector[0].epoch
        assert meta.stop_time == seg.data.state_vector[-1].epoch

    def states(seg):
        sv = seg.data.state_vector
        t = np.array([parse_epoch(s.epoch) for s in sv])
        y = np.array([[s.x.value, s.y.value, s.z.value, s.x_dot.value, s.y_dot.value, s.z_dot.value]
                      for s in sv])
        return t, y

    (t0, y0), (t1, y1) = states(segments[0]), states(segments[1])
    # starts at the plan's start state; the arcs meet at the burn, with the burn's Δv between them
    assert t0[0] == plan.start_epoch
    np.testing.assert_allclose(y0[0], plan.start_state, atol=1e-6)
    assert t0[-1] == t1[0] == plan.burns[0].epoch
    np.testing.assert_allclose(y1[0, 3:] - y0[-1, 3:], plan.burns[0].dv, atol=2e-9)
    np.testing.assert_allclose(y1[0, :3], y0[-1, :3], atol=1e-6)
    # every state agrees with a fresh propagation of the plan's burns (6 decimals of km written)
    arcs = propagate_burns(model, plan.start_epoch, np.array(plan.start_state),
                           [(b.epoch, b.dv) for b in plan.burns], problem.latest_epoch(),
                           events=("entry",), entry_radius=problem.arrival.entry_radius_km)
    for arc, (t, y) in zip(arcs, ((t0, y0), (t1, y1))):
        np.testing.assert_allclose(arc.state(t).T[:, :3], y[:, :3], atol=2e-6)
        np.testing.assert_allclose(arc.state(t).T[:, 3:], y[:, 3:], atol=2e-9)
    # it ends at the plan's entry interface crossing, through the plan's perilune
    entry, peri = plan.event("entry"), plan.event("perilune")
    assert t1[-1] == pytest.approx(entry.epoch, abs=1e-6)
    np.testing.assert_allclose(y1[-1], entry.state, atol=1e-5)
    k = np.argmin(abs(t1 - peri.epoch))
    assert abs(t1[k] - peri.epoch) < 1e-6
    np.testing.assert_allclose(y1[k], peri.state, atol=1e-5)


def test_sampling_is_dense_near_the_bodies(case):
    problem, model, plan = case
    s = sample_plan(plan, problem, model)
    gaps = np.diff(s.t)
    r = np.linalg.norm(s.y[:-1, :3], axis=1)
    assert gaps.max() <= 600.0
    assert gaps[r < 10000.0].max() < 30.0  # near the entry interface the vehicle moves ~11 km/s
    d = np.linalg.norm(s.y[:-1, :3] - s.moon_r[:-1], axis=1)
    assert gaps[d < 5000.0].max() < 60.0


# --- tables and JSON ----------------------------------------------------------------------------
def test_csv_columns_and_values(case, folder):
    _, _, plan = case
    burns = pd.read_csv(folder / "burns.csv", comment="#")
    assert list(burns.columns) == ["burn", "epoch_tdb", "t_tdb_s", "dv_mps", "dv_x_mps", "dv_y_mps",
                                   "dv_z_mps", "dv_r_mps", "dv_t_mps", "dv_n_mps", "window_open_tdb",
                                   "window_close_tdb", "max_dv_mps", "direction", "leg"]
    assert burns.dv_mps[0] == pytest.approx(plan.burns[0].dv_mps, rel=1e-12)
    assert burns.t_tdb_s[0] == plan.burns[0].epoch
    np.testing.assert_allclose(burns[["dv_r_mps", "dv_t_mps", "dv_n_mps"]].iloc[0],
                               1000 * np.array(plan.burns[0].dv_rtn), rtol=1e-12)
    traj = pd.read_csv(folder / "trajectory.csv", comment="#")
    assert list(traj.columns) == ["epoch_tdb", "t_tdb_s", "arc", "x_km", "y_km", "z_km", "vx_kms",
                                  "vy_kms", "vz_kms", "altitude_earth_km", "altitude_moon_km"]
    assert traj.t_tdb_s.is_monotonic_increasing and set(traj.arc) == {0, 1}
    assert traj.altitude_earth_km.iloc[-1] == pytest.approx(121.92, abs=1e-6)
    nodes = pd.read_csv(folder / "nodes.csv", comment="#")
    assert len(nodes) == len(plan.trajectory_t)
    for name in ("burns.csv", "trajectory.csv"):
        head = (folder / name).read_text().splitlines()[:3]
        assert head[0].startswith("# slingback") and CAUTION in head[2] and "VERIFIED" in head[1]


def test_plan_json_round_trip(case, folder):
    problem, _, plan = case
    data = json.loads((folder / "plan.json").read_text())
    back = Plan.from_dict(data)
    assert back.status == plan.status == "verified"
    assert [b.epoch for b in back.burns] == [b.epoch for b in plan.burns]
    np.testing.assert_allclose(back.burns[0].dv, plan.burns[0].dv, rtol=1e-15)
    assert [(e.name, e.epoch) for e in back.events] == [(e.name, e.epoch) for e in plan.events]
    np.testing.assert_array_equal(back.trajectory_y, plan.trajectory_y)
    assert problem_from_dict(back.problem) == problem
    assert data["caution"] == CAUTION


def test_report(case, folder):
    text = (folder / "report.md").read_text()
    assert CAUTION in text and "NOT VERIFIED" not in text
    assert "Verdict: **PASSED**" in text
    for heading in ("## Case", "## Burns", "## Events", "## Constraints", "## Verification",
                    "## Solver record", "## Figures"):
        assert heading in text
    for png in ("path-inertial.png", "path-rotating.png", "altitude.png", "burns.png"):
        assert f"]({png})" in text and (folder / png).stat().st_size > 1000
    assert "| perilune altitude | 147.3" in text and "inactive" in text


def test_unverified_plan_is_marked(case, tmp_path):
    problem, model, plan = case
    bad = replace(plan, status="unverified", reason="entry_position_km residual 12 exceeds 1.0")
    out = write_run(bad, problem, tmp_path / "u", model=model)
    report = (out / "report.md").read_text()
    assert report.count("NOT VERIFIED") >= 3 and "entry_position_km residual 12" in report
    assert "## Diagnostics (NOT VERIFIED)" in report and CAUTION in report
    assert not (out / "trajectory.oem").exists() and "no trajectory.oem" in report
    assert "NOT VERIFIED" in (out / "burns.csv").read_text().splitlines()[1]


def test_failed_plan_still_writes_diagnostics(case, tmp_path):
    problem, model, plan = case
    failed = replace(plan, status="failed", reason="IPOPT stopped: maximum iterations", verification=None,
                     burns=[replace(plan.burns[0], epoch=plan.start_epoch - 3600.0)], events=[],
                     trajectory_t=np.empty(0), trajectory_y=np.empty((0, 6)))
    out = write_run(failed, problem, tmp_path / "f", model=model)
    assert sorted(os.listdir(out)) == ["burns.csv", "plan.json", "problem.toml", "report.md"]
    report = (out / "report.md").read_text()
    assert "NOT VERIFIED" in report and "maximum iterations" in report and "could not be re-propagated" in report
    assert Plan.from_dict(json.loads((out / "plan.json").read_text())).status == "failed"


# --- atomic writing -----------------------------------------------------------------------------
def test_oem_marks_an_unverified_plan(case):
    from optimizer.export import oem_text

    problem, model, plan = case
    bad = replace(plan, status="unverified", reason="residual too large")
    text = oem_text(sample_plan(bad, problem, model), bad, problem)
    comments = " ".join(line[8:] for line in text.splitlines() if line.startswith("COMMENT "))
    assert "status UNVERIFIED (NOT VERIFIED:" in comments and "too large" in comments


def test_no_folder_left_when_writing_fails(case, tmp_path, monkeypatch):
    problem, model, plan = case

    def broken(*args, **kwargs):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr("optimizer.export.run.oem_text", broken)
    with pytest.raises(RuntimeError, match="disk on fire"):
        write_run(plan, problem, tmp_path / "run", model=model)
    assert os.listdir(tmp_path) == []


def test_no_overwrite_without_force(case, tmp_path, monkeypatch):
    problem, model, plan = case
    out = tmp_path / "run"
    out.mkdir()
    (out / "keep.txt").write_text("analyst's notes")
    with pytest.raises(FileExistsError, match="--force"):
        write_run(plan, problem, out, model=model)
    assert os.listdir(out) == ["keep.txt"]
    # a failure while replacing keeps the old folder
    monkeypatch.setattr("optimizer.export.run.oem_text", lambda *a, **k: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        write_run(plan, problem, out, model=model, force=True)
    assert os.listdir(out) == ["keep.txt"] and os.listdir(tmp_path) == ["run"]
    monkeypatch.undo()
    write_run(plan, problem, out, model=model, force=True)
    assert "plan.json" in os.listdir(out) and "keep.txt" not in os.listdir(out)
    assert os.listdir(tmp_path) == ["run"]  # old folder deleted, no temporary left


# --- the command line on written plans ----------------------------------------------------------
def test_check_passes_then_fails_after_hand_edit(folder, tmp_path):
    code, out, err = run(["check", str(folder / "plan.json")])
    assert code == 0, err
    assert "PASSED" in out
    data = json.loads((folder / "plan.json").read_text())
    data["burns"][0]["dv_icrf_mps"][1] += 0.5  # half a metre per second, typed in by hand
    edited = tmp_path / "plan.json"
    edited.write_text(json.dumps(data))
    code, out, err = run(["check", str(edited), "--json"])
    assert code == 3
    summary = json.loads(out)
    assert summary["passed"] is False and summary["violations"]
    assert "FAILED" in err and "Traceback" not in err


def test_check_refuses_bad_plan_files(folder, tmp_path):
    cases = {"missing.json": None, "garbage.json": "{not json", "list.json": "[1, 2]",
             "wrong.json": json.dumps({"format": "something-else"})}
    data = json.loads((folder / "plan.json").read_text())
    data["problem"] = {}
    cases["noproblem.json"] = json.dumps(data)
    data["problem"] = {**json.loads((folder / "plan.json").read_text())["problem"], "lunr": {}}
    cases["badproblem.json"] = json.dumps(data)
    for name, text in cases.items():
        if text is not None:
            (tmp_path / name).write_text(text)
        code, _, err = run(["check", str(tmp_path / name)])
        assert code == 2, (name, err)
        assert name in err and "Traceback" not in err
    assert "lunr" in err


def test_direct_recheck_matches(case, folder):
    assert recheck(read_plan(folder / "plan.json")).passed


def test_plot_command(folder, tmp_path):
    code, out, err = run(["plot", str(folder / "plan.json"), "--out", str(tmp_path / "figs"), ])
    assert code == 0, err
    assert sorted(os.listdir(tmp_path / "figs")) == ["altitude.png", "burns.png", "path-inertial.png",
                                                     "path-rotating.png"]


def test_models_and_sweep():
    code, out, _ = run(["models"])
    assert code == 0 and all(k in out for k in ("two-body", "earth-moon", "cr3bp", "ephemeris"))
    assert run(["sweep"])[0] == 2
    code, out, _ = run(["--help"])
    assert code == 0 and "exit codes" in out and CAUTION in out
    assert run(["solve"])[0] == 2  # usage error


@pytest.fixture
def stub_solver(case, monkeypatch):
    """Stand-in for optimizer.solver that returns the hand-made plan (the CLI plumbing under test)."""
    problem, model, plan = case
    seen = {}

    def solve(p, *, warm=None, progress=None):
        seen["problem"] = p
        if progress:
            progress("stub solver")
        return seen.get("plan", plan)

    stub = types.SimpleNamespace(solve=solve, SolveError=type("SolveError", (ValueError,), {}))
    monkeypatch.setitem(sys.modules, "optimizer.solver", stub)
    return seen


def test_solve_command(case, stub_solver, tmp_path):
    problem, _, plan = case
    path = tmp_path / "export-case.toml"
    path.write_text(dumps_toml(problem_to_dict(problem)))
    out = tmp_path / "runs" / "x"
    code, stdout, err = run(["solve", str(path), "--out", str(out), "--json"])
    assert code == 0, err
    assert stub_solver["problem"] == problem
    summary = json.loads(stdout)
    assert summary["status"] == "verified" and summary["out"] == str(out)
    assert "stub solver" in err
    code, _, err = run(["solve", str(path), "--out", str(out)])
    assert code == 2 and "already exists" in err
    code, _, err = run(["solve", str(path), "--out", str(out), "--force", "--quiet"])
    assert code == 0 and err == ""
    stub_solver["plan"] = replace(plan, status="infeasible", reason="perilune range cannot be met")
    code, _, err = run(["solve", str(path), "--out", str(out), "--force", "--quiet"])
    assert code == 3 and "perilune range cannot be met" in err
    assert "NOT VERIFIED" in (out / "report.md").read_text()
    assert run(["check", str(out / "plan.json"), "--quiet"])[0] == 0  # the burns themselves still check


def test_demo_command_finds_its_problem(case, stub_solver, tmp_path):
    _, _, plan = case
    stub_solver["plan"] = replace(plan, status="failed", reason="stub", burns=[], events=[],
                                  verification=None, trajectory_t=np.empty(0),
                                  trajectory_y=np.empty((0, 6)))
    out = tmp_path / "demo"
    for _ in range(2):  # reruns replace the earlier demo
        code, _, err = run(["demo", "--out", str(out), "--quiet"])
        assert code == 3 and "stub" in err
        assert stub_solver["problem"].name == "demo-abort"
        assert (out / "report.md").exists()
