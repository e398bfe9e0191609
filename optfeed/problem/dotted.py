"""Dotted paths into a problem file's data: ``vessel.oxygen.transfer_max``, ``limits.0.max``.

One mechanism for everything that changes a value of a problem file by name: the
sweep's ``grid``/``zip``/``sample`` entries, ``set=`` of the Python API and
``--set key=value`` on the command line.

A path names a value that exists in the file, or a key the file could hold but
leaves at its default (``solver.starts`` in a file without a ``solver`` section).
Names under ``species``, ``parameters``, ``rates``, ``feeds`` and the other
mappings of the user's own names must already exist: setting an unknown parameter
would change nothing, so it is an error, not a silent no-op.
"""

from __future__ import annotations

import copy
import difflib

from ..errors import InputError, Issue


class PathError(ValueError):
    """A dotted path that names no value of the problem file; the text is for people."""


def set_path(data: dict, dotted: str, value, problem_file: str) -> None:
    """Set ``value`` at ``dotted`` in the plain problem data ``data`` (in place).

    Raises
    ------
    PathError
        For a path that names nothing settable, or a value that is not a single
        value (a number, a text such as ``'0.5 1/h'``, or a boolean).
    """
    if not isinstance(dotted, str) or not dotted.strip():
        raise PathError("expected a dotted path such as 'parameters.mu_max'")
    if isinstance(value, (dict, list, tuple, set)):
        raise PathError("each value must be a single value")
    parts = dotted.strip().split(".")
    node = data
    for k, part in enumerate(parts):
        last = k == len(parts) - 1
        where = ".".join(parts[:k]) or "the top level"
        if isinstance(node, dict):
            if part not in node:
                allowed = _schema_keys(parts[:k])
                if part not in allowed:
                    close = difflib.get_close_matches(part, list(node) + allowed, n=3, cutoff=0.5)
                    hint = (f"did you mean {', '.join(map(repr, close))}?" if close else
                            f"{where} has {', '.join(map(str, node)) or 'nothing'}")
                    raise PathError(f"{problem_file} has no value at this path ({part!r} not found; {hint})")
                node[part] = value if last else {}
            elif last:
                node[part] = value
            if not last:
                node = node[part]
        elif isinstance(node, list):
            if not (part.isascii() and part.isdigit()) or int(part) >= len(node):  # not '²'
                raise PathError(f"{problem_file} has no item {part!r} here (the list has {len(node)} items)")
            if last:
                node[int(part)] = value
            else:
                node = node[int(part)]
        else:
            raise PathError(f"{problem_file}: {where} is a single value, not a mapping")


WHERE = "override"  # what an issue about an override names instead of a file


def apply_overrides(data: dict, overrides: dict, problem_file: str, where: str = WHERE) -> dict:
    """A copy of ``data`` with every ``dotted path -> value`` of ``overrides`` set.

    Raises
    ------
    InputError
        One issue per bad path, each naming ``where`` and the path.
    """
    if not isinstance(overrides, dict):
        raise InputError.one(where, None, "", "expected a mapping of dotted path -> value, "
                                              "e.g. {'parameters.mu_max': '0.5 1/h'}")
    out = copy.deepcopy(data)
    issues = []
    for dotted, value in overrides.items():
        try:
            set_path(out, dotted, value, problem_file)
        except PathError as exc:
            issues.append((str(dotted), str(exc)))
    if issues:
        raise InputError([Issue(where, None, key, msg) for key, msg in issues])
    return out


def _schema_keys(loc) -> list[str]:
    """Keys the problem-file schema allows at ``loc`` (a model's fields; [] under a
    mapping of the user's own names)."""
    from . import schema
    from .load import _fields_at

    return _fields_at(schema.ProblemIn, tuple(loc))


def note_overrides(exc: InputError, overrides: dict) -> InputError:
    """``exc`` with every issue about an overridden key marked as such, so that a
    bad value given by ``set=``/``--set`` is not blamed on the file's line."""
    given = {str(k).strip(): v for k, v in overrides.items()}
    issues = []
    for i in exc.issues:
        dotted = i.key.replace("[", ".").replace("]", "")
        if dotted in given:
            i = Issue(i.file, i.line, i.key, f"{i.message} (the value {given[dotted]!r} was given as an {WHERE})")
        issues.append(i)
    return InputError(issues)


def as_problem(problem, overrides: dict | None = None):
    """A checked :class:`~optfeed.problem.Problem` from a Problem or a problem file,
    with ``overrides`` (dotted path -> value) applied.

    Raises
    ------
    InputError
        For a bad file, a bad path, or a value the problem cannot take.
    """
    from .load import load_problem, problem_from_data
    from .spec import Problem

    if not isinstance(problem, Problem):
        return load_problem(problem, set=overrides)
    if not overrides:
        return problem
    data = apply_overrides(problem.data, overrides, problem.source)
    try:
        return problem_from_data(data, problem.source)
    except InputError as exc:
        raise note_overrides(exc, overrides) from None
