"""Where a result came from: tool version, problem digest, time stamp."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import platform

from . import __version__
from .expr import Expr


# where a problem was read from, not what it is
_NOT_DIGESTED = ("data", "source", "warnings", "covariance_file")


def _plain(obj):
    if isinstance(obj, Expr):
        return obj.text
    if dataclasses.is_dataclass(obj):
        return {f.name: _plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)
                if f.name not in _NOT_DIGESTED
                # a problem without an uncertainty section keeps the digest it had before there was one
                and not (f.name == "uncertainty" and getattr(obj, f.name) is None)}
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, float):
        return repr(obj)
    return obj


def problem_digest(problem) -> str:
    """SHA-256 of the resolved problem (internal units; not its file name or layout)."""
    text = json.dumps(_plain(problem), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def stamp() -> dict:
    """Tool version, Python, and the UTC time, for a result's record."""
    import casadi

    return {
        "optfeed": __version__,
        "casadi": casadi.__version__,
        "python": platform.python_version(),
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }
