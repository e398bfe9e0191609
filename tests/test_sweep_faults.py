"""Sweeps under faults, and where their results go.

* Output locations are checked before anything is computed: a file in the way, a
  name too long, a read-only file system, a dangling link, a store of another
  shape, a scheduler that cannot be reached: exit 2, nothing left behind.
* A sweep never follows a symbolic link when it cleans up, and refuses a folder
  that is one unless told otherwise.
* Faults: a case process killed by the system, a Dask worker closed or killed
  mid-case (on a real cluster on loopback), a scheduler lost, no worker at all, a
  disk that fills: nothing lost, the reason recorded, and the same command
  completes the sweep later. Two sweeps on one folder: the second is refused.
* The resume window: a case that landed but was not recorded is not computed again.

References: POSIX rename(2) (atomic within a file system), flock(2), Linux
PR_SET_PDEATHSIG; Dask distributed's LocalCluster.
"""

import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from optfeed.cli import main
from optfeed.errors import InputError
from optfeed.sweep import run_sweep
from optfeed.sweep.store import FINAL

from conftest import CONFIGS

PROBLEM, SCHEDULE = CONFIGS / "animal_cell.yaml", CONFIGS / "animal_cell_plan.csv"


def sweep_file(d: Path, values="[0.003, 0.004]", job="check", extra="") -> Path:
    d.mkdir(parents=True, exist_ok=True)
    (d / "animal_cell.yaml").write_text(PROBLEM.read_text())
    (d / "plan.csv").write_text(SCHEDULE.read_text())
    head = "job: check\nschedule: plan.csv\n" if job == "check" else f"job: {job}\n"
    path = d / "s.yaml"
    path.write_text(f"problems: animal_cell.yaml\n{head}{extra}grid:\n  parameters.k_d: {values}\n")
    return path


def tree(d: Path) -> set:
    return {str(p.relative_to(d)) for p in d.rglob("*")} if d.exists() else set()


def cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "optfeed.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=kw.pop("timeout", 120), **kw)


def can_mount() -> bool:
    """Whether this process may make a private mount namespace with a tmpfs (root on Linux)."""
    if not shutil.which("unshare") or os.geteuid() != 0:
        return False
    probe = subprocess.run(["unshare", "-m", "sh", "-c", "mount -t tmpfs -o size=64k tmpfs /mnt"],
                           capture_output=True)
    return probe.returncode == 0


# ---------------------------------------------------------------- output locations, before any work


def test_check_output_locations_are_checked_before_computing(tmp_path, capsys):
    args = ["check", str(PROBLEM), "--schedule", str(SCHEDULE)]
    a_file = tmp_path / "a_file"
    a_file.write_text("not a folder")
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "nowhere")
    before = tree(tmp_path)
    cases = [
        (["--results", str(a_file)], r"a_file is a file, not a folder"),
        (["--out", str(a_file / "run")], r"a_file is a file, not a folder"),
        (["--out", str(tmp_path / ("x" * 300))], r"is longer than the 255 bytes"),
        (["--out", str(dangling)], r"dangling: --out: is a symbolic link"),
        (["--out", ""], r"--out: is empty"),
    ]
    for extra, pattern in cases:
        assert main(args + extra) == 2, extra
        err = capsys.readouterr().err
        assert err.startswith("optfeed: bad input") and __import__("re").search(pattern, err), (extra, err)
    assert tree(tmp_path) == before  # nothing left: no run folder, no hidden half-written one
    assert not (tmp_path / "nowhere").exists()


