"""The ``slingback`` command: parses arguments, calls the library, prints.  No logic lives here.

Exit codes: 0 solved and verified (or the command succeeded), 2 bad input (problem file, plan
file, arguments, an output folder that exists or cannot be written), 3 no verified solution (the
reason is printed), 130 interrupted (Ctrl-C; nothing is written).

May import every layer of the package (it is the top): the file layer, the solve wing, the trade engine, dispersion and export.
"""

from __future__ import annotations

import os
import signal
import sys


def _interrupted_while_starting(signum, frame):
    """Ctrl-C before :func:`main` handles it (the command's own imports): one line, exit 130."""
    os.write(2, b"slingback: interrupted (Ctrl-C) while starting; nothing written\n")
    os._exit(130)


# Run as the command (python -m optimizer.cli, or the `slingback` script): Ctrl-C is ours from here
# on, before the imports below (a KeyboardInterrupt raised in them would end the process by the
# signal, -2, with a traceback).  Not when imported as a library, and not when SIGINT is ignored.
if (__name__ == "__main__" or os.path.basename(sys.argv[0]) == "slingback") and \
        signal.getsignal(signal.SIGINT) is signal.default_int_handler:
    signal.signal(signal.SIGINT, _interrupted_while_starting)

import argparse  # noqa: E402
import json  # noqa: E402
from pathlib import Path  # noqa: E402

from . import __version__
from .constants import CAUTION

EXIT_OK, EXIT_INPUT, EXIT_UNVERIFIED, EXIT_INTERRUPTED = 0, 2, 3, 130
PROBLEMS = Path(__file__).resolve().parent.parent / "problems"
DEMO = "demo-abort"

EPILOG = f"""\
exit codes:
  0  solved and verified (check: the plan passed; other commands: done)
  2  bad input: problem file, plan file or arguments (the message names the file and key),
     or an output folder that exists without --force or cannot be written (checked before solving)
  3  no verified solution (solve, demo) or the plan failed re-verification (check: a constraint
     or any figure the plan claims differs from the re-derived one); the reason is printed
  130  interrupted by Ctrl-C; nothing is written (a run folder is either whole or absent)

Epochs are TDB; units are in the key names of problem files (see docs/problem-format.md).
{CAUTION}
"""


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="slingback", epilog=EPILOG,
                                formatter_class=argparse.RawDescriptionHelpFormatter,
                                description="Minimum-fuel lunar free-return design, every optimum "
                                            "checked by an independent propagator.")
    p.add_argument("--version", action="version", version=f"slingback {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", required=True)

    def add(name, help_text):
        return sub.add_parser(name, help=help_text, description=help_text, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)

    def quiet_json(q):
        q.add_argument("--quiet", action="store_true", help="no progress lines on stderr")
        q.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")

    q = add("solve", "solve a problem file and write its run folder")
    q.add_argument("file", metavar="FILE", help="problem file (TOML)")
    q.add_argument("--out", metavar="DIR", help="run folder (default: outputs/<case name>)")
    q.add_argument("--force", action="store_true", help="replace an existing run folder")
    quiet_json(q)
    q = add("check", "re-verify an exported plan with the independent propagator alone")
    q.add_argument("plan", metavar="PLAN", help="a plan.json file or a run folder holding one")
    quiet_json(q)
    q = add("demo", f"solve problems/{DEMO}.toml into outputs/{DEMO}/ (replacing an earlier demo)")
    q.add_argument("--out", metavar="DIR", help=f"run folder (default: outputs/{DEMO})")
    quiet_json(q)
    add("models", "list the force models")
    q = add("plot", "draw the figures of an exported plan")
    q.add_argument("plan", metavar="PLAN", help="a plan.json file or a run folder holding one")
    q.add_argument("--out", metavar="DIR", help="folder for the PNG files (default: the plan's folder)")
    q = add("validate", "load a problem file and report what it asks for")
    q.add_argument("file", metavar="FILE")
    q.add_argument("--json", action="store_true", help="print the problem's table form as JSON")
    q = add("sweep", "trade study: minimum Δv over burn epoch x arrival epoch (the file's [sweep] table)")
    q.add_argument("file", metavar="FILE", help="problem file with a [sweep] table (docs/sweep-format.md)")
    q.add_argument("--out", metavar="DIR", help="trade folder (default: outputs/<case name>-trade)")
    q.add_argument("--force", action="store_true", help="replace an existing trade folder")
    q.add_argument("--workers", type=int, metavar="N", help="local worker processes (default: every core)")
    q.add_argument("--scheduler", metavar="ADDRESS", help="run the cells on a Dask distributed scheduler")
    q.add_argument("--resume", metavar="DIR", help="save finished cells here and skip those already saved")
    quiet_json(q)
    q = add("dispersion", "Monte Carlo and linear covariance of a verified plan's execution and navigation "
                          "errors; the corridor share and the margin it needs (docs/dispersion-format.md)")
    q.add_argument("plan", metavar="PLAN_OR_RUN_FOLDER", help="a plan.json or a run folder holding one")
    q.add_argument("--samples", type=int, default=1000, metavar="N", help="Monte Carlo samples (default 1000)")
    q.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    q.add_argument("--out", metavar="DIR", help="output folder (default: outputs/<plan name>-dispersion)")
    q.add_argument("--force", action="store_true", help="replace an existing output folder")
    q.add_argument("--workers", type=int, metavar="K", help="local worker processes (default: every core)")
    q.add_argument("--scheduler", metavar="ADDRESS", help="run the samples on a Dask distributed scheduler")
    q.add_argument("--resume", metavar="DIR", help="save finished samples here and skip those already saved")
    q.add_argument("--errors", action="append", default=[], metavar="FILE",
                   help="TOML file with a [dispersion] error-model table (a problem file or a small file); "
                        "repeatable, later files over earlier ones (default: the built-in defaults)")
    q.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override one error-model value, e.g. burn.pointing_sigma_deg=0.2 (repeatable)")
    q.add_argument("--no-margin-solve", action="store_true",
                   help="skip the extra solve with the flight-path margin the spread needs")
    quiet_json(q)
    return p


