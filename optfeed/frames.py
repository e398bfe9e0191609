"""Tables of a result, as plain rows and as pandas DataFrames.

Each table comes in two forms: ``*_table`` returns ``(header, rows)`` of plain Python
values (the HTML report and the CSV files use these), and ``*_frame`` returns the same
as a :class:`pandas.DataFrame`. Column names carry their units in brackets
(``"X [g/L]"``); values are in those units (the units the problem file was written
in), never in optfeed's internal units unless the column says so.

pandas is imported only inside the ``*_frame`` functions; install it with
``pip install 'optfeed[frames]'``.

The result objects have thin methods over these (``r.trajectory_frame()``...).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

TIME_TOL = 1e-12  # h, relative to max(1, |t|): samples closer than this share a time stamp


def _pandas():
    try:
        import pandas as pd
    except ImportError:
        raise ImportError("DataFrames need pandas: pip install 'optfeed[frames]' (or pip install pandas)") from None
    return pd


# ------------------------------------------------------------------ trajectory


def unique_times(t, rates) -> tuple[np.ndarray, np.ndarray]:
    """Rows to keep so that every time stamp appears once, and where the pumps change.

    A simulated trajectory repeats a time where one integrated piece ends and the
    next begins; at a pump change the two rows differ in the pump rates (the states
    are continuous). The last row of each run of equal times is kept: it holds the
    rates that apply from that time on, as a schedule's row does.

    Returns
    -------
    keep : ndarray of int
        Indices of the kept rows.
    changed : ndarray of bool
        Per kept row: a pump rate changes at this time stamp.
    """
    t = np.asarray(t, dtype=float)
    rates = np.asarray(rates, dtype=float).reshape(len(t), -1)
    same_as_next = np.abs(np.diff(t)) <= TIME_TOL * np.maximum(1.0, np.abs(t[1:]))
    keep = np.nonzero(np.concatenate([~same_as_next, [True]]))[0]
    first = np.concatenate([[0], keep[:-1] + 1])  # first row of each group
    scale = np.maximum(np.abs(rates).max(axis=0, initial=0.0), 1e-300)
    changed = np.any(np.abs(rates[keep] - rates[first]) > 1e-12 * scale, axis=1)
    return keep, changed


def trajectory_table(result) -> tuple[list[str], np.ndarray, np.ndarray]:
    """(header, rows, pump_change) of a result's simulated run: one row per time
    stamp, in the units of the problem file (see :func:`unique_times`)."""
    from .model import build_model
    from .report.files import trajectory_table as columns

    traj = getattr(result, "trajectory", None)
    if traj is None:
        raise ValueError(f"this result has no simulated run ({result.status}: {result.message})")
    header, rows = columns(build_model(result.problem), traj)
    keep, changed = unique_times(traj.t, traj.u)
    return header, rows[keep], changed


def trajectory_frame(result):
    """The simulated run as a DataFrame indexed by ``time [h]``: species, volume,
    pump rates, OUR and heat load where defined, named rates, and a boolean column
    ``pump change`` (True where a pump rate steps; the row holds the new rate)."""
    pd = _pandas()
    header, rows, changed = trajectory_table(result)
    df = pd.DataFrame(rows[:, 1:], columns=header[1:], index=pd.Index(rows[:, 0], name=header[0]))
    df["pump change"] = changed
    return df


# ------------------------------------------------------------------ schedule


def schedule_table(schedule, problem) -> tuple[list[str], list[list]]:
    """(header, rows) of a pump schedule: a row at every time any pump changes, the
    rate of each feed in its unit from then on, and its growth rate where a segment
    is exponential (``interpolation: linear`` joins the rows by straight lines)."""
    from .units import factor_to

    if schedule is None:
        return ["time [h]"], []
    units = {f.name: f.unit for f in problem.feeds}
    names = list(schedule.feeds)
    growth = schedule.interpolation == "constant" and any(any(g != 0 for g in r.growth)
                                                          for r in schedule.feeds.values())
    header = ["time [h]"]
    for n in names:
        header.append(f"{n} [{units.get(n, 'L/h')}]")
        if growth:
            header.append(f"{n} growth [1/h]")
    times = sorted({float(t) for r in schedule.feeds.values() for t in r.times})
    rows = []
    for t in times:
        row = [t]
        for n in names:
            r = schedule.feeds[n]
            f = factor_to(units.get(n, "L/h"))
            if schedule.interpolation == "linear":
                row.append(float(np.interp(t, r.times, r.rates)) * f)
            else:
                i = max(j for j, tj in enumerate(r.times) if tj <= t + 1e-12)
                row.append(r.rates[i] * math.exp(r.growth[i] * (t - r.times[i])) * f)
                if growth:
                    row.append(r.growth[i])
        rows.append(row)
    return header, rows


def schedule_frame(result):
    """The pump schedule as a DataFrame indexed by ``time [h]`` (see :func:`schedule_table`)."""
    pd = _pandas()
    header, rows = schedule_table(result.schedule, result.problem)
    df = pd.DataFrame([r[1:] for r in rows], columns=header[1:],
                      index=pd.Index([r[0] for r in rows], name=header[0]))
    df.attrs["interpolation"] = None if result.schedule is None else result.schedule.interpolation
    return df


# ------------------------------------------------------------------ limits and starts


LIMIT_COLUMNS = ["kind", "unit", "min [unit]", "max [unit]", "smallest margin [unit]", "at [h]", "side",
                 "first broken [h]", "worst excess [unit]", "peak use [%]", "at end", "key"]


def limits_table(result) -> tuple[list[str], list[list]]:
    """(header, rows): one row per limit, named in the first column; values in the
    limit's own unit (column ``unit``). An optimize result adds whether the optimum
    sits on the limit and its marginal values (objective unit per limit unit)."""
    values = [v for v in result.limits if hasattr(v, "report")]
    reports = [v.report for v in values] if values else list(result.limits)
    header = ["limit"] + LIMIT_COLUMNS
    rows = [[r.name, r.kind, r.unit, r.lower, r.upper, r.min_slack, r.time_min_slack, r.side, r.first_violation,
             r.worst_violation, r.peak_use, r.at_end, r.key] for r in reports]
    if values:
        unit = getattr(result, "objective_unit", "") or "objective unit"
        header += ["active", f"marginal value of max [{unit} per unit]", f"marginal value of min [{unit} per unit]"]
        rows = [row + [v.active, v.marginal_max, v.marginal_min] for row, v in zip(rows, values)]
    return header, rows


def limits_frame(result):
    """The limit table as a DataFrame indexed by the limit's name."""
    pd = _pandas()
    header, rows = limits_table(result)
    return pd.DataFrame([r[1:] for r in rows], columns=header[1:],
                        index=pd.Index([r[0] for r in rows], name=header[0]))


