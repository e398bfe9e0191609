"""Running one case, and running many: local case processes, or a Dask cluster.

Cases run in case processes, apart from the sweep (locally always; on a Dask
worker wherever the worker may have children), so a case that hangs past the time
limit is killed without disturbing the others, and a case that crashes is recorded
as an error. A case process is long-lived: it runs case after case and keeps
optfeed.solve's built solvers between them, so a sweep of many variants of one
problem builds its solvers once per process, not once per case. A case over its
time limit, or killed, takes its process with it and the next case gets a fresh
one; after a case that crashed, the process is replaced too. ``fresh_process``
(``--fresh-process-per-case``) gives every case a new process instead, as a
baseline. Each case writes the same run folder that ``optfeed optimize`` or
``optfeed check`` writes, under ``cases/<key>/``.

Landing a case is one step: the run folder is written under ``cases/.landing/``
together with ``outcome.json`` (the row the store records), then renamed into
``cases/<key>/``. A sweep killed between that rename and the store's record finds the
landed folder on resume and records it from ``outcome.json`` instead of computing
the case again.

A case that could not run for a reason outside it (its process killed by the
system, a full disk, a lost cluster worker or scheduler) ends as 'not run' with the
reason: that is not an answer, and the same command runs it again.
"""

from __future__ import annotations

import errno
import json
import multiprocessing as mp
import os
import re
import shutil
import signal
import threading
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError
from ..processes import ProcessEnded, WorkerPool, cpu_count

NOT_RUN = "not run"  # no answer, for a reason outside the case: the same command runs it again
LANDING = ".landing"  # cases/.landing/: run folders being written, before they land
OUTCOME_FILE = "outcome.json"
KEY_RE = re.compile(r"^[0-9a-f]{20}$")
NO_WORKER_TIMEOUT = 120.0  # s a Dask sweep waits with no worker before it gives up
CONNECT_TIMEOUT = 10.0  # s to reach a Dask scheduler

# signals that end a case from outside (the system's out-of-memory killer, a person,
# a shutdown): the case itself did nothing wrong and runs again
_OUTSIDE_SIGNALS = {signal.SIGKILL, signal.SIGTERM, signal.SIGINT, signal.SIGHUP}


@dataclass(frozen=True)
class Task:
    """Everything a worker needs for one case (plain, picklable)."""

    key: str
    data: dict
    source: str
    job: str
    schedule_text: str | None
    schedule_name: str | None
    run_dir: str
    time_limit: float  # s
    fresh_process: bool = False  # a new case process for this case (no solvers kept from earlier cases)


def run_case(task: Task) -> dict:
    """Run one case in this process and land its run folder; return its outcome.

    A full disk or memory exhausted gives a 'not run' outcome (nothing landed), so
    the same command runs the case again later."""
    try:
        return _run_case(task)
    except OSError as exc:
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            shutil.rmtree(Path(task.run_dir).parent / LANDING / task.key, ignore_errors=True)
            return _outcome(NOT_RUN, f"the disk is full ({exc.strerror}); free some space and run the same "
                                     "command again", 0.0)
        raise
    except MemoryError:
        return _outcome(NOT_RUN, "out of memory; run the same command again with fewer workers", 0.0)


