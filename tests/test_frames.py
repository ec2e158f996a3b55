"""Checks of optimizer.frames: elements against worked examples, round trips, local frames and
the Earth-Moon rotating frame."""

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from optimizer.frames import (
    Elements,
    cartesian_to_kepler,
    flight_path_angle,
    inertial_to_rotating,
    kepler_to_cartesian,
    rotating_basis,
    rotating_to_inertial,
    rtn_matrix,
    vnc_matrix,
)

DEG = math.pi / 180.0
MU_CURTIS = 398600.0  # km^3/s^2, the value Curtis's examples use
MU_VALLADO = 398600.4418  # km^3/s^2, the value Vallado's examples use
MU = 398600.4362  # any GM serves for the round trips


def angle_error(x, y):
    """Difference of two angles reduced to (-pi, pi]."""
    return abs((x - y + math.pi) % (2 * math.pi) - math.pi)


def elements_tuple(el: Elements):
    return el.a, el.e, el.i, el.raan, el.argp, el.nu


# --- Worked examples ------------------------------------------------------------------------
# Tolerances are half a unit in the last digit the book prints, unless said otherwise.


def test_state_to_elements_curtis_example_4_3():
    # Curtis, Orbital Mechanics for Engineering Students, 3rd ed., Example 4.3 (from memory).
    el = cartesian_to_kepler([-6045.0, -3490.0, 2500.0], [-3.457, 6.618, 2.533], MU_CURTIS)
    assert el.h == pytest.approx(58310.0, abs=5.0)  # printed 58,310 km^2/s
    assert el.i / DEG == pytest.approx(153.2, abs=0.05)
    assert el.raan / DEG == pytest.approx(255.3, abs=0.05)
    assert el.e == pytest.approx(0.1712, abs=0.00005)
    assert el.argp / DEG == pytest.approx(20.07, abs=0.005)
    assert el.nu / DEG == pytest.approx(28.45, abs=0.005)
    assert el.a == pytest.approx(8788.0, abs=0.5)


def test_elements_to_state_curtis_example_4_7():
    # Curtis, Orbital Mechanics for Engineering Students, 3rd ed., Example 4.7 (from memory):
    # h = 80,000 km^2/s, e = 1.4, i = 30 deg, RAAN = 40 deg, argp = 60 deg, nu = 30 deg.
    h, e = 80000.0, 1.4
    a = h * h / MU_CURTIS / (1.0 - e * e)
    r, v = kepler_to_cartesian(a, e, 30 * DEG, 40 * DEG, 60 * DEG, 30 * DEG, MU_CURTIS)
    np.testing.assert_allclose(r, [-4040.0, 4815.0, 3629.0], rtol=0, atol=0.5)
    assert np.all(np.abs(v - [-10.39, -4.772, 1.744]) <= [0.005, 0.0005, 0.0005])


def test_state_to_elements_vallado_example_2_5():
    # Vallado, Fundamentals of Astrodynamics and Applications, 4th ed., Example 2-5 (from memory).
    el = cartesian_to_kepler(
        [6524.834, 6862.875, 6448.296], [4.901327, 5.533756, -1.976341], MU_VALLADO
    )
    # p, a and i as remembered differ from a full-precision evaluation by 8e-3 km, 5e-3 km and
    # 9e-4 deg (about 1e-6 relative: the book's own rounding, or the recollection), so those
    # three get one more digit of slack than printed.
    assert el.p == pytest.approx(11067.790, abs=0.01)
    assert el.a == pytest.approx(36127.343, abs=0.01)
    assert el.e == pytest.approx(0.832853, abs=5e-7)
    assert el.i / DEG == pytest.approx(87.870, abs=0.001)
    assert el.raan / DEG == pytest.approx(227.898, abs=0.0005)
    assert el.argp / DEG == pytest.approx(53.38, abs=0.005)
    assert el.nu / DEG == pytest.approx(92.335, abs=0.0005)


def test_elements_to_state_vallado_example_2_6():
    # Vallado, Fundamentals of Astrodynamics and Applications, 4th ed., Example 2-6 (from memory):
    # p = 11067.790 km, e = 0.83285, i = 87.87, RAAN = 227.89, argp = 53.38, nu = 92.335 deg.
    p, e = 11067.790, 0.83285
    r, v = kepler_to_cartesian(
        p / (1.0 - e * e), e, 87.87 * DEG, 227.89 * DEG, 53.38 * DEG, 92.335 * DEG, MU_VALLADO
    )
    np.testing.assert_allclose(r, [6525.368, 6861.532, 6449.119], rtol=0, atol=5e-4)
    np.testing.assert_allclose(v, [4.902279, 5.533140, -1.975710], rtol=0, atol=5e-7)