def main(argv=None) -> int:
    """Run the command line; returns the exit code.

    Ctrl-C anywhere in here (parsing, imports, the work) ends with one line and exit 130.
    """
    command = "slingback"
    try:
        if signal.getsignal(signal.SIGINT) is _interrupted_while_starting:
            signal.signal(signal.SIGINT, signal.default_int_handler)  # from here a KeyboardInterrupt
        try:
            args = _parser().parse_args(argv)
        except SystemExit as exc:  # argparse: --help (0) or a usage error (2)
            return int(exc.code or 0)
        command = args.command
        from . import interrupt

        try:
            with interrupt.honour_ctrl_c():
                return _run(args)
        except Exception:
            if not interrupt.pressed():
                raise
            raise KeyboardInterrupt from None  # what broke did so because of the Ctrl-C
    except KeyboardInterrupt:
        previous = signal.signal(signal.SIGINT, signal.SIG_IGN)  # a second Ctrl-C cannot cut this line
        _err(f"interrupted (Ctrl-C); {command} stopped, nothing written")
        signal.signal(signal.SIGINT, previous)
        return EXIT_INTERRUPTED


def _run(args) -> int:
    from .export import OutputPathError, PlanFileError
    from .problem_file import ProblemError

    try:
        if args.command in SETTINGS_READ:
            _check_settings(args.command)
        return COMMANDS[args.command](args)
    except (ProblemError, PlanFileError, FileExistsError, OutputPathError, SettingError) as exc:
        _err(f"error: {exc}")
        return EXIT_INPUT


class SettingError(ValueError):
    """An environment setting (``SLINGBACK_*``) with a value the package cannot use."""


