"""The check job: simulate a proposed schedule and judge it against every limit."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

from . import status as st
from .errors import InputError, SimulationError, TimeLimitReached
from .limits import LimitReport, build_limits, judge
from .phases import require_decided
from .model import build_model
from .montecarlo import MonteCarloResult, monte_carlo
from .outcome import Outcome, outcome_of
from .problem import Problem
from .problem.dotted import as_problem
from .provenance import problem_digest, stamp
from .results import result_repr, result_trajectory_table
from .schedule import Schedule, checked_schedule, load_schedule
from .simulate import Trajectory, simulate


@dataclass(frozen=True)
class PhaseRow:
    """One phase of a simulated run: ``start`` and ``end`` in h; ``how`` it ended in
    words ('fixed time', 'schedule', 'condition S < 0.5 g/L', 'end of run', 'never
    ended')."""

    name: str
    start: float
    end: float
    how: str


@dataclass(frozen=True)
class AdditionRow:
    """One addition applied: ``time`` h, ``kind`` ('sample' or 'bolus'), ``volume``
    in mL (taken out for a sample, added for a bolus), ``amounts`` as written in
    the problem's internal units, ``key`` where it is written."""

    time: float
    kind: str
    volume: float
    amounts: dict
    key: str


def phase_rows(problem: Problem, traj: Trajectory, end_time: float, window: str = "schedule") -> tuple:
    """:class:`PhaseRow` per phase that ran in ``traj``; ``window``: what a phase
    ended in a window was ended by (the schedule; for optimize, its own choice)."""
    if not problem.phases:
        return ()
    rows, start = [], 0.0
    for ph in problem.phases:
        if ph.name in traj.switches:
            end = traj.switches[ph.name]
            if ph.end.kind == "between":
                how = window.format(lower=ph.end.lower, upper=ph.end.upper)
            else:
                how = {"at": "fixed time", "when": f"condition {ph.end.text}"}[ph.end.kind]
        elif ph.name == traj.unended:
            end, how = end_time, "never ended"
        elif ph.end.kind == "run":
            end, how = end_time, "end of run"
        else:
            break  # it never started
        rows.append(PhaseRow(ph.name, float(start), float(end), how))
        if ph.name == traj.unended:
            break
        start = end
    return tuple(rows)


def addition_rows(traj: Trajectory) -> tuple:
    return tuple(AdditionRow(a.time, a.kind, a.volume * 1e3, dict(a.amounts), a.key) for a, _ in traj.additions)


def never_ended(problem: Problem, name: str, end_time: float) -> str:
    """One sentence: the 'when' phase ``name`` did not end before ``end_time`` h."""
    ph = next(p for p in problem.phases if p.name == name)
    side = "above" if ph.end.falling else "below"
    return (f"phase {name!r} never ended: {ph.end.condition.text.strip()} stayed {side} {ph.end.level_text} "
            f"until {end_time:g} h")


@dataclass(frozen=True)
class CheckResult:
    """What ``optfeed check`` found.

    Attributes
    ----------
    status : str
        :data:`optfeed.status.WITHIN_LIMITS`, ``LIMIT_BROKEN`` or ``SIMULATION_FAILED``.
    message : str
        One line for people.
    limits : tuple of LimitReport
        One per limit, in report order.
    outcome : Outcome or None
        Final values and the objective (None if the simulation failed).
    end_time : float
        h.
    problem : Problem
    schedule : Schedule
    trajectory : Trajectory or None
    use : dict
        Limit name -> % of its upper bound at each trajectory sample.
    record : dict
        Provenance: problem digest, files, tool version, time.
    uncertainty : MonteCarloResult or None
        With ``uncertainty=True``: the schedule judged over a Monte Carlo sample of
        the uncertain values (:mod:`optfeed.montecarlo`). The status, message and
        exit code stay those of the nominal run; these figures stand beside them.
    phases : tuple of PhaseRow
        For a problem with phases: each phase's start, end and how it ended (a
        phase that never started is left out).
    additions : tuple of AdditionRow
        The additions applied: time, kind, volume.
    """

    status: str
    message: str
    limits: tuple
    outcome: Outcome | None
    end_time: float
    problem: Problem
    schedule: Schedule
    trajectory: Trajectory | None = field(repr=False, default=None)
    use: dict = field(repr=False, default_factory=dict)
    record: dict = field(default_factory=dict)
    uncertainty: MonteCarloResult | None = field(repr=False, default=None)
    phases: tuple = ()
    additions: tuple = ()

    @property
    def exit_code(self) -> int:
        return st.exit_code(self.status)

    @property
    def violations(self) -> list[LimitReport]:
        return sorted((r for r in self.limits if r.violated), key=lambda r: r.first_violation)

    def trajectory_table(self) -> dict:
        """The simulated run as plain columns in display units, units in the names
        (``{'time [h]': ..., 'X [g/L]': ...}``; see :mod:`optfeed.tables`); {} if
        the simulation failed."""
        return result_trajectory_table(self)

    # tables as pandas DataFrames, units in the column names (optfeed.frames; needs pandas)
    def trajectory_frame(self):
        """The simulated run: one row per time stamp, a ``pump change`` column."""
        from .frames import trajectory_frame

        return trajectory_frame(self)

    def schedule_frame(self):
        """The pump schedule: a row per time any pump changes, rates in each feed's unit."""
        from .frames import schedule_frame

        return schedule_frame(self)

    def limits_frame(self):
        """One row per limit: range, smallest margin and when, peak use, first break."""
        from .frames import limits_frame

        return limits_frame(self)


    def __repr__(self) -> str:
        return result_repr(self)


def check(problem, schedule, end_time: float | None = None, set: dict | None = None,
          time_limit: float | None = None, uncertainty: bool = False, samples: int | None = None,
          seed: int | None = None, workers: int | None = None, on_progress=None) -> CheckResult:
    """Simulate ``schedule`` on ``problem`` and judge every limit; with
    ``uncertainty=True`` also over a Monte Carlo sample of its uncertain values.

    Parameters
    ----------
    problem : Problem or path
        A loaded problem or a problem file.
    schedule : Schedule or path
        A schedule or a schedule file (CSV or YAML). A Schedule built in code is
        checked as strictly as a file (every feed named, times in order).
    end_time : float, optional
        Run length, h (see :func:`run_length`): the fixed end time, or for a free
        end time this value, by default the horizon's guess.
    set : dict, optional
        Values of the problem to change first, by dotted path as in sweep files:
        ``{"parameters.mu_max": "0.5 1/h"}``.
    time_limit : float, optional
        Seconds for the simulation; when it is reached the status is 'time limit'
        and the message says how far the run got. With ``uncertainty`` the same
        limit covers the Monte Carlo samples too: those not simulated by then are
        left out and counted (``result.uncertainty.not_run``).
    uncertainty : bool
        Also judge the schedule over a fresh sample of the values the problem's
        ``uncertainty`` section makes uncertain (it must have one), and report the
        probability of breaking each limit (``result.uncertainty``).
    samples, seed : int, optional
        Monte Carlo samples and seed (default: the section's ``monte_carlo``).
    workers : int, optional
        Processes for the Monte Carlo simulations (default: the cores).
    on_progress : callable, optional
        ``on_progress(text, done, total)`` as Monte Carlo samples finish.

    Returns
    -------
    CheckResult

    Raises
    ------
    InputError
        For a bad problem or schedule file.
    """
    problem = as_problem(problem, set)
    require_decided(problem, "check")
    if not uncertainty:
        for option, value in (("--samples", samples), ("--seed", seed), ("--workers", workers)):
            if value is not None:
                raise InputError.one(option, None, option, f"{option} is used only with --uncertainty "
                                                           "(uncertainty=True)")
    elif problem.uncertainty is None:
        raise InputError.one(problem.source, None, "uncertainty",
                             "--uncertainty needs an 'uncertainty' section in the problem file: the values that "
                             "are uncertain and their distributions (see README, 'Writing a problem file')")
    tf = run_length(problem, end_time)
    model = build_model(problem)
    if isinstance(schedule, Schedule):
        schedule = checked_schedule(schedule, model.feed_names, tf, problem.phases)
    else:
        schedule = load_schedule(schedule, model.feed_names, tf, problem.phases)
    record = {"problem_file": problem.source, "schedule_file": schedule.source,
              "problem_digest": problem_digest(problem), **stamp()}
    limits = build_limits(model, phases=True)
    deadline = None if time_limit is None else time.monotonic() + time_limit

    def beside():  # the Monte Carlo figures stand beside the nominal verdict, never in it
        if not uncertainty:
            return None
        mc = monte_carlo(problem, schedule, tf, samples=samples, seed=seed, workers=workers,
                         on_progress=on_progress, deadline=deadline)
        record["monte_carlo"] = {"samples": mc.samples, "seed": mc.seed, "workers": mc.workers,
                                 "integration_method": mc.integration_method}
        return mc

    try:
        traj = simulate(model, schedule, tf, deadline=deadline)
    except TimeLimitReached as exc:
        return CheckResult(st.TIME_LIMIT, f"time limit of {time_limit:g} s reached: the simulation got to "
                           f"{exc.time:.4g} h of {tf:.4g} h; nothing was judged", (), None, tf, problem, schedule,
                           None, {}, record, beside())
    except SimulationError as exc:
        return CheckResult(st.SIMULATION_FAILED, str(exc), (), None, tf, problem,  # the status says 'failed'
                           schedule, None, {}, record, beside())
    reports, use = judge(model, limits, traj)
    outcome = outcome_of(model, traj, tf)
    broken = sorted((r for r in reports if r.violated), key=lambda r: r.first_violation)
    phases, additions = phase_rows(problem, traj, tf), addition_rows(traj)
    if traj.unended is not None:
        status = st.LIMIT_BROKEN
        message = never_ended(problem, traj.unended, tf)
        if broken:
            message += f"; {len(broken)} limit(s) broken, first: {broken[0].name} at {broken[0].first_violation:.4g} h"
    elif broken:
        first = broken[0]
        status = st.LIMIT_BROKEN
        message = (f"{len(broken)} limit(s) broken; first: {first.name} at {first.first_violation:.4g} h")
    else:
        status = st.WITHIN_LIMITS
        used = [r for r in reports if r.peak_use is not None]
        message = f"within all {len(reports)} limits"
        if used:
            tight = max(used, key=lambda r: r.peak_use)
            message += f"; highest use: {tight.name} at {tight.peak_use:.1f} %"
    return CheckResult(status, message, reports, outcome, tf, problem, schedule, traj, use, record, beside(),
                       phases, additions)


def run_length(problem: Problem, end_time: float | None = None, source: str = "--end-time") -> float:
    """The run length (h) a schedule is judged over.

    A fixed horizon gives its end time (``end_time`` may only repeat it); a free
    horizon gives ``end_time`` if given (within its bounds), else its guess.
    ``validate``, ``check``, sweeps and optimize's schedule note all use this rule.
    """
    h = problem.horizon
    if end_time is None:
        return float(h.end_time if not h.free else h.guess)
    if not (isinstance(end_time, (int, float)) and math.isfinite(end_time) and end_time > 0):
        raise InputError.one(source, None, "--end-time", f"expected a run length in h above zero, got {end_time!r}")
    if not h.free:
        if abs(end_time - h.end_time) > 1e-9 * h.end_time:
            raise InputError.one(source, None, "--end-time",
                                 f"{problem.source} fixes the end time at {h.end_time:g} h; --end-time is for a "
                                 "free end time")
        return float(h.end_time)
    if not (h.min_end <= end_time <= h.max_end):
        raise InputError.one(source, None, "--end-time",
                             f"end time {end_time:g} h lies outside the allowed {h.min_end:g}..{h.max_end:g} h "
                             f"of {problem.source}")
    return float(end_time)