# --- Round trips ------------------------------------------------------------------------------

angles = st.floats(min_value=0.0, max_value=2 * math.pi, exclude_max=True)
inclinations = st.floats(min_value=1e-3, max_value=math.pi - 1e-3)
elliptic = st.tuples(
    st.floats(min_value=6600.0, max_value=1e6),
    st.floats(min_value=1e-3, max_value=0.95),
    inclinations,
    angles,
    angles,
    angles,
)


@st.composite
def hyperbolic(draw):
    e = draw(st.floats(min_value=1.01, max_value=10.0))
    nu_limit = math.acos(-1.0 / e)  # asymptote
    nu = draw(st.floats(min_value=-0.95, max_value=0.95)) * nu_limit
    a = draw(st.floats(min_value=-1e6, max_value=-1000.0))
    return a, e, draw(inclinations), draw(angles), draw(angles), nu


def assert_elements_match(el, elements):
    a, e, i, raan, argp, nu = elements
    assert el.a == pytest.approx(a, rel=1e-9)
    assert el.e == pytest.approx(e, rel=1e-9, abs=1e-12)
    assert el.i == pytest.approx(i, abs=1e-9)
    for got, want in [(el.raan, raan), (el.argp, argp), (el.nu, nu)]:
        assert angle_error(got, want) < 1e-8
    assert el.p == pytest.approx(a * (1 - e * e), rel=1e-9)
    assert el.h == pytest.approx(math.sqrt(MU * el.p), rel=1e-12)


@given(st.one_of(elliptic, hyperbolic()))
def test_elements_state_elements(elements):
    r, v = kepler_to_cartesian(*elements, MU)
    assert_elements_match(cartesian_to_kepler(r, v, MU), elements)


@given(
    st.one_of(
        elliptic,
        hyperbolic(),
        # circular and equatorial cases, where the elements are conventions but the state is not
        st.tuples(st.just(7000.0), st.sampled_from([0.0, 0.3]),
                  st.sampled_from([0.0, math.pi, 0.4]), angles, angles, angles),
    )
)
def test_state_elements_state(elements):
    r, v = kepler_to_cartesian(*elements, MU)
    r2, v2 = kepler_to_cartesian(*elements_tuple(cartesian_to_kepler(r, v, MU)), MU)
    np.testing.assert_allclose(r2, r, rtol=0, atol=1e-10 * np.linalg.norm(r))
    np.testing.assert_allclose(v2, v, rtol=0, atol=1e-10 * np.linalg.norm(v))


# --- Conventions for circular and equatorial orbits ----------------------------------------


def test_circular_inclined_gives_argument_of_latitude():
    r, v = kepler_to_cartesian(7000.0, 0.0, 0.5, 1.0, 0.7, 0.3, MU)
    el = cartesian_to_kepler(r, v, MU)
    assert el.e < 1e-12
    assert el.raan == pytest.approx(1.0) and el.argp == 0.0
    assert el.nu == pytest.approx(1.0, abs=1e-12)  # argp + nu


def test_equatorial_elliptic_gives_longitude_of_periapsis():
    r, v = kepler_to_cartesian(9000.0, 0.2, 0.0, 1.0, 0.7, 0.3, MU)
    el = cartesian_to_kepler(r, v, MU)
    assert el.i == 0.0 and el.raan == 0.0
    assert el.argp == pytest.approx(1.7, abs=1e-12)
    assert el.nu == pytest.approx(0.3, abs=1e-12)


def test_retrograde_equatorial_measures_from_x_in_direction_of_motion():
    r, v = kepler_to_cartesian(9000.0, 0.2, math.pi, 0.0, 0.7, 0.3, MU)
    el = cartesian_to_kepler(r, v, MU)
    assert el.i == pytest.approx(math.pi) and el.raan == 0.0
    assert el.argp == pytest.approx(0.7, abs=1e-12)
    assert el.nu == pytest.approx(0.3, abs=1e-12)


def test_circular_equatorial_gives_true_longitude():
    r, v = kepler_to_cartesian(7000.0, 0.0, 0.0, 1.0, 0.7, 0.3, MU)
    el = cartesian_to_kepler(r, v, MU)
    assert (el.raan, el.argp) == (0.0, 0.0)
    assert el.nu == pytest.approx(2.0, abs=1e-12)


def test_escape_parabola_has_infinite_a():
    r = np.array([7000.0, 0.0, 0.0])
    el = cartesian_to_kepler(r, [0.0, math.sqrt(2 * MU / 7000.0), 0.0], MU)
    assert el.e == pytest.approx(1.0) and (el.a == math.inf or abs(el.a) > 1e12)


