"""The NLP's constraint Jacobian and Lagrangian Hessian, assembled segment by segment
(:meth:`optimizer.transcription.Transcription.derivative_functions`), against two references
that do not use that assembly:

* CasADi's own derivatives of the whole expression graph (``nlpsol``'s generated ``nlp_jac_g`` and
  ``nlp_hess_l``), which must agree to rounding, with the same sparsity;
* central finite differences of the constraints (and of the Lagrangian's gradient), which must
  agree to the accuracy of the difference formula.

Layouts: one free burn, a fixed-direction burn plus a return-leg burn with an arrival inclination
range and a perigee target, a parking-orbit injection (free epoch and node) with the earliest-arrival
objective, and a transcription refined to other step counts per coast.
"""

from dataclasses import replace

import casadi as ca
import numpy as np
import pytest

import test_optimizer as base
from test_optimizer import model, natural  # noqa: F401  (the shared fixtures)
from optimizer.problem import BurnSpec, Objective, ParkingStart, ReturnSpec
from optimizer.solve.guess import initial_guess
from optimizer.solve.ipopt import IPOPT_OPTIONS
from optimizer.transcription import Transcription

HOUR = 3600.0


def _layouts(natural):
    one = base._problem(base._nudged(natural, 10.0))
    two = replace(one, burns=(BurnSpec(base.WINDOW, 300.0, direction="along"),
                              BurnSpec((base.T_PERILUNE + 6 * HOUR, base.T_PERILUNE + 30 * HOUR), 300.0,
                                       leg="return")),
                  arrival=ReturnSpec(target="perigee", perigee_alt_km=(30.0, 60.0), inclination_deg=(20.0, 80.0)))
    injection = replace(one, start=ParkingStart(185.0, 30.0, (base.T_START - 3 * 86400.0, base.T_START - 2.5 * 86400.0)),
                        burns=(BurnSpec((base.T_START - 3 * 86400.0, base.T_START - 2.5 * 86400.0), 3300.0,
                                        direction="along"),),
                        objective=Objective("earliest", dv_budget_mps=3300.0))
    return {"one free burn": (one, [2, 2, 2]), "along + return, perigee, inclination": (two, [2, 2, 2, 2]),
            "injection, earliest": (injection, [2, 2]), "refined steps": (one, [4, 2, 3])}


@pytest.fixture(scope="module", params=["one free burn", "along + return, perigee, inclination",
                                        "injection, earliest", "refined steps"])
def case(request, natural, model):
    prob, steps = _layouts(natural)[request.param]
    tr = Transcription(prob, model, steps, 6)
    rng = np.random.default_rng(7)
    if prob.start.__class__.__name__ == "StateStart":
        x = tr.guess_vector(*initial_guess(prob, model, tr)[:3])
    else:  # a point near the parking orbit's design: the bounds' middle, nudged
        x = np.clip(tr.x0, tr.lbx, tr.ubx)
        x = x + 1e-3 * rng.normal(size=x.size)
    x = x * (1.0 + 1e-4 * rng.normal(size=x.size))  # off the guess's structure (nonzero defects)
    lam_g = rng.normal(size=tr.v.ng)
    return tr, x, lam_g


def _dense(a):
    return np.asarray(ca.densify(a))


def test_assembled_derivatives_equal_casadis_own(case):
    tr, x, lam_g = case
    ref = ca.nlpsol("ref", "ipopt", tr.nlp, IPOPT_OPTIONS)
    mine = tr.derivative_functions()
    g_ref, j_ref = ref.get_function("nlp_jac_g")(x, [])
    g_new, j_new = mine["jac_g"](x, [])
    np.testing.assert_allclose(_dense(g_new), _dense(g_ref), rtol=0, atol=1e-13)
    assert j_new.sparsity() == j_ref.sparsity()
    scale = np.max(np.abs(_dense(j_ref)))
    np.testing.assert_allclose(_dense(j_new), _dense(j_ref), rtol=0, atol=1e-11 * scale)
    h_ref = ref.get_function("nlp_hess_l")(x, [], 0.3, lam_g)
    h_new = mine["hess_lag"](x, [], 0.3, lam_g)
    assert h_new.sparsity() == h_ref.sparsity() and h_new.sparsity().is_triu()
    scale = np.max(np.abs(_dense(h_ref)))
    np.testing.assert_allclose(_dense(h_new), _dense(h_ref), rtol=0, atol=1e-10 * scale)


@pytest.mark.parametrize("parametric", [False, True], ids=["values written in", "parameters kept"])
def test_assembled_derivatives_equal_finite_differences(case, parametric):
    """Both flavours: the one nlpsol evaluates (the model's numbers written in) and the one a
    compiled library is generated from (the numbers as the parameter input ``p``), each against
    central differences of its own constraints."""
    tr, x, lam_g = case
    mine = tr.derivative_functions(parametric=parametric)
    nlp = tr.nlp_parametric if parametric else {**tr.nlp, "p": ca.MX.sym("p", 0, 1)}
    p = tr.p_value if parametric else []
    g_sym = ca.Function("g", [nlp["x"], nlp["p"]], [nlp["g"]])
    l_sym = ca.Function("gl", [nlp["x"], nlp["p"]],
                        [ca.gradient(0.3 * nlp["f"] + ca.dot(lam_g, nlp["g"]), nlp["x"])])

    def g_fn(xx):
        return g_sym(xx, p)

    def grad_l(xx):
        return l_sym(xx, p)

    jac = _dense(mine["jac_g"](x, p)[1])
    hess = _dense(mine["hess_lag"](x, p, 0.3, lam_g))
    hess = np.triu(hess) + np.triu(hess, 1).T
    rng = np.random.default_rng(3)
    named = [sl.start for name, sl in tr.v.index.items() if not name.startswith("z")]  # S, burns, start
    for col in list(named) + list(rng.choice(x.size, size=12, replace=False)):
        h = 1e-6 * max(1.0, abs(x[col]))
        e = np.zeros(x.size)
        e[col] = h
        fd = (np.asarray(g_fn(x + e)).ravel() - np.asarray(g_fn(x - e)).ravel()) / (2 * h)
        np.testing.assert_allclose(jac[:, col], fd, rtol=0, atol=1e-6 * max(1.0, np.max(np.abs(jac))))
        fd = (np.asarray(grad_l(x + e)).ravel() - np.asarray(grad_l(x - e)).ravel()) / (2 * h)
        np.testing.assert_allclose(hess[:, col], fd, rtol=0, atol=1e-5 * max(1.0, np.max(np.abs(hess))))


def _calls(fn: ca.Function) -> list[str]:
    """Names of the functions an MX function calls, one entry per call in its graph."""
    return [fn.instruction_MX(k).which_function().name() for k in range(fn.n_instructions())
            if fn.instruction_id(k) == ca.OP_CALL]


def test_each_coasts_segment_jacobians_are_evaluated_once(case):
    """The constraints and their Jacobian share the segments' ends and Jacobians: one call of the
    mapped segment-Jacobian function per coast.  (The parameter values were once written into
    the two outputs separately, which copied the graph: every Jacobian evaluation then integrated
    every segment twice, the IPOPT iterations of a trade cell 2x slower.)"""
    tr, _, _ = case
    for parametric in (False, True):
        calls = [n for n in _calls(tr.derivative_functions(hessian=False, parametric=parametric)["jac_g"])
                 if n.endswith("_jac")]
        assert len(calls) == len(tr.phases), (parametric, calls)
