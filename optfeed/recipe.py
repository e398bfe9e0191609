"""Pump recipes: a run's schedule as setpoints a pump controller can take, checked again.

:func:`recipe` reads a run folder (its ``schedule.csv`` and ``summary.json``), cuts the
run into steps of the controller's time step, gives each step the schedule's mean
rate over it in the pump's unit rounded to the pump's resolution (so the volume of
each step is kept, up to the rounding), and simulates the rounded recipe with the
check job, so that the user sees whether it still stays inside every limit and what
the rounding costs in objective. :func:`write_recipe_run` writes the result as a run
folder: ``recipe.csv`` (the setpoint table), ``schedule.csv`` (the rounded schedule,
readable by ``optfeed check``), ``summary.json``, ``report.txt``, ``limits.csv``,
``report.html`` and figures.
"""

from __future__ import annotations

import csv
import datetime as _dt
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import status as st
from .errors import InputError

DEFAULT_STEP = "1 min"


@dataclass(frozen=True)
class RecipeResult:
    """A pump recipe and how its rounded schedule fares.

    Attributes
    ----------
    status : str
        The check job's status for the rounded recipe: 'within limits',
        'limit broken' or 'simulation failed'.
    message : str
        One line for people.
    run_folder : Path
        The run folder the recipe was made from.
    header : list of str
        Column names of the setpoint table (units in brackets).
    rows : list of list
        The setpoint table: a row at the start, at every step where a setpoint
        changes, and at the end of the run (pumps off).
    units : dict
        Feed name -> the pump unit of its setpoints (e.g. 'mL/min').
    resolution : dict
        Feed name -> the smallest setpoint change, in its pump unit.
    step : float
        The controller's time step, h.
    start : datetime or None
        Clock time of the run's start, if given.
    end_time : float
        Run length, h.
    schedule : Schedule
        The rounded recipe as a schedule (internal units, piecewise constant).
    check : CheckResult
        The rounded recipe judged by the check job.
    reference : CheckResult
        The run folder's own schedule judged the same way (the comparison base).
    objective_difference : float or None
        Objective of the recipe minus that of the run's own schedule (objective unit).
    objective_relative : float or None
        The same relative to |the run's own objective|.
    largest_rounding : dict
        Feed name -> the largest |setpoint - exact mean rate over its step|, pump unit.
    record : dict
        Where it came from: files, digests, settings, versions.
    """

    status: str
    message: str
    run_folder: Path
    header: list
    rows: list = field(repr=False)
    units: dict
    resolution: dict
    step: float
    start: _dt.datetime | None
    end_time: float
    schedule: object = field(repr=False)
    check: object = field(repr=False)
    reference: object = field(repr=False)
    objective_difference: float | None = None
    objective_relative: float | None = None
    largest_rounding: dict = field(default_factory=dict)
    record: dict = field(default_factory=dict)

    @property
    def exit_code(self) -> int:
        return st.exit_code(self.status)

    @property
    def problem(self):
        return self.check.problem

    def setpoints_frame(self):
        """The setpoint table as a pandas DataFrame."""
        from .frames import _pandas

        return _pandas().DataFrame(self.rows, columns=self.header)


