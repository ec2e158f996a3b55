"""Trade studies: a small real sweep checked the way an analyst would check one by hand.

The scenario is invented: a ballistic free return (perilune 150 km, ephemeris model) built with the
independent propagator, started 40 h before perilune and nudged by +10 m/s along the velocity, so
that a small burn is needed to get home.  The grid is 2 burn epochs x 3 arrival epochs around the
optimum; the same sweep is run on local processes, in this process (interrupted and resumed) and on
a Dask cluster on loopback, and the three tables must be identical.
"""

from __future__ import annotations

import json
import math
import shutil

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import free_return_fixture as fr
from optimizer import solve
from optimizer.constants import CAUTION
from optimizer.models import build_model
from optimizer.problem import BurnSpec, LunarPass, ModelSpec, Problem, ReturnSpec, StateStart
from optimizer.propagate import propagate
from optimizer.timescales import parse_epoch
from optimizer import trade
from optimizer.export.trade_folder import write_trade_folder
from optimizer.problem_file import load_sweep_file

DAY = 86400.0
T_PERI = parse_epoch("2027-05-13T12:00:00 TDB")
T0 = T_PERI - 40 * 3600.0

# Δv agrees between cells and the reference to IPOPT's tolerance (1e-9 on Δv/100 m/s) plus the
# difference between meshes (~1e-5 m/s measured); 0.01 m/s is far above both and far below any
# physical difference between cells (~0.3 m/s per 0.1 day of arrival shift here).
DV_TOL_MPS = 0.01


class Interrupt(Exception):
    pass


# ------------------------------------------------------------------------------------------------
# Pareto set on random tables: non-dominated, and nothing non-dominated left out
# ------------------------------------------------------------------------------------------------
def brute_pareto(df):
    ok = df[df["verified"] & np.isfinite(df["return_duration_days"]) & np.isfinite(df["total_dv_mps"])]
    keep = []
    for i, a in ok.iterrows():
        x, y = ok["return_duration_days"], ok["total_dv_mps"]
        beaten = ((x <= a["return_duration_days"]) & (y <= a["total_dv_mps"])
                  & ((x < a["return_duration_days"]) | (y < a["total_dv_mps"])))
        if not beaten.any():
            keep.append(i)
    return set(keep)


values = st.one_of(st.sampled_from([1.0, 2.0, 3.0]), st.floats(0.0, 50.0), st.just(math.nan))
rows = st.lists(st.tuples(values, values, st.booleans()), min_size=0, max_size=40)


@given(rows)
@settings(max_examples=300, deadline=None)
def test_pareto_is_exactly_the_non_dominated_verified_set(data):
    df = pd.DataFrame(data, columns=["return_duration_days", "total_dv_mps", "verified"]).astype(
        {"return_duration_days": float, "total_dv_mps": float, "verified": bool})
    front = trade.pareto(df, x_tol=0.0)
    assert set(front.index) == brute_pareto(df)
    assert front["verified"].all()
    assert front["return_duration_days"].is_monotonic_increasing
    if len(front) > 1:  # along the front, quicker returns cost more
        d = front.drop_duplicates(["return_duration_days", "total_dv_mps"])
        assert (np.diff(d["total_dv_mps"].to_numpy()) < 0).all()


def test_pareto_hand_example():
    # (duration, Δv): (4, 9) and (5, 7) trade against each other; (5, 8) and (6, 7) are beaten by
    # (5, 7); (3, 12) is quickest; the failed cell (2, 1) does not count.
    df = pd.DataFrame({"return_duration_days": [4, 5, 5, 6, 3, 2], "total_dv_mps": [9, 7, 8, 7, 12, 1],
                       "verified": [True, True, True, True, True, False]})
    assert list(trade.pareto(df, x_tol=0.0).index) == [4, 0, 1]
    # durations a second apart are the same duration: the dearer of the two is not "faster"
    near = pd.DataFrame({"return_duration_days": [4.0, 4.0 + 1e-5, 5.0], "total_dv_mps": [9.0, 8.0, 7.0],
                         "verified": [True, True, True]})
    assert list(trade.pareto(near).index) == [1, 2]
    assert list(trade.pareto(near, x_tol=0.0).index) == [0, 1, 2]


