"""Compiled NLP functions (optimizer/compiled.py): generated C, built by the system compiler, loaded
with casadi.external, cached on disk; interpreted evaluation whenever that route is unavailable.

The NLP is Hock-Schittkowski problem 71 (W. Hock, K. Schittkowski, "Test Examples for Nonlinear
Programming Codes", Lecture Notes in Economics and Mathematical Systems 187, Springer 1981,
problem 71): min x1 x4 (x1 + x2 + x3) + x3 s.t. x1 x2 x3 x4 >= 25, sum x_i^2 = 40, 1 <= x_i <= 5,
start (1, 5, 5, 1); published optimum f* = 17.0140173, x* = (1, 4.7429994, 3.8211503, 1.3794082).
"""

import os

import casadi as ca
import numpy as np
import pytest

from optimizer import compiled

HS71_F = 17.0140173
HS71_X = np.array([1.0, 4.7429994, 3.8211503, 1.3794082])


class HS71:
    """The interface compiled.nlp_functions reads: ``nlp`` and ``derivative_functions``."""

    def __init__(self):
        x = ca.MX.sym("x", 4)
        f = x[0] * x[3] * (x[0] + x[1] + x[2]) + x[2]
        g = ca.vertcat(x[0] * x[1] * x[2] * x[3], ca.sumsqr(x))
        self.nlp = {"x": x, "f": f, "g": g}

    def derivative_functions(self, hessian=True):
        x, f, g = self.nlp["x"], self.nlp["f"], self.nlp["g"]
        p, lf, lg = ca.MX.sym("p", 0, 1), ca.MX.sym("lam_f"), ca.MX.sym("lam_g", 2)
        out = {"jac_g": ca.Function("nlp_jac_g", [x, p], [g, ca.jacobian(g, x)], ["x", "p"], ["g", "jac_g_x"])}
        if hessian:
            hess = ca.triu(ca.hessian(lf * f + ca.dot(lg, g), x)[0])
            out["hess_lag"] = ca.Function("nlp_hess_l", [x, p, lf, lg], [hess], ["x", "p", "lam_f", "lam_g"],
                                          ["triu_hess_gamma_x_x"])
        return out


def _solve(fns):
    opts = {"ipopt.print_level": 0, "print_time": False, "ipopt.sb": "yes", **compiled.NLPSOL_OPTIONS}
    solver = ca.nlpsol("hs71", "ipopt", fns.pop("nlp"), {**opts, **fns})
    sol = solver(x0=[1, 5, 5, 1], lbx=1, ubx=5, lbg=[25, 40], ubg=[np.inf, 40])
    return float(sol["f"]), np.asarray(sol["x"]).ravel()


@pytest.fixture
def cache(tmp_path, monkeypatch):
    monkeypatch.setenv("SLINGBACK_CACHE_DIR", str(tmp_path))
    monkeypatch.delenv("SLINGBACK_CC", raising=False)
    return tmp_path


@pytest.mark.skipif(compiled.compiler() is None, reason="no C compiler on this machine")
def test_compiled_library_solves_hs71_to_the_published_optimum(cache):
    fns, rec = compiled.nlp_functions(HS71(), hessian=True, how="wait")
    assert rec["mode"] == "compiled", rec
    f, x = _solve(fns)
    assert f == pytest.approx(HS71_F, abs=1e-6)  # the book gives 8 figures
    assert x == pytest.approx(HS71_X, abs=1e-6)
    libs = list(cache.rglob("*.so"))
    assert len(libs) == 1 and not list(cache.rglob("*.tmp*")) and not list(cache.rglob("*.c"))
    # a second build of the same NLP loads the library: no compile time in its record
    again, rec2 = compiled.nlp_functions(HS71(), hessian=True, how="wait")
    assert rec2["mode"] == "compiled" and "compile_s" not in rec2 and rec2["key"] == rec["key"]


