"""Linear covariance: the error model mapped through the state transition matrix of the plan's path.

The 6 x 6 state transition matrix is integrated with the variational equations
``dPhi/dt = A(t) Phi``, ``A = [[0, I], [G, 0]]``, along the independently propagated path (DOP853
on the numpy model).  The gravity gradient ``G = da/dr`` is taken by central differences of the
model's own acceleration (0.05 km steps), so every force model is served without a hand-written
derivative.  An impulsive burn of fixed Δv leaves the matrix continuous.

Each error enters linearly at its own epoch:

* start-state error ``dx0``: ``dx(t) = Phi(t, t0) dx0``;
* burn-size error ``dm`` along the burn direction ``u``: ``dv = u dm`` just after the burn;
* pointing angles ``a, b`` about the axes ``e1, e2`` normal to ``u``: ``dv = |Δv| (a e1 + b e2)``;
* ignition ``dt`` late with the same inertial Δv: ``dr = -Δv dt``, ``dv = 0`` just after the burn.

Events are moved to first order: the entry crossing ``|r| = R`` by ``dt_e = -(r.dr)/(r.v)``, the
state there by ``xdot dt_e``, and the entry flight-path angle by its gradient at the entry state
(central differences).  The perilune altitude changes by ``d_hat.dr`` at the nominal perilune epoch
(``d`` the position relative to the Moon): the distance's rate is zero there, so the shift of the
perilune epoch does not enter to first order.
Sigmas follow from ``J Q J^T`` with ``Q`` the error model's covariance.

One job: linear covariance.  May import: numpy, scipy, :mod:`optimizer.frames` and the wing's
``sampling``; never CasADi or the solver.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from ..frames import flight_path_angle
from .sampling import Nominal, evaluate, navigation_covariance_icrf, pointing_axes

__all__ = ["LinearCovariance", "linear_covariance", "OUTPUTS"]

#: Quantities the linear map predicts (name, unit).
OUTPUTS = (("entry_flight_path_deg", "deg"), ("perilune_altitude_km", "km"), ("entry_epoch_tdb_s", "s"),
           ("entry_downrange_km", "km"), ("entry_crossrange_km", "km"))
GRADIENT_STEP_KM = 0.05
STM_RTOL, STM_ATOL = 1e-10, 1e-10


@dataclass
class LinearCovariance:
    """Result of :func:`linear_covariance`.

    Attributes
    ----------
    jacobian : ndarray, shape (5, P)
        Rows ``OUTPUTS``; columns ``parameters``.
    parameters : list of str
        Error parameters, in physical units (km, km/s, rad, s).
    input_covariance : ndarray, shape (P, P)
    covariance : ndarray, shape (5, 5)
        ``J Q J^T``.
    sigma : dict
        Output name -> 1-sigma.
    nominal : dict
        Output name -> nominal value (the perilune altitude, entry angle and epoch of the path).
    seconds : float
        Wall time of the computation.
    """

    jacobian: np.ndarray
    parameters: list
    input_covariance: np.ndarray
    covariance: np.ndarray
    sigma: dict
    nominal: dict
    seconds: float

    def predict(self, perturbations: np.ndarray) -> np.ndarray:
        """Linear prediction of the output changes for parameter vectors (shape (N, P))."""
        return np.asarray(perturbations) @ self.jacobian.T


def _gradient(model, t, r):
    """``da/dr`` (3 x 3) by central differences of the model's acceleration."""
    g = np.empty((3, 3))
    h = GRADIENT_STEP_KM
    for j in range(3):
        e = np.zeros(3)
        e[j] = h
        g[:, j] = (model.acceleration(t, r + e) - model.acceleration(t, r - e)) / (2 * h)
    return g


def _stm_rhs(model):
    def rhs(t, z):
        r, v = z[:3], z[3:6]
        phi = z[6:].reshape(6, 6)
        out = np.empty(42)
        out[:3] = v
        out[3:6] = model.acceleration(t, r, v)
        g = _gradient(model, t, r)
        d = np.empty((6, 6))
        d[:3] = phi[3:]
        d[3:] = g @ phi[:3]
        out[6:] = d.ravel()
        return out
    return rhs


def _stm_segments(model, t0, y0, burns, times):
    """State and Phi(t, t_k) at the requested ``times`` (one per segment that holds them), and the
    segment-end matrices; segments are split at the burns.  Returns (states, local Phis, segment
    index of each time, segment start epochs, Phi of each whole segment)."""
    rhs = _stm_rhs(model)
    edges = [t0] + [b[0] for b in burns] + [max(times)]
    z = np.concatenate([np.asarray(y0, float), np.eye(6).ravel()])
    states, local, seg_of, whole = {}, {}, {}, []
    for k in range(len(edges) - 1):
        a, b = edges[k], edges[k + 1]
        here = [t for t in times if a <= t <= b and t not in seg_of]
        if b > a:
            sol = solve_ivp(rhs, (a, b), z, method="DOP853", rtol=STM_RTOL, atol=STM_ATOL, dense_output=True)
            if sol.status < 0:
                raise RuntimeError(f"variational propagation failed: {sol.message}")
            end = sol.y[:, -1]
            for t in here:
                zt = sol.sol(t)
                states[t], local[t], seg_of[t] = zt[:6], zt[6:].reshape(6, 6), k
        else:
            end = z
            for t in here:
                states[t], local[t], seg_of[t] = z[:6], np.eye(6), k
        whole.append(end[6:].reshape(6, 6))
        z = end.copy()
        if k < len(burns):
            z[3:6] += np.asarray(burns[k][1], float)
        z[6:] = np.eye(6).ravel()
    return states, local, seg_of, edges, whole