@given(rows, st.floats(0.0, 5.0))
@settings(max_examples=200, deadline=None)
def test_pareto_with_a_duration_tolerance(data, tol):
    """With a tolerance the front is the exact front of durations snapped to their class: no kept
    cell is beaten by one at most ``tol`` slower, and no discarded cell survives it."""
    df = pd.DataFrame(data, columns=["return_duration_days", "total_dv_mps", "verified"]).astype(
        {"return_duration_days": float, "total_dv_mps": float, "verified": bool})
    front = trade.pareto(df, x_tol=tol)
    ok = df[df["verified"] & np.isfinite(df["return_duration_days"]) & np.isfinite(df["total_dv_mps"])]
    # the classes by brute force: cells joined when their durations are at most tol apart, joined
    # transitively (connected components), numbered in order of duration
    x = ok["return_duration_days"].to_numpy()
    comp = list(range(len(x)))

    def root(i):
        while comp[i] != i:
            i = comp[i]
        return i

    for i in range(len(x)):
        for j in range(len(x)):
            if abs(x[i] - x[j]) <= tol:
                comp[root(i)] = root(j)
    roots = [root(i) for i in range(len(x))]
    order = sorted(set(roots), key=lambda r: min(x[k] for k in range(len(x)) if roots[k] == r))
    snapped = ok.copy()
    snapped["return_duration_days"] = [float(order.index(r)) for r in roots]
    assert set(front.index) == brute_pareto(snapped)


# ------------------------------------------------------------------------------------------------
# A real sweep
# ------------------------------------------------------------------------------------------------
def trade_case_problem():
    """The invented problem of the test sweep (also used by tests/benchmarks/bench_cell_fallback.py):
    a ballistic free return through a 150 km perilune, nudged by +10 m/s along the velocity 40 h
    before perilune; one burn 1-12 h after the start.  Returns (problem, model)."""
    model = build_model(ModelSpec(), T_PERI - 6 * DAY, T0 + 12 * DAY)  # the problem's span (no arrival window)
    y_peri, _, _ = fr.build(model, T_PERI)
    y0 = propagate(model, T_PERI, y_peri, T0).y[:, -1]
    y0[3:] += 10e-3 * y0[3:] / np.linalg.norm(y0[3:])
    problem = Problem(name="trade-test", start=StateStart(T0, tuple(y0)),
                      burns=(BurnSpec((T0 + 3600.0, T0 + 12 * 3600.0), 300.0),),
                      lunar=LunarPass((100.0, 5000.0)), arrival=ReturnSpec(flight_path_deg=(-7.0, -5.5)),
                      summary="invented test case")
    return problem, model


@pytest.fixture(scope="module")
def case():
    problem, model = trade_case_problem()
    reference = solve(problem, model=model)  # the unconstrained optimum (minimum Δv already)
    assert reference.verified, reference.reason
    t_arr = reference.event("entry").epoch
    burns = [T0 + 3600.0, T0 + 7 * 3600.0]
    arrivals = [t_arr - 0.25 * DAY, t_arr + 0.05 * DAY, t_arr + 0.35 * DAY]
    return problem, model, reference, burns, arrivals


@pytest.fixture(scope="module")
def swept(case, tmp_path_factory):
    """The sweep on two local processes, with a resume folder."""
    problem, model, _, burns, arrivals = case
    folder = tmp_path_factory.mktemp("resume-full")
    seen = []
    df = trade.sweep(problem, burns, arrivals, workers=2, model=model, resume_dir=folder, progress=seen.append,
                     reference=case[2])
    return df, folder, seen


def comparable(df):
    return df.drop(columns=trade.TIMING_COLUMNS).reset_index(drop=True)


