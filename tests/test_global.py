"""The global layer (``optimizer.solve.search``) on planted cases: the answer is bounded by construction.

Planting (common practice in benchmarking optimisers): take a ballistic free return built by
root-finding (``free_return_fixture``: perilune 150 km, return vacuum perigee 40 km), choose a burn
epoch ``t_b`` and a Δv, and start the problem on the path that, given that Δv at ``t_b``, becomes
the free return: its state at ``t_b`` minus the Δv, propagated back to the start.  That burn is a
feasible plan, so the optimum of a problem whose window holds ``t_b`` is at most its size,
whatever the optimiser does.  The window is long (28 h) and the planted burn sits away from the
end the local solver would start from, which is where a single local solve used to land in an
expensive basin.
"""

import numpy as np
import pytest

import free_return_fixture as fr
from optimizer import solve
from optimizer.constants import ENTRY_INTERFACE_ALT, R_EARTH
from optimizer.frames import flight_path_angle
from optimizer.models import build_model
from optimizer.problem import BurnSpec, LunarPass, ModelSpec, Problem, ReturnSpec, StateStart
from optimizer.propagate import propagate
from optimizer.solve.search import target
from optimizer.timescales import parse_epoch

HOUR, DAY = 3600.0, 86400.0
T_PERI = parse_epoch("2033-07-21T09:00:00 TDB")
T_START = T_PERI - 40 * HOUR
ENTRY = R_EARTH + ENTRY_INTERFACE_ALT


@pytest.fixture(scope="module")
def model():
    return build_model(ModelSpec(kind="earth-moon"), T_PERI - 6 * DAY, T_START + 12 * DAY)


@pytest.fixture(scope="module")
def natural(model):
    y_peri, alts, _ = fr.build(model, T_PERI)
    assert np.allclose(alts, [200.0, 40.0], atol=1.0)
    return y_peri


def _planted_start(model, y_peri, t_b, dv_mps, direction):
    """Start state whose coast, given ``dv_mps`` along ``direction`` at ``t_b``, is the free return."""
    on_path = propagate(model, T_PERI, y_peri, t_b, terminal=()).y[:, -1]
    u = np.asarray(direction, dtype=float) / np.linalg.norm(direction)
    pre = on_path.copy()
    pre[3:] -= dv_mps * 1e-3 * u
    return propagate(model, t_b, pre, T_START, terminal=()).y[:, -1]


def _entry_angle(model, y_peri):
    arc = propagate(model, T_PERI, y_peri, T_PERI + 5 * DAY, events=("entry",), entry_radius=ENTRY)
    e = arc.first("entry")
    return np.degrees(flight_path_angle(e.y[:3], e.y[3:]))


def test_late_planted_burn_bounds_a_vacuum_perigee_answer(model, natural):
    t_b, planted = T_START + 30 * HOUR, 4.0
    start = _planted_start(model, natural, t_b, planted, [1.0, -2.0, 0.5])
    problem = Problem(name="planted-late", start=StateStart(T_START, tuple(start)),
                      burns=(BurnSpec((T_START + 2 * HOUR, T_START + 30 * HOUR + 1.0), 300.0),),
                      lunar=LunarPass((100.0, 2000.0)),
                      arrival=ReturnSpec(target="perigee", perigee_alt_km=(30.0, 50.0)),
                      model=ModelSpec(kind="earth-moon"))
    plan = solve(problem, model=model)
    assert plan.verified, plan.reason
    assert plan.total_dv_mps <= planted * (1 + 1e-3)  # the planted bound
    assert plan.event("perigee").altitude_km < ENTRY_INTERFACE_ALT  # a vacuum perigee below the interface
    search = plan.solver["search"]
    assert len({s["epoch_tdb_s"] for s in search["seeds"]}) >= 8 and search["starts"]


def test_early_planted_burn_bounds_an_entry_answer(model, natural):
    gamma = _entry_angle(model, natural)
    t_b, planted = T_START + 4 * HOUR, 6.0
    start = _planted_start(model, natural, t_b, planted, [-0.3, 1.0, 2.0])
    problem = Problem(name="planted-early", start=StateStart(T_START, tuple(start)),
                      burns=(BurnSpec((T_START + 3 * HOUR, T_START + 31 * HOUR), 300.0),),
                      lunar=LunarPass((100.0, 2000.0)),
                      arrival=ReturnSpec(flight_path_deg=(gamma - 0.5, gamma + 0.5)),
                      model=ModelSpec(kind="earth-moon"))
    plan = solve(problem, model=model)
    assert plan.verified, plan.reason
    assert plan.total_dv_mps <= planted * (1 + 1e-3)