def _phi(local, seg_of, whole, t, j):
    """Phi(t, t_j^+): from just after burn ``j`` (``j = -1``: the start) to ``t``; zero if ``t``
    comes before that burn."""
    k = seg_of[t]
    if k < j + 1:
        return np.zeros((6, 6))
    m = local[t]
    for s in range(k - 1, j, -1):
        m = m @ whole[s]
    return m


def linear_covariance(model, nominal: Nominal, errors) -> LinearCovariance:
    """Sigmas of the entry angle, perilune altitude, arrival epoch and entry point, to first order.

    Parameters
    ----------
    model : ForceModel
        Earth-centred numpy model.
    nominal : Nominal
        The plan to disperse (its executed burns).
    errors : ErrorModel

    Raises
    ------
    ValueError
        If the nominal path has no perilune or no entry-interface crossing after it.
    """
    import time

    tic = time.perf_counter()
    y0 = np.asarray(nominal.start_state, float)
    burns = [(float(t), np.asarray(dv, float)) for t, dv in nominal.burns]
    base = evaluate(model, nominal, y0, burns)
    if not math.isfinite(base["perilune_epoch_tdb_s"]) or not math.isfinite(base["entry_epoch_tdb_s"]):
        raise ValueError("the nominal path has no perilune or no entry-interface crossing after it; "
                         "linear covariance needs both")
    tp, te = base["perilune_epoch_tdb_s"], base["entry_epoch_tdb_s"]
    states, local, seg_of, edges, whole = _stm_segments(model, nominal.start_epoch, y0, burns, [tp, te])

    # -- rows: output sensitivities to the state at the (nominal) event epochs --------------------
    xe = states[te]
    re, ve = xe[:3], xe[3:]
    ae = model.acceleration(te, re, ve)
    dte_dx = -np.concatenate([re, np.zeros(3)]) / (re @ ve)  # d t_e / d x(t_e)
    xdot = np.concatenate([ve, ae])
    move = np.eye(6) + np.outer(xdot, dte_dx)  # dx at the event = move @ dx(t_e)
    gam = np.empty(6)
    for j in range(6):
        e = np.zeros(6)
        e[j] = 1e-6 * (np.linalg.norm(re) if j < 3 else np.linalg.norm(ve))
        gam[j] = (flight_path_angle((xe + e)[:3], (xe + e)[3:]) - flight_path_angle((xe - e)[:3], (xe - e)[3:])) \
            / (2 * e[j])
    h = np.cross(re, ve)
    h /= np.linalg.norm(h)
    rhat = re / np.linalg.norm(re)
    t_hat = np.cross(h, rhat)
    rows_e = np.vstack([math.degrees(1.0) * gam @ move,
                        dte_dx,
                        np.concatenate([t_hat, np.zeros(3)]) @ move,
                        np.concatenate([h, np.zeros(3)]) @ move])
    xp = states[tp]
    d = xp[:3] - model.moon_position(tp)
    dhat = d / np.linalg.norm(d)
    row_p = np.concatenate([dhat, np.zeros(3)])

    # -- columns: each error's effect on the state just after its epoch --------------------------
    names, cols_e, cols_p = [], [], []
    q_blocks = []

    def add(name, j, dx):
        names.append(name)
        cols_e.append(rows_e @ (_phi(local, seg_of, whole, te, j) @ dx))
        cols_p.append(row_p @ (_phi(local, seg_of, whole, tp, j) @ dx))

    for i, axis in enumerate(("x_km", "y_km", "z_km", "vx_kms", "vy_kms", "vz_kms")):
        add(f"nav_{axis}", -1, np.eye(6)[i])
    q_blocks.append(navigation_covariance_icrf(errors, y0))
    b = errors.burn
    for k, (epoch, dv) in enumerate(burns):
        size = np.linalg.norm(dv)
        u = dv / size
        e1, e2 = pointing_axes(u)
        zero3 = np.zeros(3)
        add(f"burn{k + 1}_magnitude_kms", k, np.concatenate([zero3, u]))
        add(f"burn{k + 1}_pointing1_rad", k, np.concatenate([zero3, size * e1]))
        add(f"burn{k + 1}_pointing2_rad", k, np.concatenate([zero3, size * e2]))
        add(f"burn{k + 1}_ignition_s", k, np.concatenate([-dv, zero3]))
        s_m2 = (b.magnitude_sigma_fraction * size) ** 2 + (b.magnitude_sigma_mps / 1000.0) ** 2
        s_p2 = math.radians(b.pointing_sigma_deg) ** 2
        q_blocks.append(np.diag([s_m2, s_p2, s_p2, b.ignition_sigma_s ** 2]))
    j_e = np.array(cols_e).T  # (4, P)
    j_p = np.array(cols_p)[None, :]  # (1, P)
    # the perilune's epoch shift does not enter its altitude to first order (d_hat . w = 0 there)
    jac = np.vstack([j_e[0:1], j_p, j_e[1:2], j_e[2:4]])
    n = sum(q.shape[0] for q in q_blocks)
    q = np.zeros((n, n))
    i = 0
    for blk in q_blocks:
        q[i:i + blk.shape[0], i:i + blk.shape[0]] = blk
        i += blk.shape[0]
    cov = jac @ q @ jac.T
    sigma = {name: float(math.sqrt(max(cov[m, m], 0.0))) for m, (name, _) in enumerate(OUTPUTS)}
    nominal_values = {"entry_flight_path_deg": base["entry_flight_path_deg"],
                      "perilune_altitude_km": base["perilune_altitude_km"], "entry_epoch_tdb_s": te,
                      "entry_downrange_km": 0.0, "entry_crossrange_km": 0.0}
    return LinearCovariance(jacobian=jac, parameters=names, input_covariance=q, covariance=cov, sigma=sigma,
                            nominal=nominal_values, seconds=time.perf_counter() - tic)
