"""The optimize job: the best feed profile inside every limit, and proof that it holds."""

from __future__ import annotations

import itertools
import time
from dataclasses import dataclass, field

import casadi as ca
import numpy as np

from . import status as st
from .errors import InputError
from .limits import REL_TOL, LimitReport, build_limits
from .model import build_model
from .outcome import Outcome, objective_label, outcome_of
from .problem import Problem, load_problem
from .provenance import problem_digest, stamp
from .solve import Start, make_guesses, multistart, scaling_for, solve_one, transcribe
from .units import factor_to
from .verify import Verification, verify


@dataclass(frozen=True)
class LimitValue:
    """A limit at the optimum.

    Attributes
    ----------
    report : LimitReport
        Slack etc. from the re-simulation.
    active : bool
        The optimum sits on it (smallest slack within the verification tolerance).
    marginal_max, marginal_min : float
        Gain in the objective (its unit) per unit relaxation of the limit (its
        unit), summed over the run: for raising its maximum, and for lowering its
        minimum. Zero for a side that does not hold the optimum back.
    """

    report: LimitReport
    active: bool
    marginal_max: float
    marginal_min: float

    @property
    def name(self) -> str:
        return self.report.name


@dataclass(frozen=True)
class StartSummary:
    label: str
    status: str
    ipopt_status: str
    objective: float | None  # display unit
    iterations: int
    seconds: float


@dataclass(frozen=True)
class OptimizeResult:
    """What ``optfeed optimize`` found.

    Attributes
    ----------
    status : str
        One of :mod:`optfeed.status`: 'optimal, verified', 'converged, not verified',
        'infeasible', 'iteration limit', 'failed'.
    message : str
    problem : Problem
    objective_label, objective_unit : str
    objective_nlp, objective_sim : float or None
        The objective from the NLP and from re-simulating the pump schedule (display unit).
    end_time : float or None
        h.
    limits : tuple of LimitValue
    starts : tuple of StartSummary
        Every start of the multistart, best first.
    spread : float or None
        (best - worst) / |best| over converged starts.
    verification : Verification or None
    outcome : Outcome or None
        End values from the re-simulation.
    points : dict
        Collocation-point series ('t', 'x', 'u') of the NLP answer, for figures.
    seconds : float
        Wall time of the whole job.
    record : dict
    """

    status: str
    message: str
    problem: Problem
    objective_label: str
    objective_unit: str
    objective_nlp: float | None
    objective_sim: float | None
    end_time: float | None
    limits: tuple
    starts: tuple
    spread: float | None
    verification: Verification | None
    outcome: Outcome | None
    points: dict = field(repr=False, default_factory=dict)
    seconds: float = 0.0
    record: dict = field(default_factory=dict)

    @property
    def exit_code(self) -> int:
        return st.exit_code(self.status)

    @property
    def schedule(self):
        return None if self.verification is None else self.verification.schedule

    @property
    def trajectory(self):
        return None if self.verification is None else self.verification.trajectory

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

    def starts_frame(self):
        """Every start of the multistart, best first."""
        from .frames import starts_frame

        return starts_frame(self)


