"""The tableau (`optimizer/tableau.py`) against the Runge-Kutta order conditions and scipy's table.

Theory (from memory as to theorem numbers): an explicit Runge-Kutta method (A, b, c) with
``c_i = sum_j a_ij`` has order p exactly when, for every rooted tree t with at most p vertices,
the elementary weight Phi(t) equals 1 / gamma(t) (J. C. Butcher, *Numerical Methods for Ordinary
Differential Equations*, Wiley; Hairer, Nørsett & Wanner, *Solving ODEs I*, 2nd ed., Springer
1993, section II.2, Theorem 2.13).  With ``g(leaf) = 1`` and, for t = [t_1 .. t_m],
``g(t) = prod_k A g(t_k)`` (componentwise), Phi(t) = b . g(t), and
gamma(t) = |t| * prod_k gamma(t_k).  The numbers of rooted trees with 1 .. 8 vertices are
1, 1, 2, 4, 9, 20, 48, 115 (HNW I, section II.2, Table 2.1; OEIS A000081).

The tableau's values were typed from the published DOP853 code; a mistyped digit breaks at least
one of the 200 conditions at order 8 far above the rounding of the table (~1e-15 on weights of
size up to 44), which the tolerance below is set against.
"""

from __future__ import annotations

import numpy as np
import pytest

from optimizer import tableau

TOL = 1e-12  # rounding of 30-digit values to doubles, summed over stages with weights up to ~44


def _canonical(tree):
    return tuple(sorted(_canonical(t) for t in tree))


def _with_leaf_added(tree):
    """Every tree made from ``tree`` by hanging one new leaf on one of its vertices."""
    yield _canonical(tree + ((),))  # on the root
    for i, sub in enumerate(tree):
        for grown in _with_leaf_added(sub):
            yield _canonical(tree[:i] + (grown,) + tree[i + 1:])


def rooted_trees(order):
    """Every rooted tree with ``order`` vertices, once each, as a sorted tuple of its subtrees
    (every tree of n vertices is a tree of n - 1 vertices with one leaf added)."""
    trees = {()}
    for _ in range(order - 1):
        trees = {grown for tree in trees for grown in _with_leaf_added(tree)}
    return sorted(trees)


def _size(tree):
    return 1 + sum(_size(t) for t in tree)


def _gamma(tree):
    return _size(tree) * np.prod([_gamma(t) for t in tree]) if tree else 1.0


def _g(tree, a):
    out = np.ones(a.shape[0])
    for sub in tree:
        out = out * (a @ _g(sub, a))
    return out


def order_defects(a, b, order):
    """max |Phi(t) - 1/gamma(t)| over the trees of each size 1 .. ``order``."""
    return {n: max(abs(b @ _g(t, a) - 1.0 / _gamma(t)) for t in rooted_trees(n)) for n in range(1, order + 1)}


def test_tree_enumeration_counts_match_published_table():
    # HNW I 2nd ed., section II.2, Table 2.1 (OEIS A000081): trees per order 1..8
    assert [len(rooted_trees(n)) for n in range(1, 9)] == [1, 1, 2, 4, 9, 20, 48, 115]


def test_tableau_shape_and_explicitness():
    assert tableau.A.shape == (12, 12) and tableau.B.shape == (12,) and tableau.C.shape == (12,)
    assert np.all(np.triu(tableau.A) == 0.0)  # explicit: no stage uses itself or a later one


def test_row_sums_of_a_equal_c():
    # the simplifying assumption c_i = sum_j a_ij under which the tree conditions hold (HNW I, II.2)
    assert np.max(np.abs(tableau.A.sum(axis=1) - tableau.C)) < TOL


@pytest.mark.parametrize("k", range(8))
def test_quadrature_conditions(k):
    # bushy trees: sum_i b_i c_i^k = 1 / (k + 1), k = 0 .. 7 (HNW I, II.2)
    assert abs(tableau.B @ tableau.C**k - 1.0 / (k + 1)) < TOL


def test_every_order_condition_up_to_order_eight():
    defects = order_defects(tableau.A, tableau.B, 8)
    assert all(d < TOL for d in defects.values()), defects


def test_a_mistyped_digit_breaks_an_order_condition():
    # the check has teeth: one coefficient off in its 9th significant digit (what a typing slip
    # in the table would do) violates some condition of order <= 8 by far more than TOL
    a = tableau.A.copy()
    a[8, 5] *= 1.0 + 1e-9
    assert max(order_defects(a, tableau.B, 8).values()) > 100 * TOL


