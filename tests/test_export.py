"""Run folders: the OEM read back by an independent reader, CSV columns, plan.json round trip,
atomic writing, the report, and ``slingback check`` / ``plot`` / ``solve`` on a written plan.

The plan is hand-made (``export_fixture``): a free return in the circular-Moon model plus one small
burn, with the events the independent propagator finds, so it passes verification by construction.
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import os
import re
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
        "plan.opm", "plan-icrf.opm", "report.md", "manifest.json", "path-inertial.png", "path-rotating.png",
        "altitude.png", "burns.png"])
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
    # it ends at the plan's entry interface crossing, through the plan's perilune; the plan's events
    # come from another integrator (export_fixture: scipy's Radau; measured against the DOP853
    # re-propagation 1.4e-5 s, 5e-5 km and 5e-8 km/s at entry, 9e-6 s at perilune): bounds of
    # 1 ms, 1 m and 5 mm/s leave a wide margin and still catch a wrong crossing (11 km/s at entry)
    entry, peri = plan.event("entry"), plan.event("perilune")
    assert t1[-1] == pytest.approx(entry.epoch, abs=1e-3)
    np.testing.assert_allclose(y1[-1, :3], entry.state[:3], atol=1e-3)
    np.testing.assert_allclose(y1[-1, 3:], entry.state[3:], atol=5e-6)
    k = np.argmin(abs(t1 - peri.epoch))
    assert abs(t1[k] - peri.epoch) < 1e-3
    np.testing.assert_allclose(y1[k, :3], peri.state[:3], atol=1e-3)
    np.testing.assert_allclose(y1[k, 3:], peri.state[3:], atol=5e-6)


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
BURN_COLUMNS = ["burn", "epoch_tdb", "t_tdb_s", "dv_mps", "dv_x_mps", "dv_y_mps", "dv_z_mps", "dv_r_mps",
                "dv_t_mps", "dv_n_mps", "window_open_tdb", "window_close_tdb", "max_dv_mps", "direction", "leg"]
FINITE_BURN_COLUMNS = ["mass_before_kg", "propellant_kg", "mass_after_kg", "duration_s", "ignition_epoch_tdb",
                       "ignition_t_tdb_s", "cutoff_epoch_tdb", "cutoff_t_tdb_s"]


def test_csv_columns_and_values(case, folder):
    """pandas.read_csv with its defaults: header on line 1, no comment lines, values as written."""
    _, _, plan = case
    burns = pd.read_csv(folder / "burns.csv")
    assert list(burns.columns) == BURN_COLUMNS + FINITE_BURN_COLUMNS
    assert burns.dv_mps[0] == pytest.approx(plan.burns[0].dv_mps, rel=1e-12)
    assert burns.t_tdb_s[0] == plan.burns[0].epoch
    np.testing.assert_allclose(burns[["dv_r_mps", "dv_t_mps", "dv_n_mps"]].iloc[0],
                               1000 * np.array(plan.burns[0].dv_rtn), rtol=1e-12)
    traj = pd.read_csv(folder / "trajectory.csv")
    assert list(traj.columns) == ["epoch_tdb", "t_tdb_s", "arc", "x_km", "y_km", "z_km", "vx_kms",
                                  "vy_kms", "vz_kms", "altitude_earth_km", "altitude_moon_km"]
    assert traj.t_tdb_s.is_monotonic_increasing and set(traj.arc) == {0, 1}
    assert traj.altitude_earth_km.iloc[-1] == pytest.approx(121.92, abs=1e-6)
    nodes = pd.read_csv(folder / "nodes.csv")
    assert len(nodes) == len(plan.trajectory_t)
    np.testing.assert_array_equal(nodes[["x_km", "vz_kms"]].to_numpy(), plan.trajectory_y[:, [0, 5]])
    for name in ("burns.csv", "trajectory.csv", "nodes.csv"):
        text = (folder / name).read_text()
        assert "#" not in text and text.splitlines()[0].split(",")[0] in ("burn", "epoch_tdb")
        # the standard library's reader (what a spreadsheet import does) sees one table too
        rows = list(csv.reader(io.StringIO(text)))
        assert len({len(r) for r in rows}) == 1 and len(rows) == 1 + len(pd.read_csv(folder / name))


def test_fixture_verdict_sees_a_wrong_claimed_event(case):
    """The fixture's claims (another integrator, export_fixture) pass; the same claims with the
    perilune 2 km higher, or the entry 2 km along the track, fail the verdict (tolerances 1 km)."""
    from optimizer.verify import verify

    problem, model, plan = case
    args = (model, problem, plan.start_epoch, np.array(plan.start_state), plan.burns)
    assert verify(*args, plan.events, problem.latest_epoch()).passed
    peri, entry = plan.event("perilune"), plan.event("entry")
    moved = np.array(entry.state)
    moved[:3] += 2.0 * moved[3:] / np.linalg.norm(moved[3:])
    for wrong, key in ((replace(peri, altitude_km=peri.altitude_km + 2.0), "perilune_altitude_km"),
                       (replace(entry, state=tuple(moved)), "entry_position_km")):
        claims = [wrong if e.name == wrong.name else e for e in plan.events]
        ver = verify(*args, claims, problem.latest_epoch())
        assert not ver.passed and any(v.startswith(f"{key} residual") for v in ver.violations), ver.violations


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
    _, _, plan = case
    text = (folder / "report.md").read_text()
    assert CAUTION in text and "NOT VERIFIED" not in text
    assert "Verdict: **PASSED**" in text
    for heading in ("## Case", "## Burns", "## Events", "## Constraints", "## Verification",
                    "## Solver record", "## Figures"):
        assert heading in text
    for png in ("path-inertial.png", "path-rotating.png", "altitude.png", "burns.png"):
        assert f"]({png})" in text and (folder / png).stat().st_size > 1000
    # the constraint row prints the re-propagated perilune altitude (4 decimals); the reference is
    # the fixture's own perilune, found with another integrator (scipy's Radau, export_fixture),
    # which agrees with the re-propagation to ~1e-7 km: a wrong figure in the row shows
    row = re.search(r"^\| perilune altitude \| ([0-9.]+) \| 100 \| 400 \| km \| 1 km \| (\w+) \|$", text, re.M)
    assert row is not None, "no perilune altitude row"
    assert float(row.group(1)) == pytest.approx(plan.event("perilune").altitude_km, abs=1e-4)
    assert row.group(2) == "inactive"  # inside [100, 400] km by more than the 1 km tolerance


def test_unverified_plan_is_marked(case, tmp_path):
    problem, model, plan = case
    bad = replace(plan, status="unverified", reason="entry_position_km residual 12 exceeds 1.0")
    out = write_run(bad, problem, tmp_path / "u", model=model)
    report = (out / "report.md").read_text()
    assert report.count("NOT VERIFIED") >= 3 and "entry_position_km residual 12" in report
    assert "## Diagnostics (NOT VERIFIED)" in report and CAUTION in report
    assert not (out / "trajectory.oem").exists() and "no trajectory.oem" in report
    assert not (out / "plan.opm").exists() and "no plan.opm" in report
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["status"] == "unverified" and manifest["verified"] is False
    assert "residual 12" in manifest["reason"]


def test_failed_plan_still_writes_diagnostics(case, tmp_path):
    problem, model, plan = case
    failed = replace(plan, status="failed", reason="IPOPT stopped: maximum iterations", verification=None,
                     burns=[replace(plan.burns[0], epoch=plan.start_epoch - 3600.0)], events=[],
                     trajectory_t=np.empty(0), trajectory_y=np.empty((0, 6)))
    out = write_run(failed, problem, tmp_path / "f", model=model)
    assert sorted(os.listdir(out)) == ["burns.csv", "manifest.json", "plan.json", "problem.toml", "report.md"]
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
    """Stand-in for optimizer.solve that returns the hand-made plan (the CLI plumbing under test)."""
    problem, model, plan = case
    seen = {}

    def solve(p, *, warm=None, progress=None, **_):
        seen["problem"] = p
        if progress:
            progress("stub solver")
        return seen.get("plan", plan)

    stub = types.SimpleNamespace(solve=solve, SolveError=type("SolveError", (ValueError,), {}))
    monkeypatch.setitem(sys.modules, "optimizer.solve", stub)
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
    # the burns themselves still check, but the file does not claim a verified plan: check is a gate
    code, _, err = run(["check", str(out / "plan.json"), "--quiet"])
    assert code == 3 and "status: the plan says 'infeasible'" in err and "re-verification passed" in err


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


# --- manifest.json ------------------------------------------------------------------------------
def test_manifest_lists_every_file_with_role_columns_and_units(case, folder):
    _, _, plan = case
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["format"] == "slingback-run-manifest" and manifest["caution"] == CAUTION
    assert (manifest["status"], manifest["verified"], manifest["case"]) == ("verified", True, "export-case")
    assert manifest["time_scale"] == "TDB" and manifest["model"] == "earth-moon"
    listed = [f["name"] for f in manifest["files"]]
    assert sorted(listed) == sorted(os.listdir(folder)) and len(set(listed)) == len(listed)
    for entry in manifest["files"]:
        assert entry["role"]
        if entry["name"] == "manifest.json":
            continue
        data = (folder / entry["name"]).read_bytes()
        assert entry["sha256"] == hashlib.sha256(data).hexdigest() and entry["bytes"] == len(data)
        if entry["name"].endswith(".csv"):
            columns = [c["name"] for c in entry["columns"]]
            assert columns == list(pd.read_csv(folder / entry["name"]).columns)
            assert all(c["description"] for c in entry["columns"])
            units = {c["name"]: c["unit"] for c in entry["columns"]}
            assert units["t_tdb_s"] == "s" and units.get("x_km", "km") == "km"
    burns = next(f for f in manifest["files"] if f["name"] == "burns.csv")
    assert {c["name"]: c["unit"] for c in burns["columns"]}["dv_mps"] == "m/s"


# --- CCSDS OPM ----------------------------------------------------------------------------------
def _opm(path):
    return NdmIo().from_path(path)


def test_opm_reads_back_equal_to_plan_json(case, folder):
    """CCSDS 502.0-B-2 OPM, read with ccsds-ndm: one maneuver per non-zero burn, every number equal
    to plan.json's to the last digit written (epochs to the microsecond written)."""
    data = json.loads((folder / "plan.json").read_text())
    for name, frame, key in (("plan.opm", "RTN", "dv_rtn_mps"), ("plan-icrf.opm", "ICRF", "dv_icrf_mps")):
        opm = _opm(folder / name)
        assert opm.header.originator == "SLINGBACK" and any("CAUTION" in c for c in opm.header.comment)
        meta = opm.body.segment.metadata
        assert (meta.object_name, meta.object_id, meta.center_name, meta.ref_frame, meta.time_system) == \
            ("Testbird-0", "export-case", "EARTH", "ICRF", "TDB")
        data_block = opm.body.segment.data
        sv = data_block.state_vector
        assert sv.epoch == data["start"]["epoch_tdb"]
        assert [sv.x.value, sv.y.value, sv.z.value, sv.x_dot.value, sv.y_dot.value, sv.z_dot.value] == \
            data["start"]["state_km_kms"]
        burns = [b for b in data["burns"] if b["dv_mps"] > 0]
        assert len(data_block.maneuver_parameters) == len(burns) == 1
        for man, b in zip(data_block.maneuver_parameters, burns):
            assert man.man_ref_frame == frame
            assert man.man_epoch_ignition == b["ignition_epoch_tdb"]
            assert abs(parse_epoch(man.man_epoch_ignition) - b["ignition_epoch_tdb_s"]) <= 0.5e-6
            assert man.man_duration.value == b["duration_s"]
            assert man.man_delta_mass.value == -b["propellant_kg"] < 0
            assert [1000.0 * man.man_dv_1.value, 1000.0 * man.man_dv_2.value, 1000.0 * man.man_dv_3.value] == b[key]


