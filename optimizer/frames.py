"""Keplerian elements, local orbital frames and the Earth-Moon rotating frame.

Units: km, km/s, km^3/s^2; all angles in radians.  Inertial vectors are Earth-centred with ICRF
axes (any inertial frame works, the functions only assume one).  The frame functions accept single
vectors of shape (3,) or stacks of shape (N, 3), which broadcast against each other, and return
matrices of shape (3, 3) or (N, 3, 3) whose rows are the new axes in inertial components, so
``M @ x_inertial`` gives the components of ``x`` in the new frame.

One job: frames and elements.  May import: numpy and the standard library only (nothing of the
optimiser).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

# Below this eccentricity the orbit is treated as circular, below this sin(i) as equatorial.
_TOL = 1e-11
_TAU = 2.0 * math.pi


@dataclass(frozen=True)
class Elements:
    """Classical orbital elements of a two-body orbit.

    Attributes
    ----------
    a : float
        Semi-major axis, km; negative for a hyperbola, ``inf`` for a parabola.
    e : float
        Eccentricity.
    i : float
        Inclination, rad, in [0, pi].
    raan : float
        Right ascension of the ascending node, rad, in [0, 2 pi).  Zero for an equatorial orbit
        (sin i < 1e-11), whose line of nodes is taken as the x axis.
    argp : float
        Argument of periapsis, rad, in [0, 2 pi), measured from the node in the direction of
        motion.  Zero for a circular orbit (e < 1e-11), whose periapsis is taken at the node.
    nu : float
        True anomaly, rad, in [0, 2 pi) for every conic (a hyperbola's inbound leg lies in
        (pi, 2 pi)).  For a circular orbit it is the argument of latitude; for a circular
        equatorial one, the true longitude from the x axis.
    p : float
        Semi-latus rectum, km.
    h : float
        Magnitude of the specific angular momentum, km^2/s.
    """

    a: float
    e: float
    i: float
    raan: float
    argp: float
    nu: float
    p: float
    h: float


def kepler_to_cartesian(a, e, i, raan, argp, nu, mu):
    """Position and velocity from classical orbital elements.

    Parameters
    ----------
    a : float
        Semi-major axis, km; positive with ``0 <= e < 1``, negative with ``e > 1``.
    e : float
        Eccentricity (parabolas, ``e == 1``, are not accepted: ``a`` does not fix their size).
    i, raan, argp, nu : float
        Inclination, right ascension of the ascending node, argument of periapsis and true
        anomaly, rad.  On a hyperbola ``nu`` must lie between the asymptotes.
    mu : float
        Gravitational parameter of the central body, km^3/s^2.

    Returns
    -------
    r, v : numpy.ndarray
        Inertial position (km) and velocity (km/s), shape (3,).

    Raises
    ------
    ValueError
        If ``a`` and ``e`` do not describe an ellipse or hyperbola, or ``nu`` is beyond the
        asymptotes.
    """
    p = a * (1.0 - e * e)
    if not (e >= 0.0 and p > 0.0 and mu > 0.0):
        raise ValueError(
            "expected mu > 0 and a > 0 with 0 <= e < 1 (ellipse) or a < 0 with e > 1 (hyperbola), "
            f"got a={a!r}, e={e!r}, mu={mu!r}"
        )
    denom = 1.0 + e * math.cos(nu)
    if denom <= 0.0:
        raise ValueError(
            f"true anomaly {nu!r} rad is beyond the asymptotes of a hyperbola with e={e!r}"
        )
    r_pqw = p / denom * np.array([math.cos(nu), math.sin(nu), 0.0])
    v_pqw = math.sqrt(mu / p) * np.array([-math.sin(nu), e + math.cos(nu), 0.0])
    rotation = _rot_z(raan) @ _rot_x(i) @ _rot_z(argp)  # perifocal -> inertial
    return rotation @ r_pqw, rotation @ v_pqw


def cartesian_to_kepler(r, v, mu) -> Elements:
    """Classical orbital elements from position and velocity.

    Parameters
    ----------
    r : array_like, shape (3,)
        Inertial position, km.
    v : array_like, shape (3,)
        Inertial velocity, km/s.
    mu : float
        Gravitational parameter of the central body, km^3/s^2.

    Returns
    -------
    Elements
        With the conventions for circular and equatorial orbits given in :class:`Elements`.

    Raises
    ------
    ValueError
        If the shapes are wrong or the motion is rectilinear (zero angular momentum).
    """
    r, v = _vectors(r=r, v=v)
    if r.shape != (3,) or v.shape != (3,):
        raise ValueError(f"expected r and v of shape (3,), got {r.shape} and {v.shape}")
    r_mag = np.linalg.norm(r)
    h_vec = np.cross(r, v)
    h = np.linalg.norm(h_vec)
    if not h > _TOL * r_mag * np.linalg.norm(v):
        raise ValueError(f"rectilinear or zero state has no orbital plane: r={r}, v={v}")
    w = h_vec / h
    e_vec = np.cross(v, h_vec) / mu - r / r_mag
    e = float(np.linalg.norm(e_vec))
    energy = 0.5 * (v @ v) - mu / r_mag
    sin_i = math.hypot(w[0], w[1])
    if sin_i > _TOL:
        node = np.array([-w[1], w[0], 0.0]) / sin_i  # z x w, normalised
        raan = _wrap(math.atan2(node[1], node[0]))
    else:
        node, raan = np.array([1.0, 0.0, 0.0]), 0.0
    periapsis = e_vec / e if e > _TOL else node
    return Elements(
        a=float(-mu / (2.0 * energy)) if energy != 0.0 else math.inf,
        e=e,
        i=math.atan2(sin_i, w[2]),
        raan=raan,
        argp=_angle(node, periapsis, w),
        nu=_angle(periapsis, r, w),
        p=float(h * h / mu),
        h=float(h),
    )


def flight_path_angle(r, v):
    """Flight-path angle: elevation of the velocity above the local horizontal.

    Parameters
    ----------
    r, v : array_like, shape (3,) or (N, 3)
        Position (km) and velocity (km/s) relative to the central body.

    Returns
    -------
    float or numpy.ndarray, shape () or (N,)
        Angle in rad, in [-pi/2, pi/2]; negative when the distance is decreasing.
    """
    r, v = _vectors(r=r, v=v)
    return np.arctan2(np.sum(r * v, axis=-1), np.linalg.norm(np.cross(r, v), axis=-1))


def rtn_matrix(r, v):
    """Rotation from inertial to the local radial / transverse / normal (RTN) frame.

    R is along the position, N along the angular momentum ``r x v`` and T = N x R (along the
    velocity on a circular orbit).

    Parameters
    ----------
    r, v : array_like, shape (3,) or (N, 3)
        Position (km) and velocity (km/s) relative to the central body.

    Returns
    -------
    numpy.ndarray, shape (3, 3) or (N, 3, 3)
        Rows R, T, N in inertial components; ``rtn_matrix(r, v) @ dv`` gives the RTN components.
    """
    r, v = _vectors(r=r, v=v)
    rad, nor = _unit(r, "position"), _unit(np.cross(r, v), "angular momentum")
    return np.stack([rad, np.cross(nor, rad), nor], axis=-2)


def vnc_matrix(r, v):
    """Rotation from inertial to the velocity-aligned (VNC) frame.

    V is along the velocity, N along the angular momentum ``r x v`` and C = V x N (outward,
    along R on a circular orbit), a right-handed set.

    Parameters
    ----------
    r, v : array_like, shape (3,) or (N, 3)
        Position (km) and velocity (km/s) relative to the central body.

    Returns
    -------
    numpy.ndarray, shape (3, 3) or (N, 3, 3)
        Rows V, N, C in inertial components.
    """
    r, v = _vectors(r=r, v=v)
    vel, nor = _unit(v, "velocity"), _unit(np.cross(r, v), "angular momentum")
    return np.stack([vel, nor, np.cross(vel, nor)], axis=-2)


def rotating_basis(r_moon, v_moon):
    """Axes of the Earth-centred Earth-Moon rotating frame.

    Parameters
    ----------
    r_moon, v_moon : array_like, shape (3,) or (N, 3)
        Geocentric inertial position (km) and velocity (km/s) of the Moon.

    Returns
    -------
    numpy.ndarray, shape (3, 3) or (N, 3, 3)
        Rows x (Earth to Moon), y = z x x, z (along the Moon's orbital angular momentum
        ``r_moon x v_moon``) in inertial components.
    """
    r_moon, v_moon = _vectors(r_moon=r_moon, v_moon=v_moon)
    x = _unit(r_moon, "Moon position")
    z = _unit(np.cross(r_moon, v_moon), "Moon angular momentum")
    return np.stack([x, np.cross(z, x), z], axis=-2)


def inertial_to_rotating(r, v, r_moon, v_moon):
    """Geocentric inertial state to the Earth-centred Earth-Moon rotating frame.

    The frame turns about its z axis at the Moon's instantaneous angular rate
    ``omega = |r_moon x v_moon| / |r_moon|^2``, so ``v_rot = M (v - omega x r)``.  The slow turn
    of the Moon's orbital plane (a rotation about x, which would need the Moon's acceleration) is
    not included.  Distances are not scaled: on an eccentric Moon orbit the Moon sits at
    ``(|r_moon|, 0, 0)`` with velocity ``(d|r_moon|/dt, 0, 0)``.

    Parameters
    ----------
    r, v : array_like, shape (3,) or (N, 3)
        Geocentric inertial position (km) and velocity (km/s) of the spacecraft.
    r_moon, v_moon : array_like, shape (3,) or (N, 3)
        Geocentric inertial position (km) and velocity (km/s) of the Moon at the same epoch(s),
        one Moon state per row of ``r`` or one for all.

    Returns
    -------
    r_rot, v_rot : numpy.ndarray, shape (3,) or (N, 3)
        Position (km) and velocity (km/s) in the rotating frame.
    """
    r, v = _vectors(r=r, v=v)
    basis, omega = _rotation(r_moon, v_moon)
    return _apply(basis, r), _apply(basis, v - np.cross(omega, r))


def rotating_to_inertial(r_rot, v_rot, r_moon, v_moon):
    """Earth-Moon rotating-frame state to geocentric inertial; inverse of
    :func:`inertial_to_rotating`.

    Parameters
    ----------
    r_rot, v_rot : array_like, shape (3,) or (N, 3)
        Position (km) and velocity (km/s) in the rotating frame.
    r_moon, v_moon : array_like, shape (3,) or (N, 3)
        Geocentric inertial position (km) and velocity (km/s) of the Moon at the same epoch(s).

    Returns
    -------
    r, v : numpy.ndarray, shape (3,) or (N, 3)
        Geocentric inertial position (km) and velocity (km/s).
    """
    r_rot, v_rot = _vectors(r_rot=r_rot, v_rot=v_rot)
    basis, omega = _rotation(r_moon, v_moon)
    transpose = np.swapaxes(basis, -1, -2)
    r = _apply(transpose, r_rot)
    return r, _apply(transpose, v_rot) + np.cross(omega, r)


def _rotation(r_moon, v_moon):
    """Rotating-frame axes and the frame's angular velocity in inertial components."""
    basis = rotating_basis(r_moon, v_moon)
    r_moon, v_moon = _vectors(r_moon=r_moon, v_moon=v_moon)
    rate = np.linalg.norm(np.cross(r_moon, v_moon), axis=-1) / np.sum(r_moon**2, axis=-1)
    return basis, rate[..., None] * basis[..., 2, :]


