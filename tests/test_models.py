"""Checks of optimizer.models: the numpy and CasADi accelerations agree, J2 and the indirect term.

Each model writes its acceleration twice (numpy for the independent propagator, CasADi for the
transcription).  The two are compared here at 1000 random points per model; a disagreement beyond
round-off means one of them is wrong, and the optimiser and its referee would then be solving
different problems.

Units: km, km/s, TDB seconds past J2000 (Earth-centred models); non-dimensional (CR3BP).
"""

import math

import casadi as ca
import numpy as np
import pytest

from optimizer.circular_moon import CircularMoon
from optimizer.constants import (CR3BP_LENGTH, GM_EARTH, GM_MOON, GM_SUN, J2_EARTH, R_EARTH,
                                 SECONDS_PER_DAY)
from optimizer.ephemeris import DE421, ChebyshevEphemeris
from optimizer.models import CR3BP, EarthCentred, TwoBody
from optimizer.models.base import third_body

DAY = SECONDS_PER_DAY
T0 = 9000 * DAY  # 2024-08-22 12:00 TDB: start of an arbitrary 30-day scenario window
T1 = T0 + 30 * DAY
N_POINTS = 1000
# Round-off only: the two sides do the same arithmetic in a different order.
REL_TOL = 1e-12


@pytest.fixture(scope="module")
def fit30():
    eph = DE421()
    try:
        yield ChebyshevEphemeris.fit(eph, T0, T1)
    finally:
        eph.close()


# --- helpers -------------------------------------------------------------------------------------
def _random_points(rng, n, moon_position, r_min, r_max, keep_out, t_lo, t_hi, earth=np.zeros(3)):
    """n epochs and positions: radii from ``earth`` uniform in [r_min, r_max], directions uniform
    on the sphere, none closer than ``keep_out`` to the Moon at its epoch."""
    ts, rs = [], []
    while len(ts) < n:
        t = rng.uniform(t_lo, t_hi)
        u = rng.normal(size=3)
        r = earth + rng.uniform(r_min, r_max) * u / np.linalg.norm(u)
        if np.linalg.norm(r - moon_position(t)) > keep_out:
            ts.append(t)
            rs.append(r)
    return np.array(ts), np.array(rs)


def _casadi_map(model, n):
    """The model's CasADi acceleration as a Function of (t, r, v), mapped over n points."""
    t, r, v = ca.SX.sym("t"), ca.SX.sym("r", 3), ca.SX.sym("v", 3)
    f = ca.Function("acc", [t, r, v], [model.acceleration_casadi(t, r, v)])
    return f.map(n)


def _worst_relative_difference(model, ts, rs, vs):
    """max over points of |a_casadi - a_numpy| / |a_numpy|."""
    a_np = np.array([model.acceleration(t, r, v) for t, r, v in zip(ts, rs, vs)])
    a_ca = np.array(_casadi_map(model, len(ts))(ts[None, :], rs.T, vs.T)).T
    rel = np.linalg.norm(a_ca - a_np, axis=1) / np.linalg.norm(a_np, axis=1)
    return float(rel.max())


def _earth_centred_points(seed, moon_position):
    # Cislunar space: 6500-450,000 km from Earth's centre, nothing within 2000 km of the Moon.
    rng = np.random.default_rng(seed)
    ts, rs = _random_points(rng, N_POINTS, moon_position, 6500.0, 450_000.0, 2000.0, T0, T1)
    vs = rng.normal(scale=2.0, size=(N_POINTS, 3))  # unused by these models
    return ts, rs, vs


# --- numpy against CasADi ------------------------------------------------------------------------
def test_twobody_numpy_matches_casadi():
    model = TwoBody()
    ts, rs, vs = _earth_centred_points(1, lambda t: np.full(3, 1e12))
    assert _worst_relative_difference(model, ts, rs, vs) < REL_TOL


def test_earth_moon_circular_numpy_matches_casadi():
    moon = CircularMoon(inclination_deg=5.1, raan_deg=30.0, phase_deg=40.0, epoch=T0)
    model = EarthCentred(moon, sun=False, j2=False, name="earth-moon")
    ts, rs, vs = _earth_centred_points(2, moon.moon)
    assert _worst_relative_difference(model, ts, rs, vs) < REL_TOL


