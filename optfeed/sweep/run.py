"""The sweep job: queue the cases, run what is not done yet, write the morning outputs."""

from __future__ import annotations

import shutil
import signal
import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from .outputs import write_outputs
from .runner import DaskExecutor, LocalExecutor, Task, default_workers
from .spec import Sweep, load_sweep
from .store import Store

STORE_NAME = "sweep.sqlite"


@dataclass(frozen=True)
class SweepResult:
    """What a sweep run did.

    Attributes
    ----------
    status : str
        'finished' (every case has a final status), or 'stopped' (Ctrl-C or a
        signal; run the same command again to resume).
    folder : Path
        The sweep's results folder (store, summary CSV, figures, cases/).
    total, ran, skipped, failed : int
        Cases in the sweep; run now; skipped as already done; ended in failure,
        error or time limit (over the whole sweep).
    rows : list of dict
        The store's rows for this sweep's cases.
    seconds : float
    """

    status: str
    folder: Path
    total: int
    ran: int
    skipped: int
    failed: int
    rows: list = field(repr=False, default_factory=list)
    seconds: float = 0.0

    @property
    def exit_code(self) -> int:
        if self.status != "finished":
            return 130
        return 0 if self.failed == 0 else 1

    def cases_frame(self):
        """One row per case as a pandas DataFrame: swept values (units in the header),
        status, objective, each limit's smallest margin (optfeed.frames; needs pandas)."""
        from ..frames import cases_frame

        return cases_frame(self)


# statuses of a case that did not get an answer (limit broken and infeasible are answers)
BAD = ("failed", "error", "time limit", "simulation failed", "iteration limit", "converged, not verified")


def run_sweep(sweep, folder, workers: int | None = None, scheduler: str | None = None,
              on_event=None, retry: bool = False) -> SweepResult:
    """Run every case of ``sweep`` (a Sweep or a sweep file) not already finished in
    ``folder``'s store.

    Parameters
    ----------
    folder : path
        Results folder; created if missing. Running again with the same folder
        resumes: finished cases are skipped, interrupted ones run again.
    workers : int, optional
        Local processes (default: the cores). Ignored with ``scheduler``.
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:8786``).
    on_event : callable, optional
        ``on_event(kind, row_or_none, counts)`` with kind 'start', 'done'.
    retry : bool
        Also run again the cases that ended without an answer (errors, time
        limits, failures), e.g. after a cluster worker was lost.
    """
    t0 = time.perf_counter()
    if not isinstance(sweep, Sweep):
        sweep = load_sweep(sweep)
    folder = Path(folder)
    (folder / "cases").mkdir(parents=True, exist_ok=True)
    lock = _lock(folder)
    for leftover in (folder / "cases").glob(".*"):  # half-written files of a killed run
        if leftover.is_dir():
            shutil.rmtree(leftover, ignore_errors=True)
        else:
            leftover.unlink(missing_ok=True)
    stop = {"flag": False}
    store = None
    try:
        try:
            store = Store(folder / STORE_NAME)
        except sqlite3.DatabaseError as exc:
            raise InputError.one(str(folder / STORE_NAME), None, "", f"the sweep store cannot be read ({exc}); "
                                 "move it away to start afresh") from None
        store.queue(sweep.cases, sweep.job)
        done = store.done_keys()
        if retry:
            done -= {r["key"] for r in store.rows() if r["status"] in BAD}
        todo = [c for c in sweep.cases if c.key not in done]
        tasks = [Task(c.key, c.data, c.source, sweep.job, sweep.schedule_text,
                      None if sweep.schedule_path is None else Path(sweep.schedule_path).name,
                      str((folder / "cases" / c.key).resolve()), sweep.time_limit) for c in todo]
        counts = {"total": len(sweep.cases), "done": len(sweep.cases) - len(todo), "failed": 0, "running": 0}
        counts["failed"] = sum(1 for r in store.rows([c.key for c in sweep.cases]) if r["status"] in BAD)
        event = on_event or (lambda *a: None)

        def on_start(task):
            store.mark_running(task.key)
            counts["running"] += 1
            event("start", task, dict(counts))

        def on_done(task, outcome):
            store.finish(task.key, outcome)
            counts["running"] -= 1
            counts["done"] += 1
            if outcome["status"] in BAD:
                counts["failed"] += 1
            event("done", {"key": task.key, **outcome}, dict(counts))

        def handle(signum, frame):
            stop["flag"] = True
            raise KeyboardInterrupt

        old = signal.signal(signal.SIGTERM, handle)
        executor = DaskExecutor(scheduler) if scheduler else LocalExecutor(workers or default_workers())
        try:
            executor.run(tasks, on_start, on_done, lambda: stop["flag"])
        except KeyboardInterrupt:
            stop["flag"] = True
        finally:
            signal.signal(signal.SIGTERM, old)
            store.mark_queued([t.key for t in tasks])  # anything still 'running' goes back to the queue
        rows = store.rows([c.key for c in sweep.cases])
        failed = sum(1 for r in rows if r["status"] in BAD)
        finished = all(r["status"] not in ("queued", "running") for r in rows)
        write_outputs(sweep, rows, folder)
        attempted = {t.key for t in tasks}
        ran = sum(1 for r in rows if r["key"] in attempted and r["status"] not in ("queued", "running"))
        return SweepResult("finished" if finished and not stop["flag"] else "stopped", folder, len(sweep.cases),
                           ran, len(sweep.cases) - len(todo), failed, rows, time.perf_counter() - t0)
    finally:
        if store is not None:
            store.close()
        lock.close()


def _lock(folder: Path):
    """Hold an exclusive lock on the sweep folder for as long as this run lives (the
    system releases it if the process is killed)."""
    fh = open(folder / "sweep.lock", "w")
    try:
        import fcntl

        fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except ImportError:  # no fcntl (Windows): no lock
        pass
    except OSError:
        fh.close()
        raise InputError.one(str(folder), None, "--out", "another sweep is running in this folder") from None
    return fh