def optimize(problem, workers: int | None = None, on_progress=None) -> OptimizeResult:
    """Find the feed profile that optimises the problem's objective inside every limit.

    Parameters
    ----------
    problem : Problem or path
    workers : int, optional
        Processes for the multistart (default: the free cores, at most one per start).
    on_progress : callable, optional
        ``on_progress(text, done, total)`` as the job moves on.

    Returns
    -------
    OptimizeResult
        Never labelled optimal unless the solver converged and the re-simulated
        schedule confirms the objective and every limit.
    """
    t_start = time.perf_counter()
    if not isinstance(problem, Problem):
        problem = load_problem(problem)
    if problem.objective is None:
        raise InputError.one(problem.source, None, "objective", "optimize needs an objective "
                             "(e.g. objective: {maximize: product_mass, product: P})")
    model = build_model(problem)
    limits = build_limits(model)
    label, unit = objective_label(model)
    f_obj = factor_to(unit) if unit else 1.0
    settings = dict(vars(problem.settings), elements=problem.settings.elements)
    record = {"problem_file": problem.source, "problem_digest": problem_digest(problem),
              "settings": settings, **stamp()}

    def result(status, message, **kw):
        base = dict(status=status, message=message, problem=problem, objective_label=label, objective_unit=unit,
                    objective_nlp=None, objective_sim=None, end_time=None, limits=(), starts=(), spread=None,
                    verification=None, outcome=None, seconds=time.perf_counter() - t_start, record=record)
        base.update(kw)
        return OptimizeResult(**base)

    blocked = _blocked_at_start(model, limits)
    if blocked:
        return result(st.INFEASIBLE, f"infeasible before solving: {blocked}")

    progress = on_progress or (lambda *a: None)
    progress("simulating initial feeds", 0, problem.settings.starts)
    guesses = make_guesses(problem, model, problem.settings.starts)
    if not guesses:
        return result(st.FAILED, "failed: the integrator could not follow any of the initial feeds")
    scaling = scaling_for(problem, guesses)

    def done(start: Start, n, total):
        val = "-" if start.objective is None else f"{start.objective * f_obj:.6g}"
        progress(f"start {n}/{total}: {start.status}, objective {val}", n, total)

    starts = multistart(problem, scaling, guesses, workers=workers, on_done=done)
    better = (lambda a, b: a > b) if problem.objective.sense == "maximize" else (lambda a, b: a < b)
    converged = [s for s in starts if s.status == "converged" and s.objective is not None]
    ordered = sorted(starts, key=lambda s: (s.status != "converged", s.objective is None,
                                            -(s.objective or 0) if problem.objective.sense == "maximize"
                                            else (s.objective or 0)))
    summaries = tuple(StartSummary(s.label, s.status, s.ipopt_status,
                                   None if s.objective is None else s.objective * f_obj, s.iterations, s.seconds)
                      for s in ordered)
    trans = transcribe(problem, scaling, model, limits)
    if not converged:
        statuses = {s.status for s in starts}
        best = ordered[0]
        worst_name, worst_val = _worst_violation(trans, best.w, limits)
        where = f"; closest point misses '{worst_name}' by {worst_val}" if worst_name else ""
        if "iteration limit" in statuses or "time limit" in statuses:
            return result(st.ITERATION_LIMIT, f"no start converged within its iteration or time budget"
                          f"{where}", starts=summaries)
        if statuses == {"infeasible"}:
            return result(st.INFEASIBLE, f"infeasible: no start found a feed profile that meets every limit "
                          f"(IPOPT detected local infeasibility from each){where}", starts=summaries)
        return result(st.FAILED, f"failed: IPOPT ended with {', '.join(sorted({s.ipopt_status for s in starts}))}"
                      f"{where}", starts=summaries)

    best = converged[0]
    for s in converged[1:]:
        if better(s.objective, best.objective):
            best = s
    values = [s.objective for s in converged]
    spread = (max(values) - min(values)) / max(abs(best.objective), 1e-12)
    unpacked = trans.unpack(best.w)
    progress("re-simulating the optimal schedule", len(starts), len(starts))
    tol = problem.settings.verify_tolerance
    ver = verify(model, limits, unpacked, best.objective, tol)
    backoff = {}
    for round_ in range(1, MAX_BACKOFF_ROUNDS + 1):
        # the NLP meets the limits at its points; if the re-simulated schedule
        # exceeds one between them, keep the NLP that much further away and re-solve
        excess = _excess(limits, ver, REL_TOL)
        if ver.verified or not excess or ver.objective_rel_diff > tol:
            break
        trial_backoff = dict(backoff)
        for name, amount in excess.items():
            trial_backoff[name] = trial_backoff.get(name, 0.0) + 1.5 * amount
        progress(f"backing off {', '.join(excess)} (round {round_})", len(starts), len(starts))
        trial_trans = transcribe(problem, scaling, model, limits, trial_backoff)
        trial = solve_one(trial_trans, best.w, f"{best.label}, backed off", warm=(best.lam_g, best.lam_x))
        if trial.status != "converged" or trial.objective is None:
            break
        best, trans, backoff = trial, trial_trans, trial_backoff
        unpacked = trans.unpack(best.w)
        ver = verify(model, limits, unpacked, best.objective, tol)
    if backoff:
        by_name = {l.name: l for l in limits}
        record["backoff"] = {n: {"amount": v * by_name[n].factor, "unit": by_name[n].unit} for n, v in backoff.items()}
    marg = trans.marginals(best.lam_g, best.lam_x)
    values_out = []
    for lim, rep in zip(limits, ver.limits):
        up, low = marg.get(lim.name, (0.0, 0.0))
        # at its bound, within the verification tolerance
        active = bool(rep.min_slack / lim.factor <= tol * lim.scale())
        values_out.append(LimitValue(rep, active, up * f_obj / lim.factor, low * f_obj / lim.factor))
    if "end time" in marg:
        up, low = marg["end time"]
        record["end_time_marginal_per_h"] = (up if abs(up) >= abs(low) else -low) * f_obj
    outcome = outcome_of(model, ver.trajectory, unpacked.T) if ver.trajectory is not None else None
    kept = ""
    if backoff:
        kept = "; kept clear of " + ", ".join(
            f"'{n}' by {v['amount']:.3g} {v['unit']}" for n, v in record["backoff"].items())
    if best.ipopt_status != "Solve_Succeeded":
        kept += f"; IPOPT: {best.ipopt_status.replace('_', ' ').lower()}"
    if ver.verified:
        status, message = st.OPTIMAL_VERIFIED, f"optimal and verified: {ver.message}{kept}"
    else:
        status, message = st.CONVERGED_NOT_VERIFIED, f"the solver converged but the answer is not verified: {ver.message}"
    return result(
        status, message, objective_nlp=best.objective * f_obj,
        objective_sim=None if ver.objective_sim is None else ver.objective_sim * f_obj,
        end_time=unpacked.T, limits=tuple(values_out), starts=summaries, spread=spread, verification=ver,
        outcome=outcome, points={"t": unpacked.t_points, "x": unpacked.x_points, "u": unpacked.u_points},
    )


