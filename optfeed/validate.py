"""The validate job: read and check a problem (and a schedule), solve nothing."""

from __future__ import annotations

from dataclasses import dataclass

from . import status as st
from .problem import Problem
from .problem.dotted import as_problem
from .schedule import Schedule, checked_schedule, load_schedule


@dataclass(frozen=True)
class ValidateResult:
    """What ``optfeed validate`` found (bad input raises InputError instead).

    Attributes
    ----------
    status : str
        :data:`optfeed.status.VALID`.
    message : str
        One line for people.
    problem : Problem
    schedule : Schedule or None
    end_time : float
        The run length a schedule is judged over, h.
    warnings : tuple of Issue
        Units that look wrong (see :mod:`optfeed.dimensions`); the files are valid.
    """

    status: str
    message: str
    problem: Problem
    schedule: Schedule | None
    end_time: float
    warnings: tuple = ()

    @property
    def exit_code(self) -> int:
        return st.exit_code(self.status)

    def __repr__(self) -> str:
        return (f"ValidateResult(status={self.status!r}, problem={self.problem.name!r}, "
                f"warnings={len(self.warnings)}, message={self.message!r})")


def validate(problem, schedule=None, end_time: float | None = None, set: dict | None = None) -> ValidateResult:
    """Read and check ``problem`` (and ``schedule``, if given) without solving anything.

    Parameters
    ----------
    problem : Problem or path
    schedule : Schedule or path, optional
    end_time : float, optional
        Run length, h, for a free end time (see :func:`optfeed.check.run_length`).
    set : dict, optional
        Values of the problem to change first, by dotted path as in sweep files.

    Returns
    -------
    ValidateResult

    Raises
    ------
    InputError
        For anything wrong, each issue naming file, line and key.
    """
    from .check import run_length
    from .model import build_model

    problem = as_problem(problem, set)
    model = build_model(problem)
    tf = run_length(problem, end_time)
    if isinstance(schedule, Schedule):
        schedule = checked_schedule(schedule, model.feed_names, tf, problem.phases)
    elif schedule is not None:
        schedule = load_schedule(schedule, model.feed_names, tf, problem.phases)
    what = f"{len(problem.species)} species, {len(problem.feeds)} feed(s), {len(problem.bounds)} extra bound(s)"
    if problem.uncertainty is not None:
        what += f", {len(problem.uncertainty.values)} uncertain value(s)"
    message = f"{problem.source or problem.name}: valid ({what})"
    if schedule is not None:
        message += f"; {schedule.source or 'schedule'}: valid"
    if problem.warnings:
        message += f"; {len(problem.warnings)} unit warning(s)"
    return ValidateResult(st.VALID, message, problem, schedule, tf, tuple(problem.warnings))