@pytest.mark.parametrize(
    ("a", "e", "nu"),
    [(7000.0, 1.2, 0.0), (-7000.0, 0.5, 0.0), (7000.0, 1.0, 0.0), (7000.0, -0.1, 0.0),
     (-7000.0, 2.0, 2.2)],  # the last is beyond the asymptote at 120 deg
)
def test_kepler_to_cartesian_rejects(a, e, nu):
    with pytest.raises(ValueError, match="expected|asymptotes"):
        kepler_to_cartesian(a, e, 0.1, 0.0, 0.0, nu, MU)


def test_cartesian_to_kepler_rejects_rectilinear_and_bad_shapes():
    with pytest.raises(ValueError, match="rectilinear"):
        cartesian_to_kepler([7000.0, 0.0, 0.0], [1.0, 0.0, 0.0], MU)
    with pytest.raises(ValueError, match="shape"):
        cartesian_to_kepler([[7000.0, 0.0, 0.0]], [[0.0, 7.5, 0.0]], MU)


# --- Flight-path angle and local frames ----------------------------------------------------


def test_flight_path_angle_signs_and_value():
    e = 0.3
    nu = np.array([0.0, 1.0, -1.0, 2.5])
    states = [kepler_to_cartesian(9000.0, e, 0.4, 0.2, 0.1, x, MU) for x in nu]
    r, v = np.array([s[0] for s in states]), np.array([s[1] for s in states])
    gamma = flight_path_angle(r, v)
    assert gamma.shape == (4,)
    # tan(gamma) = e sin(nu) / (1 + e cos(nu)) on a conic (follows from r = p / (1 + e cos nu)).
    np.testing.assert_allclose(gamma, np.arctan2(e * np.sin(nu), 1 + e * np.cos(nu)), atol=1e-12)
    assert gamma[0] == pytest.approx(0.0, abs=1e-12) and gamma[1] > 0 > gamma[2]
    assert flight_path_angle(r[2], v[2]) == pytest.approx(gamma[2])


def some_states(n=5):
    rng = np.random.default_rng(7)
    return rng.normal(size=(n, 3)) * 7000.0, rng.normal(size=(n, 3)) * 7.0


@pytest.mark.parametrize("matrix", [rtn_matrix, vnc_matrix])
def test_local_frames_are_right_handed_rotations(matrix):
    r, v = some_states()
    m = matrix(r, v)
    assert m.shape == (5, 3, 3)
    np.testing.assert_allclose(m @ np.swapaxes(m, -1, -2), np.broadcast_to(np.eye(3), m.shape),
                               atol=1e-14)
    np.testing.assert_allclose(np.linalg.det(m), 1.0, atol=1e-14)
    np.testing.assert_array_equal(matrix(r[3], v[3]), m[3])


def test_rtn_components():
    r, v = some_states()
    m = rtn_matrix(r, v)
    radial = 0.01 * r / np.linalg.norm(r, axis=1, keepdims=True)  # 10 m/s outward
    np.testing.assert_allclose(np.einsum("nij,nj->ni", m, radial),
                               np.tile([0.01, 0.0, 0.0], (5, 1)), atol=1e-16)
    out_of_plane = np.einsum("nij,nj->ni", m, np.cross(r, v))
    np.testing.assert_allclose(out_of_plane[:, :2], 0.0, atol=1e-9)
    assert np.all(out_of_plane[:, 2] > 0)
    r0, v0 = kepler_to_cartesian(7000.0, 0.0, 0.5, 1.0, 0.0, 2.0, MU)  # circular: v is along T
    np.testing.assert_allclose(rtn_matrix(r0, v0) @ v0, [0.0, np.linalg.norm(v0), 0.0],
                               atol=1e-14)


def test_vnc_components():
    r, v = some_states()
    m = vnc_matrix(r, v)
    np.testing.assert_allclose(np.einsum("nij,nj->ni", m, v),
                               np.linalg.norm(v, axis=1)[:, None] * [1.0, 0.0, 0.0], atol=1e-14)
    r0, v0 = kepler_to_cartesian(7000.0, 0.0, 0.5, 1.0, 0.0, 2.0, MU)  # circular: C is along R
    np.testing.assert_allclose(vnc_matrix(r0, v0)[2], r0 / np.linalg.norm(r0), atol=1e-14)


def test_zero_vectors_and_bad_shapes_are_refused():
    with pytest.raises(ValueError, match="zero"):
        rtn_matrix([7000.0, 0.0, 0.0], [1.0, 0.0, 0.0])
    with pytest.raises(ValueError, match="shape"):
        vnc_matrix([7000.0, 0.0], [0.0, 7.0])


