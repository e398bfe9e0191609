"""The morning outputs of a sweep: summary CSV, figures, and a text table."""

from __future__ import annotations

import csv
import math
import os
import re
from pathlib import Path

import numpy as np

from ..report.text import CAUTION, fmt

_NUM = re.compile(r"^\s*([-+]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][-+]?[0-9]+)?)\s*(.*)$")
GOOD = ("optimal, verified", "within limits")
PENDING = ("queued", "running", "not run")  # no final status yet: the same command runs them


def number(value):
    """(float, unit text) of a swept value such as 150, '150 mmol/L/h'; (nan, '') otherwise."""
    if isinstance(value, bool):
        return math.nan, ""
    if isinstance(value, (int, float)):
        return float(value), ""
    m = _NUM.match(str(value))
    return (float(m.group(1)), m.group(2)) if m else (math.nan, "")


def ranked(rows, sense: str = "maximize") -> list[dict]:
    """Cases with a usable objective, best first (verified/within-limits answers only)."""
    good = [r for r in rows if r["status"] in GOOD and r["objective"] is not None]
    return sorted(good, key=lambda r: -r["objective"] if sense == "maximize" else r["objective"])


def sense_of(rows, sweep) -> str:
    from ..problem.yamlio import read_yaml

    try:
        data, _ = read_yaml(sweep.cases[0].source)
        return "minimize" if "minimize" in (data.get("objective") or {}) else "maximize"
    except Exception:  # noqa: BLE001 - only for ordering
        return "maximize"


def limit_figures(reports) -> dict:
    """What a case records of its limits for the summary: name, unit, smallest slack
    (tiny values shown as 0, as in the reports); ``reports`` are LimitReports."""
    from ..report.text import tidy, unit_words

    # the key has a space, so that no species (a figure under its own name) can take it
    return {LIMITS_KEY: [{"name": r.name, "unit": unit_words(r.unit), "smallest_slack": tidy(r.min_slack, r)}
                         for r in reports]}


LIMITS_KEY = "limit slacks"
PHASE_END = "end of phase "  # a case's figure: when that phase ended, h


def summary_table(sweep, rows) -> tuple[list[str], list[list]]:
    """Header and rows of summary.csv: units in the header, plain numbers in the cells
    (a spreadsheet or ``pandas.read_csv`` reads numbers), one column per limit with
    its smallest slack."""
    paths = list(sweep.varied)
    value_units = {p: _column_unit([r["values"].get(p) for r in rows]) for p in paths}
    objective_units = {r.get("objective_unit") or "" for r in rows if r["objective"] is not None}
    one_objective_unit = len(objective_units) <= 1
    limit_units = {}
    for r in rows:
        for lim in _limits_of(r):
            limit_units.setdefault(lim["name"], lim.get("unit") or "")
    header = ["key", "label", "problem"] + [_head(p, value_units[p]) for p in paths] + ["status"]
    header += [_head("objective", next(iter(objective_units), "")) if one_objective_unit else "objective"]
    if not one_objective_unit:
        header.append("objective unit")
    phase_ends = list(dict.fromkeys(k for r in rows for k in (r.get("figures") or {}) if k.startswith(PHASE_END)))
    header += ["end time [h]"] + [_head(k, "h") for k in phase_ends] + ["run time [s]"]
    header += [_head(f"smallest slack: {name}", unit) for name, unit in limit_units.items()]
    header += ["message", "run_dir"]
    table = []
    for r in rows:
        row = [r["key"], r["label"], r["values"].get("problem", "")]
        row += [_in_unit(r["values"].get(p), value_units[p]) for p in paths]
        row += [r["status"], _num(r["objective"])]
        if not one_objective_unit:
            row.append(r.get("objective_unit") or "")
        row += [_num(r["end_time_h"])] + [_num((r.get("figures") or {}).get(k)) for k in phase_ends]
        row += [_num(r["seconds"])]
        slacks = {lim["name"]: lim for lim in _limits_of(r)}
        for name, unit in limit_units.items():
            lim = slacks.get(name)
            if lim is None or lim.get("smallest_slack") is None:
                row.append("")
            else:
                row.append(_in_unit(f"{lim['smallest_slack']!r} {lim.get('unit') or ''}".strip(), unit))
        row += [r["message"] or "", r["run_dir"] or ""]
        table.append(row)
    return header, table