def test_opm_rtn_components_agree_with_the_icrf_ones(case, folder):
    """The RTN maneuver rotated back with axes built here from the OEM's pre-burn state (R along r,
    N along r x v, T = N x R: CCSDS 502.0-B-2's RTN) gives the ICRF maneuver."""
    oem = NdmIo().from_path(folder / "trajectory.oem")
    pre = oem.body.segment[0].data.state_vector[-1]
    r = np.array([pre.x.value, pre.y.value, pre.z.value])
    v = np.array([pre.x_dot.value, pre.y_dot.value, pre.z_dot.value])
    R = r / np.linalg.norm(r)
    N = np.cross(r, v) / np.linalg.norm(np.cross(r, v))
    T = np.cross(N, R)
    rtn = _opm(folder / "plan.opm").body.segment.data.maneuver_parameters[0]
    icrf = _opm(folder / "plan-icrf.opm").body.segment.data.maneuver_parameters[0]
    dv_rtn = np.array([rtn.man_dv_1.value, rtn.man_dv_2.value, rtn.man_dv_3.value])
    dv_icrf = np.array([icrf.man_dv_1.value, icrf.man_dv_2.value, icrf.man_dv_3.value])
    # the OEM prints km to 6 decimals at ~250,000 km: axes good to ~1e-11 rad
    np.testing.assert_allclose(dv_rtn[0] * R + dv_rtn[1] * T + dv_rtn[2] * N, dv_icrf, atol=1e-13)
    assert (rtn.man_epoch_ignition, rtn.man_duration.value) == (icrf.man_epoch_ignition, icrf.man_duration.value)


