"""Running one case, and running many: a local process per case, or a Dask cluster.

Every case runs in a process of its own where it can (locally always), so a case
that hangs past the time limit is killed without disturbing the others, and a case
that crashes is recorded as an error. Each case writes the same run folder that
``optfeed optimize`` or ``optfeed check`` writes, under ``cases/<key>/``.
"""

from __future__ import annotations

import multiprocessing as mp
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from ..processes import cpu_count, run_killable


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
    from ..check import check, run_length
    from ..optimize import optimize
    from ..problem import problem_from_data
    from ..provenance import problem_digest
    from ..report import write_check_run, write_optimize_run
    from ..schedule import load_schedule
    from .outputs import limit_figures

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
        figures.update(limit_figures([v.report for v in r.limits]))
        objective = r.objective_sim
        end_time = r.end_time
    else:
        sched_file = target.parent / f".{task.key}.{task.schedule_name}"
        sched_file.write_text(task.schedule_text)
        try:
            schedule = load_schedule(sched_file, [f.name for f in problem.feeds], run_length(problem))
        finally:
            sched_file.unlink()
        r = check(problem, schedule)
        write_check_run(r, target)
        figures = {} if r.outcome is None else {f.label: f.value for f in r.outcome.finals}
        figures.update({f"slack: {x.name}": x.min_slack for x in r.limits})
        figures.update(limit_figures(r.limits))
        objective = None if r.outcome is None or r.outcome.objective is None else r.outcome.objective.value
        end_time = r.end_time
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


def run_case_limited(task: Task) -> dict:
    """Run a case in a child process, killed after ``task.time_limit`` seconds.

    Where this process may not have children (a daemonic Dask worker), run it here
    instead; the limit then cannot be enforced and is only recorded."""
    if mp.current_process().daemon:
        t0 = time.perf_counter()
        try:
            out = run_case(task)
        except Exception as exc:  # noqa: BLE001
            return _error_outcome(task, "error", f"{type(exc).__name__}: {exc}", time.perf_counter() - t0)
        if out["seconds"] > task.time_limit:
            out["message"] += f" (took {out['seconds']:.0f} s, over the {task.time_limit:.0f} s limit)"
        return out
    box = {}
    LocalExecutor(1).run([task], lambda t: None, lambda t, outcome: box.update(outcome=outcome), lambda: False)
    return box["outcome"]


class LocalExecutor:
    """Runs up to ``workers`` cases at once, each in its own killable process."""

    def __init__(self, workers: int):
        self.workers = max(1, int(workers))

    def run(self, tasks, on_start, on_done, should_stop) -> None:
        by_key = {t.key: t for t in tasks}

        def done(key, kind, payload, seconds):
            task = by_key[key]
            if kind == "ok":
                on_done(task, payload)
            elif kind == "killed":
                on_done(task, _error_outcome(task, "time limit", payload, seconds))
            else:
                on_done(task, _error_outcome(task, "error", payload, seconds))

        def over_budget(key, seconds):
            limit = by_key[key].time_limit
            return f"stopped after the {limit:.0f} s time limit" if seconds > limit else None

        run_killable([(t.key, t) for t in tasks], run_case, self.workers, done, over_budget,
                     on_start=lambda key: on_start(by_key[key]), should_stop=should_stop)


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
                fut = client.submit(run_case_limited, task, pure=False)  # a fresh key per run
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
    return cpu_count()
