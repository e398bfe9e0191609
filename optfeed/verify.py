"""Checking an NLP answer: re-simulation of the exact pump schedule and its slack.

The schedule judged here is the one written to ``schedule.csv``, and it is judged by
the same :func:`optfeed.limits.judge`, on the same samples, as ``optfeed check``
judges that file: 'verified' means that ``optfeed check`` passes the schedule as
written.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import SimulationError
from .limits import REL_TOL, judge
from .schedule import Schedule, piecewise_constant
from .simulate import Simulator, Trajectory


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
        Names both tolerances used.
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
    tolerance : float
        The objective tolerance used.
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
    tolerance: float = 0.0


def pump_schedule(feed_names, t_steps, u_steps, source: str = "") -> Schedule:
    """The piecewise-constant schedule of an NLP answer (t_steps: M+1 boundaries, h)."""
    return piecewise_constant(feed_names, t_steps[:-1], u_steps, source)


def verify(model, limits, schedule: Schedule, end_time: float, objective_nlp, tolerance: float,
           simulator: Simulator | None = None, x0=None, p=None, ignore: tuple = (),
           trajectory: Trajectory | None = None) -> Verification:
    """Re-simulate ``schedule`` over [0, end_time] h with CVODES and judge it exactly
    as ``optfeed check`` does. ``model`` is the full model (every state); ``x0`` and
    ``p`` another scenario's initial state and constants (default: the problem's).
    Limits of the kinds in ``ignore`` are judged and reported but do not decide
    (a relaxed answer whose pump settings are fixed afterwards). ``trajectory``:
    the run of ``schedule`` from ``x0`` with ``p``, simulated already (e.g. in a
    batch of scenarios, :meth:`Simulator.run_batch`); it is judged as it is."""
    sim = simulator or Simulator(model)
    try:
        traj = trajectory if trajectory is not None else sim.run(schedule, end_time, x0=x0, p=p)
    except SimulationError as exc:
        return Verification(False, f"re-simulation failed: {exc}", objective_nlp, None, np.inf, np.inf, "",
                            (), {}, None, schedule, tolerance)
    reports, use = judge(model, limits, traj)
    J_sim = (float(model.end_value(traj.final, end_time, traj.u[-1], p=traj.constants,
                                   x0=model.x0 if x0 is None else x0))
             if model.problem.objective is not None else None)
    if J_sim is not None and objective_nlp is not None:
        diff = abs(J_sim - objective_nlp) / max(abs(objective_nlp), 1e-12)
    else:
        diff = 0.0
    worst, worst_name = 0.0, ""
    for lim, rep in zip(limits, reports):
        if lim.kind in ignore:
            continue
        rel = lim.relative_excess(rep)
        if rel > worst:
            worst, worst_name = rel, lim.name
    ok = diff <= tolerance and worst <= REL_TOL
    if ok:
        msg = (f"re-simulated objective within {diff:.1e} of the NLP's (allowed {tolerance:.1e}); "
               f"every limit kept as 'optfeed check' judges it (worst excess {worst:.1e} of its bound, "
               f"allowed {REL_TOL:.0e})")
    else:
        parts = []
        if diff > tolerance:
            parts.append(f"re-simulated objective differs from the NLP's by {diff:.2%} (allowed {tolerance:.1e})")
        if worst > REL_TOL:
            parts.append(f"'{worst_name}' is exceeded by {worst:.2g} of its bound between collocation points "
                         f"(allowed {REL_TOL:.0e})")
        msg = "; ".join(parts)
    return Verification(ok, msg, objective_nlp, J_sim, diff, worst, worst_name, reports, use, traj, schedule,
                        tolerance)