def starts_table(result) -> tuple[list[str], list[list]]:
    """(header, rows): every start of an optimize run, best first."""
    unit = result.objective_unit or "objective unit"
    header = ["from", "status", "IPOPT status", f"objective [{unit}]", "iterations", "time [s]"]
    rows = [[s.label, s.status, s.ipopt_status, s.objective, s.iterations, s.seconds] for s in result.starts]
    return header, rows


def starts_frame(result):
    """Every start of an optimize run, best first, as a DataFrame."""
    pd = _pandas()
    header, rows = starts_table(result)
    return pd.DataFrame(rows, columns=header)


# ------------------------------------------------------------------ sweeps


def case_limits(row) -> list[dict]:
    """The limits of one sweep case, read from its run folder's summary.json
    (name, unit, smallest_slack, ...); empty if the case wrote none."""
    run_dir = row.get("run_dir")
    if not run_dir:
        return []
    try:
        data = json.loads((Path(run_dir) / "summary.json").read_text())
    except (OSError, ValueError):
        return []
    return [d for d in data.get("limits", []) if isinstance(d, dict) and "name" in d]


def swept_columns(rows, paths) -> list[tuple[str, str, list]]:
    """Per swept path: (path, unit, values). Values are numbers where every case's
    value is a number in one unit (or bare), else the text as written."""
    from .sweep.outputs import number

    out = []
    for p in paths:
        raw = [r["values"].get(p, "") for r in rows]
        parsed = [number(v) for v in raw]
        units = {u for x, u in parsed if not math.isnan(x) and u}
        if raw and all(not math.isnan(x) for x, _ in parsed) and len(units) <= 1:
            out.append((p, next(iter(units), ""), [x for x, _ in parsed]))
        else:
            out.append((p, "", [str(v) for v in raw]))
    return out


def case_schedule(row) -> tuple[list[str], list[list]]:
    """(header, rows) of a sweep case's schedule.csv (as written by optimize); empty
    if there is none."""
    import csv

    path = Path(row.get("run_dir") or "") / "schedule.csv"
    if not row.get("run_dir") or not path.exists():
        return [], []
    lines = [line for line in path.read_text().splitlines() if line.strip() and not line.startswith("#")]
    table = list(csv.reader(lines))
    out = []
    for cells in table[1:]:
        try:
            out.append([float(c) for c in cells])
        except ValueError:
            out.append(cells)
    return table[0], out


def cases_table(rows, paths=None) -> tuple[list[str], list[list]]:
    """(header, rows) of a sweep: one row per case with its swept values (units in
    the header), status, objective, run length, time, and each limit's smallest
    margin (read from the case's summary.json), message and run folder."""
    rows = list(rows)
    if paths is None:
        paths = []
        for r in rows:
            paths += [p for p in r["values"] if p != "problem" and p not in paths]
    swept = swept_columns(rows, paths)
    unit = next((r.get("objective_unit") for r in rows if r.get("objective_unit")), "")
    limits = [case_limits(r) for r in rows]
    names, units = [], {}
    for lims in limits:
        for d in lims:
            if d["name"] not in units:
                names.append(d["name"])
                units[d["name"]] = d.get("unit") or ""
    header = ["key", "label", "problem"] + [f"{p} [{u}]" if u else p for p, u, _ in swept]
    header += ["status", f"objective [{unit}]" if unit else "objective", "end time [h]", "time [s]"]
    header += [f"margin: {n} [{units[n]}]" if units[n] else f"margin: {n}" for n in names]
    header += ["message", "run folder"]
    table = []
    for k, r in enumerate(rows):
        by_name = {d["name"]: d.get("smallest_slack") for d in limits[k]}
        table.append([r["key"], r["label"], r["values"].get("problem", "")] + [vals[k] for _, _, vals in swept]
                     + [r["status"], r.get("objective"), r.get("end_time_h"), r.get("seconds")]
                     + [by_name.get(n) for n in names] + [r.get("message") or "", r.get("run_dir") or ""])
    return header, table


def cases_frame(sweep_result):
    """A sweep's cases as a DataFrame indexed by the case key (see :func:`cases_table`)."""
    pd = _pandas()
    header, rows = cases_table(sweep_result.rows)
    df = pd.DataFrame([r[1:] for r in rows], columns=header[1:], index=pd.Index([r[0] for r in rows], name="key"))
    for col in df.columns:
        if col.startswith(("objective", "end time", "time [", "margin: ")):
            df[col] = pd.to_numeric(df[col], errors="coerce")
    return df