def recipe(run_folder, unit: str | None = None, step: str = DEFAULT_STEP, start: str | None = None,
           problem=None, resolution: str | None = None) -> RecipeResult:
    """A controller's setpoint table for the schedule of ``run_folder``, checked again.

    Parameters
    ----------
    run_folder : path
        A folder written by ``optfeed optimize`` or ``optfeed check`` (holding
        schedule.csv and summary.json).
    unit : str, optional
        The pump's flow unit for the setpoints, e.g. 'mL/min' (default: each
        feed's unit in the problem file).
    step : str
        The controller's time step, a time with its unit, e.g. '1 min', '30 s'.
        Setpoints change only at whole steps.
    start : str, optional
        Clock time of the run's start, e.g. '2026-12-04 08:00' (ISO 8601): adds
        a clock-time column.
    problem : Problem or path, optional
        The problem to check the recipe against (default: the file summary.json
        records; it must still be the problem of the run, by its digest).
    resolution : str, optional
        The smallest setpoint change of the pump, a flow with its unit, e.g.
        '0.01 mL/min' (default: per feed, a thousandth of its maximum rate
        rounded down to a power of ten in the pump unit).

    Returns
    -------
    RecipeResult

    Raises
    ------
    InputError
        A missing folder or file, an unknown unit, a step that is not a time, a
        start that is not a date and time, a problem that no longer matches.
    """
    from .check import check, run_length
    from .problem import Problem, load_problem
    from .provenance import problem_digest, stamp
    from .schedule import load_schedule, piecewise_constant
    from .units import factor_to

    folder = Path(run_folder)
    if not folder.is_dir():
        raise InputError.one(str(folder), None, "RUN_FOLDER", "no such run folder")
    summary_path = folder / "summary.json"
    try:
        summary = json.loads(summary_path.read_text())
    except FileNotFoundError:
        raise InputError.one(str(summary_path), None, "", "missing: is this a folder written by optfeed "
                             "optimize or check?") from None
    except (OSError, ValueError) as exc:
        raise InputError.one(str(summary_path), None, "", f"cannot be read ({exc})") from None
    record = summary.get("record") if isinstance(summary.get("record"), dict) else {}
    note = ""
    if problem is None:
        recorded = record.get("problem_file")
        if not recorded:
            raise InputError.one(str(summary_path), None, "record.problem_file",
                                 "names no problem file; give one with --problem")
        if not Path(recorded).exists():
            raise InputError.one(str(summary_path), None, "record.problem_file",
                                 f"the problem file {recorded} no longer exists here; give it with --problem")
        problem = load_problem(recorded)
        if record.get("problem_digest") and problem_digest(problem) != record["problem_digest"]:
            raise InputError.one(recorded, None, "", "this problem file has changed since the run (its digest "
                                 "differs from summary.json's record.problem_digest); give --problem to check "
                                 "the recipe against it anyway")
    elif not isinstance(problem, Problem):
        problem = load_problem(problem)
    if record.get("problem_digest") and problem_digest(problem) != record["problem_digest"]:
        note = " (checked against a problem that differs from the run's)"
    end = summary.get("end_time_h")
    if not isinstance(end, (int, float)) or not math.isfinite(end) or end <= 0:
        raise InputError.one(str(summary_path), None, "end_time_h", "records no run length: the run ended "
                             f"'{summary.get('status', '?')}' without an answer")
    tf = run_length(problem, float(end) if problem.horizon.free else None, str(summary_path))
    sched_path = folder / "schedule.csv"
    if not sched_path.exists():
        raise InputError.one(str(sched_path), None, "", f"missing: the run ended '{summary.get('status', '?')}' "
                             "without a schedule")
    original = load_schedule(sched_path, problem.feed_names, tf, problem.phases)

    units = {f.name: _flow_unit(unit, "--unit") if unit else f.unit for f in problem.feeds}
    dt, step_unit = _time_step(step, tf)
    t0 = _start(start)
    res = {}
    for f in problem.feeds:
        c = factor_to(units[f.name])
        res[f.name] = _resolution(resolution, units[f.name]) if resolution else default_resolution(f.max_rate * c)

    edges = np.append(np.arange(0.0, tf - 1e-9 * tf, dt), tf)
    mean = step_means(original, problem.feed_names, edges)  # L/h, (steps, feeds)
    set_rates = np.zeros_like(mean)
    largest = {}
    for j, f in enumerate(problem.feeds):
        c = factor_to(units[f.name])
        set_rates[:, j] = [round_setpoint(m * c, res[f.name], f.min_rate * c, f.max_rate * c) for m in mean[:, j]]
        largest[f.name] = float(np.max(np.abs(set_rates[:, j] - mean[:, j] * c))) if len(mean) else 0.0
    # the recipe as a schedule: a row wherever a setpoint changes, exactly as recipe.csv and schedule.csv
    changes = [0] + [i for i in range(1, len(set_rates)) if not np.array_equal(set_rates[i], set_rates[i - 1])]
    internal = set_rates[changes] / np.array([factor_to(units[n]) for n in problem.feed_names])[None, :]
    rounded = piecewise_constant(problem.feed_names, edges[changes], internal, source=str(folder / "recipe.csv"))
    if getattr(original, "switch_times", None):
        # the phases end where the run's schedule says, a time the run chose (induction)
        # on the controller's step too, so that pump changes and the phase change coincide
        import dataclasses

        chosen = {ph.name for ph in problem.phases if ph.end.kind == "between"}
        ends = {n: (float(edges[np.argmin(np.abs(edges - t))]) if n in chosen else t)
                for n, t in original.switch_times.items()}
        rounded = dataclasses.replace(rounded, switch_times=ends)

    ref = check(problem, original, end_time=tf if problem.horizon.free else None)
    new = check(problem, rounded, end_time=tf if problem.horizon.free else None)
    diff = rel = None
    if new.outcome is not None and ref.outcome is not None and ref.outcome.objective is not None:
        a, b = new.outcome.objective.value, ref.outcome.objective.value
        diff = a - b
        rel = diff / max(abs(b), 1e-300)
    header, rows = setpoint_table(problem, units, res, edges, set_rates, dt, step_unit, t0)
    message = _message(new, ref, diff, rel) + note
    rec = {"run_folder": str(folder), "problem_file": problem.source, "problem_digest": problem_digest(problem),
           "schedule_file": str(sched_path), "step": step, **stamp()}
    return RecipeResult(new.status, message, folder, header, rows, units, res, dt, t0, tf, rounded, new, ref,
                        diff, rel, largest, rec)