@pytest.mark.parametrize("j2", [False, True])
def test_ephemeris_numpy_matches_casadi(fit30, j2):
    model = EarthCentred(fit30, sun=True, j2=j2)
    ts, rs, vs = _earth_centred_points(3 + j2, fit30.moon)
    assert _worst_relative_difference(model, ts, rs, vs) < REL_TOL


def test_cr3bp_numpy_matches_casadi():
    model = CR3BP()
    mu = model.mu
    rng = np.random.default_rng(5)
    earth, moon = np.array([-mu, 0.0, 0.0]), np.array([1.0 - mu, 0.0, 0.0])
    L = CR3BP_LENGTH
    ts, rs = _random_points(rng, N_POINTS, lambda t: moon, 6500.0 / L, 450_000.0 / L,
                            2000.0 / L, 0.0, 10.0, earth=earth)
    vs = rng.normal(scale=1.0, size=(N_POINTS, 3))  # the Coriolis term needs v
    assert _worst_relative_difference(model, ts, rs, vs) < REL_TOL


def test_cr3bp_casadi_uses_velocity():
    # The Coriolis term 2 (vy, -vx, 0): the same point with two velocities differs by exactly it.
    model = CR3BP()
    f = _casadi_map(model, 1)
    r = np.array([0.5, 0.2, 0.1])
    v1, v2 = np.array([0.1, -0.3, 0.2]), np.array([0.4, 0.1, -0.2])
    diff = np.array(f(0.0, r, v2) - f(0.0, r, v1)).ravel()
    dv = v2 - v1
    np.testing.assert_allclose(diff, [2 * dv[1], -2 * dv[0], 0.0], rtol=0, atol=1e-15)


# --- J2 ------------------------------------------------------------------------------------------
def _j2_part(model_j2, model_plain, t, r):
    return model_j2.acceleration(t, r) - model_plain.acceleration(t, r)


def test_j2_against_hand_values(fit30):
    # Hand calculation from the zonal potential U = (mu/r) [1 - J2 (Re/r)^2 (3 sin^2(phi) - 1)/2]:
    # on the equator dU/dr adds -(3/2) J2 mu Re^2 / r^4 (inward); over the pole +3 J2 mu Re^2 / r^4
    # (outward).  With J2 = 1.08262668e-3, mu = 398600.4357 km^3/s^2, Re = 6378.137 km and
    # r = 7000 km: (3/2) J2 mu Re^2 / r^4 = 1.0967390e-5 km/s^2 (worked by hand, 8 digits).
    with_j2 = EarthCentred(fit30, sun=True, j2=True)
    plain = EarthCentred(fit30, sun=True, j2=False)
    t = T0 + 3.3 * DAY
    hand = 1.0967390e-5
    a_eq = _j2_part(with_j2, plain, t, np.array([7000.0, 0.0, 0.0]))
    np.testing.assert_allclose(a_eq, [-hand, 0.0, 0.0], rtol=1e-7, atol=1e-20)
    a_eq_y = _j2_part(with_j2, plain, t, np.array([0.0, -7000.0, 0.0]))
    np.testing.assert_allclose(a_eq_y, [0.0, hand, 0.0], rtol=1e-7, atol=1e-20)
    a_pole = _j2_part(with_j2, plain, t, np.array([0.0, 0.0, 7000.0]))
    np.testing.assert_allclose(a_pole, [0.0, 0.0, 2.0 * hand], rtol=1e-7, atol=1e-20)


def test_j2_is_gradient_of_zonal_potential(fit30):
    # Central differences of the potential written independently of the model's closed form.
    mu, re = GM_EARTH, R_EARTH

    def potential(r):
        rn = np.linalg.norm(r)
        s = r[2] / rn
        return -mu * J2_EARTH * re**2 / rn**3 * 0.5 * (3.0 * s * s - 1.0)

    with_j2 = EarthCentred(fit30, sun=False, j2=True)
    plain = EarthCentred(fit30, sun=False, j2=False)
    rng = np.random.default_rng(6)
    for _ in range(20):
        u = rng.normal(size=3)
        r = rng.uniform(6500.0, 40_000.0) * u / np.linalg.norm(u)
        h = 1e-3 * np.linalg.norm(r)
        grad = np.array([(potential(r + h * e) - potential(r - h * e)) / (2 * h) for e in np.eye(3)])
        a = _j2_part(with_j2, plain, T0 + DAY, r)
        # Central-difference truncation error ~ (h/r)^2 = 1e-6 relative.
        assert np.linalg.norm(a - grad) < 1e-5 * np.linalg.norm(grad)


