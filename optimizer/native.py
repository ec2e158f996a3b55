"""The propagator's compiled engine: the whole coast stepped in C (``optimizer/data/coast.c``).

scipy's ``solve_ivp`` spends most of a coast in Python: ~2,000 right-hand-side calls of a few
microseconds each and, per step, the stage sums and the dense-output set-up in numpy.  This engine
takes the same DOP853 steps (the published tableau, our transcription in :mod:`optimizer.tableau`,
passed to C from Python; scipy's step-size control and first-step rule) in a small hand-written C
file, compiled by the system C compiler on first use and loaded with ctypes; Python only builds
scipy's own dense-output pieces from the step coefficients and runs scipy's own event search
(``find_active_events``, ``handle_events``) on them, with the propagator's event functions
unchanged.  The private scipy names still imported (``OdeSolution``, ``find_active_events``,
``handle_events``, ``prepare_events``, ``Dop853DenseOutput``) are that event search and dense
output, kept so that the events and the interpolated states match scipy's exactly.

It is part of the independent check: nothing here is generated, and nothing imports CasADi or the
transcription.  It serves the Earth-centred models (:class:`~optimizer.models.EarthCentred` on a
:class:`~optimizer.ephemeris.ChebyshevEphemeris` fit or a
:class:`~optimizer.circular_moon.CircularMoon`); :func:`supports` says when, and the propagator falls
back to scipy otherwise, or when no compiler is found (``$SLINGBACK_CC``, ``gcc``, ``cc``).

The library is cached beside the NLP libraries (``$SLINGBACK_CACHE_DIR``, else
``$XDG_CACHE_HOME/slingback`` or ``~/.cache/slingback``), named by the SHA-256 of the C source, the
compiler and its flags; compiled under a temporary name and renamed.
"""

from __future__ import annotations

import ctypes
import hashlib
import math
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from scipy.integrate._ivp.common import OdeSolution
from scipy.integrate._ivp.ivp import find_active_events, handle_events, prepare_events
from scipy.integrate._ivp.rk import Dop853DenseOutput

from . import tableau
from .constants import J2_EARTH, R_EARTH
from .toolchain import cache_root, compiler

SOURCE = Path(__file__).resolve().parent / "data" / "coast.c"
CFLAGS = ("-O2", "-fPIC", "-shared")
#: Accepted steps per C call when events are searched (a terminal event ends the coast between calls).
CHUNK = 64

#: The tableau as coast_dop853 takes it: all 16 stages' A (row-major, 16 wide), B, C, E3, E5, D.
_COEFFS = tuple(np.ascontiguousarray(a, dtype=float) for a in
                (tableau.A_ALL, tableau.B, tableau.C_ALL, tableau.E3, tableau.E5, tableau.D))
_STATE = {"lib": None, "reason": None, "tried": False}
_DP = ctypes.POINTER(ctypes.c_double)
_IP = ctypes.POINTER(ctypes.c_int)


def _cache_dir() -> Path:
    return cache_root() / "propagator"


def library():
    """The loaded engine (ctypes), compiling it if needed; None when unavailable (see :func:`reason`)."""
    if _STATE["tried"]:
        return _STATE["lib"]
    _STATE["tried"] = True
    cc = compiler()
    if cc is None:
        _STATE["reason"] = "no C compiler found (gcc, cc, $SLINGBACK_CC)"
        return None
    src = SOURCE.read_bytes()
    key = hashlib.sha256(b"\0".join([src, cc.encode(), " ".join(CFLAGS).encode(), sys.platform.encode()]))
    target = _cache_dir() / f"coast-{key.hexdigest()[:24]}.so"
    try:
        if not target.exists():
            target.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix="coast.", suffix=".tmp.so", dir=target.parent)
            os.close(fd)
            try:
                run = subprocess.run([cc, *CFLAGS, "-o", tmp, str(SOURCE), "-lm"], capture_output=True, text=True)
                if run.returncode != 0:
                    raise RuntimeError(f"{cc} failed: {run.stderr.strip()[-300:]}")
                os.replace(tmp, target)
            finally:
                if os.path.exists(tmp):
                    os.unlink(tmp)
        lib = ctypes.CDLL(str(target))
    except (OSError, RuntimeError) as exc:
        _STATE["reason"] = f"engine not built: {exc}"
        return None
    lib.coast_dop853.restype = ctypes.c_int
    lib.coast_dop853.argtypes = [_DP, _IP] + [_DP] * 6 + [ctypes.c_double, _DP, ctypes.c_double, ctypes.c_double,
                                                          ctypes.c_double, ctypes.c_double, ctypes.c_double,
                                                          ctypes.c_int, _DP, _DP, _DP, _IP, _IP, _DP, _DP]
    lib.coast_rhs.restype = ctypes.c_int
    lib.coast_rhs.argtypes = [_DP, _IP, ctypes.c_double, _DP, _DP]
    _STATE["lib"] = lib
    return lib


