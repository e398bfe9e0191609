"""The morning outputs of a sweep: summary CSV, figures, and a text table."""

from __future__ import annotations

import csv
import math
import os
import re
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from ..report.text import CAUTION, fmt  # noqa: E402

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
    header += ["end time [h]", "run time [s]"]
    header += [_head(f"smallest slack: {name}", unit) for name, unit in limit_units.items()]
    header += ["message", "run_dir"]
    table = []
    for r in rows:
        row = [r["key"], r["label"], r["values"].get("problem", "")]
        row += [_in_unit(r["values"].get(p), value_units[p]) for p in paths]
        row += [r["status"], _num(r["objective"])]
        if not one_objective_unit:
            row.append(r.get("objective_unit") or "")
        row += [_num(r["end_time_h"]), _num(r["seconds"])]
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


def write_outputs(sweep, rows, folder: Path) -> None:
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
    try:
        _figures(sweep, rows, best, folder, paths)
    except Exception as exc:  # noqa: BLE001 - figures are a convenience; the CSV is the record
        (folder / "figures" / "NOT_DRAWN.txt").write_text(f"figures could not be drawn: {exc}\n")


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


def _figures(sweep, rows, best, folder: Path, paths) -> None:
    fig_dir = folder / "figures"
    fig_dir.mkdir(exist_ok=True)
    unit = next((r.get("objective_unit") for r in best if r.get("objective_unit")), "")
    good = [r for r in rows if r["status"] in GOOD and r["objective"] is not None]
    for k, p in enumerate(paths):
        xs = [number(r["values"].get(p))[0] for r in good]
        if not good or all(math.isnan(x) for x in xs):
            continue
        xunit = next((number(r["values"].get(p))[1] for r in good if number(r["values"].get(p))[1]), "")
        fig, ax = plt.subplots(figsize=(6, 4))
        ax.plot(xs, [r["objective"] for r in good], "o", color="#1f5f8b")
        bad = [r for r in rows if r["status"] not in GOOD and r["status"] not in PENDING]
        for r in bad:
            ax.axvline(number(r["values"].get(p))[0], color="#b03a2e", lw=0.8, alpha=0.5)
        ax.set_xlabel(f"{p} ({xunit})" if xunit else p)
        ax.set_ylabel(f"objective ({unit})" if unit else "objective")
        ax.set_title("objective against " + p + (" (red: no verified answer)" if bad else ""), fontsize=9)
        ax.grid(alpha=0.3)
        fig.tight_layout()
        fig.savefig(fig_dir / f"objective_vs_{k + 1}_{_safe(p)}.png", dpi=100)
        plt.close(fig)
    if len(sweep.grid_paths) == 2:
        _heatmap(rows, sweep.grid_paths, unit, fig_dir / "heatmap.png")
    if best:
        top = best[:20]
        fig, ax = plt.subplots(figsize=(7, 0.35 * len(top) + 1.2))
        ax.barh(range(len(top))[::-1], [r["objective"] for r in top], color="#1f5f8b")
        ax.set_yticks(range(len(top))[::-1], [r["label"][:60] for r in top], fontsize=7)
        ax.set_xlabel(f"objective ({unit})" if unit else "objective")
        ax.set_title("ranking (verified answers)", fontsize=9)
        fig.tight_layout()
        fig.savefig(fig_dir / "ranking.png", dpi=100)
        plt.close(fig)
        _best_feed(best[0], fig_dir / "best_feed.png")


def _heatmap(rows, grid_paths, unit, path) -> None:
    p1, p2 = grid_paths
    v1 = sorted({number(r["values"].get(p1))[0] for r in rows})
    v2 = sorted({number(r["values"].get(p2))[0] for r in rows})
    z = np.full((len(v2), len(v1)), np.nan)
    for r in rows:
        if r["status"] in GOOD and r["objective"] is not None:
            z[v2.index(number(r["values"].get(p2))[0]), v1.index(number(r["values"].get(p1))[0])] = r["objective"]
    fig, ax = plt.subplots(figsize=(6, 4.5))
    im = ax.imshow(z, origin="lower", aspect="auto", cmap="viridis")
    ax.set_xticks(range(len(v1)), [fmt(v) for v in v1], fontsize=7)
    ax.set_yticks(range(len(v2)), [fmt(v) for v in v2], fontsize=7)
    ax.set_xlabel(p1)
    ax.set_ylabel(p2)
    fig.colorbar(im, ax=ax, label=f"objective ({unit})" if unit else "objective")
    ax.set_title("objective over the grid (blank: no verified answer)", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)


def _best_feed(row, path) -> None:
    sched = Path(row["run_dir"] or "") / "schedule.csv"
    traj = Path(row["run_dir"] or "") / "trajectory.csv"
    src = sched if sched.exists() else traj
    if not src.exists():
        return
    lines = [l for l in src.read_text().splitlines() if l and not l.startswith("#")]
    header = next(csv.reader([lines[0]]))
    data = np.array([[float(x) for x in next(csv.reader([l]))] for l in lines[1:]])
    fig, ax = plt.subplots(figsize=(7, 3.5))
    feed_cols = [i for i, h in enumerate(header[1:], 1) if "growth" not in h]
    if src is traj:
        feed_cols = [i for i, h in enumerate(header) if h.endswith("/h]") and "mmol" not in h and i > 0][:4]
    for i in feed_cols:
        ax.step(data[:, 0], data[:, i], where="post", label=header[i])
    ax.set_xlabel(header[0])
    ax.set_title(f"feed profile of the best case: {row['label']}", fontsize=9)
    ax.legend(fontsize=7)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_]+", "_", text)[:60]
