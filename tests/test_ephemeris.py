"""Checks of optimizer.ephemeris (DE421 reading, the Chebyshev fit) and optimizer.circular_moon.

Epochs are TDB seconds past J2000; positions km, velocities km/s.
"""

import json

import casadi as ca
import numpy as np
import pytest
from numpy.polynomial import chebyshev

from optimizer.circular_moon import CircularMoon
from optimizer.constants import EARTH_MOON_DISTANCE, JD_J2000, SECONDS_PER_DAY, SIDEREAL_MONTH
from optimizer.ephemeris import DE421, ChebyshevEphemeris

DAY = SECONDS_PER_DAY
# Astronomical unit, 149,597,870.7 km exactly (IAU 2012 Resolution B2), from memory.
AU_KM = 149_597_870.7
T0 = 9000 * DAY  # 2024-08-22 12:00 TDB, an arbitrary start of a 30-day scenario window
RNG = np.random.default_rng(20240822)


@pytest.fixture(scope="module")
def de421():
    eph = DE421()
    yield eph
    eph.close()


@pytest.fixture(scope="module")
def fit30(de421):
    return ChebyshevEphemeris.fit(de421, T0, T0 + 30 * DAY)


def _segment_by_hand(segment, t):
    """Position from a jplephem segment's raw coefficients, evaluated here with numpy's chebval.

    The offset into the interval is formed in seconds as (whole seconds from the interval start
    to J2000) + t, so that no large day count rounds the epoch.
    """
    init_jd, interval_days, coeffs = segment.load_array()  # coeffs: (3, n_intervals, n_coeffs)
    i = int(((JD_J2000 - init_jd) + t / DAY) // interval_days)
    offset_s = (JD_J2000 - init_jd - i * interval_days) * DAY + t
    s = 2.0 * offset_s / (interval_days * DAY) - 1.0
    return chebyshev.chebval(s, coeffs[:, i, :].T)


# --- DE421 ---------------------------------------------------------------------------------------
def test_de421_matches_jplephem_segment_arithmetic(de421):
    # Source: the DE421 file itself; Moon = EMB->Moon - EMB->Earth,
    # Sun = SSB->Sun - SSB->EMB - EMB->Earth, recomputed here from jplephem's segments.
    k = de421._kernel
    ts = T0 + RNG.uniform(0.0, 365 * DAY, 20)
    for t in ts:
        d = t / DAY
        moon = k[3, 301].compute(JD_J2000, d) - k[3, 399].compute(JD_J2000, d)
        sun = k[0, 10].compute(JD_J2000, d) - k[0, 3].compute(JD_J2000, d) - k[3, 399].compute(JD_J2000, d)
        np.testing.assert_array_equal(de421.moon(t), moon)  # exact: same arithmetic
        np.testing.assert_array_equal(de421.sun(t), sun)
        # Independent evaluation of the raw coefficients: agreement to round-off.  jplephem takes
        # days, so t/86400*86400 rounds the epoch by ~1e-7 s: ~1e-7 km for the Moon (1 km/s
        # relative to Earth), ~3e-6 km for the Sun (Earth moves 30 km/s about the barycentre).
        moon_hand = _segment_by_hand(k[3, 301], t) - _segment_by_hand(k[3, 399], t)
        sun_hand = (_segment_by_hand(k[0, 10], t) - _segment_by_hand(k[0, 3], t)
                    - _segment_by_hand(k[3, 399], t))
        np.testing.assert_allclose(de421.moon(t), moon_hand, rtol=0, atol=1e-6)
        np.testing.assert_allclose(de421.sun(t), sun_hand, rtol=0, atol=1e-5)
    # Vectorised call: (3, N), identical to the scalar calls.
    assert de421.moon(ts).shape == (3, ts.size)
    np.testing.assert_array_equal(de421.moon(ts)[:, 3], de421.moon(ts[3]))


def test_de421_velocity_is_km_per_s(de421):
    # Source: central difference of DE421 positions (h = 10 s); truncation error ~1e-9 km/s.
    t, h = T0 + 3.3 * DAY, 10.0
    _, v = de421.moon_state(t)
    fd = (de421.moon(t + h) - de421.moon(t - h)) / (2 * h)
    np.testing.assert_allclose(v, fd, rtol=0, atol=1e-8)


def test_lunar_distance_over_a_year(de421):
    # Common practice: the geocentric lunar distance stays within about 356,000-407,000 km, and in
    # any year some perigees fall below 360,000 km and some apogees exceed 404,000 km.
    # Measured, 2024 hourly: 356,895 km to 406,516 km.
    t = (8765.5 + np.arange(366 * 24) / 24) * DAY  # 2024-01-01 00:00 TDB, hourly for 366 days
    r = np.linalg.norm(de421.moon(t), axis=0)
    assert 356_000 < r.min() < 360_000
    assert 404_000 < r.max() < 407_000


def test_sun_distance_over_a_year(de421):
    # Common practice / from memory: perihelion ~0.9833 AU, aphelion ~1.0167 AU.
    # Measured, 2024 hourly (Earth's centre, not the barycentre): 0.98331 to 1.01673 AU.
    t = (8765.5 + np.arange(366 * 24) / 24) * DAY
    r = np.linalg.norm(de421.sun(t), axis=0) / AU_KM
    assert 0.983 < r.min() < 0.984
    assert 1.016 < r.max() < 1.017


def test_de421_errors(de421):
    for t in (de421.t_end + DAY, de421.t_start - 1.0):
        with pytest.raises(ValueError, match="outside the DE421 span"):
            de421.moon(t)
    with pytest.raises(ValueError, match="outside the DE421 span"):
        de421.sun(np.array([T0, de421.t_end + 1.0]))
    with pytest.raises(NotImplementedError, match="ChebyshevEphemeris.fit"):
        de421.moon_casadi(ca.SX.sym("t"))
    json.dumps(de421.describe())


# --- Chebyshev fit -------------------------------------------------------------------------------
def test_fit_30_days_numpy(de421, fit30):
    # Requirement (lead): within 10 m of DE421 over a 30-day window.
    # Measured: Moon degree 32, 7.7e-6 km (8 mm); Sun degree 24, 4.2e-5 km (4 cm); default tol 1e-4 km.
    ts = T0 + RNG.uniform(0.0, 30 * DAY, 2000)
    assert fit30.max_error_km["moon"] < 1e-4 and fit30.max_error_km["sun"] < 1e-4
    err_moon = np.linalg.norm(fit30.moon(ts) - de421.moon(ts), axis=0).max()
    err_sun = np.linalg.norm(fit30.sun(ts) - de421.sun(ts), axis=0).max()
    assert err_moon < 0.01 and err_sun < 0.01
    # Scalar fast path gives the same numbers as the array path (round-off only).
    for t in ts[:20]:
        np.testing.assert_allclose(fit30.moon(t), fit30.moon(np.array([t]))[:, 0], rtol=0, atol=1e-9)
        np.testing.assert_allclose(fit30.sun(float(t)), de421.sun(t), rtol=0, atol=0.01)
    # Derivative of the fit against DE421's velocity: 1 mm/s is ample (measured ~4e-9 km/s).
    v_err = np.abs(fit30.moon_velocity(ts) - de421.moon_velocity(ts)).max()
    assert v_err < 1e-6
    # Ends of the window are inside.
    fit30.moon(T0), fit30.moon(T0 + 30 * DAY)


def test_moon_and_sun_one_basis_matches_de421(de421, fit30):
    # The propagator's fast path (both bodies from one Chebyshev basis, summed by a product instead
    # of Clenshaw's recurrence) against DE421 read by jplephem: the same 1 cm as the series above.
    ts = T0 + RNG.uniform(0.0, 30 * DAY, 200)
    for t in ts:
        both = np.array(fit30.moon_and_sun(t))
        assert np.linalg.norm(both[:3] - de421.moon(t)) < 0.01
        assert np.linalg.norm(both[3:] - de421.sun(t)) < 0.01
    with pytest.raises(ValueError, match="outside the Chebyshev fit window"):
        fit30.moon_and_sun(T0 - DAY)


@pytest.mark.parametrize("sym", [ca.SX, ca.MX])
def test_fit_30_days_casadi(de421, fit30, sym):
    # Source: DE421 via jplephem (positions and compute_and_differentiate velocities).
    t = sym.sym("t")
    moon = fit30.moon_casadi(t)
    f = ca.Function("eph", [t], [moon, fit30.sun_casadi(t), ca.jacobian(moon, t)])
    for tk in T0 + RNG.uniform(0.0, 30 * DAY, 25):
        m, s, dm = (np.asarray(v).ravel() for v in f(tk))
        pos, vel = de421.moon_state(tk)
        np.testing.assert_allclose(m, fit30.moon(tk), rtol=0, atol=1e-8)   # casadi == numpy
        np.testing.assert_allclose(m, pos, rtol=0, atol=0.01)              # within 10 m
        np.testing.assert_allclose(s, de421.sun(tk), rtol=0, atol=0.01)
        np.testing.assert_allclose(dm, vel, rtol=0, atol=1e-6)             # 1 mm/s
    # A plain float also works (numeric DM result).
    np.testing.assert_allclose(np.asarray(fit30.moon_casadi(T0 + DAY)).ravel(),
                               fit30.moon(T0 + DAY), rtol=0, atol=1e-8)


def test_fit_10_days_needs_lower_degree(de421, fit30):
    fit10 = ChebyshevEphemeris.fit(de421, T0, T0 + 10 * DAY)
    assert fit10.degree["moon"] < fit30.degree["moon"]
    assert fit10.moon_coeffs.shape == (fit10.degree["moon"] + 1, 3)


def test_fit_errors(de421, fit30):
    with pytest.raises(ValueError, match="outside the Chebyshev fit window"):
        fit30.moon(T0 + 31 * DAY)
    with pytest.raises(ValueError, match="outside the Chebyshev fit window"):
        fit30.sun(np.array([T0 - 60.0, T0]))
    with pytest.raises(ValueError, match="does not reach"):
        ChebyshevEphemeris.fit(de421, T0, T0 + 365 * DAY)  # a year is far beyond degree 80
    with pytest.raises(ValueError, match="t_end > t_start"):
        ChebyshevEphemeris.fit(de421, T0, T0)
    json.dumps(fit30.describe(include_coefficients=True))


def test_fit_of_circular_moon_has_no_sun():
    src = CircularMoon(inclination_deg=5.0)
    fit = ChebyshevEphemeris.fit(src, 0.0, 10 * DAY)
    assert fit.sun(DAY) is None and fit.sun_casadi(ca.SX.sym("t")) is None
    np.testing.assert_allclose(fit.moon(DAY), src.moon(DAY), rtol=0, atol=1e-4)


# --- Circular Moon -------------------------------------------------------------------------------
def test_circular_moon():
    cm = CircularMoon(inclination_deg=28.5, raan_deg=40.0, phase_deg=10.0, epoch=T0)
    ts = T0 + np.linspace(0.0, 2 * SIDEREAL_MONTH, 500)
    r = cm.moon(ts)
    np.testing.assert_allclose(np.linalg.norm(r, axis=0), EARTH_MOON_DISTANCE, rtol=1e-13)
    # One period later the Moon is back; half a period later it is opposite.
    np.testing.assert_allclose(cm.moon(ts + SIDEREAL_MONTH), r, rtol=0, atol=1e-6)
    np.testing.assert_allclose(cm.moon(ts + SIDEREAL_MONTH / 2), -r, rtol=0, atol=1e-6)
    assert cm.rate == pytest.approx(2 * np.pi / SIDEREAL_MONTH)
    # Geometry of the angles: the Moon reaches its greatest height a sin(i) at u = 90 deg,
    # and the ascending node (u = 0) lies at longitude raan.
    assert r[2].max() == pytest.approx(EARTH_MOON_DISTANCE * np.sin(np.radians(28.5)), rel=1e-6)
    node = CircularMoon(raan_deg=90.0).moon(0.0)
    np.testing.assert_allclose(node, [0.0, EARTH_MOON_DISTANCE, 0.0], atol=1e-9)
    # Velocity: |v| = a n and equal to the CasADi derivative; casadi == numpy.
    t = ca.SX.sym("t")
    pos = cm.moon_casadi(t)
    f = ca.Function("cm", [t], [pos, ca.jacobian(pos, t)])
    for tk in ts[::50]:
        p, v = (np.asarray(x).ravel() for x in f(tk))
        np.testing.assert_allclose(p, cm.moon(tk), rtol=0, atol=1e-8)
        np.testing.assert_allclose(v, cm.moon_velocity(tk), rtol=0, atol=1e-12)
        assert np.linalg.norm(v) == pytest.approx(EARTH_MOON_DISTANCE * cm.rate, rel=1e-12)
    assert cm.sun(T0) is None and cm.sun_casadi(t) is None
    json.dumps(cm.describe())
