"""Error types.

One root class, :class:`OptfeedError`. Bad input raises :class:`InputError`, which
carries one entry per problem found, each naming the file, the line (where known) and
the key path. Errors pickle, so a worker process can send them back.
"""

from __future__ import annotations

from dataclasses import dataclass


class OptfeedError(Exception):
    """Root of every error optfeed raises on purpose."""


@dataclass(frozen=True)
class Issue:
    """One problem in one input file.

    Attributes
    ----------
    file : str
        Path of the file as given by the user.
    line : int or None
        1-based line number, where one is known.
    key : str
        Dotted key path (``vessel.working_volume``, ``species.X.initial``) or a
        column name for CSV files; empty when the whole file is at fault.
    message : str
        What is wrong and what was expected.
    """

    file: str
    line: int | None
    key: str
    message: str

    def __str__(self) -> str:
        where = self.file if self.line is None else f"{self.file}:{self.line}"
        return f"{where}: {self.key}: {self.message}" if self.key else f"{where}: {self.message}"


class InputError(OptfeedError, ValueError):
    """Bad input: a file that cannot be read, parsed or accepted.

    Parameters
    ----------
    issues : list of Issue
        At least one.
    """

    def __init__(self, issues):
        issues = tuple(issues)
        if not issues:
            raise ValueError("InputError needs at least one issue")
        self.issues = issues
        super().__init__(str(self))

    @classmethod
    def one(cls, file, line, key, message) -> "InputError":
        return cls([Issue(str(file), line, key, message)])

    def __str__(self) -> str:
        return "\n".join(str(i) for i in self.issues)

    def __reduce__(self):
        return (type(self), (self.issues,))


class SimulationError(OptfeedError, RuntimeError):
    """The integrator could not follow a schedule (stiff blow-up, NaN, step failure)."""

    def __init__(self, message: str, time: float | None = None):
        self.message = message
        self.time = time
        super().__init__(message)

    def __str__(self) -> str:
        if self.time is None:
            return self.message
        return f"{self.message} (at t = {self.time:.6g} h)"

    def __reduce__(self):
        return (type(self), (self.message, self.time))


class TimeLimitReached(SimulationError):
    """A job's time limit was reached while simulating (``time`` is how far it got, h)."""