#: Commands that read SLINGBACK_* settings: all of them the propagator engine; all but ``check``
#: (which only re-propagates) also the compile mode and the starts at once of a solve.
SETTINGS_READ = ("solve", "check", "demo", "sweep", "dispersion")


def _check_settings(command: str) -> None:
    """Each SLINGBACK_* setting ``command`` reads, read once before any work: a bad value stops
    the command here with its name (exit 2), not half-way through with a traceback.  ``check``
    imports nothing of the solver for it."""
    from .propagate import default_engine

    reads = [default_engine]
    if command != "check":
        from .compiled import mode
        from .solve.search import start_workers

        reads += [mode, start_workers]
    for read in reads:
        try:
            read()
        except ValueError as exc:
            raise SettingError(str(exc)) from None


def _err(text: str) -> None:
    print(f"slingback: {text}", file=sys.stderr)


def _progress(args):
    return None if getattr(args, "quiet", False) else (lambda message: _err(str(message)))


# ------------------------------------------------------------------------------------------------
def _solve_into(problem, out: Path, force: bool, args) -> int:
    from .export import OutputPathError, run_summary, write_run
    from .export.run import refuse_existing, save_rescued_plan

    refuse_existing(out, force)  # exists, is a file, lies under a file or cannot be written: before solving
    from .problem_file import problem_to_dict
    from .solve import SolveError, solve

    progress = _progress(args)
    if progress:
        progress(f"solving {problem.name} ({len(problem.burns)} burn(s), model {problem.model.kind})")
    try:
        plan = solve(problem, progress=progress, problem_table=problem_to_dict)
    except SolveError as exc:
        from .diagnose import explain_failure

        cause = explain_failure(problem)  # the problem's key, when the burn-free coast shows it
        _err(f"no solution: {cause}; nothing written" if cause else
             f"no solution: the problem cannot be set up ({exc}); nothing written")
        return EXIT_UNVERIFIED
    try:
        write_run(plan, problem, out, force=force)
    except (OSError, OutputPathError) as exc:  # the location changed since the check before solving
        kept = save_rescued_plan(plan, problem, out)
        why = (exc.strerror if isinstance(exc, OSError) else None) or exc
        _err(f"error: the run folder {out} could not be written ({why}); nothing was left there. "
             + (f"The plan ({plan.status}) is kept in {kept}" if kept else "The plan could not be kept anywhere"))
        return EXIT_INPUT
    summary = run_summary(plan, out)
    if args.json:
        print(json.dumps(summary, indent=1))
    else:
        print(f"{plan.name}: {plan.status.upper()}, total Δv {plan.total_dv_mps:.3f} m/s in "
              f"{len(plan.burns)} burn(s); run folder {out}")
        for b in summary["burns"]:
            print(f"  burn at {b['epoch_tdb']} TDB: {b['dv_mps']:.3f} m/s")
    if not plan.verified:
        from .diagnose import explain_failure

        cause = explain_failure(problem)
        _err(f"no verified solution ({plan.status}): {cause or plan.reason or 'no reason recorded'}; "
             f"diagnostics in {out / 'report.md'}")
        return EXIT_UNVERIFIED
    return EXIT_OK


def cmd_solve(args) -> int:
    from .problem_file import load_problem

    problem = load_problem(args.file)
    out = Path(args.out) if args.out else Path("outputs") / problem.name
    return _solve_into(problem, out, args.force, args)


def cmd_demo(args) -> int:
    from .problem_file import load_problem

    problem = load_problem(PROBLEMS / f"{DEMO}.toml")
    return _solve_into(problem, Path(args.out) if args.out else Path("outputs") / DEMO, True, args)


