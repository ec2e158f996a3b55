"""Compiled NLP functions: CasADi's C code generation, built by the system C compiler, cached on disk.

The NLP's functions (objective and constraints, objective gradient, the segment-assembled
constraint Jacobian and Lagrangian Hessian of :meth:`Transcription.derivative_functions`) are
written out as C with CasADi's ``CodeGenerator``, compiled into a shared library and loaded with
``casadi.external``: the documented route of CasADi's code generation.  Interpreted evaluation
(CasADi's virtual machine) stays the fallback whenever no compiler is found, compilation fails or
the library is not built yet.

Where: ``$SLINGBACK_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/slingback`` or ``~/.cache/slingback``;
never inside the package.  Which library: the SHA-256 of everything the generated code depends on
(CasADi's version, the compiler and its flags, the source of the transcription, of its derivatives
module and of this one,
and the serialised objective and constraint functions, which hold the model's form, the mesh and
the layout).

What a library is shared by: the numbers that change with the epoch (start epoch, ephemeris window
and Chebyshev coefficients, a circular Moon's orbit) are the NLP's parameter vector ``p``
(``Transcription.nlp_parametric``, value ``Transcription.p_value``), inputs of the compiled
functions rather than constants in them.  Problems of the same structure (phases, mesh, burn
kinds, objective, model kind and series degree) at any epoch therefore have the same key and load
the same library; :func:`nlp_functions` binds this problem's values to it in small wrapper
functions, so nlpsol sees an NLP without parameters, exactly as with interpreted evaluation, and
the solver calls IPOPT the same way in both cases.  A library is compiled under a temporary name and renamed when complete, so no process
ever loads a half-written file; a failed compile leaves a ``.failed`` note with the compiler's
message and is not retried for that key.

When: ``$SLINGBACK_COMPILE``

* ``auto`` (the default of ``slingback sweep``, whose many cells of one structure repay it): load
  the library if it exists; otherwise start the compiler in the
  background (one compile at a time per cache folder) and solve interpreted meanwhile; a later
  build of the same structure (the next run, or the next cache miss) uses the library.  Since a
  library serves every epoch of its structure, the cache fills with the few structures a user
  solves and the compile is paid once per machine (measured with ``bench_compiled.py``: 462 s of
  wall for -O1 with the machine loaded, then 12x faster IPOPT iterations; repaid after ~6 solves).
* ``off`` (the default everywhere else: a single solve would not repay minutes of compiling, and a
  command must not leave a compiler running after it ends): always interpreted; the test suite
  also sets it (``tests/conftest.py``).
* ``wait``: compile now if needed and use it (benchmarks, batch sweeps that will amortise it).

May import the standard library, numpy, CasADi and the package's toolchain module only.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import casadi as ca
import numpy as np

from .toolchain import cache_root, compiler  # noqa: F401  (compiler: also this module's public name)

#: Flags of the shared library.  -O1: see the README's figures for compile time and speed-up;
#: ``$SLINGBACK_CFLAGS`` replaces the optimisation flag (``-O0`` compiles ~10x faster: tests).
CFLAGS = ("-O1", "-fPIC", "-shared", "-pthread")
MODES = ("auto", "wait", "off")
#: nlpsol options that go with compiled functions: the library holds no derivatives of its own
#: (CasADi would differentiate the "nlp" function for the multipliers of the parameters; there are
#: no parameters)
NLPSOL_OPTIONS = {"calc_lam_p": False}
_HERE = Path(__file__).resolve().parent
_SOURCES = (_HERE / "transcription.py", _HERE / "derivatives.py", _HERE / "compiled.py")
_LOADED: dict = {}  # library path -> {name: external Function}, per process


def mode() -> str:
    """The compilation mode from ``$SLINGBACK_COMPILE`` (``auto``, ``wait`` or ``off``)."""
    value = os.environ.get("SLINGBACK_COMPILE", "off").strip().lower() or "off"
    if value in ("0", "no", "false", "none"):
        value = "off"
    if value not in MODES:
        raise ValueError(f"SLINGBACK_COMPILE={value!r}: expected one of {', '.join(MODES)}")
    return value


def cache_dir() -> Path:
    """Folder of the compiled libraries (created on first use)."""
    return cache_root() / f"nlp-casadi{ca.__version__}"


def cflags() -> tuple:
    """Compiler flags: ``CFLAGS`` with its optimisation flag replaced by ``$SLINGBACK_CFLAGS`` if set."""
    extra = os.environ.get("SLINGBACK_CFLAGS", "").split()
    return tuple(extra or CFLAGS[:1]) + CFLAGS[1:]


def _parametric(tr) -> dict:
    """The NLP with its parameter vector (``p`` empty for an NLP without parameters)."""
    # asked of the class: the property builds the NLP, and an error inside it must not read as "absent"
    if hasattr(type(tr), "nlp_parametric"):
        return tr.nlp_parametric
    return {**tr.nlp, "p": ca.MX.sym("p", 0, 1)}


def _defining(tr) -> list:
    """The objective and the constraints as functions of (x, p): what a library is keyed on."""
    nlp = _parametric(tr)
    x, p = nlp["x"], nlp["p"]
    # objective and constraints apart: IPOPT asks for them separately, and the objective alone is
    # a few operations while the constraints integrate every segment
    fx = ca.Function("nlp_fx", [x, p], [nlp["f"]], ["x", "p"], ["f"])
    gx = ca.Function("nlp_gx", [x, p], [nlp["g"]], ["x", "p"], ["g"])
    return [fx, gx]


def _functions(tr, hessian: bool, defining: list) -> list:
    """Everything the library holds, with the names and signatures nlpsol expects of user-given
    functions (only built when a library is to be generated: loading one needs none of this)."""
    fx, gx = defining
    nlp = _parametric(tr)
    x, p = nlp["x"], nlp["p"]
    grad = ca.Function("nlp_grad_f", [x, p], [nlp["f"], ca.gradient(nlp["f"], x)],
                       ["x", "p"], ["f", "grad_f_x"])
    d = tr.derivative_functions(hessian=hessian, parametric=True) if hasattr(type(tr), "nlp_parametric") \
        else tr.derivative_functions(hessian=hessian)
    # nlpsol differentiates the NLP once when it is set up (the gradient of the Lagrangian, for the
    # multipliers it reports): the library carries the reverse derivatives under the names CasADi's
    # external functions look up ("adj1_<name>")
    return [fx, gx, fx.reverse(1), gx.reverse(1), grad, d["jac_g"]] + ([d["hess_lag"]] if hessian else [])


def _key(cc: str, defining: list, hessian: bool) -> str:
    h = hashlib.sha256()
    for part in (ca.__version__, sys.platform, cc, " ".join(cflags()), str(hessian)):
        h.update(part.encode() + b"\0")
    for path in _SOURCES:
        h.update(path.read_bytes())
    for fn in defining:  # the objective and the constraints: the rest is derived from them
        h.update(fn.serialize().encode())
    return h.hexdigest()[:32]


def _compile(cc: str, source: str, target: Path) -> None:
    """Write ``source`` and compile it to ``target`` atomically (temporary names, then rename)."""
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, c_path = tempfile.mkstemp(prefix=target.stem + ".", suffix=".c", dir=target.parent)
    with os.fdopen(fd, "w") as fh:
        fh.write(source)
    tmp = target.with_name(f"{target.stem}.{os.getpid()}.tmp.so")
    try:
        run = subprocess.run([cc, *cflags(), "-o", str(tmp), c_path, "-lm"], capture_output=True, text=True)
        if run.returncode != 0:
            target.with_suffix(".failed").write_text(run.stderr[-4000:])
            raise RuntimeError(f"{cc} failed: {run.stderr.strip()[-300:]}")
        os.replace(tmp, target)
    finally:
        for p in (c_path, tmp):
            try:
                os.unlink(p)
            except FileNotFoundError:
                pass


def _start_background(cc: str, source: str, target: Path) -> bool:
    """Compile in a detached child process (it outlives this one); False when another compile holds
    the folder's lock (one compiler at a time on a shared machine)."""
    target.parent.mkdir(parents=True, exist_ok=True)
    lock = target.parent / "compiling.lock"
    try:
        fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        try:  # a lock older than an hour belongs to a compile that died
            if time.time() - lock.stat().st_mtime > 3600:
                lock.unlink()
        except FileNotFoundError:
            pass
        return False
    os.close(fd)
    fd, c_path = tempfile.mkstemp(prefix=target.stem + ".", suffix=".c", dir=target.parent)
    with os.fdopen(fd, "w") as fh:
        fh.write(source)
    tmp = target.with_name(f"{target.stem}.bg.tmp.so")
    # $0 compiler, $1 temporary library, $2 source, $3 library, $4 failure note, $5 lock
    script = (f'if "$0" {" ".join(cflags())} -o "$1" "$2" -lm 2> "$1.log"; then mv -f "$1" "$3"; '
              f'else mv -f "$1.log" "$4"; fi; rm -f "$1" "$1.log" "$2" "$5"')
    subprocess.Popen(["sh", "-c", script, cc, str(tmp), c_path, str(target), str(target.with_suffix(".failed")),
                      str(lock)], stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                     stderr=subprocess.DEVNULL, start_new_session=True)
    return True


