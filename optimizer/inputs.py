"""What every reader of input tables shares: the error type of bad input, the "did you mean" hint,
the short echo of a bad value, reading a TOML file, and the span the ephemeris model can serve.

One job: the common ground of the file layer (:mod:`optimizer.problem_file`) and the readers of
tables that other layers check (``[sweep]`` in :mod:`optimizer.trade.spec`, ``[dispersion]``).
May import: the standard library and :mod:`optimizer.timescales` only, so a table checker lower
in the layers can use it without importing the file layer.
"""

from __future__ import annotations

import difflib
import tomllib
from pathlib import Path

from .timescales import parse_epoch

__all__ = ["ProblemError", "EPHEMERIS_SPAN", "MAX_DEPTH", "did_you_mean", "show", "read_toml"]

#: Epochs the "ephemeris" model can serve (DE421's nominal span, 1900-2050).
EPHEMERIS_SPAN = (parse_epoch("1900-01-01T00:00:00"), parse_epoch("2050-01-01T00:00:00"))
#: Deepest nesting of tables and arrays a problem file may have (the schema needs 3).
MAX_DEPTH = 8


class ProblemError(ValueError):
    """A problem file (or dict) that cannot be used; the message names file, key and expectation."""


def did_you_mean(key, known) -> str:
    """The hint after "unknown key": ``; did you mean 'x'?`` or ``; expected one of a, b, c``."""
    near = difflib.get_close_matches(str(key)[:100], list(known), n=1)
    return f"; did you mean {near[0]!r}?" if near else f"; expected one of {', '.join(known)}"


def show(x) -> str:
    """``repr`` cut to 80 characters (an integer of hundreds of digits is not echoed whole)."""
    try:
        text = repr(x)
    except (ValueError, RecursionError):  # an integer past Python's digit limit; nesting
        text = f"a {type(x).__name__} too large to show"
    return text if len(text) <= 80 else text[:77] + "..."


def read_toml(path) -> dict:
    """The tables of a TOML file; :class:`ProblemError` naming the file when it cannot be read,
    is not UTF-8 or is not valid TOML (with the line)."""
    source = str(path)
    try:
        text = Path(path).read_bytes().decode("utf-8")
    except OSError as exc:
        raise ProblemError(f"{source}: cannot read the file ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise ProblemError(f"{source}: not a UTF-8 text file") from None
    try:
        return tomllib.loads(text)
    except ValueError as exc:  # tomllib: an integer past Python's digit limit
        if isinstance(exc, tomllib.TOMLDecodeError):
            message = str(exc).replace("(at end of document)",
                                       f"(at the end of the file, line {len(text.splitlines()) or 1})")
            raise ProblemError(f"{source}: invalid TOML: {message}") from None
        raise ProblemError(f"{source}: invalid TOML: {exc}") from None
    except RecursionError:
        raise ProblemError(f"{source}: arrays or tables nested too deeply to read (a problem file needs "
                           f"at most {MAX_DEPTH} levels)") from None
