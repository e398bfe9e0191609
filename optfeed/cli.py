"""The command line: a thin layer over the Python API.

    optfeed validate PROBLEM [--schedule FILE] [--set KEY=VALUE ...]
    optfeed check PROBLEM --schedule FILE [--uncertainty [--samples N] [--seed S] [--workers N]]
                  [--set KEY=VALUE ...] [--out DIR | --results DIR] [--json] [--quiet]
    optfeed optimize PROBLEM [--workers N] [--set KEY=VALUE ...] [--time-limit T] [--out DIR | --results DIR]
                     [--json] [--quiet]
    optfeed sweep SWEEP [--workers N | --scheduler ADDRESS] [--out DIR | --results DIR] [--max-cases N]
                  [--allow-symlink] [--retry-failed] [--fresh-process-per-case] [--quiet]
    optfeed recipe RUN_FOLDER [--unit mL/min] [--step "1 min"] [--start "2026-12-04 08:00"] [--problem FILE]
    optfeed fit PROBLEM RUNS [--profile] [--set KEY=VALUE ...] [--out DIR | --results DIR] [--json] [--quiet]

Exit codes are those of :mod:`optfeed.status`: 0 fine, 1 a limit broken (or not a
verified optimum, or a fit that did not settle), 2 bad input, 3 a solver or integrator
failure, 130 interrupted (Ctrl-C; nothing written).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from pathlib import Path

from . import __version__
from . import status as st
from .errors import InputError, Issue

MAX_ISSUES_SHOWN = 30  # a file with thousands of faults is not read out in full


def _parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="optfeed", description="Feed profiles for fed-batch cultures, "
                                 "checked against the vessel's limits.")
    ap.add_argument("--version", action="version", version=f"optfeed {__version__}")
    sub = ap.add_subparsers(dest="command", required=True, metavar="COMMAND")

    v = sub.add_parser("validate", help="read and check a problem file; solve nothing")
    v.add_argument("problem", help="problem file (YAML)")
    v.add_argument("--schedule", help="also read and check this schedule file (CSV or YAML)")
    v.add_argument("--end-time", type=float, help="run length in h (only for a free end time)")
    _set_arg(v)

    c = sub.add_parser("check", help="simulate a proposed feed schedule and judge every limit")
    c.add_argument("problem", help="problem file (YAML)")
    c.add_argument("--schedule", required=True, help="schedule file (CSV or YAML)")
    c.add_argument("--end-time", type=float, help="run length in h (only for a free end time; default: its guess)")
    c.add_argument("--time-limit", help="time for the simulation, with its unit, e.g. '2 min' (with --uncertainty: "
                                        "for the Monte Carlo samples too)")
    c.add_argument("--uncertainty", action="store_true",
                   help="also judge the schedule over a Monte Carlo sample of the values the problem's "
                        "'uncertainty' section makes uncertain: the probability of breaking each limit")
    c.add_argument("--samples", type=int, help="Monte Carlo samples (with --uncertainty; default: the section's "
                                               "monte_carlo.samples, 200)")
    c.add_argument("--seed", type=int, help="Monte Carlo seed (with --uncertainty; default: the section's)")
    c.add_argument("--workers", type=int, help="processes for the Monte Carlo simulations (default: the cores)")
    _set_arg(c)
    _output_args(c)

    o = sub.add_parser("optimize", help="find the feed profile that optimises the objective inside every limit")
    o.add_argument("problem", help="problem file (YAML)")
    o.add_argument("--workers", type=int, help="processes for the multistart (default: the cores)")
    o.add_argument("--starts", type=int, help="number of starts (overrides solver.starts)")
    o.add_argument("--time-limit", help="time for the whole job, with its unit, e.g. '20 min' (overrides "
                   "solver.time_limit); when it is reached the best verified answer so far is reported as such")
    _set_arg(o)
    _output_args(o)

    w = sub.add_parser("sweep", help="run many variants unattended; run again to resume")
    w.add_argument("sweep", help="sweep file (YAML)")
    w.add_argument("--workers", type=int, help="local processes (default: the cores)")
    w.add_argument("--scheduler", help="address of a Dask distributed scheduler, e.g. tcp://10.0.0.5:8786")
    w.add_argument("--out", help="sweep folder (default: results/<sweep name>); the same folder resumes")
    w.add_argument("--results", default="results", help="parent of the default sweep folder")
    w.add_argument("--retry-failed", action="store_true",
                   help="also run again the cases that ended without an answer (errors, time limits, failures)")
    w.add_argument("--max-cases", type=int, default=None,
                   help="refuse a sweep of more cases than this (default 10000, optfeed.sweep.spec.MAX_CASES); "
                        "cases are counted before any is built")
    w.add_argument("--allow-symlink", action="store_true",
                   help="accept a sweep folder that is a symbolic link (refused by default)")
    w.add_argument("--fresh-process-per-case", action="store_true",
                   help="run every case in a new process (default: each worker process runs case after case and "
                        "keeps the solvers it built)")
    w.add_argument("--png", action="store_true",
                   help="also write the sweep's own figures (figures/) as PNG files, drawn with matplotlib (the "
                        "cases' run folders keep SVG only)")
    w.add_argument("--quiet", action="store_true", help="print only the final status line")

    f = sub.add_parser("fit", help="calibrate the problem's parameters against past runs, with confidence")
    f.add_argument("problem", help="problem file (YAML)")
    f.add_argument("runs", help="runs file (YAML): the parameters to estimate, the measurement errors, the runs "
                   "and their data files")
    f.add_argument("--profile", action="store_true", help="also compute profile likelihood intervals (slower; the "
                   "honest intervals for a nonlinear model)")
    _set_arg(f)
    _output_args(f)

    r = sub.add_parser("recipe", help="a pump controller's setpoint table for a run's schedule, checked again")
    r.add_argument("run_folder", metavar="RUN_FOLDER", help="folder written by optimize or check")
    r.add_argument("--unit", help="the pump's flow unit, e.g. mL/min (default: each feed's unit in the problem)")
    r.add_argument("--step", default="1 min", help="the controller's time step, a time with its unit "
                   "(default: '1 min')")
    r.add_argument("--resolution", help="the smallest setpoint change, a flow with its unit, e.g. '0.01 mL/min' "
                   "(default: a thousandth of the pump's maximum, rounded down to a power of ten)")
    r.add_argument("--start", help="clock time of the run's start, e.g. '2026-12-04 08:00' (adds clock times)")
    r.add_argument("--problem", help="problem file to check against (default: the one summary.json records)")
    _output_args(r)
    return ap


def _set_arg(p):
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="change a value of the problem by dotted path, as sweep files do, e.g. "
                        "--set parameters.mu_max='0.5 1/h' --set solver.starts=2 (repeatable)")


def _overrides(pairs) -> dict:
    """--set KEY=VALUE items -> {dotted path: value}; values are read as YAML scalars
    (2 is a number, '0.5 1/h' a quantity)."""
    from .problem.dotted import WHERE
    from .problem.yamlio import read_yaml

    out, issues = {}, []
    for item in pairs:
        key, eq, text = item.partition("=")
        key = key.strip()
        if not eq or not key or not text.strip():
            issues.append(Issue("--set", None, key or item, f"expected KEY=VALUE, e.g. parameters.mu_max='0.5 1/h', "
                                                            f"got {item!r}"))
            continue
        try:
            value, _ = read_yaml(f"--set {key}", text=text)
        except InputError as exc:
            issues += exc.issues
            continue
        if isinstance(value, (dict, list)):
            issues.append(Issue(WHERE, None, key, "each value must be a single value"))
            continue
        out[key] = value
    if issues:
        raise InputError(issues)
    return out


def _output_args(p):
    p.add_argument("--out", help="run folder to write (must not exist)")
    p.add_argument("--results", default="results", help="parent of the run folder (default: results)")
    p.add_argument("--no-figures", action="store_true", help="skip the figures (SVG files and those in report.html)")
    p.add_argument("--png", action="store_true",
                   help="also write each figure as a PNG file (drawn with matplotlib: about a second more)")
    p.add_argument("--json", action="store_true", help="print summary.json to stdout instead of the report")
    p.add_argument("--quiet", action="store_true", help="print only the status line")


def main(argv=None) -> int:
    args = _parser().parse_args(argv)
    try:
        code = _run(args)
        sys.stdout.flush()  # a reader that went away (optfeed ... | head) is found here, not at exit
    except BrokenPipeError:
        _stdout_gone()
        code = st.EXIT_FAILED
    if argv is None:  # the program itself (the console script, python -m optfeed.cli): it ends now
        _ending()
    return code


def _ending() -> None:
    """The process ends next, and the operating system takes back its memory: the
    interpreter's garbage collections at exit would only walk the run's objects
    (matplotlib's, CasADi's) to free them one by one (measured: 0.2-0.35 s CPU after
    an optimize run with figures, 0.03 s with them frozen). ``gc.freeze`` puts every
    object out of their reach; objects are still released by reference counting and
    exit handlers still run. Not for ``main([...])`` called from Python: that process
    goes on."""
    import gc

    gc.freeze()


def _out(text: str = "", end: str = "\n") -> None:
    """Print to stdout; if its reader has gone (``optfeed check ... --json | head``),
    stop printing quietly: the job goes on and keeps its exit code."""
    try:
        print(text, end=end)
        sys.stdout.flush()
    except BrokenPipeError:
        _stdout_gone()


def _stdout_gone() -> None:
    # point stdout at /dev/null so that nothing (not even the flush at exit) tries again
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())
    os.close(devnull)


def _run(args) -> int:
    """Run the command; exit code."""
    try:
        if args.command == "validate":
            return _validate(args)
        if args.command == "check":
            return _check(args)
        if args.command == "optimize":
            return _optimize(args)
        if args.command == "sweep":
            return _sweep(args)
        if args.command == "recipe":
            return _recipe(args)
        if args.command == "fit":
            return _fit(args)
    except InputError as exc:
        print("optfeed: bad input", file=sys.stderr)
        for issue in exc.issues[:MAX_ISSUES_SHOWN]:
            print(f"  {issue}", file=sys.stderr)
        if len(exc.issues) > MAX_ISSUES_SHOWN:
            print(f"  ... and {len(exc.issues) - MAX_ISSUES_SHOWN} more issue(s)", file=sys.stderr)
        return st.EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("optfeed: interrupted", file=sys.stderr)
        return 130
    except Exception:  # a bug: say so plainly, with the trace for the report
        print("optfeed: internal error (please report it with the trace below)", file=sys.stderr)
        traceback.print_exc()
        return st.EXIT_FAILED
    return st.EXIT_FAILED


def _validate(args) -> int:
    from .validate import validate

    result = validate(args.problem, args.schedule, end_time=args.end_time, set=_overrides(args.set))
    _warn(result.problem)
    _out(result.message)
    return result.exit_code


def _warn(problem) -> None:
    """Unit warnings of a problem, on stderr (the files are still valid)."""
    for w in problem.warnings:
        print(f"optfeed: warning: {w}", file=sys.stderr)


def _run_folder(args, problem_name: str, job: str) -> Path:
    """The run folder of a check or optimize run: it must not exist yet, and it must
    be possible to make it and write in it (checked now, before any work)."""
    from .paths import check_output_names, check_output_parent
    from .report.files import default_run_dir

    option = "--out" if args.out is not None else "--results"
    check_output_names(args.out if args.out is not None else args.results, option)
    target = Path(args.out) if args.out is not None else default_run_dir(Path(args.results), problem_name, job)
    check_output_names(target, option)
    if os.path.islink(target):
        raise InputError.one(str(target), None, option, "is a symbolic link; give a run folder that does not exist yet")
    if os.path.lexists(target):
        raise InputError.one(str(target), None, option, "run folder already exists; choose another")
    check_output_parent(target, option)
    return target


def _show(args, result, summary: dict, text: str, target: Path, written: str) -> int:
    """Print a result as --json, --quiet or the full report asked for."""
    if args.json:
        _out(json.dumps({**summary, "run_folder": str(target)}, indent=2))
    elif args.quiet:
        _out(f"{result.status}: {result.message}")
    else:
        _out(text, end="")
        _out(f"\nWritten: {target}/{written}")
    return result.exit_code


def _check(args) -> int:
    from .check import check
    from .problem import load_problem
    from .report import check_text, write_check_run
    from .report.files import check_summary

    problem = load_problem(args.problem, set=_overrides(args.set))
    _warn(problem)
    target = _run_folder(args, problem.name, "check")
    limit = _time_limit(args)

    def job(progress=None):
        return check(problem, args.schedule, end_time=args.end_time, time_limit=limit, uncertainty=args.uncertainty,
                     samples=args.samples, seed=args.seed, workers=args.workers, on_progress=progress)

    result = job() if args.quiet or args.json or not args.uncertainty else _with_progress(job, "Monte Carlo")
    write_check_run(result, target, figures=not args.no_figures, png=args.png)
    files = "summary.json, report.txt, report.html, limits.csv, schedule.csv, trajectory.csv"
    if result.uncertainty is not None:
        files += ", montecarlo.csv"
    if not args.no_figures and result.trajectory is not None:
        files += ", figure-*.svg" + (" and .png" if args.png else "")
    return _show(args, result, check_summary(result), check_text(result), target, f" ({files})")


def _optimize(args) -> int:
    import dataclasses

    from .optimize import optimize
    from .problem import load_problem
    from .report import optimize_text, write_optimize_run
    from .report.files import optimize_summary

    problem = load_problem(args.problem, set=_overrides(args.set))
    _warn(problem)
    if args.workers is not None and not 1 <= args.workers <= 256:
        raise InputError.one("--workers", None, "--workers", "must be between 1 and 256")
    if args.starts is not None:
        if not 1 <= args.starts <= 64:
            raise InputError.one("--starts", None, "--starts", "must be between 1 and 64")
        problem = dataclasses.replace(problem, settings=dataclasses.replace(problem.settings, starts=args.starts))
    target = _run_folder(args, problem.name, "optimize")
    limit = _time_limit(args)
    if args.quiet or args.json:
        result = optimize(problem, workers=args.workers, time_limit=limit)
    else:
        result = _with_progress(lambda cb: optimize(problem, workers=args.workers, on_progress=cb,
                                                    time_limit=limit))
    write_optimize_run(result, target, figures=not args.no_figures, png=args.png)
    return _show(args, result, optimize_summary(result), optimize_text(result), target, "")


def _fit(args) -> int:
    from .fit import fit, load_runs
    from .problem import load_problem
    from .report.files import fit_summary, write_fit_run
    from .report.text import fit_text

    problem = load_problem(args.problem, set=_overrides(args.set))
    _warn(problem)
    runs = load_runs(args.runs, problem)
    target = _run_folder(args, problem.name, "fit")
    if args.quiet or args.json:
        result = fit(problem, runs, profile=args.profile)
    else:
        result = _with_progress(lambda cb: fit(problem, runs, profile=args.profile, on_progress=cb), "fitting")
    write_fit_run(result, target, figures=not args.no_figures, png=args.png)
    files = "summary.json, report.txt, report.html"
    if result.estimates:
        files += ", fitted.yaml, covariance.csv, residuals.csv, trajectory-*.csv"
        if not args.no_figures:
            files += ", figure-*.svg" + (" and .png" if args.png else "")
    return _show(args, result, fit_summary(result), fit_text(result), target, f" ({files})")


def _time_limit(args) -> float | None:
    """--time-limit in seconds (None if not given); bad input unless a time above zero."""
    if getattr(args, "time_limit", None) is None:
        return None
    from .units import parse_quantity, to_internal

    if not any(c.isalpha() for c in args.time_limit):
        raise InputError.one("--time-limit", None, "--time-limit",
                             f"give the time limit with its unit, e.g. '20 min', got {args.time_limit!r}")
    try:
        seconds = to_internal(parse_quantity(args.time_limit, "time")) * 3600.0
    except ValueError as exc:
        raise InputError.one("--time-limit", None, "--time-limit", str(exc)) from None
    if not 0 < seconds <= 30 * 86400:
        raise InputError.one("--time-limit", None, "--time-limit", "must be above zero and at most 30 days")
    return seconds


def _recipe(args) -> int:
    from .recipe import recipe, recipe_summary, recipe_text, write_recipe_run
    from .report.files import default_run_dir

    if args.out and Path(args.out).exists():
        raise InputError.one(args.out, None, "--out", "run folder already exists; choose another")
    result = recipe(args.run_folder, unit=args.unit, step=args.step, start=args.start, problem=args.problem,
                    resolution=args.resolution)
    target = Path(args.out) if args.out else default_run_dir(Path(args.results), result.problem.name, "recipe")
    write_recipe_run(result, target, figures=not args.no_figures, png=args.png)
    return _show(args, result, recipe_summary(result), recipe_text(result), target,
                 " (recipe.csv, schedule.csv, summary.json, report.txt, report.html, limits.csv)")


def _sweep(args) -> int:
    from .sweep import load_sweep, run_sweep
    from .sweep.outputs import summary_text

    if args.workers is not None and not 1 <= args.workers <= 256:
        raise InputError.one("--workers", None, "--workers", "must be between 1 and 256")
    if args.max_cases is not None and args.max_cases < 1:
        raise InputError.one("--max-cases", None, "--max-cases", "must be 1 or more")
    for option, value in (("--out", args.out), ("--results", args.results)):
        if value is not None and value.strip() == "":
            raise InputError.one(option, None, option, "is empty; give a folder name")
    if args.scheduler is not None:
        from .sweep.runner import check_address

        check_address(args.scheduler)
    sweep = load_sweep(args.sweep, max_cases=args.max_cases)
    folder = Path(args.out) if args.out is not None else Path(args.results) / sweep.name
    if args.quiet:
        result = run_sweep(sweep, folder, workers=args.workers, scheduler=args.scheduler, retry=args.retry_failed,
                           allow_symlink=args.allow_symlink, fresh_process_per_case=args.fresh_process_per_case,
                           png=args.png)
    else:
        result = _sweep_with_progress(sweep, folder, args)
        _out(summary_text(sweep, result.rows, _ranked(sweep, result.rows)), end="")
    word = {"finished": "finished", "stopped": "stopped (run the same command to resume)",
            "incomplete": "incomplete (run the same command to complete it)"}[result.status]
    _out(f"sweep {word}: {result.total} cases, {result.ran} run now, {result.skipped} already done, "
          f"{result.failed} without an answer; {folder}/")
    if result.message and result.status != "stopped":
        _out(f"  {result.message}")
    return result.exit_code


def _ranked(sweep, rows):
    from .sweep.outputs import ranked, sense_of

    return ranked(rows, sense_of(rows, sweep))


def _sweep_with_progress(sweep, folder, args):
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    from .sweep import run_sweep

    console = Console(stderr=True)
    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                  TextColumn("failed {task.fields[failed]}"), TimeRemainingColumn(), console=console,
                  disable=not console.is_terminal) as bar:
        task = bar.add_task(f"sweep {sweep.name}", total=len(sweep.cases), failed=0)

        def event(kind, row, counts):
            bar.update(task, completed=counts["done"], failed=counts["failed"])
            if kind == "done" and not console.is_terminal:
                print(f"  [{counts['done']}/{counts['total']}] {row['status']}: {row.get('message', '')[:100]}",
                      file=sys.stderr)

        return run_sweep(sweep, folder, workers=args.workers, scheduler=args.scheduler, on_event=event,
                         retry=args.retry_failed, allow_symlink=args.allow_symlink,
                         fresh_process_per_case=args.fresh_process_per_case, png=args.png)


def _with_progress(job, first: str = "optimizing"):
    """Run ``job(callback)`` under a progress display on stderr."""
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    console = Console(stderr=True)
    with Progress(TextColumn("{task.description}"), BarColumn(), TextColumn("{task.completed}/{task.total}"),
                  TimeElapsedColumn(), console=console, transient=True, disable=not console.is_terminal) as bar:
        task = bar.add_task(first, total=1)

        def callback(text, done, total):
            bar.update(task, description=text, completed=done, total=total)
            if not console.is_terminal:
                print(f"  {text}", file=sys.stderr)

        return job(callback)


if __name__ == "__main__":
    sys.exit(main())
