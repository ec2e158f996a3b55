"""The ``slingback`` command: parses arguments, calls the library, prints.  No logic lives here.

Exit codes: 0 solved and verified (or the command succeeded), 2 bad input (problem file, plan
file, arguments, existing output folder), 3 no verified solution (the reason is printed).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from . import __version__
from .constants import CAUTION

EXIT_OK, EXIT_INPUT, EXIT_UNVERIFIED = 0, 2, 3
PROBLEMS = Path(__file__).resolve().parent.parent / "problems"
DEMO = "demo-abort"

EPILOG = f"""\
exit codes:
  0  solved and verified (check: the plan passed; other commands: done)
  2  bad input: problem file, plan file or arguments (the message names the file and key),
     or an output folder that exists without --force
  3  no verified solution (solve, demo) or the plan failed re-verification (check); the reason
     is printed

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
    return p


def main(argv=None) -> int:
    """Run the command line; returns the exit code."""
    try:
        args = _parser().parse_args(argv)
    except SystemExit as exc:  # argparse: --help (0) or a usage error (2)
        return int(exc.code or 0)
    from .export import PlanFileError
    from .problem_file import ProblemError

    try:
        return COMMANDS[args.command](args)
    except (ProblemError, PlanFileError, FileExistsError) as exc:
        _err(f"error: {exc}")
        return EXIT_INPUT


def _err(text: str) -> None:
    print(f"slingback: {text}", file=sys.stderr)


def _progress(args):
    return None if getattr(args, "quiet", False) else (lambda message: _err(str(message)))


# ------------------------------------------------------------------------------------------------
def _solve_into(problem, out: Path, force: bool, args) -> int:
    from .export import run_summary, write_run

    if out.exists() and not force:
        raise FileExistsError(f"{out} already exists; use --force to replace it")
    from .solver import SolveError, solve

    progress = _progress(args)
    if progress:
        progress(f"solving {problem.name} ({len(problem.burns)} burn(s), model {problem.model.kind})")
    try:
        plan = solve(problem, progress=progress)
    except SolveError as exc:
        _err(f"no solution: the problem cannot be set up ({exc}); nothing written")
        return EXIT_UNVERIFIED
    write_run(plan, problem, out, force=force)
    summary = run_summary(plan, out)
    if args.json:
        print(json.dumps(summary, indent=1))
    else:
        print(f"{plan.name}: {plan.status.upper()}, total Δv {plan.total_dv_mps:.3f} m/s in "
              f"{len(plan.burns)} burn(s); run folder {out}")
        for b in summary["burns"]:
            print(f"  burn at {b['epoch_tdb']} TDB: {b['dv_mps']:.3f} m/s")
    if not plan.verified:
        _err(f"no verified solution ({plan.status}): {plan.reason or 'no reason recorded'}; "
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
    from .export import plan_path, read_plan, recheck

    source = str(plan_path(args.plan))
    plan = read_plan(source)
    progress = _progress(args)
    if progress:
        progress(f"re-propagating {plan.name} ({len(plan.burns)} burn(s)) with the independent propagator")
    try:
        ver = recheck(plan, source=source)
    except RuntimeError as exc:
        _err(f"the re-propagation failed: {exc}")
        return EXIT_UNVERIFIED
    if args.json:
        print(json.dumps({"plan": source, "passed": ver.passed, "residuals": ver.residuals,
                          "tolerances": ver.tolerances, "violations": ver.violations}, indent=1))
    else:
        print(f"{plan.name}: re-verification {'PASSED' if ver.passed else 'FAILED'}")
        for key, value in ver.residuals.items():
            limit = ver.tolerances.get(key)
            print(f"  {key}: {value:.4g}" + ("" if limit is None else f" (tolerance {limit:g})"))
        for v in ver.violations:
            print(f"  violation: {v}")
    if not ver.passed:
        _err("the plan FAILED re-verification: " + "; ".join(ver.violations))
        return EXIT_UNVERIFIED
    return EXIT_OK


def cmd_models(args) -> int:
    from .problem_file import MODEL_DESCRIPTIONS

    for kind, text in MODEL_DESCRIPTIONS.items():
        print(f"{kind:11s} {text}")
    return EXIT_OK


def cmd_plot(args) -> int:
    from .export import PlanFileError, plan_path, plan_problem, read_plan, write_plot_files

    source = plan_path(args.plan)
    plan = read_plan(source)
    problem = plan_problem(plan, str(source))
    out = Path(args.out) if args.out else source.resolve().parent
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
    from .trade import load_sweep_file, progress_text, run_sweep_file

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


COMMANDS = {"solve": cmd_solve, "check": cmd_check, "demo": cmd_demo, "models": cmd_models,
            "plot": cmd_plot, "validate": cmd_validate, "sweep": cmd_sweep}

if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