def _run_case(task: Task) -> dict:
    from ..check import check, run_length
    from ..optimize import optimize
    from ..problem import problem_from_data
    from ..provenance import problem_digest
    from ..report import write_check_run, write_optimize_run
    from ..schedule import load_schedule
    from .outputs import PHASE_END, limit_figures

    t0 = time.perf_counter()
    target = Path(task.run_dir)
    landing = target.parent / LANDING
    landing.mkdir(exist_ok=True)
    staged = landing / task.key
    remove_entry(staged)  # left by an attempt that was killed
    remove_entry(target)  # landed by an earlier run of a case run again (--retry-failed)
    problem = problem_from_data(task.data, task.source)
    if task.job == "optimize":
        r = optimize(problem, workers=1)
        write_optimize_run(r, staged)
        figures = {"objective_nlp": r.objective_nlp, "spread": r.spread}
        if r.outcome is not None:
            figures.update({f.label: f.value for f in r.outcome.finals})
        figures.update({f"marginal: {v.name}": v.marginal_max for v in r.limits})
        figures.update(limit_figures([v.report for v in r.limits]))
        objective = r.objective_sim
        end_time = r.end_time
    else:
        sched_file = landing / f"{task.key}.{task.schedule_name}"
        sched_file.write_text(task.schedule_text)
        try:
            schedule = load_schedule(sched_file, [f.name for f in problem.feeds], run_length(problem), problem.phases)
        finally:
            sched_file.unlink()
        r = check(problem, schedule)
        write_check_run(r, staged)
        figures = {} if r.outcome is None else {f.label: f.value for f in r.outcome.finals}
        figures.update({f"slack: {x.name}": x.min_slack for x in r.limits})
        figures.update(limit_figures(r.limits))
        objective = None if r.outcome is None or r.outcome.objective is None else r.outcome.objective.value
        end_time = r.end_time
    # when each phase ended (the induction time a sweep may be about), h
    figures.update({f"{PHASE_END}{row.name}": row.end for row in r.phases if row.how != "end of run"})
    unit = getattr(r, "objective_unit", None)
    if unit is None and getattr(r, "outcome", None) is not None and r.outcome.objective is not None:
        unit = r.outcome.objective.unit
    outcome = {
        "status": r.status, "exit_code": r.exit_code, "objective": objective, "objective_unit": unit or "",
        "end_time_h": end_time, "figures": figures, "message": r.message, "run_dir": str(target),
        "seconds": time.perf_counter() - t0, "problem_digest": problem_digest(problem),
    }
    (staged / OUTCOME_FILE).write_text(json.dumps(outcome, default=_plain) + "\n")
    os.replace(staged, target)  # the case lands, with its outcome, in one step
    return outcome


def landed_outcome(run_dir) -> dict | None:
    """The outcome of a case that landed (``run_dir/outcome.json``), or None."""
    path = Path(run_dir) / OUTCOME_FILE
    try:
        if path.is_symlink() or not path.is_file():
            return None
        outcome = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    if not isinstance(outcome, dict) or "status" not in outcome:
        return None
    return {**outcome, "run_dir": str(run_dir)}


def remove_entry(path: Path) -> None:
    """Remove a file or folder this tool made, never following a symbolic link (a
    link is removed itself, not what it points to)."""
    if path.is_symlink() or path.is_file():
        path.unlink(missing_ok=True)
    elif path.is_dir():
        shutil.rmtree(path)


def clean_leftovers(cases: Path, known_keys) -> list[str]:
    """Remove what killed runs left half-written in ``cases/``: the landing folder's
    entries and (from older versions) hidden ``.<key>.*`` entries, only for keys of
    this store. Nothing is followed through a symbolic link. Returns what was removed."""
    removed = []
    landing = cases / LANDING
    if landing.is_symlink():
        raise InputError.one(str(landing), None, "--out", "is a symbolic link; optfeed makes this folder itself: "
                                                          "move the link away")
    if landing.is_dir():
        for entry in landing.iterdir():
            key = entry.name.lstrip(".").split(".")[0]  # KEY, KEY.<schedule>, .KEY.<temp>
            if KEY_RE.match(key) and key in known_keys:
                remove_entry(entry)
                removed.append(entry.name)
    for entry in cases.iterdir():
        m = re.match(r"^\.([0-9a-f]{20})\.", entry.name)
        if m and m.group(1) in known_keys:
            remove_entry(entry)
            removed.append(entry.name)
    return removed


def _plain(obj):
    try:
        return float(obj)
    except (TypeError, ValueError):
        return str(obj)


def _outcome(status: str, message: str, seconds: float) -> dict:
    return {"status": status, "exit_code": 3, "objective": None, "message": message, "run_dir": None,
            "seconds": seconds}