@pytest.mark.skipif(not can_mount(), reason="needs a private mount namespace (root on Linux)")
def test_a_read_only_file_system_is_found_before_computing(tmp_path):
    # a real read-only file system (a tmpfs mounted read-only), which root cannot write either
    ro = tmp_path / "ro"
    ro.mkdir()
    script = (f"mount -t tmpfs -o ro,size=64k tmpfs {ro} && "
              f"{sys.executable} -m optfeed.cli check {PROBLEM} --schedule {SCHEDULE} --out {ro}/run")
    proc = subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert "--out: cannot write in" in proc.stderr and "Read-only file system" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_sweep_output_locations_are_checked_before_anything_is_written(tmp_path):
    path = sweep_file(tmp_path / "p")
    a_file = tmp_path / "a_file"
    a_file.write_text("x")
    assert cli("sweep", path, "--results", a_file).returncode == 2
    # 'cases' is a file in an existing sweep folder
    out = tmp_path / "out"
    out.mkdir()
    (out / "cases").write_text("x")
    proc = cli("sweep", path, "--out", out)
    assert proc.returncode == 2 and "cases: --out: is a file; optfeed keeps a folder here" in proc.stderr
    assert tree(out) == {"cases"}
    # a sweep.sqlite of another shape: refused, untouched, no lock left
    other = tmp_path / "other"
    other.mkdir()
    db = sqlite3.connect(other / "sweep.sqlite")
    db.execute("CREATE TABLE cases (id INTEGER, note TEXT)")
    db.commit()
    db.close()
    data = (other / "sweep.sqlite").read_bytes()
    proc = cli("sweep", path, "--out", other)
    assert proc.returncode == 2 and "holds a 'cases' table of another shape" in proc.stderr, proc.stderr
    assert (other / "sweep.sqlite").read_bytes() == data and tree(other) == {"sweep.sqlite"}
    (other / "sweep.sqlite").write_bytes(b"SQLite format 3\x00" + b"\x00" * 100)  # broken
    proc = cli("sweep", path, "--out", other)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr and tree(other) == {"sweep.sqlite"}


def test_bad_or_unreachable_scheduler_leaves_nothing(tmp_path):
    path = sweep_file(tmp_path / "p")
    for address, words in [("not a url", "is not a scheduler address"),
                           ("tcp://127.0.0.1:1", "cannot reach a Dask scheduler at tcp://127.0.0.1:1")]:
        out = tmp_path / "out"
        proc = cli("sweep", path, "--out", out, "--scheduler", address)
        assert proc.returncode == 2 and words in proc.stderr and "Traceback" not in proc.stderr, proc.stderr
        assert not out.exists()  # no folder, no store, no lock


# ---------------------------------------------------------------- links: never followed when cleaning


def test_a_symlinked_sweep_folder_is_refused_unless_allowed(tmp_path):
    path = sweep_file(tmp_path / "p", values="[0.003]")
    elsewhere = tmp_path / "elsewhere"
    (elsewhere / "cases").mkdir(parents=True)
    (elsewhere / "cases" / ".precious").write_text("someone else's")
    link = tmp_path / "link"
    link.symlink_to(elsewhere)
    with pytest.raises(InputError, match=r"link: --out: is a symbolic link .*--allow-symlink"):
        run_sweep(path, link, workers=1)
    r = run_sweep(path, link, workers=1, allow_symlink=True)
    assert r.status == "finished"
    assert (elsewhere / "cases" / ".precious").read_text() == "someone else's"  # not ours: kept


def test_cleanup_never_follows_a_link_and_removes_only_its_own_leftovers(tmp_path):
    path = sweep_file(tmp_path / "p", values="[0.003]")
    out = tmp_path / "out"
    r = run_sweep(path, out, workers=1)
    key = r.rows[0]["key"]
    victim = tmp_path / "victim"
    victim.mkdir()
    (victim / "data.txt").write_text("keep me")
    cases = out / "cases"
    (cases / ".precious").write_text("not optfeed's")
    (cases / f".{key}.abcdefgh").mkdir()  # a half-written folder of this store's case
    (cases / f".{key}.link").symlink_to(victim)  # ours by name, but a link: removed, not followed
    run_sweep(path, out, workers=1)
    assert (cases / ".precious").exists()
    assert not (cases / f".{key}.abcdefgh").exists() and not os.path.lexists(cases / f".{key}.link")
    assert (victim / "data.txt").read_text() == "keep me"
    # 'cases' itself a link to elsewhere: refused before anything is touched
    shutil.rmtree(cases)
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "elsewhere" / f".{key}.x").write_text("keep me too")
    cases.symlink_to(tmp_path / "elsewhere")
    with pytest.raises(InputError, match=r"cases: --out: is a symbolic link"):
        run_sweep(path, out, workers=1)
    assert (tmp_path / "elsewhere" / f".{key}.x").exists()