def reason() -> str | None:
    """Why :func:`library` gave None (after it was called)."""
    return _STATE["reason"]


def model_numbers(model):
    """``(p, ip)`` arrays describing ``model`` to the C right-hand side, or None if it cannot
    (not an Earth-centred model with its own acceleration, or an ephemeris of another kind)."""
    from .circular_moon import CircularMoon
    from .ephemeris import ChebyshevEphemeris
    from .models.earth_centred import EarthCentred

    if not isinstance(model, EarthCentred) or type(model).acceleration is not EarthCentred.acceleration:
        return None
    eph = model.ephemeris
    head = [model.gm_earth, model.gm_moon, model.gm_sun, -1.5 * J2_EARTH * model.gm_earth * R_EARTH**2]
    if type(eph) is ChebyshevEphemeris:
        if model.sun and eph.sun_coeffs is None:
            return None
        n = max(eph.moon_coeffs.shape[0], 0 if eph.sun_coeffs is None else eph.sun_coeffs.shape[0])
        both = np.zeros((n, 6))
        both[: eph.moon_coeffs.shape[0], :3] = eph.moon_coeffs
        if eph.sun_coeffs is not None:
            both[: eph.sun_coeffs.shape[0], 3:] = eph.sun_coeffs
        slack = 1e-12 * max(abs(eph.t_start), abs(eph.t_end), eph.t_end - eph.t_start)
        mid, half = 0.5 * (eph.t_start + eph.t_end), 0.5 * (eph.t_end - eph.t_start)
        p = np.r_[head, eph.t_start - slack, eph.t_end + slack, mid, 1.0 / half, both.ravel()]
        ip = [0, n, int(model.sun), int(model.j2)]
    elif type(eph) is CircularMoon:
        if model.sun:
            return None
        p = np.r_[head, -math.inf, math.inf, eph.radius_km, eph.rate, math.radians(eph.phase_deg), eph.epoch,
                  eph._P, eph._Q]
        ip = [1, 0, 0, int(model.j2)]
    else:
        return None
    return np.ascontiguousarray(p, dtype=float), np.ascontiguousarray(ip, dtype=np.intc)


def supports(model) -> bool:
    """True when the compiled engine can propagate ``model`` (and is available)."""
    return model_numbers(model) is not None and library() is not None


def rhs(model, t, y):
    """The C right-hand side at one point (for tests and benchmarks)."""
    p, ip = model_numbers(model)
    y = np.ascontiguousarray(y, dtype=float)
    out = np.empty(6)
    if library().coast_rhs(_ptr(p), ip.ctypes.data_as(_IP), float(t), _ptr(y), _ptr(out)):
        model.moon_position(t)  # raises the ephemeris's own out-of-window message
        raise ValueError(f"epoch {t!r} outside the model's range")
    return out


def _ptr(a):
    return a.ctypes.data_as(_DP)


class Result:
    """What :func:`integrate` returns: the fields of ``solve_ivp``'s result the propagator reads."""

    def __init__(self, t, y, sol, t_events, y_events, status, message, nfev):
        self.t, self.y, self.sol = t, y, sol
        self.t_events, self.y_events = t_events, y_events
        self.status, self.message, self.nfev = status, message, nfev


class _DenseOutput:
    """scipy's ``OdeSolution`` of the steps, built on the first call: most coasts (the global
    search's screening, the verifier's event legs) never ask for a state between steps, and
    building one interpolant object per step was a third of a short coast's time."""

    def __init__(self, t, pieces):
        self._t, self._pieces, self._sol = t, pieces, None

    def __call__(self, t):
        if self._sol is None:
            self._sol = OdeSolution(self._t, [Dop853DenseOutput(*p) for p in self._pieces])
            self._pieces = None
        return self._sol(t)


