"""The primer-vector test of held burns, read off an NLP optimum's multipliers.

``primer_scan`` gives |p| and its direction at every node of the NLP; ``release_candidates`` picks,
for a held burn, the node inside its window where an impulse would pay most.

May import: transcription (for the layout of the variables and multipliers).  Never ``strategy``.
"""

from __future__ import annotations

import casadi as ca
import numpy as np

from ..transcription import Transcription

#: A held-zero burn is proved useless where the primer magnitude |p| stays within 1 + PRIMER_TOL.
PRIMER_TOL = 1e-3
#: Size (m/s) of a released burn in the starting point of the full NLP, along the primer direction.
RELEASE_MPS = 0.5


def primer_scan(tr: Transcription, x, lam_g, lam_x=None) -> list[dict]:
    """The primer vector at every node of the NLP, from its multipliers.

    With ``L = f + lam_g . g``, an impulse ``delta`` added to the velocity at a node changes the
    optimal Lagrangian by ``dL/ddelta . delta`` to first order: ``lam`` of the defect that ends at
    that node (the node is the segment's end plus the impulse), minus ``lam`` of the link for the
    first node of a coast, or minus ``lam_x`` of the fixed start state (given ``lam_x``).  The
    impulse also costs ``price * |delta|`` (``price = df/dsigma``), so it pays iff
    ``|p| = |dL/ddelta| / price > 1``, and then along ``-dL/ddelta``.  This is the primer vector
    condition of impulsive optimal control (Lawden 1963; Prussing, "Primer vector theory and
    applications", in Conway (ed.), Spacecraft Trajectory Optimization, 2010; cited from memory),
    read off the discrete adjoint instead of integrating the costate equations.

    Returns one dict per coast: ``phase``, node ``epochs`` (TDB s), ``magnitude`` |p| and unit
    ``direction`` (3, N+1) of the impulse that lowers the cost (ECI).
    """
    g = np.asarray(lam_g, dtype=float).ravel()
    x = np.asarray(x, dtype=float).ravel()
    price = float(ca.Function("price", [tr.nlp["x"]], [ca.gradient(tr.f, tr.sigma[0])])(x))
    unpacked = tr.unpack(x)
    out = []
    for p, zs in zip(tr.phases, unpacked["phases"]):
        n = tr.segments
        dldd = np.full((3, n + 1), np.nan)
        dldd[:, 1:] = g[tr.v.gindex[f"defects{p.index}"]].reshape(7, n, order="F")[3:6]
        if f"link{p.index}" in tr.v.gindex:
            dldd[:, 0] = -g[tr.v.gindex[f"link{p.index}"]][3:6]
        elif lam_x is not None:  # the fixed start state: sensitivity of the optimum to its bounds
            dldd[:, 0] = -np.asarray(lam_x, dtype=float).ravel()[tr.v.index[f"z{p.index}"]][3:6]
        mag = np.linalg.norm(dldd, axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out.append({"phase": p.index, "epochs": zs[6].copy(), "magnitude": mag / price,
                        "direction": -dldd / mag, "gain": -dldd / price, "velocity": zs[3:6].copy()})
    return out


def release_candidates(problem, epochs, t_peri, scan, j):
    """The node of largest primer magnitude where burn ``j`` may be placed: inside its window and
    leg, between the burns of ``epochs`` (full index -> epoch; in the layout's order) at the
    minimum spacing from them.  Returns (epoch, |p|, unit direction) or None."""
    b = problem.burns[j]
    lo, hi = b.window
    if b.leg == "outbound":
        hi = min(hi, t_peri)
    else:
        lo = max(lo, t_peri)
    gap = problem.min_burn_spacing_s
    order = sorted(set(epochs) | {j}, key=lambda q: (problem.burns[q].leg != "outbound", q))
    k = order.index(j)
    if k > 0:
        lo = max(lo, epochs[order[k - 1]] + gap)
    if k + 1 < len(order):
        hi = min(hi, epochs[order[k + 1]] - gap)
    best = None
    for ph in scan:
        for t, m, d, gain, vel in zip(ph["epochs"], ph["magnitude"], ph["direction"].T, ph["gain"].T,
                                      ph["velocity"].T):
            if b.direction != "free":  # only the component along the burn's fixed direction counts
                u = (1.0 if b.direction == "along" else -1.0) * vel / np.linalg.norm(vel)
                m, d = float(gain @ u), u
            if lo <= t <= hi and np.isfinite(m) and (best is None or m > best[1]):
                best = (float(t), float(m), d.copy())
    return best
