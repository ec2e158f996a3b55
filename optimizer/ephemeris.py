"""Geocentric Moon and Sun positions: JPL DE421 and a differentiable Chebyshev fit of it.

Conventions
-----------
Epochs ``t`` are TDB seconds past J2000 (JD 2451545.0 TDB), as floats.  Positions are in km and
velocities in km/s, Earth-centred, on ICRF axes (the axes of DE421).

Every model offers the same duck-typed interface (so does the circular Moon of
:mod:`optimizer.circular_moon`):

``moon(t)``, ``sun(t)``
    numpy positions: shape (3,) for a scalar ``t``, shape (3, N) for a 1-D array of N epochs.
``moon_casadi(t, par=None)``, ``sun_casadi(t, par=None)``
    the same positions as CasADi 3x1 expressions of a symbolic (SX/MX) or numeric ``t``.
``casadi_parameters()``
    the numbers the CasADi expressions depend on (window, coefficients, orbit), as one vector;
    given a symbolic vector ``par`` of that length, ``moon_casadi``/``sun_casadi`` read them from
    it instead of writing them into the expression, so one compiled NLP serves every epoch
    (``optimizer/compiled.py``).  Without ``par`` the numbers are written in, as before.
``describe()``
    a JSON-serialisable dict naming the model and its settings, for output files.

A model without a Sun (:class:`~optimizer.circular_moon.CircularMoon`, or a fit of such a source)
returns ``None`` from ``sun`` and ``sun_casadi``.

``DE421`` reads the ephemeris file exactly but only in numpy; for CasADi, fit it over the scenario
window with ``ChebyshevEphemeris.fit(DE421(), t_start, t_end)``.

One job: the ephemeris, DE421 read exactly or through a Chebyshev fit.  May import: numpy, the
standard library, :mod:`optimizer.constants`, jplephem and skyfield-data (the DE421 file) and,
inside the CasADi functions only, CasADi.
"""

from __future__ import annotations

import hashlib
import math
import os

import numpy as np

from .constants import JD_J2000, SECONDS_PER_DAY

__all__ = ["DE421", "ChebyshevEphemeris", "default_de421_path"]


def default_de421_path() -> str:
    """Path of the ``de421.bsp`` file shipped in the ``skyfield-data`` package."""
    import skyfield_data

    return os.path.join(os.path.dirname(skyfield_data.__file__), "data", "de421.bsp")


def _fmt_epoch(t: float) -> str:
    return f"t = {t:.3f} s TDB past J2000 (day {t / SECONDS_PER_DAY:.4f})"