def _head(name: str, unit: str) -> str:
    return f"{name} [{unit}]" if unit else name


def _num(value) -> str:
    return "" if value is None else f"{value:.10g}"


def _column_unit(values) -> str:
    """The unit of a column of swept values: the first one written with a unit
    ('' if none is, or if a value is not a number)."""
    units = [number(v)[1] for v in values if v is not None]
    if any(math.isnan(number(v)[0]) for v in values if v is not None):
        return ""
    return next((u for u in units if u), "")


def _in_unit(value, unit: str) -> str:
    """A swept value or a slack as a plain number in ``unit`` (converted if written in
    another unit of the same dimension); the text itself if it is not a number."""
    if value is None:
        return ""
    n, written = number(value)
    if math.isnan(n):
        return str(value)
    if unit and written and written != unit:
        try:
            from ..units import UREG

            n = UREG.Quantity(n, written.replace("^", "**")).to(unit.replace("^", "**")).magnitude
        except Exception:  # noqa: BLE001 - not convertible: keep the text, units and all
            return str(value)
    return f"{n:.10g}"


def _limits_of(row) -> list:
    """A case's limits (name, unit, smallest slack): from the store, or for a case
    recorded before the store held them, from its summary.json."""
    figures = row.get("figures") or {}
    if LIMITS_KEY in figures:
        return figures[LIMITS_KEY]
    path = Path(row.get("run_dir") or "") / "summary.json"
    if row.get("run_dir") and path.exists():
        import json

        try:
            return [{"name": lim["name"], "unit": lim.get("unit") or "", "smallest_slack": lim["smallest_slack"]}
                    for lim in json.loads(path.read_text()).get("limits", [])]
        except (ValueError, KeyError, TypeError):
            return []
    return []