MAX_BACKOFF_ROUNDS = 3


def _excess(limits, ver, tol) -> dict:
    """Limit name -> amount (internal units) by which the re-simulation exceeds it
    beyond the verification tolerance."""
    out = {}
    for lim, rep in zip(limits, ver.limits):
        if lim.kind == "pump" or rep.worst_violation <= 0:
            continue
        if lim.relative_excess(rep) > tol:
            out[lim.name] = rep.worst_violation / lim.factor
    return out


def _blocked_at_start(model, limits) -> str:
    """A path limit that no pump setting can meet at t = 0, described; '' if none."""
    feeds = model.problem.feeds
    corners = list(itertools.product(*[(f.min_rate, f.max_rate) for f in feeds]))[:64]
    path = [l for l in limits if not l.at_end and l.kind != "pump"]
    if not path:
        return ""
    g = ca.Function("g0", [model.t, model.x, model.u], [ca.vertcat(*[ca.SX(l.expr) for l in path])])
    values = np.array([np.array(g(0.0, model.x0, np.array(c))).ravel() for c in corners])
    for i, lim in enumerate(path):
        tol = lim.tolerance()
        hi = lim.upper is not None and np.all(values[:, i] > lim.upper + tol)
        lo = lim.lower is not None and np.all(values[:, i] < lim.lower - tol)
        if hi or lo:
            v = values[:, i].min() if hi else values[:, i].max()
            bound = lim.upper if hi else lim.lower
            word = "above" if hi else "below"
            return (f"'{lim.name}' cannot be met at the start: its value at t = 0 is "
                    f"{v * lim.factor:.4g} {lim.unit}, {word} the limit {bound * lim.factor:.4g} {lim.unit} "
                    f"at every combination of pump limits (key {lim.key})")
    return ""


def _worst_violation(trans, w, limits):
    v = trans.violations(w)
    units = {l.name: (l.factor, l.unit) for l in limits}
    rel = {}
    for name, val in v.items():
        if name == "model equations":
            continue
        scale = trans.limit_scale.get(name, 1.0)
        rel[name] = val / scale
    if not rel or max(rel.values()) <= 1e-6:
        if v.get("model equations", 0) > 1e-6:
            return "model equations", f"{v['model equations']:.3g} (scaled residual)"
        return "", ""
    name = max(rel, key=rel.get)
    f, unit = units[name]
    return name, f"{v[name] * f:.4g} {unit}"
