"""Sweeps: expansion, the store, resuming after a real SIGKILL, time limits, Dask.

References: the definition of Latin-hypercube sampling (McKay, Beckman and Conover,
1979: each of n equal strata of every dimension holds exactly one sample); the
Cartesian product for grids; SQLite as the store of record.
"""

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from optfeed.errors import InputError
from optfeed.sweep import load_sweep, run_sweep
from optfeed.sweep.store import FINAL

from conftest import CONFIGS, ROOT

PROBLEM = CONFIGS / "animal_cell.yaml"
SCHEDULE = CONFIGS / "animal_cell_plan.csv"


def sweep_file(tmp_path, body: str, name="s.yaml") -> Path:
    (tmp_path / "animal_cell.yaml").write_text(PROBLEM.read_text())
    (tmp_path / "plan.csv").write_text(SCHEDULE.read_text())
    path = tmp_path / name
    path.write_text("problems: animal_cell.yaml\njob: check\nschedule: plan.csv\n" + body)
    return path


def test_grid_zip_and_linspace_expand_to_their_product(tmp_path):
    s = load_sweep(sweep_file(tmp_path, """
grid:
  parameters.mu_max: {linspace: [0.03, 0.05, 3], unit: 1/h}
  vessel.working_volume: [13 L, 14 L]
zip:
  feeds.glucose.max_rate: [20 mL/h, 25 mL/h]
  feeds.nutrients.max_rate: [40 mL/h, 45 mL/h]
"""))
    assert len(s.cases) == 3 * 2 * 2
    assert s.grid_paths == ("parameters.mu_max", "vessel.working_volume")
    assert len({c.key for c in s.cases}) == 12
    zipped = {(c.values["feeds.glucose.max_rate"], c.values["feeds.nutrients.max_rate"]) for c in s.cases}
    assert zipped == {("20 mL/h", "40 mL/h"), ("25 mL/h", "45 mL/h")}


def test_latin_hypercube_has_one_sample_per_stratum(tmp_path):
    n = 16
    s = load_sweep(sweep_file(tmp_path, f"""
sample:
  method: latin_hypercube
  count: {n}
  seed: 3
  ranges:
    parameters.mu_max: {{min: 0.03, max: 0.05}}
    parameters.k_d: {{min: 0.002, max: 0.006}}
"""))
    for path, (lo, hi) in {"parameters.mu_max": (0.03, 0.05), "parameters.k_d": (0.002, 0.006)}.items():
        u = np.array([(c.values[path] - lo) / (hi - lo) for c in s.cases])
        assert sorted(np.floor(u * n).astype(int)) == list(range(n))
    again = load_sweep(sweep_file(tmp_path, f"""
sample: {{method: latin_hypercube, count: {n}, seed: 3, ranges: {{parameters.mu_max: {{min: 0.03, max: 0.05}},
         parameters.k_d: {{min: 0.002, max: 0.006}}}}}}
""", name="t.yaml"))
    assert [c.key for c in again.cases] == [c.key for c in s.cases]  # the seed makes it repeatable