def _apply(matrix, x):
    """Matrix-vector products over stacks: (..., 3, 3) and (..., 3) -> (..., 3)."""
    return np.einsum("...ij,...j->...i", matrix, x)


def _vectors(**arrays):
    """Convert to float arrays whose last axis has length 3, or say which one is not."""
    out = []
    for name, x in arrays.items():
        x = np.asarray(x, dtype=float)
        if x.ndim not in (1, 2) or x.shape[-1] != 3:
            raise ValueError(f"expected {name} of shape (3,) or (N, 3), got shape {x.shape}")
        out.append(x)
    return out


def _unit(x, name):
    """Unit vectors along the last axis; a zero vector is an error, not a NaN."""
    norm = np.linalg.norm(x, axis=-1, keepdims=True)
    if np.any(norm == 0.0):
        raise ValueError(f"{name} is zero, so its direction is undefined")
    return x / norm


def _angle(start, end, axis):
    """Angle from ``start`` to ``end`` turning positively about unit ``axis``, in [0, 2 pi)."""
    return _wrap(math.atan2(np.cross(start, end) @ axis, start @ end))


def _wrap(angle):
    """Angle reduced to [0, 2 pi); a tiny negative angle gives 0, not 2 pi."""
    angle %= _TAU
    return 0.0 if angle == _TAU else angle


def _rot_x(angle):
    c, s = math.cos(angle), math.sin(angle)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])


def _rot_z(angle):
    c, s = math.cos(angle), math.sin(angle)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