# ------------------------------------------------------------------------------------------------
# JPL DE421, read exactly
# ------------------------------------------------------------------------------------------------
class DE421:
    """Exact geocentric Moon and Sun from the JPL DE421 file, read with ``jplephem``.

    Parameters
    ----------
    path : str, optional
        Path of ``de421.bsp``.  Default: the copy shipped in ``skyfield-data`` (no download).

    Notes
    -----
    Moon = [EMB -> Moon] - [EMB -> Earth];
    Sun = [SSB -> Sun] - [SSB -> EMB] - [EMB -> Earth].
    Epochs are passed to ``jplephem`` as JD 2451545.0 plus ``t / 86400`` days, which keeps the
    fraction separate from the whole day count.
    """

    def __init__(self, path: str | None = None):
        from jplephem.spk import SPK

        self.path = os.path.abspath(path or default_de421_path())
        if not os.path.exists(self.path):
            raise FileNotFoundError(f"DE421 file not found: {self.path}")
        self._kernel = SPK.open(self.path)
        k = self._kernel
        self._emb_moon, self._emb_earth = k[3, 301], k[3, 399]
        self._ssb_sun, self._ssb_emb = k[0, 10], k[0, 3]
        segs = (self._emb_moon, self._emb_earth, self._ssb_sun, self._ssb_emb)
        self.t_start = max(float(s.start_second) for s in segs)  # s TDB past J2000
        self.t_end = min(float(s.end_second) for s in segs)
        self._sha256: str | None = None

    def close(self) -> None:
        """Release the memory-mapped file."""
        self._kernel.close()

    # -- helpers -----------------------------------------------------------------------------
    def _days(self, t):
        """Check the span and return the day fraction past J2000 (scalar or 1-D array)."""
        t_arr = np.asarray(t, dtype=float)
        if t_arr.ndim > 1:
            raise ValueError(f"t must be a scalar or a 1-D array, got shape {t_arr.shape}")
        lo, hi = float(np.min(t_arr)), float(np.max(t_arr))
        if lo < self.t_start or hi > self.t_end:
            bad = lo if lo < self.t_start else hi
            raise ValueError(
                f"epoch {_fmt_epoch(bad)} is outside the DE421 span "
                f"[{self.t_start:.1f}, {self.t_end:.1f}] s TDB past J2000 ({self.path})"
            )
        return t_arr / SECONDS_PER_DAY if t_arr.ndim else float(t_arr) / SECONDS_PER_DAY

    # -- positions ---------------------------------------------------------------------------
    def moon(self, t):
        """Geocentric Moon position, km: shape (3,) for scalar ``t``, (3, N) for N epochs."""
        d = self._days(t)
        return self._emb_moon.compute(JD_J2000, d) - self._emb_earth.compute(JD_J2000, d)

    def sun(self, t):
        """Geocentric Sun position, km: shape (3,) for scalar ``t``, (3, N) for N epochs."""
        d = self._days(t)
        return (
            self._ssb_sun.compute(JD_J2000, d)
            - self._ssb_emb.compute(JD_J2000, d)
            - self._emb_earth.compute(JD_J2000, d)
        )

    def moon_state(self, t):
        """Geocentric Moon position (km) and velocity (km/s), each shaped like ``moon(t)``."""
        d = self._days(t)
        pm, vm = self._emb_moon.compute_and_differentiate(JD_J2000, d)
        pe, ve = self._emb_earth.compute_and_differentiate(JD_J2000, d)
        return pm - pe, (vm - ve) / SECONDS_PER_DAY  # jplephem gives km/day

    def moon_velocity(self, t):
        """Geocentric Moon velocity, km/s, shaped like ``moon(t)``."""
        return self.moon_state(t)[1]

    def moon_casadi(self, t, par=None):
        raise NotImplementedError(
            "DE421 has no CasADi form; fit it over the scenario window with "
            "ChebyshevEphemeris.fit(DE421(), t_start, t_end) and use that fit's moon_casadi"
        )

    def sun_casadi(self, t, par=None):
        raise NotImplementedError(
            "DE421 has no CasADi form; fit it over the scenario window with "
            "ChebyshevEphemeris.fit(DE421(), t_start, t_end) and use that fit's sun_casadi"
        )

    def describe(self) -> dict:
        """JSON-serialisable description (model, file, its SHA-256, span, frame, time scale)."""
        if self._sha256 is None:
            h = hashlib.sha256()
            with open(self.path, "rb") as f:
                for block in iter(lambda: f.read(1 << 20), b""):
                    h.update(block)
            self._sha256 = h.hexdigest()
        import jplephem

        return {
            "model": "JPL DE421",
            "file": self.path,
            "sha256": self._sha256,
            "reader": f"jplephem {jplephem.__version__}",
            "span_tdb_s": [self.t_start, self.t_end],
            "frame": "ICRF axes, Earth-centred",
            "time_scale": "TDB seconds past J2000",
            "units": "km, km/s",
        }


# ------------------------------------------------------------------------------------------------
# Chebyshev fit (numpy and CasADi)
# ------------------------------------------------------------------------------------------------
def _cheb_nodes(n: int) -> np.ndarray:
    """The n Chebyshev points of the first kind on [-1, 1]."""
    return np.cos(np.pi * (np.arange(n) + 0.5) / n)


