"""Running work in child processes that can be stopped: the multistart and sweeps.

:func:`run_killable` runs ``func(arg)`` for each item in child processes, at most
``workers`` at a time. By default each item gets a process of its own; with
``reuse=True`` a process runs item after item (a :class:`WorkerPool`), so what it
keeps in memory between items (optfeed.solve's built solvers) serves them all. Either
way, a process is killed when ``over_budget`` says so (and replaced by a fresh one),
and a process that crashes is reported, never raised: one bad item never stops the
others. Children ignore Ctrl-C (the parent decides) and, on Linux, die with the
thread that started them, so a parent killed outright leaves no orphans behind.
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
    """Linux: have this process killed when its parent dies (strictly: when the
    parent's thread that started it ends); a no-op elsewhere."""
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


def _child(conn, func, first, parent_pid, reuse) -> None:
    """A child's life: run ``first``, then (``reuse``) each item the parent sends,
    until it sends None or goes away. After an item that raised, the child ends (the
    parent knows, and sends it nothing more): a process in an unknown state runs
    nothing else."""
    global _PROGRESS
    die_with_parent()
    if os.getppid() != parent_pid:  # the parent died before we asked to die with it
        os._exit(1)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _PROGRESS = conn
    item = first
    try:
        while item is not None:
            try:
                conn.send(("ok", func(item)))
            except BaseException as exc:  # noqa: BLE001 - reported to the parent, never raised here
                text = "".join(traceback.format_exception_only(type(exc), exc)).strip()
                conn.send(("error", text[-500:]))
                return
            if not reuse:
                return
            try:
                item = conn.recv()
            except (EOFError, OSError):
                return
    finally:
        conn.close()


class _Worker:
    """One child process of a :class:`WorkerPool` and the item it runs (if any)."""

    def __init__(self, ctx, func, key, arg, reuse):
        parent, child = ctx.Pipe(duplex=True)
        self.proc = ctx.Process(target=_child, args=(child, func, arg, os.getpid(), reuse), daemon=True)
        self.proc.start()
        child.close()
        self.conn = parent
        self.key, self.started = key, time.perf_counter()

    def give(self, key, arg) -> bool:
        """Send the next item; False if the process is gone (it is then closed)."""
        try:
            self.conn.send(arg)
        except (OSError, ValueError):  # BrokenPipeError: it died while idle
            self.close(kill=True)
            return False
        self.key, self.started = key, time.perf_counter()
        return True

    def close(self, kill: bool = False) -> None:
        if kill and self.proc.is_alive():
            self.proc.kill()
        elif not kill and self.proc.is_alive():
            try:
                self.conn.send(None)  # idle: asked to end
            except (OSError, ValueError):
                pass
            self.proc.join(timeout=2.0)
            if self.proc.is_alive():
                self.proc.kill()
        self.proc.join()
        self.conn.close()


class WorkerPool:
    """Up to ``workers`` child processes running ``func(arg)``; with ``reuse`` each
    process runs many items in turn and stays between calls of :meth:`run`, until
    :meth:`close`. Without ``reuse`` each item gets a fresh process (forked with
    its item: nothing is pickled where fork is available).

    A process whose item is over budget, or is stopped, is killed; the next item gets
    a fresh process. Use one pool from one thread: its processes die with the thread
    that started them (Linux), never outliving it.
    """

    def __init__(self, func, workers: int, reuse: bool = True):
        self.func, self.workers, self.reuse = func, max(1, int(workers)), bool(reuse)
        self.ctx = context()
        self._idle: list[_Worker] = []

    def _start(self, key, arg) -> _Worker:
        if self.reuse:
            while self._idle:
                w = self._idle.pop()
                if w.proc.is_alive() and w.give(key, arg):
                    return w
                w.close(kill=True)
        return _Worker(self.ctx, self.func, key, arg, self.reuse)

    def run(self, items, on_done, over_budget=None, on_start=None, should_stop=None, on_progress=None) -> None:
        """Run every ``(key, arg)`` of ``items``; see :func:`run_killable` for the callbacks."""
        pending = list(items)
        running: dict = {}  # key -> _Worker
        try:
            while pending or running:
                if should_stop and should_stop():
                    break
                while pending and len(running) < self.workers:
                    key, arg = pending.pop(0)
                    running[key] = self._start(key, arg)
                    if on_start:
                        on_start(key)
                conns = [w.conn for w in running.values()] + [w.conn for w in self._idle]
                ready = mp_connection.wait(conns, timeout=0.2)
                for w in [w for w in self._idle if w.conn in ready]:  # an idle process ended (killed from outside)
                    self._idle.remove(w)
                    w.close(kill=True)
                now = time.perf_counter()
                for key, w in list(running.items()):
                    if w.conn in ready:
                        try:
                            kind, payload = w.conn.recv()
                        except (EOFError, OSError):
                            w.proc.join()
                            kind, payload = "error", ProcessEnded.of(w.proc.exitcode)
                            w.conn.close()
                        else:
                            if kind == "progress":
                                if on_progress:
                                    on_progress(key, payload)
                                continue
                            if self.reuse and kind == "ok":
                                self._idle.append(w)
                            else:  # its one item is done, or it raised and ends
                                w.close()
                        del running[key]
                        on_done(key, kind, payload, now - w.started)
                        continue
                    reason = over_budget(key, now - w.started) if over_budget else None
                    if reason:
                        w.close(kill=True)
                        del running[key]
                        on_done(key, "killed", reason, now - w.started)
        finally:
            for w in running.values():  # stopped, interrupted or failed: the running items end now
                w.close(kill=True)

    def close(self) -> None:
        """End the idle processes."""
        while self._idle:
            self._idle.pop().close()

    @property
    def processes(self) -> list:
        """The idle processes kept for the next items (for tests)."""
        return [w.proc for w in self._idle]


def run_killable(items, func, workers: int, on_done, over_budget=None, on_start=None, should_stop=None,
                 on_progress=None, reuse: bool = False) -> None:
    """Run ``func(arg)`` for every ``(key, arg)`` in ``items`` in child processes.

    Parameters
    ----------
    items : list of (key, arg)
        ``func`` and each ``arg`` must pickle where fork is not available (and every
        ``arg`` after a process's first must pickle with ``reuse``).
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
        ``on_start(key)`` when an item starts (its process is running by then).
    should_stop : callable, optional
        Checked between events; True stops starting new items and kills the running.
    on_progress : callable, optional
        ``on_progress(key, payload)`` for what a child sends with :func:`report_progress`.
    reuse : bool
        Let each process run item after item (default: a fresh process per item).
        The processes end when this returns.
    """
    pool = WorkerPool(func, workers, reuse)
    try:
        pool.run(items, on_done, over_budget, on_start, should_stop, on_progress)
    finally:
        pool.close()