def test_a_real_search_makes_the_same_starts_and_plan_with_starts_at_once(model, natural, monkeypatch):
    """The early planted case with every screened seed a start (the three cheapest), made one
    after another and then at once in forked processes: the same starts, iterations and plan; the
    chosen plan was made in another process, and the transcription rebuilt for it here has the
    bounds of the one the plan was solved in (the run made in this process)."""
    from optimizer.solve import search, strategy

    monkeypatch.setattr(search, "basins", lambda seeds, limit=search.MAX_STARTS: sorted(
        (s for s in seeds if s.dv is not None), key=lambda s: s.dv_mps)[:limit])
    gamma = _entry_angle(model, natural)
    start = _planted_start(model, natural, T_START + 4 * HOUR, 6.0, [-0.3, 1.0, 2.0])
    problem = Problem(name="planted-early", start=StateStart(T_START, tuple(start)),
                      burns=(BurnSpec((T_START + 3 * HOUR, T_START + 31 * HOUR), 300.0),),
                      lunar=LunarPass((100.0, 2000.0)),
                      arrival=ReturnSpec(flight_path_deg=(gamma - 0.5, gamma + 0.5)),
                      model=ModelSpec(kind="earth-moon"))
    runs = {}
    for workers in (1, 2):
        monkeypatch.setattr(strategy, "start_workers", lambda threads=1, n=workers: n)
        plan, tr = strategy.solve_with_transcription(problem, model=model)
        record = plan.solver["search"]
        runs[workers] = (plan, tr, record)
        assert plan.verified and record["start_workers"] == workers
    (p1, tr1, r1), (p2, tr2, r2) = runs[1], runs[2]
    fields = ("status", "total_dv_mps", "iterations", "explore", "uphill", "burn_epochs_tdb_s")
    assert len(r1["starts"]) == 3
    assert [[s.get(f) for f in fields] for s in r1["starts"]] == [[s.get(f) for f in fields] for s in r2["starts"]]
    assert r1["chosen"] == r2["chosen"] and p1.total_dv_mps == p2.total_dv_mps
    assert r2["starts"][r2["chosen"]].get("process") == "forked" and "process" not in r1["starts"][r1["chosen"]]
    assert tr2 is not tr1 and tr2.steps == tr1.steps
    assert np.array_equal(tr2.lbx, tr1.lbx) and np.array_equal(tr2.ubx, tr1.ubx)
    assert np.array_equal(tr2.lbg, tr1.lbg) and np.array_equal(tr2.ubg, tr1.ubg)


def test_targeting_converges_from_a_steep_ballistic_return(model, natural):
    # 8 m/s against the velocity 30 h before perilune: the ballistic return comes back far too
    # steep (checked below); the screen's targeting must bring it into the corridor
    t_b = T_START + 10 * HOUR
    y_b = propagate(model, T_PERI, natural, t_b, terminal=()).y[:, -1]
    y_b[3:] -= 8e-3 * y_b[3:] / np.linalg.norm(y_b[3:])
    ballistic = propagate(model, t_b, y_b, t_b + 8 * DAY, events=("entry", "impact_earth"), entry_radius=ENTRY)
    hit = ballistic.first("entry")
    assert hit is None or np.degrees(flight_path_angle(hit.y[:3], hit.y[3:])) < -20.0
    problem = Problem(name="steep", start=StateStart(T_START, tuple(y_b)), burns=(BurnSpec((t_b, t_b), 100.0),),
                      lunar=LunarPass((100.0, 5000.0)), arrival=ReturnSpec(flight_path_deg=(-6.9, -5.9)),
                      model=ModelSpec(kind="earth-moon"))
    dv, why, _ = target(problem, model, t_b, y_b, t_b + 10 * DAY, cap_kms=0.1)
    assert dv is not None, why
    y = y_b.copy()
    y[3:] += dv
    arc = propagate(model, t_b, y, t_b + 10 * DAY, events=("perilune", "entry"), entry_radius=ENTRY,
                    perilune_within=66000.0)
    peri, entry = arc.first("perilune"), arc.first("entry")
    assert 100.0 <= np.linalg.norm(peri.y[:3] - model.moon_position(peri.t)) - 1737.4 <= 5000.0
    assert -6.95 <= np.degrees(flight_path_angle(entry.y[:3], entry.y[3:])) <= -5.85


