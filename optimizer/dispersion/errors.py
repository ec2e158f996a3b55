"""The error model of a dispersion analysis: what is read, checked and where each default comes from.

The model is the ``[dispersion]`` table of a TOML file (a problem file or a small file holding only
that table), layered over the defaults below and under command-line overrides (``KEY=VALUE`` with
dotted keys, e.g. ``burn.pointing_sigma_deg=0.2``).  Every key, unit and default is documented in
``docs/dispersion-format.md``; every mistake raises :class:`ErrorModelError` naming the source and
the key (exit code 2 on the command line).

All sigmas are 1-sigma of zero-mean Gaussian errors, independent of one another.

One job: the error model.  May import: numpy, the standard library and :mod:`optimizer.inputs` (the
bad-input error type) only; never the file layer, which imports this module to check a
``[dispersion]`` table.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..inputs import ProblemError

__all__ = ["ErrorModel", "BurnErrors", "NavigationErrors", "ErrorModelError", "DEFAULTS",
           "error_model_from_table", "error_model_from_layers", "load_error_model", "parse_overrides"]


class ErrorModelError(ProblemError):
    """An error-model table that cannot be used; the message names the source and the key."""


#: Defaults: key -> (value, unit, meaning, where the value comes from).  Printed into the docs and
#: into every summary.json, so an analyst sees which figures nobody chose for this mission.
DEFAULTS = {
    "burn.magnitude_sigma_fraction": (
        0.0033, "1", "proportional part of the burn-size error (1-sigma, fraction of the burn)",
        "common practice: a 1 % burn-size error quoted as 3-sigma (the issue's own example), /3"),
    "burn.magnitude_sigma_mps": (
        0.01, "m/s", "fixed part of the burn-size error (1-sigma), e.g. cut-off impulse scatter",
        "from memory: order of a small thruster's cut-off scatter; not from a named source"),
    "burn.pointing_sigma_deg": (
        0.167, "deg", "pointing error (1-sigma about each of the two axes normal to the burn)",
        "common practice: half a degree quoted as 3-sigma (the issue's own example), /3"),
    "burn.ignition_sigma_s": (
        0.1, "s", "ignition-time error (1-sigma); the burn is the planned inertial Δv, late or early",
        "from memory: order of a command-timing scatter; not from a named source"),
    "navigation.frame": (
        "rtn", "", "axes of the sigmas or covariance: \"rtn\" (of the start state) or \"icrf\"",
        "common practice: navigation errors are quoted in RTN"),
    "navigation.position_sigma_km": (
        [1.0, 1.0, 1.0], "km", "start-state position error, 1-sigma per axis",
        "from memory: order of ground-tracking accuracy on a translunar coast; not from a named source"),
    "navigation.velocity_sigma_mps": (
        [0.01, 0.01, 0.01], "m/s", "start-state velocity error, 1-sigma per axis",
        "from memory: order of ground-tracking accuracy on a translunar coast; not from a named source"),
}

TABLE_KEYS = {
    "": ("source", "burn", "navigation"),
    "burn": ("magnitude_sigma_fraction", "magnitude_sigma_mps", "pointing_sigma_deg", "ignition_sigma_s"),
    "navigation": ("frame", "position_sigma_km", "velocity_sigma_mps", "covariance_km_kms"),
}


@dataclass(frozen=True)
class BurnErrors:
    """Execution errors of every executed burn (1-sigma; a burn planned at exactly zero is not
    executed and gets no error)."""

    magnitude_sigma_fraction: float
    magnitude_sigma_mps: float
    pointing_sigma_deg: float
    ignition_sigma_s: float


@dataclass(frozen=True)
class NavigationErrors:
    """Knowledge error of the start state: the true state differs from the plan's by a Gaussian
    vector of this covariance (km, km/s; axes ``frame``).  The burns are flown as planned (open
    loop, no re-targeting)."""

    frame: str
    covariance: tuple  # 6 x 6 nested tuples, km^2, km^2/s, km^2/s^2

    def matrix(self) -> np.ndarray:
        return np.array(self.covariance, dtype=float)


@dataclass(frozen=True)
class ErrorModel:
    """A complete error model and where each value came from (key -> source text)."""

    burn: BurnErrors
    navigation: NavigationErrors
    sources: dict = field(default_factory=dict, compare=False)
    note: str = ""

    def is_zero(self) -> bool:
        b = self.burn
        return not any((b.magnitude_sigma_fraction, b.magnitude_sigma_mps, b.pointing_sigma_deg,
                        b.ignition_sigma_s, np.any(self.navigation.matrix())))

    def to_table(self) -> dict:
        """The table form (what :func:`error_model_from_table` reads), covariance written in full."""
        b = self.burn
        return {"burn": {"magnitude_sigma_fraction": b.magnitude_sigma_fraction,
                         "magnitude_sigma_mps": b.magnitude_sigma_mps,
                         "pointing_sigma_deg": b.pointing_sigma_deg,
                         "ignition_sigma_s": b.ignition_sigma_s},
                "navigation": {"frame": self.navigation.frame,
                               "covariance_km_kms": [list(r) for r in self.navigation.covariance]}}


# ------------------------------------------------------------------------------------------------
def _number(x) -> bool:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return False
    try:
        return math.isfinite(float(x))
    except OverflowError:  # an integer too large for a float
        return False


def _check_keys(table: dict, name: str, where) -> None:
    known = TABLE_KEYS[name]
    for key in table:
        if key not in known:
            near = difflib.get_close_matches(str(key)[:100], known, n=1)
            hint = f"; did you mean {near[0]!r}?" if near else f"; expected one of {', '.join(known)}"
            shown = str(key) if len(str(key)) <= 60 else str(key)[:57] + "..."
            raise ErrorModelError(f"{where(shown)}: unknown key{hint}")


def error_model_from_table(table: dict | None, source: str = "<dict>", overrides: dict | None = None) -> ErrorModel:
    """Build an :class:`ErrorModel` from one ``[dispersion]`` table over the defaults.

    Parameters
    ----------
    table : dict or None
        The ``[dispersion]`` table (None: defaults only).
    source : str
        Name used in messages and in the per-value sources (the file path).
    overrides : dict, optional
        Dotted key -> value (from the command line), applied last.

    Raises
    ------
    ErrorModelError
        Naming ``source`` and the key, for unknown keys, wrong types, negative sigmas, a covariance
        that is not 6 x 6, symmetric and positive semi-definite, or both sigmas and a covariance.
    """
    return error_model_from_layers([] if table is None else [(table, source)], overrides)


def error_model_from_layers(layers, overrides: dict | None = None) -> ErrorModel:
    """Build an :class:`ErrorModel` from ``[dispersion]`` tables, each over the ones before it.

    ``layers`` is a sequence of ``(table, source)``: e.g. a problem file's table, then a small
    file of updated values; a later table's keys replace the earlier ones (a covariance replaces
    per-axis sigmas and the other way round).  ``overrides`` (command line) come last.
    """
    merged, sources, origin_of, notes = {}, {}, {}, []
    for key, (value, *_rest) in DEFAULTS.items():
        merged[key], sources[key], origin_of[key] = value, "default: " + _rest[2], f"default {key}"
    nav_sigmas = ("navigation.position_sigma_km", "navigation.velocity_sigma_mps")

    def sigmas_replace_covariance():
        """Per-axis sigmas given after a covariance: the covariance goes, a sigma not given comes
        back from the defaults."""
        if merged.pop("navigation.covariance_km_kms", None) is not None:
            for k in nav_sigmas:
                merged[k], sources[k], origin_of[k] = DEFAULTS[k][0], "default: " + DEFAULTS[k][3], f"default {k}"

    for table, source in layers:
        if not isinstance(table, dict):
            raise ErrorModelError(f"{source}: [dispersion]: expected a table, got {table!r}")

        def where(key, sub="", source=source):
            return f"{source}: [dispersion{'.' + sub if sub else ''}].{key}"

        _check_keys(table, "", lambda k: where(k))
        note = table.get("source", "")
        if not isinstance(note, str):
            raise ErrorModelError(f"{where('source')}: expected a text saying where the values come from")
        if note:
            notes.append(note)
        for sub in ("burn", "navigation"):
            t = table.get(sub, {})
            if not isinstance(t, dict):
                raise ErrorModelError(f"{where(sub)}: expected a table, got {t!r}")
            _check_keys(t, sub, lambda k, s=sub: where(k, s))
            if sub == "navigation" and "covariance_km_kms" in t:
                if any(k in t for k in ("position_sigma_km", "velocity_sigma_mps")):
                    raise ErrorModelError(f"{where('covariance_km_kms', sub)}: give either a covariance or "
                                          "per-axis sigmas, not both")
                for k in nav_sigmas:
                    merged.pop(k, None)
            elif sub == "navigation" and any(k in t for k in ("position_sigma_km", "velocity_sigma_mps")):
                sigmas_replace_covariance()
            for key, value in t.items():
                merged[f"{sub}.{key}"] = value
                sources[f"{sub}.{key}"] = source + (f" ({note})" if note else "")
                origin_of[f"{sub}.{key}"] = where(key, sub)
    for key, value in (overrides or {}).items():
        sub, _, leaf = key.partition(".")
        if sub not in ("burn", "navigation") or leaf not in TABLE_KEYS[sub]:
            known = [f"{s}.{k}" for s in ("burn", "navigation") for k in TABLE_KEYS[s]]
            near = difflib.get_close_matches(key, known, n=1)
            raise ErrorModelError(f"command line: --set {key}: unknown key"
                                  + (f"; did you mean {near[0]!r}?" if near else ""))
        if key == "navigation.covariance_km_kms":
            for k in nav_sigmas:
                merged.pop(k, None)
        elif key in nav_sigmas:
            sigmas_replace_covariance()
        merged[key], sources[key], origin_of[key] = value, "command line", f"command line: --set {key}"

    def origin(key):
        return origin_of[key]

    def sigma(key):
        x = merged[key]
        if not _number(x) or x < 0:
            raise ErrorModelError(f"{origin(key)}: expected a number of at least 0, got {x!r}")
        return float(x)

    def triple(key):
        x = merged[key]
        if not (isinstance(x, list) and len(x) == 3 and all(_number(v) and v >= 0 for v in x)):
            raise ErrorModelError(f"{origin(key)}: expected three numbers of at least 0, got {x!r}")
        return [float(v) for v in x]

    burn = BurnErrors(*(sigma(f"burn.{k}") for k in TABLE_KEYS["burn"]))
    if burn.pointing_sigma_deg > 10.0:
        raise ErrorModelError(f"{origin('burn.pointing_sigma_deg')}: expected at most 10 degrees "
                              f"(a small-angle error model), got {burn.pointing_sigma_deg!r}")
    frame = merged["navigation.frame"]
    if frame not in ("rtn", "icrf"):
        raise ErrorModelError(f"{origin('navigation.frame')}: expected \"rtn\" or \"icrf\", got {frame!r}")
    if "navigation.covariance_km_kms" in merged:
        key = "navigation.covariance_km_kms"
        cov = merged[key]
        if not (isinstance(cov, list) and len(cov) == 6
                and all(isinstance(r, list) and len(r) == 6 and all(_number(v) for v in r) for r in cov)):
            raise ErrorModelError(f"{origin(key)}: expected 6 rows of 6 numbers (km^2, km^2/s, km^2/s^2)")
        m = np.array(cov, dtype=float)
        if not np.allclose(m, m.T, rtol=1e-9, atol=0.0):
            raise ErrorModelError(f"{origin(key)}: expected a symmetric matrix")
        if np.min(np.linalg.eigvalsh(m)) < -1e-12 * max(1.0, np.max(np.abs(np.diag(m)))):
            raise ErrorModelError(f"{origin(key)}: expected a positive semi-definite matrix "
                                  f"(smallest eigenvalue {np.min(np.linalg.eigvalsh(m)):.3g})")
        for k in ("navigation.position_sigma_km", "navigation.velocity_sigma_mps"):
            sources[k] = sources[key]
    else:
        pos = triple("navigation.position_sigma_km")
        vel = [x / 1000.0 for x in triple("navigation.velocity_sigma_mps")]
        m = np.diag(np.square(pos + vel))
    nav = NavigationErrors(frame=frame, covariance=tuple(tuple(float(v) for v in r) for r in m))
    sources.pop("navigation.covariance_km_kms", None)
    return ErrorModel(burn=burn, navigation=nav, sources=sources, note="; ".join(notes))


def load_error_model(paths=None, overrides: dict | None = None) -> ErrorModel:
    """Read the ``[dispersion]`` tables of TOML files in order (each over the ones before; None or
    empty: the defaults), then the overrides."""
    if paths is None:
        paths = []
    elif isinstance(paths, (str, Path)):
        paths = [paths]
    return error_model_from_layers([(_read_table(p), str(p)) for p in paths], overrides)


def _read_table(path) -> dict:
    source = str(path)
    try:
        data = tomllib.loads(Path(path).read_bytes().decode("utf-8"))
    except OSError as exc:
        raise ErrorModelError(f"{source}: cannot read the file ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise ErrorModelError(f"{source}: not a UTF-8 text file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ErrorModelError(f"{source}: invalid TOML: {exc}") from None
    if "dispersion" not in data:
        raise ErrorModelError(f"{source}: [dispersion]: missing; expected the error-model table "
                              "(docs/dispersion-format.md)")
    return data["dispersion"]


def parse_overrides(items) -> dict:
    """``["burn.pointing_sigma_deg=0.2", "navigation.frame=icrf", ...]`` -> dict (TOML values)."""
    out = {}
    for item in items or ():
        key, sep, text = str(item).partition("=")
        if not sep or not key.strip():
            raise ErrorModelError(f"command line: --set {item}: expected KEY=VALUE, e.g. "
                                  "burn.pointing_sigma_deg=0.2")
        try:
            value = tomllib.loads(f"v = {text.strip()}")["v"]
        except tomllib.TOMLDecodeError:
            value = text.strip()  # a bare word, e.g. icrf
        out[key.strip()] = value
    return out