def cmd_check(args) -> int:
    from .export import plan_path, read_plan_data, recheck
    from .export.check import claim_differences, plan_problem

    source = str(plan_path(args.plan))
    plan, data = read_plan_data(source)
    problem = plan_problem(plan, source)
    progress = _progress(args)
    if progress:
        progress(f"re-propagating {plan.name} ({len(plan.burns)} burn(s)) with the independent propagator")
    try:
        ver = recheck(plan, problem, source=source)
    except RuntimeError as exc:
        _err(f"the re-propagation failed: {exc}")
        return EXIT_UNVERIFIED
    claims = claim_differences(data, plan, problem, ver)
    passed = ver.passed and not claims
    if args.json:
        print(json.dumps({"plan": source, "passed": passed, "residuals": ver.residuals,
                          "tolerances": ver.tolerances, "violations": ver.violations,
                          "claims_differing": claims}, indent=1))
    else:
        print(f"{plan.name}: re-verification {'PASSED' if passed else 'FAILED'}")
        for key, value in ver.residuals.items():
            limit = ver.tolerances.get(key)
            print(f"  {key}: {value:.4g}" + ("" if limit is None else f" (tolerance {limit:g})"))
        for v in ver.violations:
            print(f"  violation: {v}")
        for c in claims:
            print(f"  claim differs: {c}")
    if not passed:
        _err("the plan FAILED re-verification: " + "; ".join(ver.violations + claims))
        return EXIT_UNVERIFIED
    return EXIT_OK


def cmd_models(args) -> int:
    from .problem_file import MODEL_DESCRIPTIONS

    for kind, text in MODEL_DESCRIPTIONS.items():
        print(f"{kind:11s} {text}")
    return EXIT_OK


def cmd_plot(args) -> int:
    from .export import PlanFileError, plan_path, plan_problem, read_plan, write_plot_files
    from .export.run import check_writable

    source = plan_path(args.plan)
    plan = read_plan(source)
    problem = plan_problem(plan, str(source))
    out = Path(args.out) if args.out else source.resolve().parent
    check_writable(out)
    out.mkdir(parents=True, exist_ok=True)
    try:
        names = write_plot_files(plan, problem, out)
    except ValueError as exc:
        raise PlanFileError(f"{source}: cannot re-propagate the plan ({exc})") from None
    for name in names:
        print(out / name)
    return EXIT_OK


def cmd_validate(args) -> int:
    from .problem_file import describe_problem, load_problem, problem_to_dict

    problem = load_problem(args.file)
    if args.json:
        print(json.dumps(problem_to_dict(problem), indent=1))
    else:
        print(f"{args.file}: valid")
        print(describe_problem(problem))
    return EXIT_OK


def cmd_sweep(args) -> int:
    from .export.trade_folder import run_sweep_file
    from .problem_file import load_sweep_file
    from .trade import progress_text

    # a sweep solves one NLP structure many times: compile it in the background unless told otherwise
    os.environ.setdefault("SLINGBACK_COMPILE", "auto")
    problem, _ = load_sweep_file(args.file)  # bad input stops here, before anything is solved
    out = Path(args.out) if args.out else Path("outputs") / f"{problem.name}-trade"
    say = None if args.quiet else (lambda p: _err(progress_text(p)))
    df, folder = run_sweep_file(args.file, out, workers=args.workers, scheduler=args.scheduler,
                                resume_dir=args.resume, progress=say, force=args.force)
    ok = df[df["status"] == "verified"]
    summary = {"trade_folder": str(folder), "cells": int(len(df)), "verified": int(len(ok)),
               "min_total_dv_mps": float(ok["total_dv_mps"].min()) if len(ok) else None}
    if args.json:
        print(json.dumps(summary, indent=1))
    else:
        print(f"{problem.name}: {summary['verified']} of {summary['cells']} cells verified; "
              f"trade folder {folder}")
    if not len(ok):
        _err("no cell has a verified solution; reasons in trade.csv")
        return EXIT_UNVERIFIED
    return EXIT_OK


