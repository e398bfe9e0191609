"""The sweep job: queue the cases, run what is not done yet, write the morning outputs."""

from __future__ import annotations

import os
import shutil
import signal
import sqlite3
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from ..paths import check_output_names, check_output_parent
from .outputs import write_outputs
from .runner import (LANDING, NO_WORKER_TIMEOUT, NOT_RUN, DaskExecutor, LocalExecutor, Task, clean_leftovers,
                     default_workers, landed_outcome)
from .spec import Sweep, load_sweep
from .store import FINAL, Store, store_problem

STORE_NAME = "sweep.sqlite"
LOCK_NAME = "sweep.lock"


@dataclass(frozen=True)
class SweepResult:
    """What a sweep run did.

    Attributes
    ----------
    status : str
        'finished' (every case has a final status); 'incomplete' (some cases could
        not be run for a reason outside them: a lost process, worker or scheduler,
        a full disk; the reasons are in their rows and in ``message``; run the same
        command again to complete it); or 'stopped' (Ctrl-C or a signal; run the
        same command again to resume).
    folder : Path
        The sweep's results folder (store, summary CSV, figures, cases/).
    total, ran, skipped, failed : int
        Cases in the sweep; run now; skipped as already done; without an answer
        (failure, error, time limit, not run; over the whole sweep).
    rows : list of dict
        The store's rows for this sweep's cases.
    seconds : float
    message : str
        Why the sweep is incomplete or stopped ('' when finished).
    """

    status: str
    folder: Path
    total: int
    ran: int
    skipped: int
    failed: int
    rows: list = field(repr=False, default_factory=list)
    seconds: float = 0.0
    message: str = ""

    @property
    def exit_code(self) -> int:
        if self.status == "stopped":
            return 130
        return 0 if self.status == "finished" and self.failed == 0 else 1

    def cases_frame(self):
        """One row per case as a pandas DataFrame: swept values (units in the header),
        status, objective, each limit's smallest margin (optfeed.frames; needs pandas)."""
        from ..frames import cases_frame

        return cases_frame(self)


# statuses of a case that did not get an answer (limit broken and infeasible are answers)
BAD = ("failed", "error", "time limit", "simulation failed", "iteration limit", "converged, not verified", NOT_RUN)
PENDING = ("queued", "running", NOT_RUN)  # run by the same command
# what a sweep folder holds: made by optfeed only, so never a symbolic link
_OWN_DIRS = ("cases", "figures")
_OWN_FILES = (STORE_NAME, LOCK_NAME, "summary.csv", "summary.txt", ".summary.csv.tmp", ".summary.txt.tmp")