def test_finite_burn_figures_agree_in_every_file(case, folder):
    """Rocket equation with the fixture's invented spacecraft (1200 kg, 440 N, 225 s), written
    out by hand here; the same figures in burns.csv, plan.json, the OPM and the report."""
    from export_fixture import SPACECRAFT

    _, _, plan = case
    mass, thrust, isp = SPACECRAFT
    c = 9.80665 * isp
    propellant = mass * (1.0 - np.exp(-plan.burns[0].dv_mps / c))
    duration = propellant * c / thrust
    data = json.loads((folder / "plan.json").read_text())
    b = data["burns"][0]
    assert b["propellant_kg"] == pytest.approx(propellant, rel=1e-12)
    assert b["duration_s"] == pytest.approx(duration, rel=1e-12)
    assert b["ignition_epoch_tdb_s"] == pytest.approx(plan.burns[0].epoch - duration / 2, abs=1e-9)
    assert b["mass_before_kg"] == mass and b["mass_after_kg"] == pytest.approx(mass - propellant, rel=1e-15)
    assert data["finite_burns"]["total_propellant_kg"] == b["propellant_kg"]
    row = pd.read_csv(folder / "burns.csv").iloc[0]
    assert (row.propellant_kg, row.duration_s, row.ignition_t_tdb_s) == \
        (b["propellant_kg"], b["duration_s"], b["ignition_epoch_tdb_s"])
    assert abs(parse_epoch(row.ignition_epoch_tdb) - b["ignition_epoch_tdb_s"]) <= 0.5e-3  # to the millisecond
    report = (folder / "report.md").read_text()
    assert "## Finite burns" in report and f"{propellant:.3f}" in report and f"{duration:.3f}" in report