def _load(path: Path, names: list) -> dict:
    if str(path) not in _LOADED:
        _LOADED[str(path)] = {n: ca.external(n, str(path)) for n in names}
    return _LOADED[str(path)]


def nlp_functions(tr, hessian: bool = True, how: str | None = None):
    """Compiled functions for nlpsol, or None and the reason the interpreted ones must serve.

    Returns ``(functions, record)``: ``functions`` is ``{"nlp": Function, "grad_f": ..., "jac_g":
    ..., "hess_lag": ...}`` (external, compiled) or None; ``record`` says what happened
    (``mode``: ``"compiled"`` or ``"interpreted"``, the library's key, compile seconds, the
    reason for the fallback).
    """
    how = how or mode()
    if how == "off":
        return None, {"mode": "interpreted", "reason": "SLINGBACK_COMPILE=off"}
    cc = compiler()
    if cc is None:
        return None, {"mode": "interpreted", "reason": "no C compiler found (gcc, cc, $SLINGBACK_CC)"}
    defining = _defining(tr)
    names = ["nlp_fx", "nlp_gx", "nlp_grad_f", "nlp_jac_g"] + (["nlp_hess_l"] if hessian else [])
    key = _key(cc, defining, hessian)
    target = cache_dir() / f"{key}.so"
    rec = {"key": key}
    if not target.exists():
        if target.with_suffix(".failed").exists():
            return None, {**rec, "mode": "interpreted", "reason": "an earlier compile of this NLP failed"}
        if how == "auto" and (target.parent / "compiling.lock").exists():
            return None, {**rec, "mode": "interpreted", "reason": "another compile is running"}
        cg = ca.CodeGenerator(f"slingback_{key}.c", {"with_header": False})
        for f in _functions(tr, hessian, defining):
            cg.add(f)
        t = time.perf_counter()
        source = cg.dump()
        rec["codegen_s"] = round(time.perf_counter() - t, 3)
        if how == "auto":
            started = _start_background(cc, source, target)
            return None, {**rec, "mode": "interpreted",
                          "reason": "compiling in the background" if started else "another compile is running"}
        t = time.perf_counter()
        try:
            _compile(cc, source, target)
        except (OSError, RuntimeError) as exc:
            return None, {**rec, "mode": "interpreted", "reason": f"compile failed: {exc}"}
        rec["compile_s"] = round(time.perf_counter() - t, 2)
    try:
        ext = _load(target, names)
    except RuntimeError as exc:  # a library that does not load is set aside, never retried as is
        return None, {**rec, "mode": "interpreted", "reason": f"library did not load: {exc}"}
    return bind(ext, defining[0].size1_in(0), getattr(tr, "p_value", np.zeros(0)), hessian), \
        {**rec, "mode": "compiled", "parameters": int(defining[0].numel_in(1))}


