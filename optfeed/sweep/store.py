"""The sweep store: one SQLite file, one row per case.

Rows are written as cases are queued, started and finished, each in its own
transaction, so a sweep killed at any moment loses nothing that finished. A row whose
status is final is never run again; a row left 'running' by a killed sweep, and a
row 'not run' (its process or worker was lost, the disk was full), is run again on
resume.
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from pathlib import Path

FINAL = ("optimal, verified", "converged, not verified", "infeasible", "iteration limit", "failed",
         "within limits", "limit broken", "simulation failed", "time limit", "error")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS cases (
    key TEXT PRIMARY KEY,
    label TEXT NOT NULL,
    source TEXT NOT NULL,
    job TEXT NOT NULL,
    values_json TEXT NOT NULL,
    problem_digest TEXT,
    status TEXT NOT NULL,
    exit_code INTEGER,
    objective REAL,
    objective_unit TEXT,
    end_time_h REAL,
    figures_json TEXT,
    message TEXT,
    run_dir TEXT,
    seconds REAL,
    queued_at REAL,
    started_at REAL,
    finished_at REAL
)
"""


COLUMNS = ("key", "label", "source", "job", "values_json", "problem_digest", "status", "exit_code", "objective",
           "objective_unit", "end_time_h", "figures_json", "message", "run_dir", "seconds", "queued_at",
           "started_at", "finished_at")


def store_problem(path) -> str | None:
    """Why the file at ``path`` is not a sweep store optfeed can use, or None (also
    None when there is no file yet). Reads only; leaves nothing behind."""
    path = Path(path)
    if not os.path.lexists(path):
        return None
    if path.is_symlink():
        return "is a symbolic link; optfeed makes this file itself: move the link away"
    if not path.is_file():
        return "is not a regular file"
    if path.stat().st_size == 0:
        return None  # an empty file is an empty database
    try:
        db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5.0)
    except sqlite3.Error as exc:
        return f"cannot be opened as a sweep store ({exc})"
    try:
        tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if "cases" not in tables:
            return (f"is an SQLite file without optfeed's 'cases' table (it holds {', '.join(sorted(tables)) or 'nothing'})"
                    "; move it away or choose another --out")
        columns = tuple(r[1] for r in db.execute("PRAGMA table_info(cases)"))
        if columns != COLUMNS:
            return ("holds a 'cases' table of another shape (not this version's sweep store); move it away or "
                    "choose another --out")
    except sqlite3.DatabaseError as exc:
        return f"cannot be read as a sweep store ({exc}); move it away to start afresh"
    finally:
        db.close()
    return None


class Store:
    """The SQLite store of one sweep (``path``, created if missing)."""

    def __init__(self, path):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.db = sqlite3.connect(str(self.path), timeout=30.0, isolation_level=None)
        try:
            self.db.execute("PRAGMA journal_mode=WAL")
            self.db.execute("PRAGMA synchronous=NORMAL")
            self.db.execute(_SCHEMA)
        except sqlite3.DatabaseError:
            self.db.close()
            raise

    def keys(self) -> set:
        return {r[0] for r in self.db.execute("SELECT key FROM cases")}

    def close(self) -> None:
        self.db.close()

    def queue(self, cases, job: str) -> None:
        """Add cases not yet known (existing rows are left as they are)."""
        now = time.time()
        with self.db:
            self.db.execute("BEGIN")
            self.db.executemany(
                "INSERT OR IGNORE INTO cases (key, label, source, job, values_json, status, queued_at) "
                "VALUES (?, ?, ?, ?, ?, 'queued', ?)",
                [(c.key, c.label, c.source, job, json.dumps(c.values, default=str), now) for c in cases])

    def done_keys(self) -> set:
        rows = self.db.execute(f"SELECT key FROM cases WHERE status IN ({','.join('?' * len(FINAL))})", FINAL)
        return {r[0] for r in rows}

    def mark_running(self, key: str) -> None:
        self.db.execute("UPDATE cases SET status='running', started_at=? WHERE key=?", (time.time(), key))

    def mark_queued(self, keys) -> None:
        """Rows still 'running' (a run that stopped) go back to the queue."""
        self.db.executemany("UPDATE cases SET status='queued' WHERE key=? AND status='running'",
                            [(k,) for k in keys])

    def finish(self, key: str, outcome: dict) -> None:
        self.db.execute(
            "UPDATE cases SET status=?, exit_code=?, objective=?, objective_unit=?, end_time_h=?, figures_json=?, "
            "message=?, run_dir=?, seconds=?, problem_digest=?, finished_at=? WHERE key=?",
            (outcome["status"], outcome.get("exit_code"), outcome.get("objective"), outcome.get("objective_unit"),
             outcome.get("end_time_h"), json.dumps(outcome.get("figures", {})), outcome.get("message", ""),
             outcome.get("run_dir"), outcome.get("seconds"), outcome.get("problem_digest"), time.time(), key))

    def rows(self, keys=None) -> list[dict]:
        cur = self.db.execute("SELECT * FROM cases ORDER BY queued_at, rowid")
        names = [d[0] for d in cur.description]
        out = [dict(zip(names, r)) for r in cur.fetchall()]
        if keys is not None:
            keys = set(keys)
            out = [r for r in out if r["key"] in keys]
        for r in out:
            r["values"] = json.loads(r.pop("values_json"))
            r["figures"] = json.loads(r.pop("figures_json") or "{}")
        return out

    def counts(self) -> dict:
        return dict(self.db.execute("SELECT status, COUNT(*) FROM cases GROUP BY status").fetchall())