def run_sweep(sweep, folder, workers: int | None = None, scheduler: str | None = None,
              on_event=None, retry: bool = False, allow_symlink: bool = False,
              no_worker_timeout: float = NO_WORKER_TIMEOUT, fresh_process_per_case: bool = False,
              png: bool = False) -> SweepResult:
    """Run every case of ``sweep`` (a Sweep or a sweep file) not already finished in
    ``folder``'s store.

    Parameters
    ----------
    folder : path
        Results folder; created if missing. Running again with the same folder
        resumes: finished cases are skipped, interrupted ones run again. Checked
        before anything is computed or written (bad input if it cannot hold the
        results, or if another sweep is running in it).
    workers : int, optional
        Local processes (default: the cores). Ignored with ``scheduler``.
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:8786``), reached
        before anything is written.
    on_event : callable, optional
        ``on_event(kind, row_or_none, counts)`` with kind 'start', 'done'.
    retry : bool
        Also run again the cases that ended without an answer (errors, time
        limits, failures).
    allow_symlink : bool
        Accept a ``folder`` that is a symbolic link (refused by default: a sweep
        cleans up inside its folder, and a link makes that somewhere else).
    no_worker_timeout : float
        Seconds a Dask sweep waits without any worker, or without its scheduler,
        before it records the remaining cases as not run and ends.
    fresh_process_per_case : bool
        Run every case in a new process (default: case processes run case after
        case and keep their built solvers, which a sweep of variants of one problem
        reuses). For comparisons and for cases that must not share a process.
    png : bool
        Also write the sweep's own figures (``figures/``) as PNG, drawn with
        matplotlib; the cases' run folders keep their SVG figures only.

    Raises
    ------
    InputError
        For a bad sweep file, a folder that cannot take the results or is in use,
        a store of another shape, or an unreachable scheduler; nothing is written.
    """
    t0 = time.perf_counter()
    if not isinstance(sweep, Sweep):
        sweep = load_sweep(sweep)
    folder = Path(folder)
    check_sweep_folder(folder, allow_symlink)
    executor = DaskExecutor(scheduler, no_worker_timeout) if scheduler else \
        LocalExecutor(workers or default_workers(), fresh_process=fresh_process_per_case)
    executor.connect()  # a cluster that cannot be reached is found before anything is written
    stop = {"flag": False, "why": ""}
    store = lock = None
    try:
        lock, store = _open_folder(folder, sweep)
        done = store.done_keys()
        if retry:
            done -= {r["key"] for r in store.rows() if r["status"] in BAD and r["status"] != NOT_RUN}
        status_of = {r["key"]: r["status"] for r in store.rows()}
        for c in sweep.cases:  # landed by a run killed before it could record them
            if status_of.get(c.key) in PENDING:
                landed = landed_outcome((folder / "cases" / c.key).resolve())
                if landed is not None and landed["status"] in FINAL:
                    store.finish(c.key, landed)
                    done.add(c.key)
        todo = [c for c in sweep.cases if c.key not in done]
        tasks = [Task(c.key, c.data, c.source, sweep.job, sweep.schedule_text,
                      None if sweep.schedule_path is None else Path(sweep.schedule_path).name,
                      str((folder / "cases" / c.key).resolve()), sweep.time_limit, fresh_process_per_case)
                 for c in todo]
        counts = {"total": len(sweep.cases), "done": len(sweep.cases) - len(todo), "failed": 0, "running": 0}
        counts["failed"] = sum(1 for r in store.rows([c.key for c in sweep.cases]) if r["status"] in BAD)
        event = on_event or (lambda *a: None)

        def on_start(task):
            store.mark_running(task.key)
            counts["running"] += 1
            event("start", task, dict(counts))

        def on_done(task, outcome):
            try:
                store.finish(task.key, outcome)
            except sqlite3.OperationalError as exc:  # the disk is full: nothing more can be recorded
                stop["flag"] = True
                stop["why"] = (f"the sweep store could not be written ({exc}); free some space and run the same "
                               "command again (cases that finished are recognised from their folders)")
                return
            counts["running"] -= 1
            counts["done"] += 1
            if outcome["status"] in BAD:
                counts["failed"] += 1
            event("done", {"key": task.key, **outcome}, dict(counts))

        def handle(signum, frame):
            stop["flag"] = True
            raise KeyboardInterrupt

        main_thread = threading.current_thread() is threading.main_thread()  # signals go to the main thread only
        old = signal.signal(signal.SIGTERM, handle) if main_thread else None
        interrupted = False
        try:
            executor.run(tasks, on_start, on_done, lambda: stop["flag"])
        except KeyboardInterrupt:
            stop["flag"] = interrupted = True
        finally:
            if main_thread:
                signal.signal(signal.SIGTERM, old)
            try:
                store.mark_queued([t.key for t in tasks])  # anything still 'running' goes back to the queue
            except sqlite3.OperationalError:
                pass
        try:
            (folder / "cases" / LANDING).rmdir()  # empty unless a case is still being written
        except OSError:
            pass
        rows = store.rows([c.key for c in sweep.cases])
        failed = sum(1 for r in rows if r["status"] in BAD)
        not_run = [r for r in rows if r["status"] == NOT_RUN]
        try:
            write_outputs(sweep, rows, folder, png=png)
        except OSError as exc:
            stop["why"] = stop["why"] or f"the summary could not be written ({exc.strerror})"
        attempted = {t.key for t in tasks}
        ran = sum(1 for r in rows if r["key"] in attempted and r["status"] not in PENDING)
        if interrupted:
            status, message = "stopped", "stopped; run the same command again to resume"
        elif stop["why"] or not_run or any(r["status"] in PENDING for r in rows):
            status = "incomplete"
            message = stop["why"] or (f"{len(not_run)} case(s) not run ({_reasons(not_run)}); "
                                      "run the same command again to complete the sweep")
        else:
            status, message = "finished", ""
        return SweepResult(status, folder, len(sweep.cases), ran, len(sweep.cases) - len(todo), failed, rows,
                           time.perf_counter() - t0, message)
    finally:
        executor.close()
        if store is not None:
            store.close()
        if lock is not None:
            lock.close()