def bind(ext: dict, nx: int, p_value, hessian: bool) -> dict:
    """nlpsol's functions of an NLP without parameters: the library's functions with the parameter
    input fixed to ``p_value`` (this problem's epoch and ephemeris).  Each is a small MX function
    calling the compiled one; the library itself is shared by every problem of the structure."""
    x, p0 = ca.MX.sym("x", nx), ca.MX.sym("p", 0, 1)
    pv = ca.MX(ca.DM(np.asarray(p_value, dtype=float).reshape(-1, 1)))
    out = {"nlp": ca.Function("nlp", [x, p0], [ext["nlp_fx"](x, pv), ext["nlp_gx"](x, pv)],
                              ["x", "p"], ["f", "g"]),
           "grad_f": ca.Function("nlp_grad_f", [x, p0], ext["nlp_grad_f"](x, pv), ["x", "p"], ["f", "grad_f_x"]),
           "jac_g": ca.Function("nlp_jac_g", [x, p0], ext["nlp_jac_g"](x, pv), ["x", "p"], ["g", "jac_g_x"])}
    if hessian:
        lf, lg = ca.MX.sym("lam_f"), ca.MX.sym("lam_g", ext["nlp_hess_l"].size1_in(3))
        out["hess_lag"] = ca.Function("nlp_hess_l", [x, p0, lf, lg], [ext["nlp_hess_l"](x, pv, lf, lg)],
                                      ["x", "p", "lam_f", "lam_g"], ["triu_hess_gamma_x_x"])
    return out