def run_case_limited(task: Task) -> dict:
    """Run a case in a case process of this thread, killed after ``task.time_limit``
    seconds (on a Dask worker). The process is kept for the thread's next case (and
    its solvers with it) unless ``task.fresh_process``.

    Where this process may not have children (a daemonic Dask worker), run it here
    instead: the solvers then stay in this process between cases; the limit cannot
    be enforced and is only recorded."""
    if mp.current_process().daemon:
        t0 = time.perf_counter()
        try:
            out = run_case(task)
        except Exception as exc:  # noqa: BLE001
            return _outcome("error", f"{type(exc).__name__}: {exc}", time.perf_counter() - t0)
        if out["seconds"] > task.time_limit:
            out["message"] += f" (took {out['seconds']:.0f} s, over the {task.time_limit:.0f} s limit)"
        return out
    box = {}
    if task.fresh_process:
        pool = WorkerPool(run_case, 1, reuse=False)
    else:  # one case process per thread: it dies with the thread that started it
        pool = getattr(_THREAD_POOL, "pool", None) or WorkerPool(run_case, 1, reuse=True)
        _THREAD_POOL.pool = pool
    try:
        run_in_pool(pool, [task], lambda t: None, lambda t, outcome: box.update(outcome=outcome), _worker_leaving())
    finally:
        if task.fresh_process:
            pool.close()
    if "outcome" not in box:  # the worker is closing: the case process was killed with it
        return _outcome(NOT_RUN, "the Dask worker closed while the case ran; run the same command again", 0.0)
    return box["outcome"]


_THREAD_POOL = threading.local()  # a Dask worker thread's case process (run_case_limited)


def _worker_leaving():
    """A check, true once the Dask worker running this task closes (or has failed):
    its case process must not outlive it. Always false outside a Dask worker."""
    try:
        from distributed import get_worker

        worker = get_worker()
    except (ImportError, ValueError):
        return lambda: False
    return lambda: getattr(worker.status, "name", "") in ("closing", "closed", "closing_gracefully", "failed")


def died_outcome(payload: str, exitcode, seconds: float) -> dict:
    """The outcome of a case whose process ended without a word: 'not run' if it was
    killed from outside (it runs again), 'error' if it crashed."""
    if exitcode is not None and exitcode < 0 and -exitcode in _OUTSIDE_SIGNALS:
        name = signal.Signals(-exitcode).name
        return _outcome(NOT_RUN, f"the case's process was killed from outside by {name} (the system's "
                                 "out-of-memory killer does this); run the same command again", seconds)
    return _outcome("error", payload, seconds)


def run_in_pool(pool: WorkerPool, tasks, on_start, on_done, should_stop) -> None:
    """Run ``tasks`` in ``pool``'s case processes: each one's outcome to
    ``on_done(task, outcome)``; a case over its time limit is stopped ('time limit');
    a process that ended without a word gives 'not run' or 'error' (:func:`died_outcome`)."""
    by_key = {t.key: t for t in tasks}

    def done(key, kind, payload, seconds):
        task = by_key[key]
        if kind == "ok":
            on_done(task, payload)
        elif kind == "killed":
            on_done(task, _outcome("time limit", payload, seconds))
        elif isinstance(payload, ProcessEnded):
            on_done(task, died_outcome(str(payload), payload.exitcode, seconds))
        else:
            on_done(task, _outcome("error", payload, seconds))

    def over_budget(key, seconds):
        limit = by_key[key].time_limit
        return f"stopped after the {limit:.0f} s time limit" if seconds > limit else None

    pool.run([(t.key, t) for t in tasks], done, over_budget, on_start=lambda key: on_start(by_key[key]),
             should_stop=should_stop)


class LocalExecutor:
    """Runs up to ``workers`` cases at once in long-lived case processes (each keeps
    its built solvers between cases), or with ``fresh_process`` in a new process per
    case."""

    def __init__(self, workers: int, fresh_process: bool = False):
        self.workers = max(1, int(workers))
        self.fresh_process = bool(fresh_process)

    def connect(self) -> None:
        """Nothing to reach (see :meth:`DaskExecutor.connect`)."""

    def close(self) -> None:
        pass

    def run(self, tasks, on_start, on_done, should_stop) -> None:
        pool = WorkerPool(run_case, self.workers, reuse=not self.fresh_process)
        try:
            run_in_pool(pool, tasks, on_start, on_done, should_stop)
        finally:
            pool.close()


_ADDRESS_RE = re.compile(r"^(?:(?:tcp|tls|ws|wss|ucx)://)?(?:\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.\-]+):(\d{1,5})$")