def test_every_cell_solved_and_verified(swept):
    df, _, _ = swept
    assert len(df) == 6 and list(df.columns) == trade.COLUMNS
    bad = df[~df["verified"]]
    assert bad.empty, bad[["cell", "status", "reason"]].to_string()
    # the arrival found by the independent re-propagation is the column's epoch (tolerance 0)
    # (epochs are ~8.6e8 s: an absolute tolerance in seconds, no relative one, which would be 2.4 h)
    assert np.allclose(df["arrival_epoch_tdb_s"], df["arrival_grid_epoch_tdb_s"], rtol=0.0, atol=1.0)
    # the column is the burn-to-arrival time of that arrival (1 ms: rounding of days x 86400 only)
    assert np.allclose(df["burn_to_arrival_days"] * DAY + df["burn_epoch_tdb_s"], df["arrival_epoch_tdb_s"],
                       rtol=0.0, atol=1e-3)
    assert (df["perilune_altitude_km"].between(100.0 - 1.0, 5000.0 + 1.0)).all()
    assert (df["arrival_flight_path_deg"].between(-7.01, -5.49)).all()


def test_no_cell_beats_the_unconstrained_optimum(case, swept):
    _, _, reference, burns, _ = case
    df, _, _ = swept
    assert (df["total_dv_mps"] >= reference.total_dv_mps - DV_TOL_MPS).all(), df["total_dv_mps"].min()
    # the continuation starts at the cell nearest that optimum, found here by hand: the burn epoch
    # nearest the optimum's burn, and column 1 (the arrival 0.05 d after the optimum's; the others
    # are 0.25 d before and 0.35 d after)
    r0 = int(np.argmin([abs(t - reference.burns[0].epoch) for t in burns]))
    assert df.attrs["sweep"]["seed_cell"] == f"r{r0:02d}c01"
    assert df.loc[(df["row"] == r0) & (df["col"] == 1), "warm_from"].item() == "reference"
    # pinning the arrival away from the optimum's costs Δv: the seed column is the cheapest of each row
    for _, row in df.groupby("row"):
        assert row["total_dv_mps"].idxmin() == row.index[row["col"] == 1][0]


def test_real_pareto_set(swept):
    df, _, _ = swept
    front = trade.pareto(df, x_tol=0.0)
    assert not front.empty
    assert set(front.index) == brute_pareto(df)
    # with the default tolerance each column (one arrival epoch) gives at most one cell
    assert trade.pareto(df)["col"].is_unique
    for _, cell in df[df["verified"]].iterrows():  # every other verified cell is beaten by the front
        if cell.name in front.index:
            continue
        assert ((front["return_duration_days"] <= cell["return_duration_days"])
                & (front["total_dv_mps"] <= cell["total_dv_mps"])).any()


def test_progress_reports(swept):
    df, _, seen = swept
    first = [p for p in seen if p.stage == "solve"]
    assert first[0].done == 0 and first[-1].done == first[-1].total == len(df)
    assert [p.done for p in first] == list(range(len(df) + 1))
    assert all(p.eta_s is None or p.eta_s >= 0 for p in seen)
    # a cell that failed first and was rescued by its retry counts as failed only until then
    assert first[-1].failed == int((df["attempts"] == 2).sum())
    assert seen[-1].failed == 0


def test_interrupted_and_resumed_sweep_equals_uninterrupted(case, swept, tmp_path):
    problem, model, _, burns, arrivals = case
    df, _, _ = swept

    def stop_after_three(p):
        if p.stage == "solve" and p.done == 3:
            raise Interrupt

    with pytest.raises(Interrupt):  # in this process this time: a different executor, same table
        trade.sweep(problem, burns, arrivals, workers=1, model=model, resume_dir=tmp_path, progress=stop_after_three,
                    reference=case[2])
    saved = sorted(p.name for p in (tmp_path / "cells").iterdir())
    # in this process cells finish in launch order: the seed, then its row neighbours
    assert saved == ["r00c00.json", "r00c01.json", "r00c02.json", "reference.json"]
    seen = []
    again = trade.sweep(problem, burns, arrivals, workers=1, model=model, resume_dir=tmp_path, progress=seen.append,
                        reference=case[2])
    assert seen[0].done == 3  # the saved cells count as done and were not solved again
    pd.testing.assert_frame_equal(comparable(again), comparable(df))


