"""The run folder: every file of a result, written all at once or not at all.

Files go to a temporary folder beside the target, which is renamed into place when
all are written; a crash leaves no half-written run folder.
"""

from __future__ import annotations

import csv
import datetime as _dt
import json
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from ..tables import points_columns, trajectory_columns
from .text import CAUTION, check_text, tidy, unit_words


def default_run_dir(results: Path, problem_name: str, job: str) -> Path:
    """results/<problem>-<job>-<UTC time>, with a suffix if that exists."""
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%d-%H%M%S")
    base = Path(results) / f"{problem_name}-{job}-{stamp}"
    path, k = base, 1
    while path.exists():
        k += 1
        path = base.with_name(f"{base.name}-{k}")
    return path


class RunFolder:
    """Context manager: a temp folder that becomes ``target`` on success."""

    def __init__(self, target):
        self.target = Path(target)

    def __enter__(self) -> Path:
        if self.target.exists():
            raise FileExistsError(f"{self.target} already exists")
        self.target.parent.mkdir(parents=True, exist_ok=True)
        self.tmp = Path(tempfile.mkdtemp(prefix=f".{self.target.name}.", dir=self.target.parent))
        os.chmod(self.tmp, 0o755)  # mkdtemp makes it private; a run folder is for sharing
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            shutil.rmtree(self.tmp, ignore_errors=True)
            return False
        os.replace(self.tmp, self.target)
        return False


def write_json(path: Path, data) -> None:
    path.write_text(json.dumps(data, indent=2, default=_json_default) + "\n")


def _json_default(obj):
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(type(obj).__name__)


def trajectory_table(model, traj, unique: bool = False) -> tuple[list[str], np.ndarray]:
    """Header and rows of a simulated run in display units (see
    :func:`optfeed.tables.trajectory_columns`): by default row for row with
    ``traj.t`` (a pump change sampled twice); ``unique=True`` gives one row per
    time, as trajectory.csv holds it."""
    return _table(trajectory_columns(model, traj, unique=unique))


def _table(cols: dict) -> tuple[list[str], np.ndarray]:
    return list(cols), np.column_stack(list(cols.values()))


