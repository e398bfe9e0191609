"""Running work in child processes that can be stopped: the multistart and sweeps.

:func:`run_killable` runs ``func(arg)`` for each item in a process of its own, at
most ``workers`` at a time. A process is killed when ``over_budget`` says so, and a
process that crashes is reported, never raised: one bad item never stops the others.
Children ignore Ctrl-C (the parent decides) and, on Linux, die with their parent, so
a parent killed outright leaves no orphans behind.
"""

from __future__ import annotations

import ctypes
import multiprocessing as mp
import multiprocessing.connection as mp_connection
import os
import signal
import time
import traceback


class ProcessEnded(str):
    """The text of an 'error' for a process that ended without sending a result;
    ``exitcode`` is its exit code (negative: the signal that killed it)."""

    exitcode: int | None = None

    @classmethod
    def of(cls, exitcode):
        if exitcode is not None and exitcode < 0:
            try:
                name = signal.Signals(-exitcode).name
            except ValueError:
                name = f"signal {-exitcode}"
            text = cls(f"the process was killed by {name}")
        else:
            text = cls(f"the process ended with exit code {exitcode}")
        text.exitcode = exitcode
        return text


def cpu_count() -> int:
    """Cores this process may use."""
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def context():
    """fork where available (fast start, no re-import), spawn elsewhere."""
    return mp.get_context("fork") if "fork" in mp.get_all_start_methods() else mp.get_context("spawn")


def die_with_parent() -> None:
    """Linux: have this process killed when its parent dies; a no-op elsewhere."""
    try:
        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


_PROGRESS = None  # in a child: the connection to the parent


def report_progress(payload) -> bool:
    """In a child process run by :func:`run_killable`: send ``payload`` to the
    parent's ``on_progress``. Returns False (and does nothing) elsewhere."""
    if _PROGRESS is None:
        return False
    try:
        _PROGRESS.send(("progress", payload))
    except (OSError, ValueError):
        return False
    return True


def _child(conn, func, arg, parent_pid) -> None:
    global _PROGRESS
    die_with_parent()
    if os.getppid() != parent_pid:  # the parent died before we asked to die with it
        os._exit(1)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _PROGRESS = conn
    try:
        conn.send(("ok", func(arg)))
    except BaseException as exc:  # noqa: BLE001 - reported to the parent, never raised here
        text = "".join(traceback.format_exception_only(type(exc), exc)).strip()
        conn.send(("error", text[-500:]))
    finally:
        conn.close()


def run_killable(items, func, workers: int, on_done, over_budget=None, on_start=None, should_stop=None,
                 on_progress=None) -> None:
    """Run ``func(arg)`` for every ``(key, arg)`` in ``items`` in child processes.

    Parameters
    ----------
    items : list of (key, arg)
        ``func`` and each ``arg`` must pickle where fork is not available.
    workers : int
        Processes at once.
    on_done : callable
        ``on_done(key, kind, payload, seconds)``: kind 'ok' (payload = the return
        value), 'error' (payload = text; a :class:`ProcessEnded` with the exit code
        when the process ended without a word) or 'killed' (payload = the budget's
        reason).
    over_budget : callable, optional
        ``over_budget(key, seconds_running) -> str or None``; a text kills the item.
    on_start : callable, optional
        ``on_start(key)`` when an item's process starts.
    should_stop : callable, optional
        Checked between events; True stops starting new items and kills the running.
    on_progress : callable, optional
        ``on_progress(key, payload)`` for what a child sends with :func:`report_progress`.
    """
    ctx = context()
    pending = list(items)
    running = {}  # key -> (process, connection, started)
    try:
        while pending or running:
            if should_stop and should_stop():
                break
            while pending and len(running) < workers:
                key, arg = pending.pop(0)
                parent, child = ctx.Pipe(duplex=False)
                proc = ctx.Process(target=_child, args=(child, func, arg, os.getpid()), daemon=True)
                proc.start()
                child.close()
                running[key] = (proc, parent, time.perf_counter())
                if on_start:
                    on_start(key)
            ready = mp_connection.wait([c for _, c, _ in running.values()], timeout=0.2)
            now = time.perf_counter()
            for key, (proc, conn, t0) in list(running.items()):
                if conn in ready:
                    try:
                        kind, payload = conn.recv()
                    except EOFError:
                        proc.join()
                        kind, payload = "error", ProcessEnded.of(proc.exitcode)
                    if kind == "progress":
                        if on_progress:
                            on_progress(key, payload)
                        continue
                    proc.join()
                    del running[key]
                    on_done(key, kind, payload, now - t0)
                    continue
                reason = over_budget(key, now - t0) if over_budget else None
                if reason:
                    proc.kill()
                    proc.join()
                    del running[key]
                    on_done(key, "killed", reason, now - t0)
    finally:
        for proc, _, _ in running.values():
            proc.kill()
            proc.join()