def test_resume_folder_of_another_sweep_is_refused(case, swept):
    problem, model, _, burns, arrivals = case
    _, folder, _ = swept
    with pytest.raises(trade.SweepSpecError, match="different sweep"):
        trade.sweep(problem, burns, arrivals[:2], workers=1, model=model, resume_dir=folder)


def test_dask_cluster_on_loopback_gives_the_same_table(case, swept, tmp_path):
    """Row 1 (its spine cell and both neighbours) solved again on a two-worker Dask cluster on
    127.0.0.1, the rest read from a copy of the resume folder: the table must not change."""
    distributed = pytest.importorskip("distributed")
    problem, model, _, burns, arrivals = case
    df, folder, _ = swept
    shutil.copytree(folder, tmp_path / "resume")
    for cell in ("r01c00", "r01c01", "r01c02"):
        (tmp_path / "resume" / "cells" / f"{cell}.json").unlink()
    seen = []
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        on_dask = trade.sweep(problem, burns, arrivals, scheduler=cluster.scheduler_address, model=model,
                              resume_dir=tmp_path / "resume", progress=seen.append)
    solved = [p for p in seen if p.stage == "solve"]
    assert solved[0].done == 3 and solved[-1].done == 6
    pd.testing.assert_frame_equal(comparable(on_dask), comparable(df))


def test_best_plan_reproduces_the_cheapest_cell(case, swept):
    problem, model, _, _, _ = case
    df, folder, _ = swept
    plan = trade.best_plan(problem, df, resume_dir=folder, model=model)
    best = df.loc[df["total_dv_mps"].idxmin()]
    assert plan.verified and plan.solver["trade_cell"] == best["cell"]
    # re-solved at the solver's full tolerance from the cell's own answer (cells stop at 1e-7)
    assert plan.total_dv_mps == pytest.approx(best["total_dv_mps"], abs=1e-3)
    assert plan.burns[0].epoch == pytest.approx(best["burn_epoch_tdb_s"], abs=1e-3)


def test_a_verified_solve_records_its_final_primal_infeasibility(case):
    """The figure the cells' exact-Hessian gate reads is IPOPT's own primal infeasibility of the
    last iterate: a verified solve ends within the constraint tolerance."""
    last = case[2].solver["attempts"][-1]["primal_infeasibility"]
    assert last is not None and 0.0 <= last <= 1e-8  # IPOPT_OPTIONS: constr_viol_tol 1e-10, acceptable 1e-9


@pytest.mark.parametrize("inf_pr, solves", [(0.15, 1), (5.0, 1), (8.4e-7, 2), (None, 2)])
def test_exact_fallback_runs_only_after_a_near_feasible_stall(case, monkeypatch, inf_pr, solves):
    """A cell whose limited-memory attempt stalled at the iteration cap goes on with the exact
    Hessian only when it ended near feasible (``cells.FALLBACK_MAX_INFEASIBILITY``).  The solver is
    replaced by a stand-in that stalls; the figures are those measured by
    tests/benchmarks/bench_cell_fallback.py (a feasible stall ended at 8.4e-7 and the exact attempt
    verified it; cells without a solution ended at 0.15 to 5.0).  None: no finite figure was
    reported, and the exact attempt is tried."""
    import copy

    import optimizer
    from optimizer.trade import cells

    problem, _, reference, _, _ = case
    seen = []

    def stalls(prob, warm=None, model=None, ipopt_options=None, **kwargs):
        seen.append(dict(ipopt_options))
        plan = copy.copy(reference)
        plan.status, plan.reason = "failed", "IPOPT stopped with Maximum_Iterations_Exceeded"
        plan.solver = {"attempts": [{"iterations": 100, "primal_infeasibility": inf_pr}]}
        return plan

    monkeypatch.setattr(optimizer, "solve", stalls)
    rec, warm = cells.solve_task(problem, None, None, 100, 0)
    assert rec["status"] == "failed" and warm is None
    assert len(seen) == solves
    assert seen[0]["ipopt.hessian_approximation"] == "limited-memory"
    if solves == 2:
        assert "ipopt.hessian_approximation" not in seen[1]  # the exact Hessian