def _cheb_interpolate(values: np.ndarray, nodes: np.ndarray) -> np.ndarray:
    """Coefficients (n, 3) of the degree n-1 interpolant of ``values`` (3, n) at first-kind nodes."""
    n = nodes.size
    theta = np.arccos(nodes)
    T = np.cos(np.outer(np.arange(n), theta))  # T[j, k] = T_j(x_k)
    c = (2.0 / n) * T @ values.T
    c[0] *= 0.5
    return c


def _clenshaw_array(c: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Sum_j c[j] T_j(x) for c (deg+1, 3) and x (N,), returning (3, N)."""
    b1 = np.zeros((3, x.size))
    b2 = np.zeros((3, x.size))
    x2 = 2.0 * x
    for cj in c[:0:-1]:
        b1, b2 = cj[:, None] + x2 * b1 - b2, b1
    return c[0][:, None] + x * b1 - b2


def _clenshaw_scalar(rows, c0, x: float) -> np.ndarray:
    """Scalar Clenshaw on python floats; ``rows`` holds (cx, cy, cz) from degree deg down to 1."""
    x2 = x + x
    ax = ay = az = bx = by = bz = 0.0
    for cx, cy, cz in rows:
        ax, bx = cx + x2 * ax - bx, ax
        ay, by = cy + x2 * ay - by, ay
        az, bz = cz + x2 * az - bz, az
    return np.array((c0[0] + x * ax - bx, c0[1] + x * ay - by, c0[2] + x * az - bz))


def _clenshaw_casadi(c, x):
    """Chebyshev series ``sum_k c[k] T_k(x)`` as a CasADi 3x1 expression of a scalar ``x``.

    ``c`` is an (n, 3) array of numbers, or an (n, 3) CasADi matrix of symbols (the coefficients
    as NLP parameters).  Written on the basis values ``T_k(x)`` (three-term recurrence, stable on
    [-1, 1]) rather than by Clenshaw's recurrence: two series of the same ``x`` (Moon and Sun) then
    share the basis after CasADi's common-subexpression pass, and each term costs a multiply-add.
    Measured on the DE421 fit of ``tests/benchmarks/bench_abort.py`` (Moon degree 20, Sun 16): the
    NLP's segment Jacobian 23 % and Hessian 26 % cheaper with the transcription's shared distances.
    """
    import casadi as ca

    numeric = not isinstance(c, (ca.SX, ca.MX))
    if numeric:
        c = np.asarray(c, dtype=float)
    n = c.shape[0]
    basis = [1.0, x]
    for _ in range(2, n):
        basis.append(2.0 * x * basis[-1] - basis[-2])
    out = []
    for comp in range(3):
        if n == 1:
            acc = ca.DM(c[0, comp]) if numeric else c[0, comp]
        else:
            acc = c[0, comp] + c[1, comp] * x
        for k in range(2, n):
            acc = acc + c[k, comp] * basis[k]
        out.append(acc)
    return ca.vertcat(*out)


#: Degree of the series the NLP carries as parameters: the fit's degree rounded up to a multiple
#: of this, the extra coefficients zero, so that fits of windows at other epochs (whose degrees
#: differ by a step of the fit's ladder, 4) give the same compiled functions.
PARAMETER_DEGREE_STEP = 8


_DOT = np.dot


class _Series:
    """One body's Chebyshev series on the window: position and derivative coefficients."""

    def __init__(self, coeffs: np.ndarray, half_span: float):
        self.coeffs = np.ascontiguousarray(coeffs, dtype=float)  # (deg+1, 3), km
        self.degree = self.coeffs.shape[0] - 1
        # d/dt = (dx/dt) d/dx, with dx/dt = 1 / half_span; derivative coefficients in km/s.
        d = np.polynomial.chebyshev.chebder(self.coeffs, axis=0) / half_span
        self.dcoeffs = d if d.shape[0] else np.zeros((1, 3))
        self._rows = [tuple(r) for r in self.coeffs[:0:-1].tolist()]
        self._c0 = tuple(self.coeffs[0].tolist())
        self._drows = [tuple(r) for r in self.dcoeffs[:0:-1].tolist()]
        self._dc0 = tuple(self.dcoeffs[0].tolist())


class ChebyshevEphemeris:
    """Differentiable global Chebyshev fit of the geocentric Moon and Sun over a window.

    Usually built with :meth:`fit`.  Coefficients are of the normalised time
    ``x = (t - t_mid) / (0.5 * (t_end - t_start))`` in [-1, 1].

    Parameters
    ----------
    t_start, t_end : float
        Window, s TDB past J2000.
    moon_coeffs : ndarray, shape (deg+1, 3)
        Chebyshev coefficients of the Moon position, km.
    sun_coeffs : ndarray, shape (deg+1, 3), or None
        Same for the Sun; ``None`` for a source without a Sun.
    max_error_km : dict, optional
        Measured maximum error per body (``"moon"``, ``"sun"``) against the source, km.
    source : dict, optional
        ``describe()`` of the source that was fitted.
    tol_km : float, optional
        Tolerance the fit was asked to meet, km.

    Notes
    -----
    The numpy methods raise ``ValueError`` outside [t_start, t_end] (a slack of 1e-12 of the
    epoch magnitude absorbs round-off at the ends).  The CasADi methods cannot check a symbolic
    epoch and silently extrapolate, which degrades fast: keep the NLP's epochs inside the window.
    """

    def __init__(self, t_start, t_end, moon_coeffs, sun_coeffs=None, max_error_km=None,
                 source=None, tol_km=None):
        t_start, t_end = float(t_start), float(t_end)
        if not t_end > t_start:
            raise ValueError(f"window must have t_end > t_start, got [{t_start}, {t_end}]")
        self.t_start, self.t_end = t_start, t_end
        self._mid = 0.5 * (t_start + t_end)
        self._half = 0.5 * (t_end - t_start)
        self._inv_half = 1.0 / self._half
        self._slack = 1e-12 * max(abs(t_start), abs(t_end), t_end - t_start)
        self._moon = _Series(moon_coeffs, self._half)
        self._sun = None if sun_coeffs is None else _Series(sun_coeffs, self._half)
        # Moon and Sun position coefficients side by side, (deg+1, 6), the shorter series padded
        # with zeros: both bodies from one basis and one product (the propagator's fast path)
        deg = max(self._moon.degree, self._sun.degree if self._sun is not None else 0)
        self._both = np.zeros((deg + 1, 6))
        self._both[: self._moon.degree + 1, :3] = self._moon.coeffs
        if self._sun is not None:
            self._both[: self._sun.degree + 1, 3:] = self._sun.coeffs
        self.max_error_km = dict(max_error_km or {})
        self.source = source
        self.tol_km = tol_km

    # -- construction ------------------------------------------------------------------------
    @classmethod
    def fit(cls, source, t_start, t_end, tol_km=1e-4, degrees=tuple(range(8, 81, 4)),
            n_check=4001):
        """Fit the source's Moon (and Sun, if it has one) over [t_start, t_end].

        For each body, tries the degrees in order, interpolating at deg+1 Chebyshev nodes, and
        keeps the first whose maximum position error on an independent uniform grid of
        ``n_check`` epochs (ends included) is below ``tol_km``.

        Parameters
        ----------
        source : object
            Anything with ``moon(t)`` and ``sun(t)`` accepting a 1-D array of epochs and
            returning (3, N) km (``sun`` may return ``None``), e.g. :class:`DE421`.
        t_start, t_end : float
            Window, s TDB past J2000.
        tol_km : float
            Required maximum position error per body, km (default 1e-4 km = 10 cm).
        degrees : sequence of int
            Candidate degrees, in increasing order.
        n_check : int
            Size of the check grid.

        Returns
        -------
        ChebyshevEphemeris

        Raises
        ------
        ValueError
            If no candidate degree meets ``tol_km`` for a body (the message gives the best error
            reached; shorten the window or allow higher degrees).
        """
        t_start, t_end = float(t_start), float(t_end)
        if not t_end > t_start:
            raise ValueError(f"window must have t_end > t_start, got [{t_start}, {t_end}]")
        if not tol_km > 0:
            raise ValueError(f"tol_km must be positive, got {tol_km}")
        mid, half = 0.5 * (t_start + t_end), 0.5 * (t_end - t_start)
        t_check = np.linspace(t_start, t_end, int(n_check))
        x_check = (t_check - mid) / half
        coeffs, errors = {}, {}
        for body in ("moon", "sun"):
            f = getattr(source, body)
            truth = f(t_check)
            if truth is None:
                coeffs[body] = None
                continue
            best = math.inf
            for deg in degrees:
                x = _cheb_nodes(deg + 1)
                c = _cheb_interpolate(np.asarray(f(mid + half * x)), x)
                err = float(np.max(np.linalg.norm(_clenshaw_array(c, x_check) - truth, axis=0)))
                best = min(best, err)
                if err < tol_km:
                    coeffs[body], errors[body] = c, err
                    break
            else:
                raise ValueError(
                    f"Chebyshev fit of the {body} over [{t_start:.1f}, {t_end:.1f}] s TDB "
                    f"({(t_end - t_start) / SECONDS_PER_DAY:.2f} days) does not reach "
                    f"tol_km={tol_km:g} with degrees up to {max(degrees)} (best {best:.3g} km); "
                    "shorten the window or allow higher degrees"
                )
        describe = getattr(source, "describe", None)
        return cls(t_start, t_end, coeffs["moon"], coeffs["sun"], errors,
                   describe() if describe else repr(source), tol_km)

    # -- numpy evaluation --------------------------------------------------------------------
    def _x(self, t):
        """Normalised time: float for a scalar, (N,) array otherwise; checks the window."""
        if isinstance(t, (float, int)) or np.ndim(t) == 0:
            t = float(t)
            if not (self.t_start - self._slack <= t <= self.t_end + self._slack):
                raise ValueError(self._outside(t))
            return (t - self._mid) * self._inv_half
        t = np.asarray(t, dtype=float)
        if t.ndim != 1:
            raise ValueError(f"t must be a scalar or a 1-D array, got shape {t.shape}")
        if t.size and (t.min() < self.t_start - self._slack or t.max() > self.t_end + self._slack):
            raise ValueError(self._outside(t.min() if t.min() < self.t_start else t.max()))
        return (t - self._mid) * self._inv_half

    def _outside(self, t):
        return (f"epoch {_fmt_epoch(float(t))} is outside the Chebyshev fit window "
                f"[{self.t_start:.3f}, {self.t_end:.3f}] s TDB past J2000")

    @staticmethod
    def _eval(series, x, derivative=False):
        if series is None:
            return None
        if isinstance(x, float):
            if derivative:
                return _clenshaw_scalar(series._drows, series._dc0, x)
            return _clenshaw_scalar(series._rows, series._c0, x)
        return _clenshaw_array(series.dcoeffs if derivative else series.coeffs, x)

    def moon_and_sun(self, t: float) -> list:
        """Moon and Sun positions at one epoch as six floats (km; the Sun's are 0 if not fitted).

        The propagator's right-hand side calls this once per evaluation: the Chebyshev basis
        ``T_k(x)`` by its three-term recurrence on floats, then one product with both bodies'
        coefficients (the series :meth:`moon` and :meth:`sun` give, summed on the basis instead of
        by Clenshaw's recurrence: equal to rounding).
        """
        t = float(t)
        if not (self.t_start - self._slack <= t <= self.t_end + self._slack):
            raise ValueError(self._outside(t))
        x = (t - self._mid) * self._inv_half
        x2, a, b = x + x, 1.0, x
        basis = [1.0, x]
        for _ in range(self._both.shape[0] - 2):
            a, b = b, x2 * b - a
            basis.append(b)
        return _DOT(basis[: self._both.shape[0]], self._both).tolist()

    def moon(self, t):
        """Geocentric Moon position, km: shape (3,) for scalar ``t``, (3, N) for N epochs."""
        return self._eval(self._moon, self._x(t))

    def sun(self, t):
        """Geocentric Sun position, km, shaped like ``moon(t)``; ``None`` if not fitted."""
        return self._eval(self._sun, self._x(t))

    def moon_velocity(self, t):
        """Geocentric Moon velocity (derivative of the fit), km/s, shaped like ``moon(t)``."""
        return self._eval(self._moon, self._x(t), derivative=True)

    # -- CasADi evaluation -------------------------------------------------------------------
    def _parameter_degree(self) -> int:
        deg = max(self.degree.values())
        return -(-deg // PARAMETER_DEGREE_STEP) * PARAMETER_DEGREE_STEP

    def casadi_parameters(self) -> np.ndarray:
        """The numbers of :meth:`moon_casadi` and :meth:`sun_casadi` as one vector: the window's
        middle and inverse half-length, then the Moon's and (if fitted) the Sun's coefficients,
        each padded with zeros to one degree (the largest, rounded up to a multiple of
        ``PARAMETER_DEGREE_STEP``) and laid out row by row (degree 0 x, y, z, degree 1 ...)."""
        n = self._parameter_degree() + 1
        parts = [np.array([self._mid, self._inv_half])]
        for series in (self._moon, self._sun):
            if series is not None:
                c = np.zeros((n, 3))
                c[: series.degree + 1] = series.coeffs
                parts.append(c.ravel())
        return np.concatenate(parts)

    def _par_series(self, par, body):
        """(normalised-time scale, coefficient matrix) of ``body`` read from the symbols ``par``."""
        import casadi as ca

        n = self._parameter_degree() + 1
        start = 2 + (3 * n if body == "sun" else 0)
        coeffs = ca.reshape(par[start:start + 3 * n], 3, n).T  # rows: degrees
        return par[0], par[1], coeffs

    def moon_casadi(self, t, par=None):
        """Moon position, km, as a CasADi 3x1 expression of ``t`` (SX/MX scalar or float).

        With ``par`` (symbols shaped like :meth:`casadi_parameters`) the window and coefficients
        are read from it.  No window check is possible for a symbolic ``t``; outside the window the
        series extrapolates and quickly loses accuracy.
        """
        if par is not None:
            mid, inv_half, c = self._par_series(par, "moon")
            return _clenshaw_casadi(c, (t - mid) * inv_half)
        return _clenshaw_casadi(self._moon.coeffs, (t - self._mid) * self._inv_half)

    def sun_casadi(self, t, par=None):
        """Sun position, km, as a CasADi 3x1 expression of ``t``; ``None`` if not fitted."""
        if self._sun is None:
            return None
        if par is not None:
            mid, inv_half, c = self._par_series(par, "sun")
            return _clenshaw_casadi(c, (t - mid) * inv_half)
        return _clenshaw_casadi(self._sun.coeffs, (t - self._mid) * self._inv_half)

    # -- metadata ----------------------------------------------------------------------------
    @property
    def moon_coeffs(self) -> np.ndarray:
        """Moon coefficients, shape (deg+1, 3), km."""
        return self._moon.coeffs

    @property
    def sun_coeffs(self) -> np.ndarray | None:
        """Sun coefficients, shape (deg+1, 3), km, or None."""
        return None if self._sun is None else self._sun.coeffs

    @property
    def degree(self) -> dict:
        """Degree per body."""
        d = {"moon": self._moon.degree}
        if self._sun is not None:
            d["sun"] = self._sun.degree
        return d

    def describe(self, include_coefficients: bool = False) -> dict:
        """JSON-serialisable description; optionally with the coefficients (lists, km)."""
        out = {
            "model": "Chebyshev fit of geocentric positions",
            "window_tdb_s": [self.t_start, self.t_end],
            "degree": self.degree,
            "tol_km": self.tol_km,
            "max_error_km": self.max_error_km,
            "source": self.source,
            "frame": "ICRF axes, Earth-centred",
            "time_scale": "TDB seconds past J2000",
            "units": "km, km/s",
        }
        if include_coefficients:
            out["moon_coeffs"] = self._moon.coeffs.tolist()
            out["sun_coeffs"] = None if self._sun is None else self._sun.coeffs.tolist()
        return out