def test_missing_path_is_bad_input_and_nothing_starts(tmp_path):
    path = sweep_file(tmp_path, "grid:\n  vessel.oxygen.transfer_mx: [5, 6]\n")
    with pytest.raises(InputError, match=r"s.yaml:5: vessel.oxygen.transfer_mx: .*no value at this path"):
        load_sweep(path)
    proc = subprocess.run([sys.executable, "-m", "optfeed.cli", "sweep", str(path), "--out", str(tmp_path / "out")],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and "no value at this path" in proc.stderr
    assert not (tmp_path / "out").exists()


def test_case_that_breaks_the_problem_names_the_case(tmp_path):
    # the swept value is at fault: the sweep file's line and key are named
    path = sweep_file(tmp_path, "grid:\n  vessel.initial_volume: [10 L, 20 L]\n")
    with pytest.raises(InputError, match=r"s.yaml:5: vessel.initial_volume: initial volume '20 L' is above the "
                                         r"working volume '14 L' \(the value '20 L' in animal_cell.yaml\)"):
        load_sweep(path)
    # another key of the problem is at fault: the problem file is named, with the case
    path = sweep_file(tmp_path, "grid:\n  vessel.working_volume: [14 L, 5 L]\n")
    with pytest.raises(InputError, match=r"animal_cell.yaml:\d+: vessel.initial_volume: initial volume .* is above "
                                         r"the working volume .*in the case vessel.working_volume = 5 L"):
        load_sweep(path)


def test_run_store_outputs_and_resume(tmp_path):
    path = sweep_file(tmp_path, "grid:\n  vessel.oxygen.transfer_max: [6 mmol/L/h, 10 mmol/L/h]\n"
                                "  feeds.glucose.max_rate: [20 mL/h, 25 mL/h]\n")
    out = tmp_path / "out"
    r = run_sweep(path, out, workers=2)
    assert (r.status, r.total, r.ran, r.skipped) == ("finished", 4, 4, 0)
    statuses = sorted(row["status"] for row in r.rows)
    # 6 mmol/L/h is below what the culture needs late in the run
    assert statuses == ["limit broken", "limit broken", "within limits", "within limits"]
    for row in r.rows:
        assert (Path(row["run_dir"]) / "summary.json").exists()
    assert (out / "summary.csv").read_text().count("\n") == 5
    assert (out / "figures" / "heatmap.svg").exists() and (out / "figures" / "ranking.svg").exists()
    # each limit's margin against the swept values, and the sweep's own report
    assert (out / "figures" / "margins_vs_vessel_oxygen_transfer_max.svg").exists()
    html = (out / "report.html").read_text()
    assert '<h1 id="status">2 of 4 cases within every limit</h1>' in html
    assert html.count('<figure id="') == len(list((out / "figures").glob("*.svg")))
    for row in r.rows:
        assert (Path(row["run_dir"]) / "report.html").exists()
    # the case table as a DataFrame: the swept values as numbers, units in the header (as in the sweep file)
    pd = pytest.importorskip("pandas")
    df = r.cases_frame()
    assert isinstance(df, pd.DataFrame) and len(df) == 4
    assert sorted(df["vessel.oxygen.transfer_max [mmol/L/h]"]) == [6, 6, 10, 10]
    broken = df["status"] == "limit broken"
    assert (df.loc[broken, "vessel.oxygen.transfer_max [mmol/L/h]"] == 6).all()
    assert (df.loc[broken, "margin: OTR ceiling [mmol/L/h]"] < 0).all()
    assert (df.loc[~broken, "margin: OTR ceiling [mmol/L/h]"] > 0).all()
    # a folder written before (a PNG copy, a note of a failed drawing) is left without stale figures
    (out / "figures" / "ranking.png").write_bytes(b"stale")
    (out / "figures" / "figure-not-drawn.txt").write_text("stale")
    again = run_sweep(path, out, workers=2)
    assert (again.ran, again.skipped) == (0, 4)
    assert not (out / "figures" / "ranking.png").exists()
    assert not (out / "figures" / "figure-not-drawn.txt").exists()
    # --png (resuming: nothing runs again) adds a PNG of each of the sweep's own figures
    from optfeed.cli import main

    assert main(["sweep", str(path), "--out", str(out), "--png", "--quiet"]) == 0
    svgs = sorted(p.stem for p in (out / "figures").glob("*.svg"))
    assert svgs and svgs == sorted(p.stem for p in (out / "figures").glob("*.png"))
    for png in (out / "figures").glob("*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # change one value of the base problem: every case changes, all run again
    prob = tmp_path / "animal_cell.yaml"
    prob.write_text(prob.read_text().replace("k_d: 0.004 1/h", "k_d: 0.005 1/h"))
    third = run_sweep(path, out, workers=2)
    assert (third.ran, third.skipped) == (4, 0)
    assert len(sqlite3.connect(out / "sweep.sqlite").execute("SELECT key FROM cases").fetchall()) == 8


def test_time_limit_stops_a_case_without_stopping_the_others(tmp_path):
    # optimize on this 12-day problem takes tens of seconds: 1.5 s stops each case,
    # and every case is still tried and recorded
    (tmp_path / "animal_cell.yaml").write_text(PROBLEM.read_text())
    path = tmp_path / "slow.yaml"
    path.write_text("problems: animal_cell.yaml\njob: optimize\ntime_limit: 1.5 s\n"
                    "grid:\n  parameters.k_d: [0.003, 0.004, 0.005]\n")
    t0 = time.time()
    r = run_sweep(path, tmp_path / "out", workers=2)
    assert time.time() - t0 < 30
    assert r.status == "finished"
    assert [row["status"] for row in r.rows] == ["time limit"] * 3
    assert all("time limit" in row["message"] for row in r.rows)
    assert r.exit_code == 1


def test_sigkill_then_resume_loses_and_repeats_nothing(tmp_path):
    n = 8
    path = sweep_file(tmp_path, f"grid:\n  parameters.k_d: {{linspace: [0.003, 0.005, {n}]}}\n")
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "optfeed.cli", "sweep", str(path), "--out", str(out), "--workers", "1", "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)
    db = out / "sweep.sqlite"
    deadline = time.time() + 120
    finished_before = []
    while time.time() < deadline:
        if db.exists():
            try:
                finished_before = sqlite3.connect(db).execute(
                    f"SELECT key, finished_at FROM cases WHERE status IN ({','.join('?' * len(FINAL))})",
                    FINAL).fetchall()
            except sqlite3.OperationalError:
                pass
        if len(finished_before) >= 2:
            break
        time.sleep(0.1)
    assert len(finished_before) >= 2, "the sweep did not get going"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert len(finished_before) < n, "the sweep finished before it could be killed"
    time.sleep(0.5)  # the case process dies with its parent
    assert subprocess.run(["pgrep", "-f", f"--out {out}"], capture_output=True).stdout == b""

    done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    rows = sqlite3.connect(db).execute("SELECT key, status, finished_at FROM cases").fetchall()
    assert len(rows) == n and all(status in FINAL for _, status, _ in rows)
    after = {key: t for key, _, t in rows}
    for key, t in finished_before:  # finished cases were not run again
        assert after[key] == t
    assert f"{n - len(finished_before)} run now" in done.stdout or f"{len(finished_before)} already done" in done.stdout
    assert len(list((out / "cases").iterdir())) == n


def test_dask_local_cluster(tmp_path):
    distributed = pytest.importorskip("distributed")
    import dask

    path = sweep_file(tmp_path, "grid:\n  parameters.k_d: [0.003, 0.004, 0.005]\n")
    with dask.config.set({"distributed.worker.daemon": False}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                      dashboard_address=None, processes=True) as cluster:
            r = run_sweep(path, tmp_path / "out", scheduler=cluster.scheduler_address)
    assert r.status == "finished" and r.ran == 3
    assert {row["status"] for row in r.rows} == {"within limits"}