def test_write_trade_folder(swept, case, tmp_path):
    problem = case[0]
    df, _, _ = swept
    out = write_trade_folder(df, tmp_path / "trade", problem=problem)
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(["trade.csv", "trade.parquet", "pareto.csv", "trade-map.png", "trade-abort.png",
                            "trade-pareto.png", "trade-report.md", "manifest.json"])
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary folder left
    report = (out / "trade-report.md").read_text()
    assert CAUTION in report and "r00c01" in report
    text = (out / "trade.csv").read_text()
    assert "#" not in text.splitlines()[0]  # plain CSV: header on line 1, metadata in manifest.json
    back = pd.read_csv(out / "trade.csv")
    assert list(back.columns) == trade.COLUMNS
    assert np.allclose(back["total_dv_mps"], df["total_dv_mps"], rtol=1e-14)
    assert list(pd.read_csv(out / "pareto.csv")["cell"]) == list(trade.pareto(df)["cell"])
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["caution"] == CAUTION and manifest["case"] == problem.name
    assert sorted(f["name"] for f in manifest["files"]) == names
    columns = next(f["columns"] for f in manifest["files"] if f["name"] == "trade.csv")
    assert [c["name"] for c in columns] == trade.COLUMNS
    units = {c["name"]: c["unit"] for c in columns}
    assert (units["total_dv_mps"], units["burn_epoch_tdb_s"], units["perilune_altitude_km"]) == ("m/s", "s", "km")
    assert pd.read_parquet(out / "trade.parquet")["cell"].tolist() == df["cell"].tolist()
    from PIL import Image

    for name in ("trade-map.png", "trade-abort.png", "trade-pareto.png"):
        assert CAUTION in Image.open(out / name).info["Description"]
    with pytest.raises(FileExistsError):
        write_trade_folder(df, out)
    write_trade_folder(df, out, force=True)


def test_duration_axis_is_a_relaxation(case, tmp_path):
    """Allowing a longer return can only lower the Δv; past the optimum's own duration it is the
    optimum's Δv (burn epoch at the optimum's)."""
    problem, model, reference, _, _ = case
    dur = (reference.event("entry").epoch - T0) / DAY
    spec = {"burn_epochs": [_tdb(reference.burns[0].epoch)], "return_durations_days": [dur - 0.15, dur + 0.2]}
    df = trade.sweep_from_spec(problem, spec, workers=1, model=model, reference=reference)
    assert df["verified"].all(), df["reason"].tolist()
    short, long_ = df["total_dv_mps"]
    assert long_ == pytest.approx(reference.total_dv_mps, abs=DV_TOL_MPS)
    assert short > long_ + 0.1  # measured +0.30 m/s for arriving 0.15 d sooner
    assert df["return_duration_days"].iloc[0] <= dur - 0.15 + 1e-6


# ------------------------------------------------------------------------------------------------
# [sweep] tables
# ------------------------------------------------------------------------------------------------
def _tdb(t):
    from optimizer.timescales import format_epoch

    return format_epoch(t, 3) + " TDB"