def test_the_check_sees_that_the_scheme_is_not_of_order_nine():
    # an 8th-order pair cannot meet all 286 conditions of order 9 (HNW I, II.5: order 8 is the
    # pair's order); the checker must tell the two apart
    assert order_defects(tableau.A, tableau.B, 9)[9] > 1e6 * TOL


# --- the adaptive engine's coefficients (optimizer/native.py passes them to optimizer/data/coast.c) --

def test_engine_coefficients_equal_scipys_to_the_last_bit():
    # Outside reference: scipy's own DOP853 table, scipy.integrate._ivp.dop853_coefficients (the
    # numbers of Hairer's DOP853 code).  Equal doubles, not merely close: the compiled engine must
    # take exactly the steps it took when it read that table, and a mistyped digit anywhere shows.
    from scipy.integrate._ivp import dop853_coefficients as scipy_table

    assert tableau.STAGES_ALL == scipy_table.N_STAGES_EXTENDED
    pairs = {"A_ALL": (tableau.A_ALL, scipy_table.A), "C_ALL": (tableau.C_ALL, scipy_table.C),
             "B": (tableau.B, scipy_table.B), "E3": (tableau.E3, scipy_table.E3),
             "E5": (tableau.E5, scipy_table.E5), "D": (tableau.D, scipy_table.D),
             "A": (tableau.A, scipy_table.A[:12, :12]), "C": (tableau.C, scipy_table.C[:12])}
    differ = [name for name, (ours, ref) in pairs.items() if not np.array_equal(ours, ref)]
    assert not differ, differ


def _continuous_weights(theta, d):
    """b(theta), the 16 stage weights of the engine's dense output at theta of a step (h = 1):
    the seven rows coast.c writes (the step's ends, then h D k) evaluated by scipy's own
    ``Dop853DenseOutput``, the interpolant optimizer/native.py builds, one weight per component."""
    from scipy.integrate._ivp.rk import Dop853DenseOutput

    b = np.zeros(tableau.STAGES_ALL)
    b[:12] = tableau.B
    first, at_end = np.eye(tableau.STAGES_ALL)[0], np.eye(tableau.STAGES_ALL)[12]
    rows = np.vstack([b, first - b, 2.0 * b - at_end - first, d])
    return Dop853DenseOutput(0.0, 1.0, np.zeros(tableau.STAGES_ALL), rows)(theta)


def dense_defects(a_all, d, theta, order):
    """max |b(theta) . g(t) - theta^|t| / gamma(t)| over the trees of each size 1 .. ``order``."""
    b = _continuous_weights(theta, d)
    return {n: max(abs(b @ _g(t, a_all) - theta**n / _gamma(t)) for t in rooted_trees(n))
            for n in range(1, order + 1)}


@pytest.mark.parametrize("theta", [0.2, 0.5, 0.85])
def test_dense_output_is_of_order_seven(theta):
    # a continuous extension of order 7 meets every tree condition up to 7 vertices with right
    # side theta^|t| / gamma(t) (HNW I, section II.6, continuous Runge-Kutta methods; the order 7
    # of DOP853's dense output from memory), and not those of order 8 inside the step
    defects = dense_defects(tableau.A_ALL, tableau.D, theta, 8)
    assert all(defects[n] < TOL for n in range(1, 8)), defects
    assert defects[8] > 1e6 * TOL


def test_a_mistyped_dense_output_digit_breaks_a_condition():
    # the dense-output check has teeth: one entry of D (or of an extra stage's row) off in its
    # 9th significant digit violates a condition of order <= 7
    d = tableau.D.copy()
    d[2, 7] *= 1.0 + 1e-9
    a_all = tableau.A_ALL.copy()
    a_all[14, 13] *= 1.0 + 1e-9
    assert max(dense_defects(tableau.A_ALL, d, 0.5, 7).values()) > 100 * TOL
    assert max(dense_defects(a_all, tableau.D, 0.5, 7).values()) > 100 * TOL


@pytest.mark.parametrize("name, order", [("E5", 5), ("E3", 3)])
def test_error_estimators_vanish_to_their_order(name, order):
    # E = b - b_hat with b of order 8 and b_hat of order 5 or 3 (the "(5,3)" of the pair: HNW I,
    # section II.10, from memory): E . g(t) = 0 for every tree up to that order, and not beyond
    e = getattr(tableau, name)
    a13 = tableau.A_ALL[:13, :13]  # stage 13 is the right-hand side at the new point
    defects = {n: max(abs(e @ _g(t, a13)) for t in rooted_trees(n)) for n in range(1, order + 2)}
    assert all(defects[n] < TOL for n in range(1, order + 1)), defects
    assert defects[order + 1] > 1e6 * TOL