def test_no_compiler_falls_back_to_interpreted(cache, monkeypatch):
    monkeypatch.setenv("PATH", str(cache))  # neither gcc nor cc
    fns, rec = compiled.nlp_functions(HS71(), hessian=True, how="wait")
    assert fns is None and rec["mode"] == "interpreted" and "no C compiler" in rec["reason"]


@pytest.mark.skipif(compiled.compiler() is None or not os.path.exists("/bin/false"), reason="needs /bin/false")
def test_failed_compile_falls_back_and_leaves_no_library(cache, monkeypatch):
    monkeypatch.setenv("SLINGBACK_CC", "/bin/false")  # a "compiler" that always fails
    fns, rec = compiled.nlp_functions(HS71(), hessian=True, how="wait")
    assert fns is None and rec["mode"] == "interpreted" and "compile failed" in rec["reason"]
    assert not list(cache.rglob("*.so"))
    again, rec2 = compiled.nlp_functions(HS71(), hessian=True, how="wait")
    assert again is None and "failed" in rec2["reason"]  # not retried for the same key


def test_off_means_interpreted(cache, monkeypatch):
    monkeypatch.setenv("SLINGBACK_COMPILE", "off")
    fns, rec = compiled.nlp_functions(HS71())
    assert fns is None and rec["mode"] == "interpreted"
    monkeypatch.setenv("SLINGBACK_COMPILE", "sometimes")
    with pytest.raises(ValueError, match="SLINGBACK_COMPILE"):
        compiled.mode()


def test_library_key_changes_with_the_objective_and_the_constraints():
    # a library serves only the NLP it was generated from: same constraints with another objective
    # (or the reverse) must not find it
    cc = compiled.compiler() or "cc"
    base = HS71()
    other_f, other_g = HS71(), HS71()
    x = other_f.nlp["x"]
    other_f.nlp["f"] = other_f.nlp["f"] + x[1]
    xg = other_g.nlp["x"]
    other_g.nlp["g"] = ca.vertcat(other_g.nlp["g"][0], ca.sumsqr(xg) + xg[0])
    keys = {compiled._key(cc, compiled._defining(t), True) for t in (base, other_f, other_g)}
    assert len(keys) == 3
    assert compiled._key(cc, compiled._defining(HS71()), True) in keys  # and it is stable


# --- one library for every start epoch -----------------------------------------------------------
# The invented abort case of tests/test_optimizer.py (a ballistic free return through a 150 km
# perilune at 2027-05-13 12:00 TDB, found by root-finding on the independent propagator; 10 m/s
# along the velocity spoils it; one burn 1-12 h later restores it), picked up at two start epochs
# 6 h apart: two problems of one structure whose epochs, ephemeris fits and answers differ.
HOUR, DAY = 3600.0, 86400.0


@pytest.fixture(scope="module")
def two_epochs():
    import free_return_fixture as fr
    from optimizer.models import build_model
    from optimizer.problem import BurnSpec, LunarPass, ModelSpec, Problem, ReturnSpec, StateStart
    from optimizer.propagate import propagate
    from optimizer.timescales import parse_epoch

    t_p = parse_epoch("2027-05-13T12:00:00 TDB")
    seed_model = build_model(ModelSpec(), t_p - 6 * DAY, t_p + 12 * DAY)
    y_peri, alts, _ = fr.build(seed_model, t_p, alt_km=150.0)
    assert np.allclose(alts, [200.0, 40.0], atol=1.0)  # the root-finding did its job
    problems = []
    for hours in (40.0, 34.0):
        t0 = t_p - hours * HOUR
        y = propagate(seed_model, t_p, y_peri, t0).y[:, -1].copy()
        y[3:] += 10e-3 * y[3:] / np.linalg.norm(y[3:])
        problems.append(Problem(name=f"abort-{hours:g}h", start=StateStart(t0, tuple(y)),
                                burns=(BurnSpec((t0 + HOUR, t0 + 12 * HOUR), 300.0),),
                                lunar=LunarPass((100.0, 5000.0)), arrival=ReturnSpec(flight_path_deg=(-7.0, -5.5))))
    return problems