# --- Earth-Moon rotating frame ---------------------------------------------------------------

TILT = rotating_basis([1.0, 0.2, 0.1], [-0.1, 1.0, 0.3]).T  # an arbitrary fixed rotation
R_MOON, W_MOON = 384400.0, 2.6617e-6  # km, rad/s; only a plausible size is needed here


def circular_moon(t):
    """Moon on a circular orbit in a tilted plane, position and velocity at times t (s)."""
    t = np.atleast_1d(t)
    c, s, z = np.cos(W_MOON * t), np.sin(W_MOON * t), np.zeros_like(t)
    r = R_MOON * np.stack([c, s, z], axis=-1) @ TILT.T
    v = R_MOON * W_MOON * np.stack([-s, c, z], axis=-1) @ TILT.T
    return r, v


def test_moon_is_fixed_on_the_x_axis():
    r_moon, v_moon = circular_moon(np.linspace(0.0, 2e6, 7))
    r_rot, v_rot = inertial_to_rotating(r_moon, v_moon, r_moon, v_moon)
    np.testing.assert_allclose(r_rot, np.tile([R_MOON, 0.0, 0.0], (7, 1)), atol=1e-9)
    np.testing.assert_allclose(v_rot, 0.0, atol=1e-15)


def test_moon_on_an_eccentric_orbit_moves_only_along_x():
    r_moon, v_moon = kepler_to_cartesian(384400.0, 0.055, 0.09, 0.3, 0.2, 1.0, 403503.0)
    r_rot, v_rot = inertial_to_rotating(r_moon, v_moon, r_moon, v_moon)
    np.testing.assert_allclose(r_rot, [np.linalg.norm(r_moon), 0.0, 0.0], atol=1e-9)
    radial_rate = r_moon @ v_moon / np.linalg.norm(r_moon)
    np.testing.assert_allclose(v_rot, [radial_rate, 0.0, 0.0], atol=1e-15)


def test_rotating_velocity_is_the_derivative_of_rotating_position():
    # A vehicle coasting in a straight line (inertial) seen from the rotating frame: the
    # rotating-frame velocity must match a central difference of the rotating-frame position.
    r0, v0 = np.array([40000.0, -20000.0, 5000.0]), np.array([1.0, 2.0, -0.5])
    t, dt = 1.0e5, 10.0
    times = np.array([t - dt, t, t + dt])
    r_moon, v_moon = circular_moon(times)
    r_rot, v_rot = inertial_to_rotating(r0 + v0 * times[:, None], np.tile(v0, (3, 1)),
                                        r_moon, v_moon)
    np.testing.assert_allclose((r_rot[2] - r_rot[0]) / (2 * dt), v_rot[1], rtol=1e-9)


@given(st.integers(min_value=0, max_value=2**32 - 1))
def test_rotating_round_trip(seed):
    rng = np.random.default_rng(seed)
    r, v = rng.normal(size=(4, 3)) * 1e5, rng.normal(size=(4, 3))
    r_moon, v_moon = circular_moon(rng.uniform(0.0, 3e6, size=4))
    back = rotating_to_inertial(*inertial_to_rotating(r, v, r_moon, v_moon), r_moon, v_moon)
    np.testing.assert_allclose(back[0], r, rtol=0, atol=1e-9)
    np.testing.assert_allclose(back[1], v, rtol=0, atol=1e-14)


def test_rotating_frame_shapes_and_broadcast():
    r_moon, v_moon = circular_moon(np.array([0.0, 1e5, 2e5]))
    basis = rotating_basis(r_moon, v_moon)
    assert basis.shape == (3, 3, 3)
    np.testing.assert_allclose(basis[1, 2], TILT[:, 2], atol=1e-15)  # z: the orbit normal
    r, v = np.array([1e5, 2e5, 3e4]), np.array([0.1, -0.5, 0.2])
    single = inertial_to_rotating(r, v, r_moon[1], v_moon[1])
    assert single[0].shape == (3,)
    stacked = inertial_to_rotating(np.tile(r, (3, 1)), np.tile(v, (3, 1)), r_moon, v_moon)
    one_moon_many_vehicles = inertial_to_rotating(np.tile(r, (3, 1)), np.tile(v, (3, 1)),
                                                  r_moon[1], v_moon[1])
    for got in (stacked, one_moon_many_vehicles):
        assert got[0].shape == (3, 3)
        np.testing.assert_allclose(got[0][1], single[0], atol=1e-9)
        np.testing.assert_allclose(got[1][1], single[1], atol=1e-15)