def test_without_a_spacecraft_table_the_figures_are_absent(case, tmp_path):
    problem, model, plan = case
    bare = replace(problem, propulsion=None)
    out = write_run(plan, bare, tmp_path / "bare", model=model)
    assert not (out / "plan.opm").exists() and not (out / "plan-icrf.opm").exists()
    assert list(pd.read_csv(out / "burns.csv").columns) == BURN_COLUMNS
    data = json.loads((out / "plan.json").read_text())
    assert "finite_burns" not in data and not set(FINITE_BURN_COLUMNS) & set(data["burns"][0])
    assert "propellant_kg" not in data["burns"][0] and "duration_s" not in data["burns"][0]
    report = (out / "report.md").read_text()
    assert "## Finite burns" not in report and "no plan.opm" in report and "[spacecraft]" in report


# --- plan.json: schema, versions, our own words -------------------------------------------------
def test_plan_json_fits_its_schema_and_the_schema_has_teeth(folder):
    from plan_schema import validator

    data = json.loads((folder / "plan.json").read_text())
    assert not list(validator().iter_errors(data))
    for mutate in (lambda d: d.update(format_version=1), lambda d: d.pop("burns"),
                   lambda d: d["burns"][0].pop("duration_s"),  # finite-burn figures come together
                   lambda d: d["warm_start"].update(lam_x=[0.0]),
                   lambda d: d["solver"].update(status="Solve_Succeeded"),
                   lambda d: d["start"].update(epoch_tdb="2027-05-11 00:00:00 UTC"),
                   lambda d: d.pop("finite_burns")):
        bad = json.loads(json.dumps(data))
        mutate(bad)
        assert list(validator().iter_errors(bad)), mutate