def test_screen_survives_a_coast_into_the_earth(model):
    """A start whose coast without burns falls straight into the Earth (radial, 60,000 km out):
    the screen's ballistic path must stop at the impact (an event), not stall the integrator in
    the Earth's centre ("required step size is less than spacing between numbers")."""
    from optimizer.solve.search import ballistic_path

    r0 = 60000.0
    y0 = np.array([r0, 0.0, 0.0, -0.5, 0.0, 0.0])  # km, km/s: inbound, no angular momentum
    problem = Problem(name="into-earth", start=StateStart(T_START, tuple(y0)),
                      burns=(BurnSpec((T_START + HOUR, T_START + 20 * HOUR), 500.0, "free", "outbound"),),
                      lunar=LunarPass((100.0, 10000.0)),
                      arrival=ReturnSpec(target="entry", entry_radius_km=ENTRY, flight_path_deg=(-7.0, -5.5)),
                      model=ModelSpec(kind="earth-moon"))
    arc, t_peri = ballistic_path(problem, model, T_START + 5 * DAY)
    assert arc.status == "stopped at impact_earth"
    r_end = np.linalg.norm(arc.y[:3, -1])
    assert abs(r_end - R_EARTH) < 1.0  # stopped at the surface, not somewhere inside


def test_a_start_that_ends_far_above_its_seed_is_solved_again(monkeypatch):
    """The search's bookkeeping, with the screen and the NLP replaced by stand-ins: a start whose
    verified answer costs more than UPHILL_RATIO x its screened Δv + SKIP_MPS is solved once more
    with the other settings and the cheaper answer is kept; a start after a verified plan is
    made in exploring mode.  (Tuning-half case 58 of the out-of-family benchmark ended at 56.67 m/s
    from a 36.35 m/s seed after a rounding-level change; its retry gives 36.27 m/s.)"""
    from types import SimpleNamespace

    from optimizer.solve import search

    seeds = [search.Seed(0, 100.0, "same side, same sense", np.array([0.03635, 0.0, 0.0]), "screened"),
             search.Seed(0, 200.0, "same side, opposite sense", np.array([0.0399, 0.0, 0.0]), "screened")]
    monkeypatch.setattr(search, "screened", lambda problem, model, say=None: (seeds, None))
    problem = SimpleNamespace(burns=[SimpleNamespace(window=(0.0, 300.0))], start=SimpleNamespace(epoch=0.0))
    calls = []

    def solve_from(burns, explore=False, uphill=False, say=None):
        calls.append((burns[0][0], explore, uphill))
        dv = {(100.0, False): 56.668, (100.0, True): 36.269}.get((burns[0][0], uphill), 40.0)
        return SimpleNamespace(verified=True, status="verified", total_dv_mps=dv,
                               burns=[SimpleNamespace(epoch=burns[0][0])], solver={"iterations": 10})

    best, record, _ = search.global_solve(problem, None, solve_from)
    assert best.total_dv_mps == 36.269
    assert calls == [(100.0, False, False), (100.0, False, True), (200.0, True, False)]
    assert record["chosen"] == 1 and record["starts"][1].get("uphill") is True


def test_a_failed_search_says_when_the_coast_passes_no_moon_ahead():
    """Found by exploratory testing: a start 10 h after the lunar pass failed with "0 seeds
    screened" and no hint why; the reason now says the coast meets no lunar pass ahead, and
    start epochs are calendar epochs, not raw TDB seconds."""
    from optimizer.solve.search import search_summary

    behind = search_summary({"seeds": [], "starts": [], "ballistic_perilune_tdb_s": None})
    assert "passes the Moon nowhere ahead of the start" in behind
    start = {"burn": 1, "epoch_tdb_s": T_START, "family": "same side, same sense", "status": "failed"}
    ahead = search_summary({"seeds": [], "starts": [start], "ballistic_perilune_tdb_s": T_PERI})
    assert "nowhere ahead" not in ahead and "2033-07-19T17:00:00 TDB" in ahead