def cmd_dispersion(args) -> int:
    from .dispersion import load_error_model, parse_overrides
    import shutil

    from .dispersion.outputs import (progress_bar, read_verified_plan, run_dispersion, temporary_store,
                                     write_dispersion)
    from .export.run import OutputPathError, check_writable, refuse_existing

    errors = load_error_model(args.errors, parse_overrides(args.set))  # bad input stops here
    plan, problem, source = read_verified_plan(args.plan)
    if not plan.verified:
        _err(f"{source}: the plan is {plan.status}, not verified; a dispersion of it means nothing")
        return EXIT_UNVERIFIED
    out = Path(args.out) if args.out else Path("outputs") / f"{plan.name}-dispersion"
    refuse_existing(out, args.force)  # before any sample is computed
    if args.resume:
        check_writable(Path(args.resume), folder_of=Path(args.resume))
    store, kept = temporary_store(args.resume, plan.name)  # every finished chunk saved as it comes
    update, close = progress_bar(args.samples, args.quiet)
    result = None
    try:
        try:
            result = run_dispersion(plan, problem, errors, samples=args.samples, seed=args.seed,
                                    workers=args.workers, scheduler=args.scheduler, resume_dir=store,
                                    progress=_progress(args), sample_progress=update,
                                    margin_solve=not args.no_margin_solve)
        finally:
            close()
        write_dispersion(result, plan, problem, out, force=args.force)
    except (OSError, OutputPathError) as exc:
        why = (exc.strerror if isinstance(exc, OSError) else None) or exc
        if result is None:  # the sample store itself could not be written
            _err(f"error: the samples could not be saved in {store} ({why}); nothing was written to {out}")
            return EXIT_INPUT
        kept = True  # the samples are what took the time: keep their store
        _err(f"error: the dispersion folder {out} could not be written ({why}); nothing was left there. "
             f"The {args.samples} computed samples are kept in {store}: run the same command with "
             f"--resume {store} (and a writable --out) to write them without computing them again")
        return EXIT_INPUT
    finally:
        if not kept:
            shutil.rmtree(store, ignore_errors=True)
    s = result["summary"]
    ins = s["inside"]
    if args.json:
        print(json.dumps({"out": str(out), "samples": s["samples"], "inside": ins,
                          "margin": s["margin"], "caution": CAUTION}, indent=1, default=str))
    else:
        print(f"{plan.name}: {ins['count']} of {s['samples']} samples inside the corridor "
              f"({ins['share']:.1%}, 95 % Wilson {ins['wilson_95'][0]:.1%}-{ins['wilson_95'][1]:.1%}); "
              f"folder {out}")
        g = s["statistics"]["entry_flight_path_deg"]
        lin = (s["linear_covariance"].get("sigma") or {}).get("entry_flight_path_deg", {})
        print(f"  entry flight-path angle sigma {g['sigma']:.4f} deg (linear covariance "
              f"{lin.get('sigma_linear', float('nan')):.4f} deg)")
        m = s["margin"]
        if m:
            sv = m["solve"]
            extra = (f"; a solve with it costs {sv['total_dv_mps']:.3f} m/s ({sv['extra_dv_mps']:+.3f}, "
                     f"{sv['status']})" if sv.get("total_dv_mps") is not None else f"; {sv.get('reason')}")
            print(f"  3-sigma margin needed: {m['margin_deg']:.2f} deg{extra}")
    return EXIT_OK


COMMANDS = {"solve": cmd_solve, "check": cmd_check, "demo": cmd_demo, "models": cmd_models,
            "plot": cmd_plot, "validate": cmd_validate, "sweep": cmd_sweep,
            "dispersion": cmd_dispersion}

if __name__ == "__main__":  # pragma: no cover
    code = main()
    if code == EXIT_INTERRUPTED:
        # Under `python -m`, CPython 3.11 ends the process by the signal itself (-2) once a
        # KeyboardInterrupt has passed through an exec or eval of source text (a dataclass or
        # named tuple being made by an import the Ctrl-C landed in), whatever the exit code.  The
        # command has stopped and said so: leave at once with 130.
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(code)
    sys.exit(code)