def test_solver_record_and_warm_start_in_our_own_words(case):
    """A record shaped as the solver writes it (library names) comes out in ours, and back."""
    _, _, plan = case
    run = {"timing_s": {"nlp_f": 0.1, "nlp_g": 0.2, "nlp_grad_f": 0.3, "nlp_jac_g": 0.4, "nlp_hess_l": 0.5},
           "status": "Solve_Succeeded", "success": True, "iterations": 12, "wall_s": 1.0}
    solved = replace(plan, solver={**run, "attempts": [dict(run)], "stages": [{"status": "verified"}]},
                     warm={"x": [1.0, 2.0], "lam_x": [0.5, 0.0], "lam_g": [3.0], "segments": 12, "steps": 2})
    data = solved.to_dict()
    text = json.dumps({k: data[k] for k in ("solver", "warm_start")})
    for word in ("nlp_", "lam_", '"x"', '"success"'):
        assert word not in text, word
    assert text.count("Solve_Succeeded") == 2 and data["solver"]["solver_message"] == "Solve_Succeeded"
    assert data["solver"]["timing_s"] == {"objective": 0.1, "constraints": 0.2, "objective_gradient": 0.3,
                                          "constraint_jacobian": 0.4, "lagrangian_hessian": 0.5}
    assert data["solver"]["stages"] == [{"status": "verified"}]  # a plan status, not the library's
    assert data["warm_start"]["bound_multipliers"] == [0.5, 0.0]
    assert Plan.from_dict(data).warm == solved.warm  # what a warm start reads in-process


def test_check_reads_version_1_and_refuses_others(folder, tmp_path):
    data = json.loads((folder / "plan.json").read_text())
    # a version-1 plan as version 1 wrote it: the library's words, the old first table, no figures
    problem = {k: v for k, v in data["problem"].items() if k not in ("case", "spacecraft")}
    problem["scenario"] = {"name": "export-case", "description": "old words", "vehicle": "Testbird-0"}
    v1 = {**data, "format_version": 1, "problem": problem, "warm_start": {"x": [1.0], "lam_x": [0.0], "lam_g": []},
          "solver": {"status": "Solve_Succeeded", "success": True, "timing_s": {"nlp_f": 0.1}, "iterations": 3},
          "burns": [{k: v for k, v in b.items() if k in ("epoch_tdb", "epoch_tdb_s", "dv_mps", "dv_icrf_mps",
                                                          "dv_rtn_mps")} for b in data["burns"]]}
    v1.pop("finite_burns")
    (tmp_path / "v1.json").write_text(json.dumps(v1))
    code, out, err = run(["check", str(tmp_path / "v1.json")])
    assert code == 0 and "PASSED" in out, err
    back = read_plan(tmp_path / "v1.json")
    assert back.problem["case"] == {"name": "export-case", "summary": "old words", "spacecraft": "Testbird-0"}
    assert back.warm["lam_x"] == [0.0]
    rewritten = back.to_dict()  # written again, it is version 2 in our own words
    assert rewritten["format_version"] == 2 and rewritten["solver"]["solver_message"] == "Solve_Succeeded"
    assert rewritten["warm_start"] == {"variables": [1.0], "bound_multipliers": [0.0], "constraint_multipliers": []}
    for version in (3, "2", None):
        (tmp_path / "vx.json").write_text(json.dumps({**data, "format_version": version}))
        code, _, err = run(["check", str(tmp_path / "vx.json")])
        assert code == 2 and "vx.json" in err and "versions 1 and 2" in err and "Traceback" not in err