def test_parametric_acceleration_matches_the_numpy_model_at_two_epochs(two_epochs):
    # the CasADi acceleration reading its ephemeris from a parameter vector against the separately
    # written numpy acceleration (DE421 fit: Earth, Moon, Sun; circular Moon): a wrong layout of
    # the coefficients or window in the vector moves the Moon by thousands of km
    from optimizer.models import build_model
    from optimizer.problem import ModelSpec
    from optimizer.solve.guess import model_span

    rng = np.random.default_rng(14)
    for kind in ("ephemeris", "earth-moon"):
        pars = []
        for prob in two_epochs:
            model = build_model(ModelSpec(kind=kind), *model_span(prob))
            t, r, par = ca.SX.sym("t"), ca.SX.sym("r", 3), ca.SX.sym("p", model.casadi_parameters().size)
            fn = ca.Function("acc", [t, r, par], [model.acceleration_casadi(t, r, None, par=par),
                                                  model.moon_position_casadi(t, par=par)])
            pars.append(model.casadi_parameters())
            lo, hi = model_span(prob)
            for _ in range(20):
                tt = rng.uniform(lo, hi)
                rr = rng.normal(size=3) * 2e5
                acc, moon = (np.asarray(a).ravel() for a in fn(tt, rr, pars[-1]))
                assert acc == pytest.approx(model.acceleration(tt, rr), rel=1e-12, abs=1e-18)
                assert moon == pytest.approx(model.moon_position(tt), rel=0, abs=1e-6)  # km
        # same length (one structure), other numbers (the parameters carry the epoch)
        assert pars[0].size == pars[1].size and not np.allclose(pars[0], pars[1])


@pytest.mark.skipif(compiled.compiler() is None, reason="no C compiler on this machine")
def test_two_start_epochs_share_one_library_and_match_interpreted_verified(two_epochs, cache, monkeypatch):
    # one structure, two start epochs: the same key, one library in the cache, each problem solved
    # with it passes the independent re-propagation (scipy DOP853 on the numpy model), and its
    # optimum is one of the interpreted NLP too (CasADi's virtual machine on the same problem, with
    # the model's numbers written in rather than passed as parameters, started there: a library
    # evaluating another NLP would send IPOPT elsewhere).
    # -O0: compiles in tens of seconds instead of minutes; the key holds the flags.
    from optimizer import solve

    monkeypatch.setenv("SLINGBACK_CFLAGS", "-O0")
    monkeypatch.setenv("SLINGBACK_COMPILE", "wait")
    plans = [solve(prob) for prob in two_epochs]
    keys = set()
    for plan in plans:
        assert plan.verified, plan.reason
        records = [a["evaluation"] for a in plan.solver["attempts"]]
        assert records and all(r["mode"] == "compiled" for r in records), records
        keys |= {r["key"] for r in records}
    assert "compile_s" in plans[0].solver["attempts"][0]["evaluation"]  # built once ...
    assert all("compile_s" not in a["evaluation"] for a in plans[1].solver["attempts"])  # ... loaded after
    assert len(keys) == 1, keys
    assert len(list(cache.rglob("*.so"))) == 1
    assert abs(plans[0].total_dv_mps - plans[1].total_dv_mps) > 0.01  # two problems, two answers
    monkeypatch.setenv("SLINGBACK_COMPILE", "off")
    for prob, plan in zip(two_epochs, plans):
        again = solve(prob, warm=plan)
        assert again.verified and all(a["evaluation"]["mode"] == "interpreted" for a in again.solver["attempts"])
        # IPOPT's tolerance: 1e-3 m/s is 0.015 % of the 6.8 m/s answer
        assert again.total_dv_mps == pytest.approx(plan.total_dv_mps, abs=1e-3)