# --- indirect term -------------------------------------------------------------------------------
def test_third_body_vanishes_at_earth_centre():
    # At Earth's centre the direct pull and the indirect term are the same vector: exactly zero.
    for b in ([384_400.0, 0.0, 0.0], [-2.1e5, 3.0e5, 1.1e5], [1.49e8, 1.2e7, -5.0e6]):
        assert third_body(GM_MOON, 0.0, 0.0, 0.0, *b) == (0.0, 0.0, 0.0)


@pytest.mark.parametrize("body", ["moon", "sun"])
def test_perturbation_near_earth_centre_is_tidal(fit30, body):
    # With Earth's own pull switched off (gm_earth = 0) only the perturbation remains.  Close to
    # Earth's centre it must be the tidal acceleration (gm / d^3) (3 (u.r) u - r), u the unit vector
    # to the body (the first term of the expansion in r/d): it vanishes linearly as r -> 0.
    # Neglected terms are O(r/d) relative: 100 km / 360,000 km ~ 3e-4 for the Moon.  The direct
    # and indirect terms (each ~ gm / d^2) cancel, so round-off leaves a floor of a few
    # eps * gm / d^2 (~1e-21 km/s^2 for the Sun, comparable to its tide at r = 1 km).
    gms = {"moon": (GM_MOON, 0.0), "sun": (0.0, GM_SUN)}[body]
    model = EarthCentred(fit30, sun=True, j2=False, gm_earth=0.0, gm_moon=gms[0], gm_sun=gms[1])
    f = _casadi_map(model, 1)
    t = T0 + 7.7 * DAY
    b = getattr(fit30, body)(t)
    d = np.linalg.norm(b)
    u = b / d
    gm = gms[0] + gms[1]
    rng = np.random.default_rng(7)
    for scale in (100.0, 10.0, 1.0):
        r = scale * rng.normal(size=3) / math.sqrt(3)
        tidal = gm / d**3 * (3.0 * np.dot(u, r) * u - r)
        for a in (model.acceleration(t, r), np.array(f(t, r, np.zeros(3))).ravel()):
            floor = 10.0 * np.finfo(float).eps * gm / d**2
            bound = 5.0 * np.linalg.norm(r) / d * np.linalg.norm(tidal) + floor
            assert np.linalg.norm(a - tidal) < bound


def test_earth_centred_circular_moon_is_the_cr3bp():
    # The CR3BP (Szebehely, Theory of Orbits, 1967, ch. 1) is Earth and Moon on circular orbits
    # about their barycentre.  Seen from Earth, with the indirect term, that is EarthCentred with a
    # circular Moon whose rate obeys n^2 a^3 = GM_E + GM_M: propagating the same state in both
    # frames must give the same path (this is what the "cr3bp" kind of the solver uses).
    from optimizer.constants import GM_EARTH, GM_MOON
    from optimizer.circular_moon import CircularMoon
    from optimizer.models import EarthCentred
    from optimizer.propagate import propagate

    rot = CR3BP()
    mu, L, T = rot.mu, rot.length_unit, rot.time_unit
    period = 2 * np.pi * np.sqrt(L**3 / (GM_EARTH + GM_MOON))
    ecm = EarthCentred(CircularMoon(radius_km=L, period_s=period), sun=False, name="cr3bp")

    def to_earth_centred(tau, y):
        c, s = np.cos(tau), np.sin(tau)
        R = np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])
        rho = y[:3] + [mu, 0, 0]
        return np.r_[L * R @ rho, L / T * R @ (y[3:] + np.cross([0, 0, 1], rho))]

    y0 = np.array([0.45, 0.62, 0.03, -0.35, 0.12, 0.02])  # cislunar, clear of both bodies
    arc_rot = propagate(rot, 0.0, y0, 2.0)
    arc_ecm = propagate(ecm, 0.0, to_earth_centred(0.0, y0), 2.0 * T)
    want = to_earth_centred(2.0, arc_rot.y[:, -1])
    assert np.linalg.norm(arc_ecm.y[:3, -1] - want[:3]) < 1e-3  # km, after ~8.7 days
    assert np.linalg.norm(arc_ecm.y[3:, -1] - want[3:]) < 1e-8  # km/s
