"""Running one case, and running many: a local process per case, or a Dask cluster.

Every case runs in a process of its own where it can (locally always), so a case
that hangs past the time limit is killed without disturbing the others, and a case
that crashes is recorded as an error. Each case writes the same run folder that
``optfeed optimize`` or ``optfeed check`` writes, under ``cases/<key>/``.
"""

from __future__ import annotations

import ctypes
import multiprocessing as mp
import multiprocessing.connection as mp_connection
import os
import shutil
import signal
import time
import traceback
from dataclasses import dataclass
from pathlib import Path


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


def run_case(task: Task) -> dict:
    """Run one case in this process and write its run folder; return its outcome."""
    from ..check import check
    from ..optimize import optimize
    from ..problem import problem_from_data
    from ..report import write_check_run, write_optimize_run
    from ..schedule import load_schedule

    t0 = time.perf_counter()
    target = Path(task.run_dir)
    if target.exists():  # left by a run that was killed before it was recorded
        shutil.rmtree(target)
    problem = problem_from_data(task.data, task.source)
    if task.job == "optimize":
        r = optimize(problem, workers=1)
        write_optimize_run(r, target)
        figures = {"objective_nlp": r.objective_nlp, "spread": r.spread}
        if r.outcome is not None:
            figures.update({f.label: f.value for f in r.outcome.finals})
        figures.update({f"marginal: {v.name}": v.marginal_max for v in r.limits})
        objective = r.objective_sim
        end_time = r.end_time
    else:
        sched_file = target.parent / f".{task.key}.{task.schedule_name}"
        sched_file.write_text(task.schedule_text)
        try:
            tf = problem.horizon.end_time if not problem.horizon.free else None
            schedule = load_schedule(sched_file, [f.name for f in problem.feeds], tf)
        finally:
            sched_file.unlink()
        r = check(problem, schedule)
        write_check_run(r, target)
        figures = {} if r.outcome is None else {f.label: f.value for f in r.outcome.finals}
        figures.update({f"slack: {x.name}": x.min_slack for x in r.limits})
        objective = None if r.outcome is None or r.outcome.objective is None else r.outcome.objective.value
        end_time = r.end_time
    from ..provenance import problem_digest

    unit = getattr(r, "objective_unit", None)
    if unit is None and getattr(r, "outcome", None) is not None and r.outcome.objective is not None:
        unit = r.outcome.objective.unit
    return {
        "status": r.status, "exit_code": r.exit_code, "objective": objective, "objective_unit": unit or "",
        "end_time_h": end_time, "figures": figures, "message": r.message, "run_dir": str(target),
        "seconds": time.perf_counter() - t0, "problem_digest": problem_digest(problem),
    }


def _error_outcome(task: Task, status: str, message: str, seconds: float) -> dict:
    return {"status": status, "exit_code": 3, "objective": None, "message": message, "run_dir": None,
            "seconds": seconds}


def _die_with_parent() -> None:
    """Linux: have this process killed when its parent dies (so a killed sweep
    leaves no orphans behind); a no-op elsewhere."""
    try:
        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _child(conn, task: Task) -> None:
    _die_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    try:
        conn.send(("ok", run_case(task)))
    except BaseException as exc:  # noqa: BLE001 - recorded, never raised across processes
        text = "".join(traceback.format_exception_only(type(exc), exc)).strip()
        conn.send(("error", text[-500:]))
    finally:
        conn.close()


def _context():
    return mp.get_context("fork") if "fork" in mp.get_all_start_methods() else mp.get_context("spawn")


def run_case_limited(task: Task) -> dict:
    """Run a case in a child process, killed after ``task.time_limit`` seconds.

    Where this process may not have children (a daemonic Dask worker), run it here
    instead; the limit then cannot be enforced and is only recorded."""
    t0 = time.perf_counter()
    if mp.current_process().daemon:
        try:
            out = run_case(task)
        except Exception as exc:  # noqa: BLE001
            return _error_outcome(task, "error", f"{type(exc).__name__}: {exc}", time.perf_counter() - t0)
        if out["seconds"] > task.time_limit:
            out["message"] += f" (took {out['seconds']:.0f} s, over the {task.time_limit:.0f} s limit)"
        return out
    ctx = _context()
    parent, child = ctx.Pipe(duplex=False)
    proc = ctx.Process(target=_child, args=(child, task), daemon=True)
    proc.start()
    child.close()
    try:
        if parent.poll(task.time_limit):
            try:
                kind, payload = parent.recv()
            except EOFError:
                kind, payload = "error", f"the case's process ended with exit code {proc.exitcode}"
        else:
            kind, payload = "timeout", None
    finally:
        if proc.is_alive():
            proc.kill()
        proc.join()
    seconds = time.perf_counter() - t0
    if kind == "ok":
        return payload
    if kind == "timeout":
        return _error_outcome(task, "time limit", f"stopped after the {task.time_limit:.0f} s time limit", seconds)
    return _error_outcome(task, "error", payload, seconds)


class LocalExecutor:
    """Runs up to ``workers`` cases at once, each in its own process."""

    def __init__(self, workers: int):
        self.workers = max(1, int(workers))

    def run(self, tasks, on_start, on_done, should_stop) -> None:
        ctx = _context()
        pending = list(tasks)
        running = {}  # key -> (process, connection, started, task)
        try:
            while pending or running:
                if should_stop():
                    break
                while pending and len(running) < self.workers:
                    task = pending.pop(0)
                    parent, child = ctx.Pipe(duplex=False)
                    proc = ctx.Process(target=_child, args=(child, task), daemon=True)
                    proc.start()
                    child.close()
                    running[task.key] = (proc, parent, time.perf_counter(), task)
                    on_start(task)
                ready = mp_connection.wait([c for _, c, _, _ in running.values()], timeout=0.2)
                now = time.perf_counter()
                for key, (proc, conn, t0, task) in list(running.items()):
                    if conn in ready:
                        try:
                            kind, payload = conn.recv()
                        except EOFError:
                            kind, payload = "error", f"the case's process ended with exit code {proc.exitcode}"
                        proc.join()
                        del running[key]
                        on_done(task, payload if kind == "ok" else _error_outcome(task, "error", payload, now - t0))
                    elif now - t0 > task.time_limit:
                        proc.kill()
                        proc.join()
                        del running[key]
                        on_done(task, _error_outcome(task, "time limit",
                                                     f"stopped after the {task.time_limit:.0f} s time limit", now - t0))
        finally:
            for proc, _, _, _ in running.values():
                proc.kill()
                proc.join()


class DaskExecutor:
    """Runs cases on a Dask distributed cluster (``address`` of its scheduler)."""

    def __init__(self, address: str):
        self.address = address

    def run(self, tasks, on_start, on_done, should_stop) -> None:
        try:
            from distributed import Client, as_completed
        except ImportError:
            from ..errors import InputError

            raise InputError.one("--scheduler", None, "--scheduler",
                                 "Dask is not installed: pip install 'optfeed[cluster]'") from None

        with Client(self.address, timeout="30s") as client:
            futures = {}
            for task in tasks:
                fut = client.submit(run_case_limited, task, key=f"optfeed-{task.key}", pure=False)
                futures[fut] = task
                on_start(task)
            for fut in as_completed(list(futures)):
                task = futures[fut]
                try:
                    outcome = fut.result()
                except Exception as exc:  # noqa: BLE001 - worker lost, cancelled...
                    outcome = _error_outcome(task, "error", f"{type(exc).__name__}: {exc}", 0.0)
                on_done(task, outcome)
                if should_stop():
                    for f in futures:
                        f.cancel()
                    break


def default_workers() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