# ---------------------------------------------------------------- two sweeps at once


def test_a_second_sweep_on_the_same_folder_is_refused(tmp_path):
    # enough cases that the first sweep still runs while the second process starts
    # (six check cases once took about as long as a Python start, and the second
    # then found them all done)
    values = ", ".join(f"{0.003 + 0.00002 * i:.5f}" for i in range(80))
    path = sweep_file(tmp_path / "p", values=f"[{values}]")
    out = tmp_path / "out"
    first = subprocess.Popen([sys.executable, "-m", "optfeed.cli", "sweep", str(path), "--out", str(out),
                              "--workers", "1", "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.time() + 120
        while time.time() < deadline and not _running(out):
            time.sleep(0.05)
        assert _running(out), "the first sweep did not start"
        second = cli("sweep", path, "--out", out, "--workers", "1", "--quiet")
        assert second.returncode == 2
        assert "another sweep is running in this folder" in second.stderr and "Traceback" not in second.stderr
        stdout, stderr = first.communicate(timeout=300)
        assert first.returncode == 0, stderr
    finally:
        if first.poll() is None:
            first.kill()
            first.wait()


def _running(out: Path) -> bool:
    try:
        return bool(sqlite3.connect(out / "sweep.sqlite").execute(
            "SELECT 1 FROM cases WHERE status='running'").fetchall())
    except sqlite3.Error:
        return False


# ---------------------------------------------------------------- the resume window


def test_a_case_that_landed_but_was_not_recorded_is_not_computed_again(tmp_path):
    # the state a SIGKILL leaves between the case folder landing and the store's record:
    # the folder is there, the row still says 'running'
    path = sweep_file(tmp_path / "p")
    out = tmp_path / "out"
    r = run_sweep(path, out, workers=1)
    key = r.rows[0]["key"]
    landed = out / "cases" / key
    stamp = (landed / "summary.json").stat().st_mtime_ns
    db = sqlite3.connect(out / "sweep.sqlite")
    db.execute("UPDATE cases SET status='running', objective=NULL, finished_at=NULL WHERE key=?", (key,))
    db.commit()
    db.close()
    again = run_sweep(path, out, workers=1)
    assert (again.status, again.ran, again.skipped) == ("finished", 0, 2)
    row = next(x for x in again.rows if x["key"] == key)
    assert row["status"] == "within limits" and row["objective"] == r.rows[0]["objective"]
    assert (landed / "summary.json").stat().st_mtime_ns == stamp  # the same folder, not a new one
    assert json.loads((landed / "outcome.json").read_text())["status"] == "within limits"


# ---------------------------------------------------------------- faults


def test_a_case_process_killed_by_the_system_is_run_again_by_the_same_command(tmp_path):
    import psutil

    path = sweep_file(tmp_path / "p", values="[0.003, 0.004, 0.005]")
    out = tmp_path / "out"
    killed = []
    before = {p.pid for p in psutil.Process().children()}

    def on_event(kind, task, counts):
        if kind == "start" and not killed:  # the first case's process, as the OOM killer would
            # (earlier tests may have left multiprocessing's resource tracker: not it)
            case = [p for p in psutil.Process().children() if p.pid not in before][0]
            case.send_signal(signal.SIGKILL)
            killed.append(task.key)

    r = run_sweep(path, out, workers=1, on_event=on_event)
    assert r.status == "incomplete" and r.exit_code == 1
    row = next(x for x in r.rows if x["key"] == killed[0])
    assert row["status"] == "not run" and "SIGKILL" in row["message"]
    assert sorted(x["status"] for x in r.rows) == ["not run", "within limits", "within limits"]  # the rest went on
    assert "not run" in (out / "summary.txt").read_text()
    done = run_sweep(path, out, workers=1)
    assert (done.status, done.ran, done.skipped) == ("finished", 1, 2)
    assert {x["status"] for x in done.rows} == {"within limits"}


def _cluster(**kw):
    distributed = pytest.importorskip("distributed")
    return distributed.LocalCluster(threads_per_worker=1, dashboard_address=None, **kw)


def test_a_closing_dask_worker_takes_its_case_process_with_it(tmp_path):
    import psutil

    # one case, two workers in this process: the case's process is this process's only
    # child, and the worker executing it is closed; the other worker takes the case up
    # (an optimize case runs for tens of seconds: it is stopped by its 12 s time limit, so
    # a case process gone within 4 s of the close went with its worker)
    path = sweep_file(tmp_path / "p", values="[0.003]", job="optimize", extra="time_limit: 12 s\n")
    me = psutil.Process()
    before = {p.pid for p in me.children()}  # earlier tests may have left multiprocessing's resource tracker

    def cases():  # this test's case processes
        return [p for p in me.children() if p.pid not in before]

    with _cluster(n_workers=2, processes=False) as cluster:
        seen = {}

        def close_the_worker():
            deadline = time.time() + 60
            busy = []
            while time.time() < deadline and not (busy and cases()):
                busy = [w for w in cluster.workers.values() if w.state.executing]
                time.sleep(0.02)
            seen["case"] = cases()
            closing = threading.Thread(target=cluster.sync, args=(busy[0].close,))
            closing.start()
            t0 = time.time()
            while time.time() - t0 < 4 and any(p.is_running() and p.status() != psutil.STATUS_ZOMBIE
                                               for p in seen["case"]):
                time.sleep(0.05)
            seen["alive"] = [p.pid for p in seen["case"] if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]
            closing.join()

        th = threading.Thread(target=close_the_worker)
        th.start()
        r = run_sweep(path, tmp_path / "out", scheduler=cluster.scheduler_address, no_worker_timeout=60)
        th.join()
        if r.status != "finished":  # the case came back as not run, with the reason: the same command runs it
            assert r.rows[0]["status"] == "not run" and "worker closed" in r.rows[0]["message"]
            r = run_sweep(path, tmp_path / "out", scheduler=cluster.scheduler_address, no_worker_timeout=60)
    assert seen["case"], "no case process was seen"
    assert seen["alive"] == [], "the closed worker's case process is still running"
    assert r.status == "finished" and len(r.rows) == 1 and r.rows[0]["status"] in FINAL


def test_a_dask_worker_killed_mid_case_loses_nothing_and_leaves_no_orphan(tmp_path):
    import dask
    import psutil

    path = sweep_file(tmp_path / "p", values="[0.003, 0.0035, 0.004, 0.0045]")
    with dask.config.set({"distributed.worker.daemon": False}):
        with _cluster(n_workers=2, processes=True, host="127.0.0.1") as cluster:
            from distributed import Client

            with Client(cluster) as client:
                pids = list(client.run(os.getpid).values())
            seen = {}

            def kill_a_busy_worker():
                deadline = time.time() + 60
                while time.time() < deadline and "case" not in seen:
                    for pid in pids:
                        try:
                            kids = psutil.Process(pid).children(recursive=True)
                        except psutil.NoSuchProcess:
                            continue
                        if kids:
                            seen["case"] = kids
                            os.kill(pid, signal.SIGKILL)  # the worker is lost mid-case
                            break
                    time.sleep(0.01)
                time.sleep(3)
                seen["alive"] = [p.pid for p in seen.get("case", [])
                                 if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]

            th = threading.Thread(target=kill_a_busy_worker)
            th.start()
            r = run_sweep(path, tmp_path / "out", scheduler=cluster.scheduler_address)
            th.join()
    assert seen.get("case"), "no case process was seen"
    assert seen["alive"] == [], "a case process outlived its worker"
    done = r if r.status == "finished" else run_sweep(path, tmp_path / "out", workers=1)
    assert done.status == "finished" and {x["status"] for x in done.rows} == {"within limits"}


def test_no_dask_worker_ends_with_a_clear_message_and_the_same_command_completes(tmp_path):
    path = sweep_file(tmp_path / "p")
    out = tmp_path / "out"
    with _cluster(n_workers=0, processes=False) as cluster:
        t0 = time.time()
        r = run_sweep(path, out, scheduler=cluster.scheduler_address, no_worker_timeout=2)
        assert time.time() - t0 < 60
        assert r.status == "incomplete" and r.exit_code == 1
        assert [x["status"] for x in r.rows] == ["not run", "not run"]
        assert "no Dask worker for 2 s" in r.rows[0]["message"] and "no Dask worker for 2 s" in r.message
        cluster.scale(1)
        done = run_sweep(path, out, scheduler=cluster.scheduler_address, no_worker_timeout=60)
    assert (done.status, done.ran) == ("finished", 2)


def test_losing_the_dask_scheduler_leaves_the_cases_to_run_again(tmp_path):
    path = sweep_file(tmp_path / "p", values="[0.003, 0.0035]", job="optimize", extra="time_limit: 5 s\n")
    out = tmp_path / "out"
    cluster = _cluster(n_workers=1, processes=False)
    try:
        def lose_the_scheduler():
            time.sleep(2)
            cluster.sync(cluster.scheduler.close)

        th = threading.Thread(target=lose_the_scheduler)
        th.start()
        r = run_sweep(path, out, scheduler=cluster.scheduler_address, no_worker_timeout=10)
        th.join()
    finally:
        import dask

        # the cluster without its scheduler: closing it waits out the connect timeout (30 s)
        with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
            cluster.close()
    assert r.status == "incomplete"
    assert {x["status"] for x in r.rows} == {"not run"}
    assert "scheduler" in r.rows[0]["message"]
    store = sqlite3.connect(out / "sweep.sqlite")
    assert store.execute("SELECT COUNT(*) FROM cases WHERE status IN ('error', 'failed')").fetchone() == (0,)


@pytest.mark.skipif(not can_mount(), reason="needs a private mount namespace (root on Linux)")
def test_a_full_disk_loses_nothing_and_the_same_command_completes_later(tmp_path):
    # the sweep folder on a small tmpfs, nearly full: cases land until the disk is full,
    # the sweep ends with the reason, and after space is freed the same command completes
    # it without computing a landed case twice. A check case writes about 0.6 MB.
    project = tmp_path / "p"
    path = sweep_file(project, values="[0.003, 0.0035, 0.004, 0.0045]")
    disk = tmp_path / "disk"
    disk.mkdir()
    cmd = f"{sys.executable} -m optfeed.cli sweep {path} --out {disk}/out --workers 1 --quiet"
    script = f"""
set -u
mount -t tmpfs -o size=8m tmpfs {disk} || exit 99
dd if=/dev/zero of={disk}/filler bs=1k count=16000 2>/dev/null
{cmd}; echo "full exit $?"
echo "left: $(ls -A {disk})"
rm {disk}/filler
dd if=/dev/zero of={disk}/filler bs=1k count=6200 2>/dev/null
{cmd}; echo "first exit $?"
sqlite3_rows() {{ {sys.executable} -c "import sqlite3; print(sorted(sqlite3.connect('{disk}/out/sweep.sqlite').execute('SELECT key, status, finished_at FROM cases').fetchall()))"; }}
echo "rows after first: $(sqlite3_rows)"
rm {disk}/filler
{cmd}; echo "second exit $?"
echo "rows after second: $(sqlite3_rows)"
ls {disk}/out/cases | wc -l | sed 's/^/cases /'
"""
    proc = subprocess.run(["unshare", "-m", "bash", "-c", script], capture_output=True, text=True, timeout=300)
    out = proc.stdout
    # a disk full from the start: bad input (the results cannot go there), and nothing is left
    assert "full exit 2" in out and "left: filler\n" in out, out + proc.stderr
    assert "the sweep's store cannot be written here" in proc.stderr
    assert "first exit 1" in out, out + proc.stderr
    assert "incomplete" in out and ("disk is full" in out or "could not be written" in out), out
    assert "Traceback" not in proc.stderr, proc.stderr
    assert "second exit 0" in out and "sweep finished: 4 cases" in out, out + proc.stderr
    first = eval(out.split("rows after first: ")[1].splitlines()[0])
    second = eval(out.split("rows after second: ")[1].splitlines()[0])
    landed_first = {(k, t) for k, s, t in first if s in FINAL}
    assert landed_first and landed_first <= {(k, t) for k, _, t in second}  # nothing landed was computed again
    assert all(s == "within limits" for _, s, _ in second)
    assert "cases 4" in out
