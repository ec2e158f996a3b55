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