def integrate(model, t0, y0, t1, *, rtol, atol, max_step=np.inf, events=None) -> Result:
    """DOP853 from ``(t0, y0)`` to ``t1`` in C, with dense output and ``solve_ivp``'s event logic.

    ``events`` are ``solve_ivp`` event functions (``terminal``, ``direction`` attributes).
    """
    lib = library()
    p, ip = model_numbers(model)
    pp, ipp = _ptr(p), ip.ctypes.data_as(_IP)
    coeffs = [_ptr(a) for a in _COEFFS]
    y = np.array(y0, dtype=float)
    t, h_abs, nfev = float(t0), 0.0, 0
    if events:
        events, max_events, event_dir = prepare_events(events)
        event_count = np.zeros(len(events))
        g = [ev(t, y) for ev in events]
        t_events, y_events = [[] for _ in events], [[] for _ in events]
        # event functions with ``many`` are first evaluated at all of a chunk's step ends at once;
        # only the steps where that shows a zero or a sign change go through scipy's event logic,
        # on the scalar functions at both ends of the step (as solve_ivp would)
        quick = all(hasattr(ev, "many") for ev in events)
        g_last = np.asarray(g, dtype=float)
    else:
        t_events = y_events = None
    ts, ys, pieces = [t], [y], []  # pieces: each step's dense-output data (built into objects lazily)
    status, message = None, "The solver successfully reached the end of the integration interval."
    n_out, nf_out = ctypes.c_int(), ctypes.c_int()
    h_out, t_fail = ctypes.c_double(), ctypes.c_double()
    while status is None:
        cap = CHUNK if events else 4096
        T, Y, F = np.empty(cap + 1), np.empty((cap + 1, 6)), np.empty((cap, 7, 6))
        code = lib.coast_dop853(pp, ipp, *coeffs, t, _ptr(y), float(t1), float(rtol), float(atol), float(max_step),
                                h_abs, cap, _ptr(T), _ptr(Y), _ptr(F), ctypes.byref(n_out), ctypes.byref(nf_out),
                                ctypes.byref(h_out), ctypes.byref(t_fail))
        n, nfev, h_abs = n_out.value, nfev + nf_out.value, h_out.value
        if events and quick and n:
            ends = np.column_stack([ev.many(T[1:n + 1], Y[1:n + 1]) for ev in events])
            before = np.vstack([g_last, ends[:-1]])
            still = ((before > 0) & (ends > 0)) | ((before < 0) & (ends < 0))
            flagged = ~still.all(axis=1)
            g_last = ends[-1]
        for k in range(n):
            t_old, t_new, y_old, y_new = float(T[k]), float(T[k + 1]), Y[k], Y[k + 1]
            pieces.append((t_old, t_new, y_old, F[k]))
            t_end, y_end = t_new, y_new
            if events and (not quick or flagged[k]):  # quick and not flagged: no value changed sign
                if quick:  # the scalar values at the step's start (earlier quiet steps skipped them)
                    g = [ev(t_old, y_old) for ev in events]
                g_new = [ev(t_new, y_new) for ev in events]
                # scipy's test needs a zero or a sign change somewhere: skip it when none (exact)
                changed = any(not ((a > 0 and b > 0) or (a < 0 and b < 0)) for a, b in zip(g, g_new))
                active = find_active_events(g, g_new, event_dir) if changed else ()
                if len(active) > 0:
                    sol = Dop853DenseOutput(t_old, t_new, y_old, F[k])
                    event_count[active] += 1
                    roots_i, roots, terminate = handle_events(sol, events, active, event_count, max_events,
                                                              t_old, t_new)
                    for e, te in zip(roots_i, roots):
                        t_events[e].append(te)
                        y_events[e].append(sol(te))
                    if terminate:
                        status = 1
                        message = "A termination event occurred."
                        t_end = roots[-1]
                        y_end = sol(t_end)
                g = g_new
            if len(ts) > 1 and ts[-1] == t_end:
                pieces.pop()
            else:
                ts.append(t_end)
                ys.append(np.array(y_end))
            if status == 1:
                break
        if status is None:
            if code == 0:
                status = 0
            elif code == -1:
                status, message = -1, f"Required step size is less than spacing between numbers (t={T[n]!r})."
            elif code == -2:
                model.moon_position(t_fail.value)  # the ephemeris's own message for an epoch outside its window
                status, message = -1, f"epoch {t_fail.value!r} outside the model's range"
            else:
                t, y = float(T[n]), Y[n].copy()
    t_arr = np.array(ts)
    sol = _DenseOutput(t_arr, pieces) if pieces else None
    if t_events is not None:
        t_events = [np.asarray(te) for te in t_events]
        y_events = [np.asarray(ye) for ye in y_events]
    return Result(t_arr, np.array(ys).T, sol, t_events, y_events, status, message, nfev)
