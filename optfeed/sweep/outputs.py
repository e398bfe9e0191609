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


def write_outputs(sweep, rows, folder: Path) -> None:
    folder = Path(folder)
    sense = sense_of(rows, sweep)
    paths = list(sweep.varied)
    tmp_csv = folder / ".summary.csv.tmp"
    with tmp_csv.open("w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["key", "label", "problem"] + paths + ["status", "objective", "objective_unit", "end_time_h",
                                                          "seconds", "message", "run_dir"])
        for r in rows:
            w.writerow([r["key"], r["label"], r["values"].get("problem", "")] +
                       [r["values"].get(p, "") for p in paths] +
                       [r["status"], "" if r["objective"] is None else f"{r['objective']:.10g}",
                        r.get("objective_unit") or "", "" if r["end_time_h"] is None else f"{r['end_time_h']:.6g}",
                        "" if r["seconds"] is None else f"{r['seconds']:.3f}", r["message"] or "", r["run_dir"] or ""])
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