def write_outputs(sweep, rows, folder: Path, png: bool = False) -> None:
    folder = Path(folder)
    sense = sense_of(rows, sweep)
    paths = list(sweep.varied)
    tmp_csv = folder / ".summary.csv.tmp"
    header, table = summary_table(sweep, rows)
    with tmp_csv.open("w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows(table)
    os.replace(tmp_csv, folder / "summary.csv")
    best = ranked(rows, sense)
    tmp_txt = folder / ".summary.txt.tmp"
    tmp_txt.write_text(summary_text(sweep, rows, best))
    os.replace(tmp_txt, folder / "summary.txt")
    _report(sweep, rows, best, folder, paths, png)


def _report(sweep, rows, best, folder: Path, paths, png: bool = False) -> None:
    """figures/*.svg (and .png with ``png``) and report.html (figures are a
    convenience; the CSV is the record)."""
    from ..report.html import sweep_page, write_report

    write_report(folder, lambda d, s, note: sweep_page(sweep, rows, best, d, s, note),
                 lambda: sweep_drawings(sweep, rows, best, paths), figure_folder=folder / "figures", png=png)


def summary_text(sweep, rows, best, top: int = 10) -> str:
    unit = next((r.get("objective_unit") for r in best if r.get("objective_unit")), "")
    counts = {}
    for r in rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    lines = [f"optfeed sweep: {sweep.name} ({sweep.job}, {len(rows)} cases)",
             "  " + ", ".join(f"{n} {s}" for s, n in sorted(counts.items(), key=lambda kv: -kv[1])), ""]
    if best:
        lines.append(f"Best cases (objective, {unit}):")
        for i, r in enumerate(best[:top], 1):
            lines.append(f"  {i:>3}. {fmt(r['objective'], 6):>12}  {r['label']}")
        lines.append("")
    bad = [r for r in rows if r["status"] not in GOOD and r["status"] not in PENDING]
    if bad:
        lines.append("Cases that are not optimal and verified / within limits:")
        for r in bad:
            lines.append(f"  {r['status']:<24} {r['label']}: {(r['message'] or '')[:160]}")
        lines.append("")
    lost = [r for r in rows if r["status"] == "not run"]
    if lost:
        lines.append("Cases not run, for a reason outside them (the same command runs them again):")
        for r in lost:
            lines.append(f"  {r['label']}: {(r['message'] or '')[:160]}")
        lines.append("")
    left = [r for r in rows if r["status"] in ("queued", "running")]
    if left:
        lines.append(f"{len(left)} case(s) not run yet: run the same command again to resume.")
        lines.append("")
    lines.append(CAUTION)
    return "\n".join(lines) + "\n"


def sweep_drawings(sweep, rows, best, paths) -> list:
    """The figures of a sweep (see :mod:`optfeed.report.figures`): the objective and
    each limit's smallest margin against every swept value, a heat map for a two-way
    grid, the ranking, and the best case's feed profile."""
    from ..frames import case_limits
    from ..report import figures as F

    out = []
    unit = next((r.get("objective_unit") for r in best if r.get("objective_unit")), "")
    good = [r for r in rows if r["status"] in GOOD and r["objective"] is not None]
    answered = [r for r in rows if r["status"] not in PENDING and case_limits(r)]
    margins = {r["key"]: {d["name"]: (d.get("smallest_slack"), d.get("unit") or "") for d in case_limits(r)}
               for r in answered}
    bad = [r for r in rows if r["status"] not in GOOD and r["status"] not in PENDING]
    for p in paths:
        xunit = next((number(r["values"].get(p))[1] for r in rows if number(r["values"].get(p))[1]), "")
        xs = [number(r["values"].get(p))[0] for r in good]
        if good and not all(math.isnan(x) for x in xs):
            out.append(F.objective_against(p, xunit, xs, [r["objective"] for r in good], unit,
                                           [number(r["values"].get(p))[0] for r in bad]))
        panels = []
        names = list(dict.fromkeys(n for r in answered for n in margins[r["key"]]))
        for name in names:
            pts = [(number(r["values"].get(p))[0], *margins[r["key"]][name]) for r in answered
                   if name in margins[r["key"]] and margins[r["key"]][name][0] is not None]
            pts = [q for q in pts if not math.isnan(q[0])]
            if not pts or len({round(q[1], 12) for q in pts}) == 1 and len(pts) > 1:
                continue  # nothing to see: the same margin in every case
            panels.append((name, pts[0][2], [q[0] for q in pts], [q[1] for q in pts]))
        if panels:
            out.append(F.margins_against(p, xunit, panels))
    if len(sweep.grid_paths) == 2:
        p1, p2 = sweep.grid_paths
        v1 = sorted({number(r["values"].get(p1))[0] for r in rows})
        v2 = sorted({number(r["values"].get(p2))[0] for r in rows})
        z = np.full((len(v2), len(v1)), np.nan)
        for r in good:
            z[v2.index(number(r["values"].get(p2))[0]), v1.index(number(r["values"].get(p1))[0])] = r["objective"]
        out.append(F.heatmap(p1, p2, v1, v2, z, unit))
    if best:
        top = best[:20]
        out.append(F.ranking([r["label"] for r in top], [r["objective"] for r in top], unit))
        feed = _best_feed(best[0])
        if feed is not None:
            out.append(feed)
    return out


def _best_feed(row):
    from ..report.figures import feed_profile

    sched = Path(row["run_dir"] or "") / "schedule.csv"
    traj = Path(row["run_dir"] or "") / "trajectory.csv"
    src = sched if sched.exists() else traj
    if not row["run_dir"] or not src.exists():
        return None
    lines = [l for l in src.read_text().splitlines() if l and not l.startswith("#")]
    header = next(csv.reader([lines[0]]))
    numeric = [i for i, h in enumerate(header) if h.strip() != "phase"]  # a phased run's phase column is words
    header = [header[i] for i in numeric]
    data = np.array([[float(x) for k, x in enumerate(next(csv.reader([l]))) if k in numeric] for l in lines[1:]])
    feed_cols = [i for i, h in enumerate(header[1:], 1) if "growth" not in h]
    if src is traj:
        feed_cols = [i for i, h in enumerate(header) if h.endswith("/h]") and "mmol" not in h and i > 0][:4]
    return feed_profile(row["label"], data[:, 0], {header[i]: data[:, i] for i in feed_cols})