def test_spec_axes():
    spec = {"burn_epochs": {"start": "2027-05-12T00:00:00 TDB", "stop": "2027-05-12T06:00:00 TDB", "count": 4},
            "arrival_epochs": ["2027-05-16T00:00:00 TDB", "2027-05-16T12:00:00 TDB"],
            "arrival_tolerance_hours": 0.5, "burn": 1, "max_iterations": 80, "retry_failed": False}
    s = trade.parse_sweep_spec(spec)
    t = parse_epoch("2027-05-12T00:00:00 TDB")
    assert s.burn_epochs == (t, t + 7200.0, t + 14400.0, t + 21600.0)
    assert s.arrival_epochs[1] - s.arrival_epochs[0] == 43200.0
    assert (s.arrival_tolerance_s, s.burn_index, s.max_iter, s.retry) == (1800.0, 0, 80, False)
    assert trade.parse_sweep_spec({"burn_epochs": ["2027-05-12T00:00:00 TDB"],
                                   "return_durations_days": {"start": 4, "stop": 6, "count": 3}}
                                  ).return_durations_days == (4.0, 5.0, 6.0)


@pytest.mark.parametrize("spec, message", [
    ({"arrival_epochs": ["2027-05-16T00:00:00"]}, r"\[sweep\]\.burn_epochs: missing"),
    ({"burn_epochs": ["2027-05-12T00:00:00"]}, r"\[sweep\]: give exactly one of arrival_epochs"),
    ({"burn_epochs": ["2027-05-12T00:00:00"], "arrival_epochs": ["2027-05-16T00:00:00"],
      "return_durations_days": [4.0]}, r"both given"),
    ({"burn_epochs": {"start": "2027-05-12T00:00:00", "stop": "2027-05-12T06:00:00", "count": 0},
      "return_durations_days": [4.0]}, r"\[sweep\]\.burn_epochs\.count: expected a whole number from 1 to 200, got 0"),
    ({"burn_epochs": {"start": "2027-05-12T00:00:00", "stop": "2027-05-11T06:00:00", "count": 3},
      "return_durations_days": [4.0]}, r"\[sweep\]\.burn_epochs\.stop: expected later"),
    ({"burn_epochs": {"start": "2027-05-12T00:00:00", "count": 3}, "return_durations_days": [4.0]},
     r"\[sweep\]\.burn_epochs\.stop: missing"),
    ({"burn_epochs": {"start": "2027-05-12T00:00:00", "end": "x", "count": 3}, "return_durations_days": [4.0]},
     r"\[sweep\]\.burn_epochs\.end: unknown key"),
    ({"burn_epochs": ["2027-05-12T00:00:00 UTC"], "return_durations_days": [4.0]},
     r"\[sweep\]\.burn_epochs\[0\]: expected an ISO-8601 TDB epoch"),
    ({"burn_epochs": ["2027-05-12T00:00:00", "2027-05-11T00:00:00"], "return_durations_days": [4.0]},
     r"\[sweep\]\.burn_epochs: values must increase strictly"),
    ({"burn_epochs": ["2027-05-12T00:00:00"], "return_durations_days": [4.0, -1.0]},
     r"\[sweep\]\.return_durations_days\[1\]: expected a number of days above 0 and at most 100"),
    ({"burn_epochs": ["2027-05-12T00:00:00"], "return_durations_days": [4.0], "arrival_tolerance_hours": 1.0},
     r"arrival_tolerance_hours: applies to arrival_epochs only"),
    ({"burn_epochs": ["2027-05-12T00:00:00"], "arrival_epoch": ["2027-05-16T00:00:00"]},
     r"\[sweep\]\.arrival_epoch: unknown key; did you mean 'arrival_epochs'\?"),
    ({"burn_epochs": ["2027-05-12T00:00:00"], "return_durations_days": [4.0], "max_iterations": 2},
     r"\[sweep\]\.max_iterations: expected a whole number from 5 to 3000, got 2"),
    ({"burn_epochs": ["2027-05-12T00:00:00"], "return_durations_days": [4.0], "retry_failed": "yes"},
     r"\[sweep\]\.retry_failed: expected true or false"),
])
def test_spec_errors_name_the_key(spec, message):
    with pytest.raises(trade.SweepSpecError, match=message) as err:
        trade.parse_sweep_spec(spec, source="problems/x.toml")
    assert str(err.value).startswith("problems/x.toml: [sweep]")