# ------------------------------------------------------------------ the pieces


def _flow_unit(text: str, key: str) -> str:
    from .units import parse_quantity

    try:
        parse_quantity(f"1 {text}", "flow")
    except ValueError as exc:
        msg = str(exc).replace("'1 ", "'", 1)
        raise InputError.one(key, None, key, f"{msg}; expected a pump unit such as mL/min or L/h") from None
    return text.strip()


def _time_step(text, tf: float) -> tuple[float, str]:
    """(step in h, its unit as written) of a time step such as '1 min'."""
    from .units import parse_quantity, to_internal, written_unit

    if not isinstance(text, str) or not written_unit(text, "any"):
        raise InputError.one("--step", None, "--step", f"expected a time with its unit, such as '1 min' or "
                             f"'30 s', got {text!r}")
    try:
        dt = to_internal(parse_quantity(text, "time"))
    except ValueError as exc:
        raise InputError.one("--step", None, "--step", f"{exc}; the step is the controller's time step") from None
    if not 0 < dt <= tf:
        raise InputError.one("--step", None, "--step", f"{text} is not between zero and the run's length "
                             f"({tf:g} h)")
    if tf / dt > 1_000_000:
        raise InputError.one("--step", None, "--step", f"{text} cuts the {tf:g} h run into more than a million "
                             "steps; choose a longer step")
    return dt, written_unit(text, "time")


def _start(text):
    if text is None:
        return None
    try:
        return _dt.datetime.fromisoformat(str(text).strip())
    except ValueError:
        raise InputError.one("--start", None, "--start", f"expected a date and clock time such as "
                             f"'2026-12-04 08:00', got {text!r}") from None


def _resolution(text: str, pump_unit: str) -> float:
    from .units import UREG, parse_quantity

    try:
        q = parse_quantity(text, "flow")
    except ValueError as exc:
        raise InputError.one("--resolution", None, "--resolution", str(exc)) from None
    value = float(q.to(UREG.parse_units(pump_unit)).magnitude)
    if not value > 0:
        raise InputError.one("--resolution", None, "--resolution", f"must be above zero, got {text!r}")
    return value


def default_resolution(max_rate: float) -> float:
    """A thousandth of the pump's maximum rate, rounded down to a power of ten (in the
    unit ``max_rate`` is given in): what a three-digit pump display can set."""
    if not max_rate > 0:
        return 1.0
    return 10.0 ** math.floor(math.log10(max_rate / 1000.0))


def round_setpoint(rate: float, resolution: float, min_rate: float, max_rate: float) -> float:
    """``rate`` rounded to the nearest multiple of ``resolution``, kept within the
    pump's range (rounding down below the maximum, up above a non-zero minimum)."""
    k = round(rate / resolution)
    if k * resolution > max_rate + 1e-12 * max(1.0, abs(max_rate)):
        k = math.floor(max_rate / resolution + 1e-9)
    if k * resolution < min_rate - 1e-12 * max(1.0, abs(min_rate)):
        k = math.ceil(min_rate / resolution - 1e-9)
    value = k * resolution
    return 0.0 if k == 0 else float(f"{value:.12g}")


def step_means(schedule, feed_names, edges) -> np.ndarray:
    """Mean rate of each feed (L/h) over each step [edges[i], edges[i+1]), integrated
    exactly over the schedule's segments; shape (len(edges) - 1, feeds)."""
    segs = schedule.segments(list(feed_names), float(edges[-1]))
    out = np.zeros((len(edges) - 1, len(feed_names)))
    k = 0
    for i in range(len(edges) - 1):
        a, b = edges[i], edges[i + 1]
        while k < len(segs) and segs[k].end <= a:
            k += 1
        m = k
        total = np.zeros(len(feed_names))
        while m < len(segs) and segs[m].start < b:
            s = segs[m]
            lo, hi = max(a, s.start) - s.start, min(b, s.end) - s.start
            if hi > lo:
                total += [_law_integral(s.a[j], s.b[j], s.k[j], lo, hi) for j in range(len(feed_names))]
            m += 1
        out[i] = total / (b - a)
    return out


