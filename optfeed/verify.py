"""Checking an NLP answer: re-simulation of the exact pump schedule and its slack."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import SimulationError
from .limits import REL_TOL, judge
from .schedule import Schedule, piecewise_constant, round_schedule
from .simulate import Trajectory, simulate


@dataclass(frozen=True)
class Verification:
    """How well an NLP answer holds up when its pump schedule is re-simulated.

    Attributes
    ----------
    verified : bool
        The re-simulated objective within ``tolerance`` (relative) of the NLP's, and
        no limit exceeded by more than :data:`optfeed.limits.REL_TOL` of its scale,
        the tolerance ``optfeed check`` uses.
    message : str
    objective_nlp, objective_sim : float or None
        Internal units, the objective's own sense.
    objective_rel_diff : float
        |sim - nlp| / max(|nlp|, tiny).
    worst_violation : float
        Largest violation of any limit relative to its bound (0 if none).
    worst_limit : str
    limits : tuple of LimitReport
    use : dict
    trajectory : Trajectory or None
    schedule : Schedule
    """

    verified: bool
    message: str
    objective_nlp: float | None
    objective_sim: float | None
    objective_rel_diff: float
    worst_violation: float
    worst_limit: str
    limits: tuple
    use: dict
    trajectory: Trajectory | None
    schedule: Schedule


def pump_schedule(feed_names, t_steps, u_steps, source: str = "") -> Schedule:
    """The piecewise-constant schedule of an NLP answer (t_steps: M+1 boundaries, h)."""
    return piecewise_constant(feed_names, t_steps[:-1], u_steps, source)


def verify(model, limits, unpacked, objective_nlp, tolerance: float) -> Verification:
    """Re-simulate the pump schedule of ``unpacked`` with CVODES and judge it."""
    T = unpacked.T
    # verify the schedule exactly as schedule.csv will hold it: rounded, exact zeros
    schedule = round_schedule(pump_schedule(model.feed_names, unpacked.t_steps, unpacked.u_steps),
                              model.problem.feeds, end_time=T)
    try:
        traj = simulate(model, schedule, T, min_points=4000)
    except SimulationError as exc:
        return Verification(False, f"re-simulation failed: {exc}", objective_nlp, None, np.inf, np.inf, "",
                            (), {}, None, schedule)
    # limits are judged exactly as `optfeed check` judges them, so that a verified
    # schedule also passes check; the objective gets the looser `tolerance`
    reports, use = judge(model, limits, traj)
    J_sim = float(model.end_value(traj.final, T, traj.u[-1])) if model.problem.objective is not None else None
    if J_sim is not None and objective_nlp is not None:
        diff = abs(J_sim - objective_nlp) / max(abs(objective_nlp), 1e-12)
    else:
        diff = 0.0
    worst, worst_name = 0.0, ""
    for lim, rep in zip(limits, reports):
        rel = lim.relative_excess(rep)
        if rel > worst:
            worst, worst_name = rel, lim.name
    ok = diff <= tolerance and worst <= REL_TOL
    if ok:
        msg = (f"re-simulated objective within {diff:.1e} (relative) of the NLP; "
               f"worst limit excess {worst:.1e} of its bound")
    else:
        parts = []
        if diff > tolerance:
            parts.append(f"re-simulated objective differs from the NLP by {diff:.2%}")
        if worst > REL_TOL:
            parts.append(f"'{worst_name}' is exceeded by {worst:.2g} of its bound between collocation points "
                         f"(allowed {REL_TOL:.0e})")
        if diff > tolerance:
            parts[0] += f" (allowed {tolerance:.1e})"
        msg = "; ".join(parts) + "; refine the grid (solver.elements_per_step, degree)"
    return Verification(ok, msg, objective_nlp, J_sim, diff, worst, worst_name, reports, use, traj, schedule)
