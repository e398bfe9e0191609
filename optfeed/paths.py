"""Paths written in input files, and the places results go.

A path written in a file (a sweep's problem files and schedule; the data files of a
calibration) must resolve inside the folder it is meant for: a file can then never
make optfeed read or write anywhere else. :func:`inside` and :func:`glob_inside`
check that, after following symbolic links, and raise :class:`InputError` naming the
file, line and key where the path was written.

:func:`check_output_parent` looks at where results are about to go before any work
starts: a run that would fail to write its results after an hour of computing is
bad input now.
"""

from __future__ import annotations

import glob
import itertools
import os
import re
import stat
import tempfile
from pathlib import Path

from .errors import InputError

# a name that becomes a folder: letters, digits, '_', '-', '.', not starting with '.'
SAFE_NAME = re.compile(r"^[A-Za-z0-9_\-][A-Za-z0-9_.\-]{0,79}$")
MAX_GLOB_MATCHES = 1000


def safe_folder_name(name: str, default: str = "problem") -> str:
    """``name`` made safe for a results folder (a file's stem may hold anything)."""
    return name if SAFE_NAME.match(name) else (re.sub(r"[^A-Za-z0-9_.\-]+", "_", name).lstrip(".") or default)[:80]


def why_not_folder_name(name) -> str | None:
    """Why ``name`` cannot name a results folder, or None if it can."""
    if not isinstance(name, str) or not SAFE_NAME.match(name):
        return (f"name {name!r} is used for result folders: 1 to 80 letters, digits, '_', '-' and '.', "
                "not starting with '.'")
    return None


def inside(text, folder, file, line, key, what: str = "file") -> Path:
    """The path ``text`` (written in ``file`` at ``line`` under ``key``), relative to
    ``folder``; it must resolve inside ``folder`` (symbolic links followed).

    Parameters
    ----------
    text : str
        The path as written; absolute paths and '..' are allowed only if they
        still lead inside ``folder``.
    folder : path
        The folder the path is meant for (a sweep's: the sweep file's folder).
    what : str
        What the path names, for messages ('problem file', 'schedule', ...).

    Returns
    -------
    Path
        Absolute, resolved.

    Raises
    ------
    InputError
        For a value that is not a path, or a path leading outside ``folder``.
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError.one(file, line, key, f"expected the name of a {what}, got {text!r}")
    if "\x00" in text:
        raise InputError.one(file, line, key, f"the {what} name holds a NUL character")
    base = Path(folder).resolve()
    target = (base / text).resolve()
    if not target.is_relative_to(base):
        raise InputError.one(file, line, key, f"{text!r} leads outside {base}; a {what} named in {Path(file).name} "
                                              "must lie in its folder or below it")
    return target


def glob_inside(pattern, folder, file, line, key, what: str = "file", limit: int = MAX_GLOB_MATCHES) -> list[Path]:
    """The files matching ``pattern`` (relative to ``folder``), each of which must
    resolve inside ``folder``; at least one and at most ``limit``, sorted.

    The matches are counted as they are found: a pattern matching a million files
    is refused after ``limit + 1``, without listing them all.
    """
    if not isinstance(pattern, str) or not pattern.strip():
        raise InputError.one(file, line, key, f"expected a {what} name or a glob, got {pattern!r}")
    base = Path(folder).resolve()
    if Path(pattern).is_absolute() or ".." in Path(pattern).parts:
        inside(pattern, folder, file, line, key, what)  # a plain path may still lead inside
        if not glob.has_magic(pattern):
            return [inside(pattern, folder, file, line, key, what)]
        raise InputError.one(file, line, key, f"the glob {pattern!r} must be relative to the folder of "
                                              f"{Path(file).name}, without '..'")
    found = list(itertools.islice(glob.iglob(pattern, root_dir=str(base)), limit + 1))
    if len(found) > limit:
        raise InputError.one(file, line, key, f"{pattern!r} matches more than {limit} files; at most {limit} "
                                              f"{what}s are taken: narrow the pattern")
    if not found:
        raise InputError.one(file, line, key, f"no {what} matches {pattern!r} (relative to {base})")
    return sorted({inside(m, base, file, line, key, what) for m in found})


def check_output_parent(target, option: str) -> None:
    """Check that the folder ``target`` (not existing yet, or an existing folder for
    a sweep) can be made and written, before any work starts.

    Every part of the path that exists must be a folder (a file in the way is
    refused), every part to be made must have a name the file system takes, and the
    nearest existing folder must accept a new entry (tried for real, and removed:
    a read-only or full file system is found here, not after the work).

    Raises
    ------
    InputError
        Naming ``option`` (``--out``, ``--results``) and what is wrong.
    """
    check_output_names(target, option)
    path = Path(target)
    existing = _nearest_existing(path.absolute())
    try:
        info = existing.stat()
    except OSError as exc:
        raise InputError.one(option, None, option, f"{existing} cannot be used ({exc.strerror})") from None
    if not stat.S_ISDIR(info.st_mode):
        raise InputError.one(option, None, option, f"{existing} is a file, not a folder; results cannot be put "
                                                    f"{'in' if existing == path.absolute() else 'under'} it")
    try:
        probe = tempfile.mkdtemp(prefix=".optfeed-probe-", dir=existing)
    except OSError as exc:
        raise InputError.one(option, None, option, f"cannot write in {existing} ({exc.strerror})") from None
    os.rmdir(probe)


def check_output_names(target, option: str) -> None:
    """Refuse an empty output path, or one with a part longer than the file system
    takes (looked at before anything else touches the path)."""
    if str(target).strip() == "":
        raise InputError.one(option, None, option, "is empty; give a folder name")
    path = Path(target)
    try:
        max_name = os.pathconf(_nearest_existing(path.absolute()), "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):  # no pathconf (Windows): the common limit
        max_name = 255
    for part in path.parts:
        if len(os.fsencode(part)) > max_name:
            raise InputError.one(option, None, option, f"the name {part[:40]!r}... is longer than the "
                                                        f"{max_name} bytes a folder name may have here")


def _nearest_existing(path: Path) -> Path:
    """``path`` or its nearest ancestor that exists (a dangling link counts as existing)."""
    p = path
    while not os.path.lexists(p) and p != p.parent:
        p = p.parent
    return p