def _law_integral(a: float, b: float, k: float, lo: float, hi: float) -> float:
    """Integral of (a + b*tau) * exp(k*tau) d tau from ``lo`` to ``hi``."""
    if abs(k) * max(abs(hi), abs(lo)) < 1e-8:
        return a * (hi - lo) + b * (hi * hi - lo * lo) / 2.0

    def prim(tau):
        e = math.exp(k * tau)
        return a * e / k + b * e * (k * tau - 1.0) / (k * k)

    return prim(hi) - prim(lo)


def volume_unit(flow_unit: str) -> str:
    """The volume part of a flow unit as written: 'mL/min' -> 'mL', 'L/h' -> 'L'."""
    from .units import UREG

    head = flow_unit.split("/")[0].strip()
    try:
        if head and UREG.Quantity(1, head).dimensionality == UREG.Quantity(1, "L").dimensionality:
            return head
    except Exception:  # noqa: BLE001 - pint raises several types; fall back to litres
        pass
    return "L"


def _elapsed_text(hours: float) -> str:
    s = int(round(hours * 3600.0))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


def setpoint_table(problem, units, res, edges, set_rates, dt, step_unit, t0):
    """(header, rows) of the setpoint table (see :class:`RecipeResult`)."""
    from .units import factor_to

    names = problem.feed_names
    vol = {n: volume_unit(units[n]) for n in names}
    f_step = factor_to(step_unit)
    header = ["step", "elapsed [h:mm:ss]", f"elapsed [{step_unit}]"]
    if t0 is not None:
        header.append("clock time")
    header += [f"{n} [{units[n]}]" for n in names] + [f"{n} delivered [{vol[n]}]" for n in names] + ["note"]
    decimals = {n: _decimals(res[n]) for n in names}
    to_l_per_h = np.array([factor_to(units[n]) for n in names])
    per_step = set_rates / to_l_per_h[None, :] * np.diff(edges)[:, None]  # L per step
    delivered = np.vstack([np.zeros(len(names)), np.cumsum(per_step, axis=0)])
    rows = []
    for i in range(len(edges)):
        last = i == len(edges) - 1
        if 0 < i and not last and np.array_equal(set_rates[i], set_rates[i - 1]):
            continue
        t = float(edges[i])
        rates = np.zeros(len(names)) if last else set_rates[i]
        row = [i, _elapsed_text(t), float(f"{t * f_step:.10g}")]
        if t0 is not None:
            row.append((t0 + _dt.timedelta(hours=t)).isoformat(sep=" ", timespec="seconds"))
        row += [round(float(r), decimals[n]) for r, n in zip(rates, names)]
        row += [float(f"{delivered[i, j] * factor_to(vol[n]):.6g}") for j, n in enumerate(names)]
        row.append("start" if i == 0 else "end of run: pumps off" if last else "")
        rows.append(row)
    return header, rows


def _decimals(resolution: float) -> int:
    for d in range(0, 13):
        scaled = resolution * 10 ** d
        if abs(scaled - round(scaled)) < 1e-9 * max(1.0, scaled):
            return d
    return 12


def _message(new, ref, diff, rel) -> str:
    if new.outcome is None:
        return f"the rounded recipe could not be simulated: {new.message}"
    if new.status == st.WITHIN_LIMITS:
        text = f"the rounded recipe stays within all {len(new.limits)} limits"
    else:
        names = ", ".join(f"{r.name} (from {r.first_violation:.4g} h)" for r in new.violations)
        text = f"the rounded recipe breaks {names}"
        if ref.status == st.LIMIT_BROKEN:
            text += "; the run's own schedule already broke " + ", ".join(r.name for r in ref.violations)
    if diff is not None:
        o = new.outcome.objective
        text += (f"; objective {o.value:.6g} {o.unit} against {ref.outcome.objective.value:.6g} {o.unit} from "
                 f"the run's own schedule ({rel:+.3%})").replace("  ", " ")
    return text


# ------------------------------------------------------------------ the run folder


def recipe_summary(result: RecipeResult) -> dict:
    """The machine-readable record of a recipe (summary.json)."""
    from .report.files import limit_dict, outcome_dict
    from .report.text import CAUTION

    return {
        "job": "recipe", "status": result.status, "exit_code": result.exit_code, "message": result.message,
        "problem": result.problem.name, "end_time_h": result.end_time, "step_h": result.step,
        "start": None if result.start is None else result.start.isoformat(sep=" "),
        "units": result.units, "resolution": result.resolution, "largest_rounding": result.largest_rounding,
        "objective": {"recipe": None if result.check.outcome is None or result.check.outcome.objective is None
                      else result.check.outcome.objective.value,
                      "run_schedule": None if result.reference.outcome is None
                      or result.reference.outcome.objective is None else result.reference.outcome.objective.value,
                      "difference": result.objective_difference, "relative_difference": result.objective_relative},
        "setpoint_rows": len(result.rows),
        "limits": [limit_dict(r) for r in result.check.limits],
        **outcome_dict(result.check.outcome),
        "record": result.record, "caution": CAUTION,
    }


def recipe_text(result: RecipeResult) -> str:
    """The text report of a recipe."""
    from .report.text import CAUTION, fmt, limits_table

    res = ", ".join(f"{n} {fmt(v)} {result.units[n]}" for n, v in result.resolution.items())
    rnd = ", ".join(f"{n} {fmt(v)} {result.units[n]}" for n, v in result.largest_rounding.items())
    lines = [f"optfeed recipe: {result.problem.name}",
             f"  from      {result.run_folder}",
             f"  step      {result.record.get('step', '')}; setpoints rounded to {res}",
             f"  rows      {len(result.rows)} (a row where a setpoint changes)", "",
             f"STATUS: {result.status.upper()} - {result.message}", "",
             f"Largest change from rounding and stepping: {rnd}", ""]
    if result.check.outcome is not None:
        lines += ["Limits of the rounded recipe:"] + limits_table(result.check.limits) + [""]
    lines.append(CAUTION)
    return "\n".join(lines) + "\n"


def recipe_schedule_text(result: RecipeResult) -> str:
    """The rounded recipe in the CSV format ``optfeed check --schedule`` reads: a
    row per step where a setpoint changes, rates in the pump units as set."""
    names = result.problem.feed_names
    if result.problem.phases:  # with the phase column, in hours, split where each phase ends
        from .schedule import schedule_csv_text

        traj = result.check.trajectory
        return schedule_csv_text(
            result.schedule, {n: result.units[n] for n in names},
            f"Rounded pump recipe from {result.run_folder} for {result.problem.name}.\n"
            f"Run length: {result.end_time!r} h. Check it with: optfeed check PROBLEM --schedule schedule.csv",
            [ph.name for ph in result.problem.phases], None if traj is None else traj.switches)
    first = 3 + (result.start is not None)
    lines = [f"# Rounded pump recipe from {result.run_folder} for {result.problem.name}.",
             f"# Run length: {result.end_time!r} h. Check it with: optfeed check PROBLEM --schedule schedule.csv",
             "# interpolation: constant",
             ",".join([result.header[2].replace("elapsed", "time")] + [f"{n} [{result.units[n]}]" for n in names])]
    for row in result.rows[:-1]:  # the last row is the end of the run
        lines.append(",".join([repr(row[2])] + [repr(float(v)) for v in row[first:first + len(names)]]))
    return "\n".join(lines) + "\n"


def write_recipe_run(result: RecipeResult, target, figures: bool = True, png: bool = False) -> Path:
    """Write ``result`` to the run folder ``target`` (must not exist), all at once.

    Files: recipe.csv (the setpoint table), schedule.csv (the rounded recipe in the
    format ``optfeed check --schedule`` reads), summary.json, report.txt,
    limits.csv, report.html and the figures of the rounded recipe's simulation.
    """
    from .model import build_model
    from .report.figures import run_drawings
    from .report.files import RunFolder, limits_rows, write_csv, write_json
    from .report.html import recipe_page, write_report

    with RunFolder(target) as tmp:
        with (tmp / "recipe.csv").open("w", newline="") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(result.header)
            w.writerows(result.rows)
        (tmp / "schedule.csv").write_text(recipe_schedule_text(result))
        write_json(tmp / "summary.json", recipe_summary(result))
        (tmp / "report.txt").write_text(recipe_text(result))
        write_csv(tmp / "limits.csv", *limits_rows(result.check.limits))
        draw = None
        if figures and result.check.trajectory is not None:
            model = build_model(result.problem)
            draw = lambda: run_drawings(model, result.check.trajectory,  # noqa: E731
                                        title=f"{result.problem.name}: rounded recipe - {result.status}")
        write_report(tmp, lambda d, s, n: recipe_page(result, d, s, n), draw,
                     "No figures: there is no simulated run." if figures else "Figures were not drawn (--no-figures).",
                     png=png)
    return Path(target)