def _open_folder(folder: Path, sweep):
    """Make the folder (if new), lock it, open the store and queue the cases. A
    failure here (the folder in use, a store of another shape, no space) is bad
    input, and a folder made just now is removed again."""
    created = not os.path.lexists(folder)
    lock = store = None
    try:
        (folder / "cases").mkdir(parents=True, exist_ok=True)
        lock = _lock(folder)
        why = store_problem(folder / STORE_NAME)  # again, now that this run holds the folder
        if why:
            raise InputError.one(str(folder / STORE_NAME), None, "", why)
        store = Store(folder / STORE_NAME)
        clean_leftovers(folder / "cases", store.keys())
        store.queue(sweep.cases, sweep.job)
        return lock, store
    except (OSError, sqlite3.Error, InputError) as exc:
        if store is not None:
            store.close()
        if created and lock is not None:  # made by this run, which holds it: nobody else is in it
            shutil.rmtree(folder, ignore_errors=True)
        if lock is not None:
            lock.close()
        if isinstance(exc, InputError):
            raise
        raise InputError.one(str(folder), None, "--out", f"the sweep's store cannot be written here ({exc}); "
                                                         "free some space or choose another --out") from None


def _reasons(rows) -> str:
    texts = list(dict.fromkeys((r["message"] or "").split(";")[0] for r in rows))
    return "; ".join(texts[:3]) + ("; ..." if len(texts) > 3 else "")


def check_sweep_folder(folder: Path, allow_symlink: bool = False) -> None:
    """Everything about a sweep folder that can be checked before a case is run;
    reads only, writes nothing. Raises InputError (option ``--out``)."""
    folder = Path(folder)
    check_output_names(folder, "--out")
    if folder.is_symlink() and not allow_symlink:
        raise InputError.one(str(folder), None, "--out", f"is a symbolic link (to {os.readlink(folder)}); a sweep "
                                                         "cleans up inside its folder, so it is refused unless you "
                                                         "say so (--allow-symlink)")
    check_output_parent(folder, "--out")
    if not folder.exists():
        return
    for name in _OWN_DIRS + _OWN_FILES + (f"cases/{LANDING}",):
        p = folder / name
        if p.is_symlink():
            raise InputError.one(str(p), None, "--out", "is a symbolic link; optfeed makes this itself: move the "
                                                        "link away")
        if os.path.lexists(p) and (name in _OWN_DIRS or name.endswith(LANDING)) != p.is_dir():
            raise InputError.one(str(p), None, "--out", f"is a {'file' if p.is_file() else 'folder'}; optfeed keeps "
                                                        f"a {'file' if name in _OWN_FILES else 'folder'} here: move "
                                                        "it away or choose another --out")
    why = store_problem(folder / STORE_NAME)
    if why:
        raise InputError.one(str(folder / STORE_NAME), None, "", why)
    if (folder / LOCK_NAME).exists() and _locked(folder):
        raise InputError.one(str(folder), None, "--out", "another sweep is running in this folder")


def _locked(folder: Path) -> bool:
    """Whether another process holds the folder's lock (looked at without taking it for long)."""
    try:
        fh = _lock(folder)
    except InputError:
        return True
    fh.close()
    return False


def _lock(folder: Path):
    """Hold an exclusive lock on the sweep folder for as long as this run lives (the
    system releases it if the process is killed)."""
    fd = os.open(folder / LOCK_NAME, os.O_WRONLY | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)
    fh = os.fdopen(fd, "w")
    try:
        import fcntl

        fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except ImportError:  # no fcntl (Windows): no lock
        pass
    except OSError:
        fh.close()
        raise InputError.one(str(folder), None, "--out", "another sweep is running in this folder") from None
    return fh