def check_address(address: str) -> None:
    """Refuse a scheduler address that is not ``[tcp://]HOST:PORT`` (also tls, ws, wss, ucx)."""
    if isinstance(address, str) and re.match(r"^inproc://\S+$", address):  # a cluster in this process
        return
    m = _ADDRESS_RE.match(address or "")
    if not m or not 0 < int(m.group(1)) < 65536:
        raise InputError.one("--scheduler", None, "--scheduler",
                             f"{address!r} is not a scheduler address; expected tcp://HOST:PORT, e.g. tcp://10.0.0.5:8786")


class DaskExecutor:
    """Runs cases on a Dask distributed cluster (``address`` of its scheduler).

    Parameters
    ----------
    address : str
        ``tcp://host:port`` (checked at once).
    no_worker_timeout : float
        Seconds without any worker (or without the scheduler) after which the
        remaining cases are recorded as not run and the sweep ends.
    """

    def __init__(self, address: str, no_worker_timeout: float = NO_WORKER_TIMEOUT):
        check_address(address)
        self.address = address
        self.no_worker_timeout = float(no_worker_timeout)
        self.client = None

    def connect(self) -> None:
        """Reach the scheduler (before anything is written); InputError if it cannot be reached."""
        try:
            from distributed import Client
        except ImportError:
            raise InputError.one("--scheduler", None, "--scheduler",
                                 "Dask is not installed: pip install 'optfeed[cluster]'") from None
        try:
            self.client = Client(self.address, timeout=f"{CONNECT_TIMEOUT:g}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError.one("--scheduler", None, "--scheduler",
                                 f"cannot reach a Dask scheduler at {self.address} within {CONNECT_TIMEOUT:g} s "
                                 f"({type(exc).__name__})") from None

    def close(self) -> None:
        if self.client is not None:
            try:
                self.client.close(timeout=5)
            except Exception:  # noqa: BLE001 - the scheduler may be gone already
                pass
            self.client = None

    def _workers(self) -> int:
        """Workers the scheduler knows now (0 if the scheduler itself is lost)."""
        if self.client is None or self.client.status != "running":
            return 0
        try:
            return len(self.client.scheduler_info().get("workers", {}))
        except Exception:  # noqa: BLE001
            return 0

    def run(self, tasks, on_start, on_done, should_stop) -> None:
        if self.client is None:
            self.connect()
        client = self.client
        pending = {}
        for task in tasks:
            fut = client.submit(run_case_limited, task, pure=False)  # a fresh key per run
            pending[fut] = task
            on_start(task)
        alone_since = None
        while pending:
            if should_stop():
                break
            finished = [f for f in pending if f.done()]
            for fut in finished:
                task = pending.pop(fut)
                on_done(task, self._outcome(fut))
            if finished:
                alone_since = None
                continue
            if self._workers() == 0:
                alone_since = alone_since or time.monotonic()
                if time.monotonic() - alone_since > self.no_worker_timeout:
                    what = "scheduler" if client.status != "running" else "worker"
                    for fut, task in pending.items():
                        on_done(task, _outcome(NOT_RUN, f"no Dask {what} for {self.no_worker_timeout:g} s; "
                                                        "run the same command again when the cluster is back", 0.0))
                    break
            else:
                alone_since = None
            time.sleep(0.2)
        for fut in pending:
            fut.cancel()

    @staticmethod
    def _outcome(fut) -> dict:
        """A finished future's outcome; any exception is the cluster's, not the case's
        (run_case_limited never raises for a case): the case was not run."""
        try:
            return fut.result(timeout=60)  # done: only the transfer from the worker is left
        except Exception as exc:  # noqa: BLE001 - worker lost (KilledWorker), scheduler lost (cancelled)...
            name, text = type(exc).__name__, str(exc)
            if "scheduler-connection-lost" in text or "Cancelled" in name:
                why = "the connection to the Dask scheduler was lost"
            elif name == "KilledWorker":
                why = "the Dask workers running it were lost, one after another"
            else:
                why = f"the Dask cluster lost it ({name}: {text.splitlines()[0][:160] if text else ''})"
            return _outcome(NOT_RUN, f"{why}; run the same command again", 0.0)


def default_workers() -> int:
    return cpu_count()