def test_check_and_plot_take_a_run_folder(folder, tmp_path):
    code, out, err = run(["check", str(folder), "--json"])
    assert code == 0, err
    assert json.loads(out)["plan"] == str(folder / "plan.json")
    code, out, err = run(["plot", str(folder), "--out", str(tmp_path / "figs")])
    assert code == 0, err
    assert len(os.listdir(tmp_path / "figs")) == 4
    code, _, err = run(["check", str(tmp_path)])  # a folder without a plan
    assert code == 2 and "plan.json" in err


def test_exports_speak_our_own_vocabulary(folder):
    for name in ("report.md", "trajectory.oem", "plan.opm", "manifest.json", "plan.json", "problem.toml"):
        text = (folder / name).read_text().lower()
        assert "scenario" not in text and "vehicle" not in text, name
    report = (folder / "report.md").read_text()
    assert "## Case" in report and "| spacecraft | Testbird-0 |" in report


def test_figure_footers_carry_the_whole_caution(case, tmp_path, monkeypatch):
    from matplotlib.figure import Figure

    problem, model, plan = case
    footers, save = [], Figure.savefig

    def savefig(fig, *args, **kwargs):
        footers.append(" ".join(t.get_text() for t in fig.texts))
        return save(fig, *args, **kwargs)

    monkeypatch.setattr(Figure, "savefig", savefig)
    from optimizer.export import write_plot_files

    names = write_plot_files(plan, problem, tmp_path, model=model)
    assert len(footers) == len(names) == 4
    for text in footers:
        assert CAUTION in text.replace("\n", " ")


def test_every_run_folder_is_checked_against_the_schema(case, tmp_path, monkeypatch):
    """The suite-wide hook (tests/conftest.py) refuses a plan.json that breaks the schema."""
    problem, model, plan = case
    monkeypatch.setattr("optimizer.plan.FORMAT_VERSION", 7)
    with pytest.raises(AssertionError, match="plan.schema.json"):
        write_run(plan, problem, tmp_path / "bad", model=model)
    assert not (tmp_path / "bad").exists()


def test_search_figure_of_a_zero_dv_answer_warns_of_nothing(case, tmp_path):
    """Found by exploratory testing: a start already on a free return (every seed 0 m/s) made
    matplotlib warn on stderr that the Δv axis could not be log-scaled, and a figure without
    labelled lines warned of an empty legend.  Warnings are errors here."""
    import warnings
    from dataclasses import replace

    from optimizer.export.figures import write_search_figure

    problem, model, plan = case
    seeds = [{"burn": 1, "epoch_tdb_s": plan.start_epoch + 3600.0 * k, "family": "same side, same sense",
              "screened_dv_mps": 0.0, "outcome": "screened", "screen_s": 0.0} for k in range(1, 4)]
    starts = [{**seeds[0], "status": "verified", "total_dv_mps": 0.0}]
    zero = replace(plan, solver={**plan.solver, "search": {"seeds": seeds, "starts": starts, "chosen": 0}})
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert write_search_figure(zero, problem, tmp_path, model_name="test") == ["search.png"]
    assert (tmp_path / "search.png").stat().st_size > 0