def write_csv(path: Path, header, rows) -> None:
    """``header`` and ``rows``, numbers to 10 significant digits. A float array (a
    trajectory's thousands of rows) is written line by line from one format, which
    gives the same text as the general path at a fraction of its cost."""
    with path.open("w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        if isinstance(rows, np.ndarray) and rows.ndim == 2 and rows.dtype.kind == "f":
            line = ",".join(["%.10g"] * rows.shape[1]) + "\n"
            fh.writelines(line % tuple(r) for r in rows.tolist())
            return
        for row in rows:
            w.writerow([f"{v:.10g}" if isinstance(v, (float, np.floating)) else v for v in row])


def limits_rows(reports):
    header = ["limit", "kind", "unit", "min", "max", "smallest_slack", "at_h", "side",
              "first_violation_h", "worst_violation", "peak_use_pct", "at_end", "key"]
    rows = [[r.name, r.kind, unit_words(r.unit), _blank(r.lower), _blank(r.upper), tidy(r.min_slack, r),
             r.time_min_slack, r.side, _blank(r.first_violation), tidy(r.worst_violation, r), _blank(r.peak_use),
             r.at_end, r.key] for r in reports]
    return header, rows


def _blank(v):
    return "" if v is None else v


def limit_dict(r) -> dict:
    return {
        "name": r.name, "kind": r.kind, "unit": unit_words(r.unit), "min": r.lower, "max": r.upper,
        "smallest_slack": tidy(r.min_slack, r), "at_h": r.time_min_slack, "side": r.side,
        "first_violation_h": r.first_violation, "worst_violation": tidy(r.worst_violation, r),
        "peak_use_pct": r.peak_use, "at_end": r.at_end, "key": r.key,
    }


def outcome_dict(outcome) -> dict:
    if outcome is None:
        return {}
    d = {"finals": [{"name": f.label, "value": f.value, "unit": f.unit} for f in outcome.finals]}
    if outcome.objective is not None:
        d["objective"] = {"label": outcome.objective.label, "value": outcome.objective.value,
                          "unit": outcome.objective.unit}
    return d


def uncertainty_summary(mc, problem) -> dict:
    """The Monte Carlo part of summary.json (a :class:`~optfeed.montecarlo.MonteCarloResult`)."""
    from ..units import factor_to

    def risk(r):
        return {"name": r.name, "kind": r.kind, "unit": unit_words(r.unit) if r.kind != "any" else "",
                "broken": r.broken, "judged": r.judged, "probability": r.probability,
                "interval_95": None if r.low is None else [r.low, r.high], "nominal_broken": r.nominal_broken,
                "smallest_margin_p5": r.margin_p5, "smallest_margin_p50": r.margin_p50}

    values = []
    for v, text in zip(problem.uncertainty.values, mc.distributions):
        f = factor_to(v.unit) if v.unit else 1.0
        values.append({"name": v.name, "distribution": v.distribution, "described": text,
                       "nominal": v.nominal * f, "sd": v.sd * f,
                       "min": None if v.lower is None else v.lower * f,
                       "max": None if v.upper is None else v.upper * f,
                       "unit": v.unit or "internal units", "key": v.key})
    u = problem.uncertainty
    return {
        "note": "Monte Carlo over the uncertain values; the status above is the nominal run's",
        "samples": mc.samples, "seed": mc.seed, "method": "independent random draws",
        "judged": mc.judged, "simulation_failed": mc.failed, "simulation_failed_interval_95": list(mc.failed_interval),
        "not_run_time_limit": mc.not_run,
        "limits": [risk(r) for r in mc.limits], "any_limit": risk(mc.any_limit),
        "objective": None if mc.objective is None else {**mc.objective, "label": mc.objective_label,
                                                        "unit": mc.objective_unit},
        "values": values, "covariance_file": u.covariance_file or None,
        "seconds": mc.seconds, "workers": mc.workers, "samples_per_second": mc.samples_per_second,
        "integration_method": mc.integration_method,
        "per_sample": "montecarlo.csv",
    }


def montecarlo_rows(mc):
    """Header and rows of montecarlo.csv: each sample's values, status, objective and
    each limit's smallest margin (units in the header)."""
    header = ["sample"] + [f"{n} [{u or 'internal units'}]" for n, u in zip(mc.names, mc.units)] + ["status"]
    if mc.objective_label:
        header.append(f"objective [{mc.objective_unit or 'internal units'}]")
    header += [f"smallest margin: {r.name} [{unit_words(r.unit)}]" for r in mc.limits]
    header += ["limits broken", "message"]
    rows = []
    for r in mc.runs:
        row = [r.index + 1, *r.values, r.status]
        if mc.objective_label:
            row.append("" if r.objective is None else r.objective)
        row += list(r.margins) if r.margins is not None else [""] * len(mc.limits)
        row += ["; ".join(r.broken), r.message]
        rows.append(row)
    return header, rows


def check_summary(result) -> dict:
    extra = {} if result.uncertainty is None else {"uncertainty": uncertainty_summary(result.uncertainty,
                                                                                      result.problem)}
    return {
        "job": "check",
        "status": result.status,
        "exit_code": result.exit_code,
        "message": result.message,
        "problem": result.problem.name,
        "end_time_h": result.end_time,
        "limits": [limit_dict(r) for r in result.limits],
        **phases_dict(result),
        **outcome_dict(result.outcome),
        **extra,
        "warnings": [str(w) for w in result.problem.warnings],
        "record": result.record,
        "caution": CAUTION,
    }


def phases_dict(result) -> dict:
    """``phases`` (name, start/end in h, how it ended) and ``additions`` (time h, kind,
    volume mL, amounts) of a run, for summary.json; {} for a problem with neither."""
    out = {}
    if result.problem.phases:
        out["phases"] = [{"name": r.name, "start_h": r.start, "end_h": r.end, "ended_by": r.how}
                         for r in result.phases]
    if result.problem.additions:
        out["additions"] = [{"time_h": a.time, "kind": a.kind, "volume_mL": a.volume, "amounts": a.amounts,
                             "key": a.key} for a in result.additions]
    return out


def write_check_run(result, target, figures: bool = True, png: bool = False) -> Path:
    """Write a check result to the run folder ``target`` (must not exist).

    Files: summary.json, report.txt, limits.csv, schedule.csv (the schedule
    checked), report.html, trajectory.csv and the
    figures figure-limits.svg, figure-culture.svg, figure-feeds.svg (if the
    simulation reached the end and ``figures``; each also as PNG if ``png``); with a
    Monte Carlo result also montecarlo.csv (one row per sample) and figure-fan.svg.
    """
    from ..model import build_model
    from ..schedule import schedule_csv_text
    from .figures import fan_drawing, run_drawings
    from .html import check_page, write_report

    with RunFolder(target) as tmp:
        write_json(tmp / "summary.json", check_summary(result))
        (tmp / "report.txt").write_text(check_text(result))
        write_csv(tmp / "limits.csv", *limits_rows(result.limits))
        # the schedule as checked, so that the folder is complete (optfeed recipe reads it)
        (tmp / "schedule.csv").write_text(schedule_csv_text(
            result.schedule, {f.name: f.unit for f in result.problem.feeds},
            f"The schedule checked by optfeed check ({result.status}) for {result.problem.name}, "
            f"from {result.schedule.source or 'code'}.\nRun length: {result.end_time!r} h.",
            [ph.name for ph in result.problem.phases],
            None if result.trajectory is None else result.trajectory.switches))
        if result.trajectory is not None:
            model = build_model(result.problem)
            header, rows = trajectory_table(model, result.trajectory, unique=True)
            write_csv(tmp / "trajectory.csv", header, rows)
        mc = result.uncertainty
        if mc is not None:
            write_csv(tmp / "montecarlo.csv", *montecarlo_rows(mc))
        # the shareable report and its figures (optfeed/report/html.py, figures.py)
        draw = None
        title = f"{result.problem.name}: check - {result.status}"
        if figures and result.trajectory is not None:
            draw = lambda: run_drawings(model, result.trajectory, title=title) + (  # noqa: E731
                [fan_drawing(mc.bands, f"{result.problem.name}: check over {mc.samples} samples")]
                if mc is not None and mc.bands else [])
        elif figures and mc is not None and mc.bands:
            draw = lambda: [fan_drawing(mc.bands, f"{result.problem.name}: check over {mc.samples} samples")]  # noqa: E731
        write_report(tmp, lambda d, s, note: check_page(result, d, s, note), draw,
                     "No figures: there is no simulated run." if figures else "Figures were not drawn (--no-figures).",
                     png=png)
    return Path(target)


def planned_yaml_text(result, chosen) -> str:
    """The problem file with the amounts optimize chose for its additions written in,
    read back and checked: ``optfeed check planned.yaml --schedule schedule.csv``
    judges the answer as it was verified."""
    import yaml

    from ..phases import planned_data
    from ..problem.load import problem_from_data

    words = ", ".join(f"{c['species']} {c['amount']:.6g} at {c['time_h']:g} h ({c['addition']})" for c in chosen)
    head = (f"# {result.problem.name} as planned by optfeed optimize ({result.status}): the amounts it chose\n"
            f"# for the additions are written in ({words}; internal units: g or mmol).\n"
            "# Check the answer with: optfeed check planned.yaml --schedule schedule.csv\n")
    text = head + yaml.safe_dump(planned_data(result.problem, chosen), sort_keys=False, allow_unicode=False,
                                 width=100)
    back = problem_from_data(yaml.safe_load(text), "planned.yaml")
    if any(not a.decided for a in back.additions):  # pragma: no cover - planned_data writes every amount
        raise AssertionError("planned.yaml still leaves an amount to choose")
    return text


def optimize_summary(result) -> dict:
    """The machine-readable record of an optimize run (summary.json)."""
    ver = result.verification
    limits = []
    for v in result.limits:
        d = limit_dict(v.report)
        d.update({"active": v.active, "marginal_max": v.marginal_max, "marginal_min": v.marginal_min,
                  "marginal_unit": f"{unit_words(result.objective_unit)} per {unit_words(v.report.unit)}"})
        limits.append(d)
    # the outcome's own 'objective' (the re-simulated value) must not replace this one
    finals = outcome_dict(result.outcome).get("finals", [])
    return {
        "job": "optimize",
        "status": result.status,
        "exit_code": result.exit_code,
        "message": result.message,
        "problem": result.problem.name,
        "objective": {
            "label": result.objective_label, "unit": result.objective_unit,
            "value": result.objective_sim,  # as check reports it: the re-simulated schedule's
            "nlp": result.objective_nlp, "resimulated": result.objective_sim,
            "relative_difference": None if ver is None else ver.objective_rel_diff,
        },
        "end_time_h": result.end_time,
        **phases_dict(result),
        "verification": None if ver is None else {
            "verified": ver.verified, "message": ver.message,
            "worst_limit_excess_relative": ver.worst_violation, "worst_limit": ver.worst_limit,
        },
        "limits": limits,
        "solver": {
            "starts": [{"from": s.label, "status": s.status, "ipopt_status": s.ipopt_status,
                        "objective": s.objective, "iterations": s.iterations, "seconds": s.seconds}
                       for s in result.starts],
            "spread_relative": result.spread,
            "seconds_total": result.seconds,
        },
        "finals": finals,
        **_robust_summary(result),
        "warnings": [str(w) for w in result.problem.warnings],
        "record": result.record,
        "caution": CAUTION,
    }


def _robust_summary(result) -> dict:
    """The Monte Carlo judgement of the answer and, for a scenario solve, the nominal
    optimum beside it (summary.json)."""
    out = {}
    if result.uncertainty is not None:
        out["uncertainty"] = uncertainty_summary(result.uncertainty, result.problem)
        out["uncertainty"]["note"] = ("Monte Carlo over the uncertain values; the status above is the "
                                      "optimizer's verdict over its scenarios")
    n = result.nominal
    if n is not None:
        out["nominal_optimum"] = {
            "note": "the optimum of the nominal problem alone, for comparison; not the answer",
            "status": n.status, "message": n.message, "objective": n.objective_sim, "unit": result.objective_unit,
            "end_time_h": n.end_time, "schedule": "nominal-schedule.csv" if n.schedule is not None else None,
            "uncertainty": None if n.uncertainty is None else {
                **uncertainty_summary(n.uncertainty, result.problem), "per_sample": "montecarlo-nominal.csv"},
        }
    return out


def write_optimize_run(result, target, figures: bool = True, png: bool = False) -> Path:
    """Write an optimize result to the run folder ``target`` (must not exist).

    Files: summary.json, report.txt, limits.csv, report.html; when there is an
    answer also schedule.csv (the pump schedule, readable by ``optfeed check
    --schedule``), trajectory.csv (re-simulated), points.csv (the NLP's collocation
    points) and the figures figure-limits.svg, figure-culture.svg, figure-feeds.svg
    (each also as PNG if ``png``). With an uncertainty section also montecarlo.csv
    and figure-fan.svg (the answer
    over the Monte Carlo sample) and, for a scenario solve, nominal-schedule.csv
    and montecarlo-nominal.csv (the nominal optimum, for comparison; not the
    answer) and figure-robust-feeds.svg (the two pump profiles). When the solve failed, the closest schedule the solver found is written as
    closest-schedule.csv (with its trajectory and figures), never as schedule.csv.
    """
    from ..model import build_model
    from ..schedule import schedule_csv_text
    from .figures import fan_drawing, feeds_against, run_drawings
    from .html import optimize_page, write_report
    from .text import optimize_text

    with RunFolder(target) as tmp:
        write_json(tmp / "summary.json", optimize_summary(result))
        (tmp / "report.txt").write_text(optimize_text(result))
        header, rows = limits_rows([v.report for v in result.limits])
        header += ["active", "marginal_max", "marginal_min"]
        rows = [r + [v.active, v.marginal_max, v.marginal_min] for r, v in zip(rows, result.limits)]
        write_csv(tmp / "limits.csv", header, rows)
        if result.trajectory is not None:
            model = build_model(result.problem)
            units = {f.name: f.unit for f in result.problem.feeds}
            phase_names = [ph.name for ph in result.problem.phases]
            end = f" --end-time {result.end_time!r}" if result.problem.horizon.free else ""
            answer = result.objective_nlp is not None  # a converged solve, verified or not
            name = "schedule.csv" if answer else "closest-schedule.csv"
            note = (f"Pump schedule from optfeed optimize ({result.status}) for {result.problem.name}.\n"
                    + ("" if answer else "NOT AN ANSWER: the closest schedule the solver found, kept to show "
                       "why the problem failed.\n") +
                    f"Run length: {result.end_time!r} h. Check it with: "
                    f"optfeed check PROBLEM --schedule {name}{end}")
            (tmp / name).write_text(schedule_csv_text(result.schedule, units, note, phase_names,
                                                      result.trajectory.switches))
            write_csv(tmp / "trajectory.csv", *trajectory_table(model, result.trajectory, unique=True))
            pts = result.points
            write_csv(tmp / "points.csv", *_table(points_columns(model, pts)))
        chosen = result.record.get("chosen_amounts")
        if chosen and result.trajectory is not None:
            (tmp / "planned.yaml").write_text(planned_yaml_text(result, chosen))
        nominal = result.nominal
        phase_names = [ph.name for ph in result.problem.phases]
        if nominal is not None and nominal.schedule is not None:
            end = f" --end-time {nominal.end_time!r}" if result.problem.horizon.free else ""
            (tmp / "nominal-schedule.csv").write_text(schedule_csv_text(nominal.schedule, {
                f.name: f.unit for f in result.problem.feeds},
                f"NOT THE ANSWER: the optimum of the nominal problem alone ({nominal.status}) for "
                f"{result.problem.name}, kept for comparison with schedule.csv.\nRun length: {nominal.end_time!r} h. "
                f"Check it with: optfeed check PROBLEM --schedule nominal-schedule.csv{end}", phase_names,
                None if nominal.trajectory is None else nominal.trajectory.switches))
        mc = result.uncertainty
        if mc is not None:
            write_csv(tmp / "montecarlo.csv", *montecarlo_rows(mc))
        if nominal is not None and nominal.uncertainty is not None:
            write_csv(tmp / "montecarlo-nominal.csv", *montecarlo_rows(nominal.uncertainty))
        # the shareable report and its figures (optfeed/report/html.py, figures.py)
        draw = None
        if figures and result.trajectory is not None:
            fan = ([fan_drawing(mc.bands, f"{result.problem.name}: the answer over {mc.samples} samples",
                                reference=None if nominal is None or nominal.uncertainty is None
                                else nominal.uncertainty.bands, label="samples (the answer)",
                                reference_label="samples (the nominal optimum)")]
                   if mc is not None and mc.bands else [])
            if nominal is not None and nominal.schedule is not None:
                fan.append(feeds_against(result.problem.feeds, result.schedule, result.end_time, nominal.schedule,
                                         nominal.end_time, f"{result.problem.name}: the answer against the "
                                         "nominal optimum"))
            draw = lambda: run_drawings(model, result.trajectory, points=result.points,  # noqa: E731
                                        title=f"{result.problem.name}: optimize - {result.status}") + fan
        write_report(tmp, lambda d, s, note: optimize_page(result, d, s, note), draw,
                     "No figures: there is no simulated run." if figures else "Figures were not drawn (--no-figures).",
                     png=png)
    return Path(target)


def _clean(obj):
    """Plain JSON values: numpy numbers as Python numbers, inf and NaN as null."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def fit_summary(result) -> dict:
    """The machine-readable record of a fit (summary.json): values in each
    parameter's unit (``unit``); a standard error or interval the data cannot fix
    is null."""
    from ..units import factor_to

    r = result
    s = r.statistics
    names = [e.name for e in r.estimates]
    out = {
        "job": "fit",
        "status": r.status,
        "exit_code": r.exit_code,
        "message": r.message,
        "problem": r.problem.name,
        "runs_file": r.runs.source,
        "runs": [{"name": run.name, "data_file": run.data_file, "end_time_h": run.end_time,
                  "sampling_times": len(run.times), "measured": {q: int(np.isfinite(v).sum()) for q, v in
                                                                 run.values.items()},
                  "sample_volume_L": run.sample_volume} for run in r.runs.runs],
        "measured_values": r.runs.n_samples,
        "estimates": [{"name": e.name, "unit": e.unit or "internal units", "value": e.value, "se": e.se,
                       "relative_se": e.se / abs(e.value) if e.value else None,
                       "ci_low": e.ci_low, "ci_high": e.ci_high, "profile_low": e.profile_low,
                       "profile_high": e.profile_high, "start": e.start, "min": e.lower, "max": e.upper}
                      for e in r.estimates],
    }
    if s is not None:
        f = np.array([factor_to(e.unit) if e.unit else 1.0 for e in r.estimates])
        out["intervals"] = (f"95 % confidence: estimate +- t(0.975, {s.dof}) x SE, t = {s.t_quantile:.6g}"
                            + ("; profile likelihood: chi-square rise of 3.841 (95 % of chi-square with 1 degree "
                               "of freedom)" + ("" if r.runs.trusted else " times s^2") if any(
                                   e.profile_low is not None or e.profile_high is not None for e in r.estimates)
                               else ""))
        out["correlation"] = {"names": names, "matrix": s.correlation}
        out["covariance"] = {"names": names, "units": [e.unit or "internal units" for e in r.estimates],
                             "matrix": np.asarray(s.covariance) * np.outer(f, f),
                             "note": "row i, column j in unit_i * unit_j (as covariance.csv)"}
        out["identifiability"] = {
            "condition_number": s.condition,
            "weakest_direction": {n: float(c) for n, c in zip(names, s.weakest)},
            "weakest_direction_note": "eigenvector of the smallest eigenvalue of the information matrix in "
                                      "log-parameters: the combination the data fix least",
        }
        out["goodness_of_fit"] = {"chi_square": s.chi2, "degrees_of_freedom": s.dof, "p_value": s.p_value,
                                  "error_model": "trusted" if r.runs.trusted else "scaled",
                                  "residual_variance_factor": s.scale, "verdict": r.verdict}
    out["flags"] = list(r.flags)
    out["residuals"] = [{k: d[k] for k in ("run", "quantity", "unit", "count", "mean", "rms")} for d in r.residuals]
    out["solver"] = {"starts": r.starts, "spread_relative": r.spread, "nlp_chi_square": r.nlp_chi2,
                     "seconds_total": r.seconds}
    out["warnings"] = [str(w) for w in r.problem.warnings]
    out["record"] = r.record
    out["caution"] = CAUTION
    return _clean(out)


def residual_rows(result):
    """Header and rows of residuals.csv: every measured value with the re-simulated
    model's value, in the quantity's unit."""
    from ..units import factor_to

    header = ["run", "quantity", "time [h]", "unit", "measured", "fitted", "sigma",
              "weighted residual [dimensionless]"]
    rows = []
    for d in result.residuals:
        f = factor_to(d["unit"]) if d["unit"] else 1.0
        for t, y, m, s in zip(d["times"], d["measured"], d["fitted"], d["sigma"]):
            rows.append([d["run"], d["quantity"], float(t), d["unit"], y * f, m * f, s * f, (m - y) / s])
    return header, rows


def write_fit_run(result, target, figures: bool = True, png: bool = False) -> Path:
    """Write a fit result to the run folder ``target`` (must not exist).

    Files: summary.json, report.txt, report.html; when there are estimates also
    fitted.yaml (the problem file with the estimates written in), covariance.csv,
    residuals.csv, trajectory-<k>.csv (each run re-simulated at the estimates) and
    the figures figure-fit.svg (measured points with error bars against the fitted
    runs), figure-residuals.svg and figure-correlation.svg (each also as PNG if ``png``).
    """
    from ..fit.fitted import covariance_csv_text, fitted_yaml_text
    from ..fit.runs import fit_model
    from .figures import fit_drawings
    from .html import fit_page, write_report
    from .text import fit_text

    answer = bool(result.estimates) and result.statistics is not None
    with RunFolder(target) as tmp:
        write_json(tmp / "summary.json", fit_summary(result))
        (tmp / "report.txt").write_text(fit_text(result))
        if answer:
            text, _how = fitted_yaml_text(result)
            (tmp / "fitted.yaml").write_text(text)
            (tmp / "covariance.csv").write_text(covariance_csv_text(result))
            header, rows = residual_rows(result)
            with (tmp / "residuals.csv").open("w", newline="") as fh:
                fh.write("# measured, fitted and sigma are in the row's unit; weighted residual = "
                         "(fitted - measured) / sigma\n")
                w = csv.writer(fh, lineterminator="\n")
                w.writerow(header)
                for row in rows:
                    w.writerow([f"{v:.10g}" if isinstance(v, float) else v for v in row])
            model = fit_model(result.problem)  # the courses' layout
            for k, (run, traj) in enumerate(zip(result.runs.runs, result.trajectories), start=1):
                assert tuple(traj.state_names) == tuple(model.state_names), "a course in another layout"
                header, rows = trajectory_table(model, traj, unique=True)
                write_csv(tmp / f"trajectory-{k}.csv", header, rows)
        draw = None
        if figures and answer:
            draw = lambda: fit_drawings(result)  # noqa: E731
        write_report(tmp, lambda d, s, note: fit_page(result, d, s, note), draw,
                     "No figures: the fit has no estimates." if figures else "Figures were not drawn (--no-figures).",
                     png=png)
    return Path(target)