def test_spec_checked_against_the_problem(case):
    problem = case[0]
    late = _tdb(T0 + 13 * 3600.0)  # after the burn window closes
    with pytest.raises(trade.SweepSpecError, match=r"\[sweep\]\.burn_epochs: .* \(value 2\) lies outside the window "
                                                   r"of \[\[burn\]\] 1"):
        trade.parse_sweep_spec({"burn_epochs": [_tdb(T0 + 3600.0), late], "return_durations_days": [5.0]},
                               problem, "p.toml")
    with pytest.raises(trade.SweepSpecError, match=r"\[sweep\]\.burn: expected a whole number from 1 to 1"):
        trade.parse_sweep_spec({"burn_epochs": [_tdb(T0 + 3600.0)], "return_durations_days": [5.0], "burn": 2},
                               problem, "p.toml")
    with pytest.raises(trade.SweepSpecError, match="burn_epochs: .* lies outside the window"):
        trade.sweep(problem, [T0 + 13 * 3600.0], return_durations_days=[5.0], workers=1)
    with pytest.raises(trade.SweepSpecError, match="exactly one of"):
        trade.sweep(problem, [T0 + 3600.0], workers=1)


def test_resume_cell_files_are_small_and_plain_json(swept):
    _, folder, _ = swept
    files = list((folder / "cells").glob("r??c??.json"))
    assert len(files) == 6
    for f in files:
        assert f.stat().st_size < 100_000
        d = json.loads(f.read_text())
        final = d.get("retry") or d  # a cell rescued by its retry keeps both attempts
        assert d["format"] == "slingback-trade-cell" and final["record"]["status"] == "verified"
        assert len(final["warm"]["x"]) == len(final["warm"]["lam_x"])
    assert json.loads((folder / "sweep.json").read_text())["format"] == "slingback-trade-sweep"


def test_problem_file_with_a_sweep_table(tmp_path):
    from pathlib import Path

    shipped = (Path(__file__).resolve().parent.parent / "problems" / "demo-trade.toml").read_text()
    shipped_problem, shipped_spec = load_sweep_file(Path(__file__).resolve().parent.parent / "problems"
                                                          / "demo-trade.toml")
    assert len(shipped_spec.burn_epochs) == 12 and len(shipped_spec.arrival_epochs) == 12  # the 12 x 12 demo grid
    text = shipped.split("\n[sweep]")[0]  # the same file without its own [sweep] table
    good = tmp_path / "trade.toml"
    good.write_text(text + '\n[sweep]\nburn_epochs = { start = "2027-05-11T22:00:00 TDB", '
                    'stop = "2027-05-12T06:00:00 TDB", count = 5 }\nreturn_durations_days = [4.0, 5.0]\n')
    problem, spec = load_sweep_file(good)
    assert problem.name == "demo-trade" and len(spec.burn_epochs) == 5 and spec.return_durations_days == (4.0, 5.0)
    assert spec.burn_epochs[1] - spec.burn_epochs[0] == 2 * 3600.0
    bad = tmp_path / "bad.toml"
    bad.write_text(text + '\n[sweep]\nburn_epoch = ["2027-05-11T22:00:00 TDB"]\nreturn_durations_days = [4.0]\n')
    with pytest.raises(trade.SweepSpecError, match=r"bad.toml: \[sweep\]\.burn_epoch: unknown key; did you mean "
                                                    r"'burn_epochs'\?"):
        load_sweep_file(bad)
    none = tmp_path / "none.toml"
    none.write_text(text)
    with pytest.raises(trade.SweepSpecError, match=r"none.toml: \[sweep\]: missing"):
        load_sweep_file(none)
    from optimizer.problem_file import ProblemError

    assert issubclass(trade.SweepSpecError, ProblemError)  # the command line reports it like any file error


def test_progress_text():
    p = trade.SweepProgress("solve", 37, 144, 2, 80.0, 70.4, "r03c01")
    assert trade.progress_text(p) == "solve 37/144 cells, 2 without a verified answer, about 1 min 10 s left"
    assert "estimating" in trade.progress_text(trade.SweepProgress("solve", 0, 144, 0, 1.0, None))
