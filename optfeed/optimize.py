"""The optimize job: the best feed profile inside every limit, and proof that it holds.

How it searches (each stage warm-starts the next; budgets are iteration counts, so
the answer does not depend on how busy the machine is):

1. **Explore.** Each initial feed (simulated first) is solved on a coarse grid (one
   finite element per pump step): cheap, and each start settles in its own basin.
2. **Refine the distinct optima that can win.** The best coarse answer is
   re-simulated and solved again on the fine grid, starting from that exact
   trajectory; how far that moved its objective is the coarse
   grid's error. Every other distinct coarse optimum within twice that error of
   the best is refined
   too (a heuristic: one further below overtakes the best only if its own grid
   error is several times the best's); those left out are reported as such, unless none of the
   refined answers verifies: then they are refined and verified after all. Every
   answer that verifies is kept.
3. **Verify.** The best answer's pump schedule is re-simulated with CVODES and
   judged exactly as ``optfeed check`` judges it. If a limit is exceeded between
   collocation points, the NLP keeps that much clear of it and is solved again
   (a change of bounds only: the built solver and the multipliers are reused).
4. **A grid fine enough.** Unless the pump grid is the user's own, the pump grid is
   doubled (warm-started) until the objective changes by less than
   ``solver.grid_tolerance``, or until two shrinking changes predict that the next
   doubling would; the last change is reported as the grid's gap. Another verified
   fine optimum that lies less than twice the best's refinement gain below it is
   refined too, and the better refined answer wins (local optima gain unequally).
"""

from __future__ import annotations

import itertools
import math
import time
import dataclasses
from dataclasses import dataclass, field, replace

import numpy as np

from . import status as st
from .errors import InputError, Issue
from .limits import REL_TOL, LimitReport, build_limits, judge, limit_function
from .marginals import is_active
from .outcome import Outcome, objective_label, outcome_of
from .problem import Problem
from .problem.dotted import as_problem
from .processes import cpu_count, report_progress, run_killable
from .provenance import problem_digest, stamp
from .report.text import unit_words
from .results import result_repr, result_trajectory_table
from .schedule import piecewise_constant, round_schedule
from .simulate import Simulator
from .solve import (Guess, Scaling, Start, _solver, end_time_info, get_nlp, interrupt_guard,
                    interrupted, make_guesses, models, scaling_for, solve, states_for)
from .phases import (base_model, condition_function, decide, guess_switches, models_like, phase_constants,
                     phase_models)
from .transcription import Grid, NLPData, plan_stretches
from .uncertainty import ScenarioSet, scenario_set
from .units import factor_to
from .verify import Verification, pump_schedule, verify


@dataclass(frozen=True)
class LimitValue:
    """A limit at the optimum.

    Attributes
    ----------
    report : LimitReport
        Slack etc. from the re-simulation.
    active : bool
        It holds the optimum back: its marginal value is not zero
        (:func:`optfeed.marginals.is_active`, the one rule for 'ACTIVE').
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
    """One start: where it began, how each stage ended (display units, CPU seconds)."""

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
        'infeasible', 'iteration limit', 'time limit', 'failed'.
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
        (best - worst) / |best| over the starts' fine-grid answers.
    verification : Verification or None
    outcome : Outcome or None
        End values from the re-simulation.
    points : dict
        Collocation-point series ('t', 'x', 'u') of the NLP answer (states of the
        full model, internal units), for figures.
    seconds : float
        Wall time of the whole job.
    record : dict
        Provenance and how the answer was found: settings, the final grid, the
        grid's estimated gap, distinct local optima met, back-offs; for a scenario
        solve, each scenario's objective and verification ('scenarios').
    nominal : OptimizeResult or None
        For a scenario solve: the nominal problem's own optimum, for comparison
        (with its own Monte Carlo judgement).
    uncertainty : MonteCarloResult or None
        With an ``uncertainty`` section: the schedule found, judged over a fresh
        Monte Carlo sample of the uncertain values (probability of breaking each
        limit, the objective's spread). It never changes the status.
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
    nominal: "OptimizeResult | None" = field(default=None, repr=False)
    uncertainty: "MonteCarloResult | None" = field(default=None, repr=False)

    @property
    def exit_code(self) -> int:
        return st.exit_code(self.status)

    @property
    def schedule(self):
        return None if self.verification is None else self.verification.schedule

    @property
    def trajectory(self):
        return None if self.verification is None else self.verification.trajectory

    @property
    def phases(self) -> tuple:
        """For a problem with phases: each phase's start and end (h) in the
        re-simulated answer and what ended it (``check.PhaseRow``)."""
        from .check import phase_rows

        traj = self.trajectory
        if traj is None or not self.problem.phases:
            return ()
        return phase_rows(self.problem, traj, self.end_time, "chosen by optimize within {lower:g}-{upper:g} h")

    @property
    def additions(self) -> tuple:
        """The additions applied in the re-simulated answer (``check.AdditionRow``)."""
        from .check import addition_rows

        traj = self.trajectory
        return () if traj is None else addition_rows(traj)

    # -- for people (optfeed.results): a one-line repr, the run as plain columns
    def trajectory_table(self) -> dict:
        """The re-simulated run as plain columns in display units, units in the names
        (``{'time [h]': ..., 'X [g/L]': ...}``; see :mod:`optfeed.tables`); {} if
        there is no answer."""
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

    def starts_frame(self):
        """Every start of the multistart, best first."""
        from .frames import starts_frame

        return starts_frame(self)


    def __repr__(self) -> str:
        return result_repr(self)


# iteration caps of the stages (the whole start never exceeds solver.max_iter)
COARSE_ITER = 600
MAX_BACKOFF_ROUNDS = 3
# a refinement that needs more than this from a near point is not worth its time (an
# exact warm start converges in 25-60 iterations; measured: an 8-scenario refinement
# that had not converged after 500 iterations, 100 s, with its objective settled)
REFINE_ITER = 200
SHORTEST_STEP = 1e-5  # of the run: a phased answer's shorter pump steps are left out of its schedule
DISTINCT_REL = 1e-4  # coarse answers closer than this (objective and pump profile) are one optimum
REFINE_WITHIN = 2.0  # coarse optima this many coarse-grid errors below the best are not refined


@dataclass
class _Answer:
    """A fine-grid answer on its way to the result."""

    start: Start
    nlp: object
    data: NLPData
    verification: Verification | None = None
    backoff: dict = field(default_factory=dict)
    label: str = ""
    pump: tuple | None = None  # step-by-step pump bounds, when an on/off pattern is fixed


class _Job:
    """Everything the stages of one optimize run share."""

    def __init__(self, problem: Problem, on_progress, deadline, scenarios: ScenarioSet | None = None):
        self.problem = problem
        self.scenarios = scenarios
        self.settings = problem.settings
        self.full, self.lean, self.limits = models(problem)
        # amounts of additions that optimize chooses: simulated (guesses) in the middle
        # of their ranges; each answer verified with its own (see decided())
        self.choosing = any(not a.decided for a in problem.additions)
        if self.choosing:
            self.full = base_model(decide(problem))
        self.full_limits = build_limits(self.full, phases=True)  # judged as check judges
        self._decided = {}
        self.fixed, self.t_bounds, self.T = end_time_info(problem)
        self.free = self.fixed is None
        self.progress = on_progress or (lambda *a: None)
        self.deadline = deadline
        self.simulator = Simulator(self.full)
        self.label, self.unit = objective_label(self.full)
        self.f_obj = factor_to(self.unit) if self.unit else 1.0
        self.better = (lambda a, b: a > b) if problem.objective.sense == "maximize" else (lambda a, b: a < b)
        self.sense = -1.0 if problem.objective.sense == "maximize" else 1.0
        self.j_scale = None
        # pumps that are off or at least a minimum: the search works on the relaxed
        # problem, and only the final stage holds (and verifies) the minimum settings
        self.relaxed_pumps = any(f.min_on > f.min_rate for f in problem.feeds)
        # phases and additions: one model per phase, and the run's time line
        self.lean_phases = phase_models(problem, "used") if problem.phases else None
        self.switch_guess = guess_switches(problem)
        self.stretches = None

    def data(self, scaling: Scaling, backoff=None, pump=None) -> NLPData:
        """The numbers of a solve; ``pump`` = (lower, upper), each (nu, M) L/h, bounds
        the pumps step by step (an on/off pattern fixed)."""
        p, lean = self.problem, self.lean
        self.j_scale = self.j_scale or scaling.objective
        lower, upper, scale = {}, {}, {}
        for lim in self.limits:
            lo, hi = design_bounds(lim, p.vessel.margin)
            b = (backoff or {}).get(lim.name, 0.0)
            lower[lim.name] = None if lo is None else lo + b
            upper[lim.name] = None if hi is None else hi - b
            scale[lim.name] = lim.scale()
        sc = self.scenarios
        if sc is None:
            constants, x0, weights, risk = lean.p0[:, None], lean.x0[:, None], np.ones(1), 0.0
        else:
            keep = [self.full.index(n) for n in lean.state_names]
            constants, x0 = sc.constants, sc.x0[keep, :]
            weights, risk = sc.weights, sc.risk
        return NLPData(
            constants=constants, x0=x0, end_time=self.fixed, end_bounds=self.t_bounds,
            pump_min=np.array([f.min_rate for f in p.feeds]) if pump is None else pump[0],
            pump_max=np.array([f.max_rate for f in p.feeds]) if pump is None else pump[1],
            lower=lower, upper=upper, scale=scale, x_scale=scaling.x, t_scale=scaling.t,
            j_scale=scaling.objective, weights=weights, smoothing=self.settings.smoothing, risk=risk,
            pump_scale=np.array([f.max_rate for f in p.feeds]),
        )

    def nlp(self, grid: Grid):
        sc = self.scenarios
        return get_nlp(self.problem, self.lean, self.limits, grid, self.free,
                       scenarios=1 if sc is None else sc.count, combine="mean" if sc is None else sc.combine,
                       smoothing=self.settings.smoothing > 0, stretches=self.stretches,
                       phase_models=self.lean_phases)

    def plan(self, guesses, ends: dict | None = None, end_time: float | None = None):
        """Cut the run at its phase ends and additions (a run with phases or
        additions): the phases end where ``ends`` says, else where the first
        simulated guess's phases ended, else at their guesses; the run ends near
        ``end_time`` (default: the nominal; it decides which additions happen)."""
        p = self.problem
        if not (p.phases or p.additions):
            return
        known = dict(self.switch_guess)
        traj = next((g.trajectory for g in guesses if g.trajectory is not None), None)
        if traj is not None:
            known.update(getattr(traj, "switches", {}) or {})
        known.update(ends or {})
        for ph in p.phases[:-1]:
            if ph.end.kind == "at":
                known[ph.name] = ph.end.time
            elif ph.name not in known:  # a condition the guess never met: somewhere in the run
                known[ph.name] = self.T * 0.5
        try:
            self.stretches = plan_stretches(p, self.settings.pump_steps, known, end_time or self.T)
        except ValueError as exc:
            raise InputError([Issue(p.source, None, "solver.pump_steps", str(exc))]) from None

    def scenario_inputs(self):
        """(x0 of the full model, constants) per scenario: [(x0, p), ...]."""
        sc = self.scenarios
        if sc is None:
            return [(self.full.x0, self.full.p0)]
        return [(sc.x0[:, s], sc.constants[:, s]) for s in range(sc.count)]

    def report(self, label, iteration, f, infeasibility=None):
        """Progress of a running solve: ``f`` is the NLP's scaled objective, shown as
        the objective in its unit (with the scaling of the first data built)."""
        J = f * self.sense * self.j_scale * self.f_obj if self.j_scale else f
        text = f"{label}: iteration {iteration}, objective {J:.6g} {self.unit}".rstrip()
        if infeasibility is not None:
            text += f", largest constraint violation {infeasibility:.1e} (scaled)"
        if not report_progress(text):
            self.progress(text, None, None)

    def pack_from_schedule(self, nlp, data, steps_u, T, traj=None, t_steps=None, switches=None):
        """NLP vector from pump steps (uniform over [0, T], or with boundaries
        ``t_steps``), with the states of their simulation in every scenario
        (``traj``: the nominal's, when already simulated); ``switches``: the phases'
        end times the steps were made for."""
        M = steps_u.shape[0]
        starts = np.linspace(0, T, M + 1)[:-1] if t_steps is None else np.asarray(t_steps)[:-1]
        sched = piecewise_constant(self.full.feed_names, starts, steps_u)
        times, states = [], []
        for s, (x0, p) in enumerate(self.scenario_inputs()):
            tr = traj if (traj is not None and s == 0) else self.simulator.run(
                sched, T, min_points=max(400, 4 * M), x0=x0, p=p, **self.switch_kwargs(switches))
            times.append(tr.t)
            states.append(states_for(self.lean, self.full, tr.x))
        ends = getattr(traj if traj is not None else tr, "switches", None)
        return nlp.pack(data, steps_u, T, times, states, switches=ends, t_steps=t_steps)

    def decided(self, amounts: dict):
        """(problem, full model, its limits, simulator) with the additions' chosen
        ``amounts`` written in (addition index -> {species: amount})."""
        key = tuple(sorted((j, sp, v) for j, d in amounts.items() for sp, v in d.items()))
        if key not in self._decided:
            problem = decide(self.problem, amounts)
            full = base_model(problem)
            self._decided[key] = (problem, full, build_limits(full, phases=True), Simulator(full))
            while len(self._decided) > 8:
                self._decided.pop(next(iter(self._decided)))
        return self._decided[key]

    def switch_kwargs(self, switches=None) -> dict:
        """Simulator.run's switch times for a phased run (the given ones, else the
        guesses); nothing for a run without phases."""
        if not self.problem.phases:
            return {}
        return {"switch_times": {**self.switch_guess, **(switches or {})}}

    def schedule_of(self, un):
        """The pump schedule of an unpacked answer as schedule.csv will hold it
        (rounded, exact zeros), with its phases' end times."""
        t_steps, u_steps = un.t_steps, un.u_steps
        if un.switches:  # a stretch squeezed to nothing leaves steps no pump can run: drop them
            keep = np.diff(t_steps) > SHORTEST_STEP * un.T
            keep[0] = True
            t_steps, u_steps = np.append(t_steps[:-1][keep], t_steps[-1]), u_steps[keep]
        schedule = round_schedule(pump_schedule(self.full.feed_names, t_steps, u_steps),
                                  self.problem.feeds, end_time=un.T)
        if un.switches:
            schedule = dataclasses.replace(schedule, switch_times=dict(un.switches))
        return schedule

    def verify(self, nlp, data, start: Start) -> Verification:
        """Re-simulate the answer's schedule (as schedule.csv will hold it: rounded,
        exact zeros) in every scenario; verified when every scenario is. Returns the
        nominal scenario's Verification, its message covering all of them; the
        others are kept in ``self.scenario_checks``."""
        un = nlp.unpack(start.w, data)
        schedule = self.schedule_of(un)
        tol = self.settings.verify_tolerance
        ignore = ("setting",) if self.relaxed_pumps else ()
        if self.scenarios is None:
            if self.choosing:
                _, full, limits, sim = self.decided(un.amounts)
                return verify(full, limits, schedule, un.T, start.objective, tol, sim, ignore=ignore)
            return verify(self.full, self.full_limits, schedule, un.T, start.objective, tol, self.simulator,
                          ignore=ignore)
        J_nlp = nlp.scenario_objectives(start.w, data)
        full, limits, sim = self.decided(un.amounts)[1:] if self.choosing else \
            (self.full, self.full_limits, self.simulator)
        inputs = self.scenario_inputs()
        runs = _scenario_runs(sim, schedule, un.T, inputs)
        checks = [verify(full, limits, schedule, un.T, float(J_nlp[s]), tol, sim,
                         x0=x0, p=p, ignore=ignore, trajectory=runs[s]) for s, (x0, p) in enumerate(inputs)]
        self.scenario_checks = checks
        bad = [self.scenarios.labels[s] for s, c in enumerate(checks) if not c.verified]
        nominal = checks[0]
        if not bad:
            message = f"every one of {len(checks)} scenarios verified; nominal: {nominal.message}"
        else:
            first = next(c for c in checks if not c.verified)
            message = f"not verified in scenario(s) {', '.join(bad)}: {first.message}"
        from dataclasses import replace as _replace

        worst = max(checks, key=lambda c: c.worst_violation)
        return _replace(nominal, verified=not bad, message=message, objective_nlp=start.objective,
                        worst_violation=worst.worst_violation, worst_limit=worst.worst_limit,
                        limits=_worst_reports([c.limits for c in checks]))


def merge_identical(sc: ScenarioSet | None) -> ScenarioSet | None:
    """Scenarios that are the same problem carry nothing new (and would make the NLP's
    constraints degenerate): keep one of each (all the same: the nominal problem)."""
    if sc is None:
        return None
    first, weight = {}, {}
    for s, w in zip(range(sc.count), sc.weights):
        key = (tuple(sc.constants[:, s]), tuple(sc.x0[:, s]))
        first.setdefault(key, s)
        weight[key] = weight.get(key, 0.0) + w  # a repeated draw keeps its share of the mean
    if len(first) == 1:
        return None
    if len(first) == sc.count:
        return sc
    keep = list(first.values())
    return replace(sc, constants=sc.constants[:, keep], x0=sc.x0[:, keep], values=sc.values[:, keep],
                   labels=tuple(sc.labels[s] for s in keep), weights=np.array([weight[k] for k in first]))


def _choose_order(job, data, guesses, record) -> None:
    """Where a phase end that optimize times may fall on either side of an addition
    (an induction window holding a sampling time), or a free end of the run before
    or after one (whether that addition happens at all), the order is part of the
    NLP's shape. Try each order with a coarse solve from the first guess and keep the
    best (recorded); with one order there is nothing to choose."""
    p = job.problem
    windows = []
    for ph in p.phases:
        if ph.end.kind != "between":
            continue
        cuts = [a.time for a in p.additions if ph.end.lower < a.time < ph.end.upper]
        edges = [ph.end.lower] + cuts + [ph.end.upper]
        windows.append([(ph.name, 0.5 * (a + b), (a, b)) for a, b in zip(edges[:-1], edges[1:])])
    if job.free:  # additions the free end may come before or after: which happen is part of the shape
        lo, hi = job.t_bounds
        cuts = [a.time for a in p.additions if lo < a.time < hi]
        edges = [lo] + cuts + [hi]
        windows.append([(None, 0.5 * (a + b), (a, b)) for a, b in zip(edges[:-1], edges[1:])])
    orders = list(itertools.product(*windows))
    if len(orders) <= 1:
        return
    orders = orders[:12]
    s = job.settings
    tried = []
    for order in orders:
        ends = {name: mid for name, mid, _ in order if name is not None}
        end_time = next((mid for name, mid, _ in order if name is None), None)
        job.plan(guesses, ends, end_time)
        nlp = job.nlp(Grid(s.pump_steps, s.pump_steps, s.degree))
        g = guesses[0]
        try:
            w0 = job.pack_from_schedule(nlp, data, g.steps_u, g.T, switches=ends)
        except Exception:  # noqa: BLE001 - the guess cannot be followed in this order: try the next
            continue
        start = solve(nlp, data, w0, "phase order", profile="cold", tolerance=s.tolerance,
                      max_iter=min(COARSE_ITER, s.max_iter), deadline=job.deadline, report=job.report)
        ok = start.status == "converged" and start.objective is not None
        tried.append((order, ends, start.objective if ok else None, job.stretches))
    usable = [t for t in tried if t[2] is not None]
    if not usable:
        job.plan(guesses)
        record["phase_order"] = "no order of phase ends and additions converged on the coarse grid; kept the guess's"
        return
    best = usable[0]
    for t in usable[1:]:
        if job.better(t[2], best[2]):
            best = t
    job.stretches = best[3]
    words = []
    for order, _, J, _ in tried:
        where = ", ".join(f"{name or 'the run'} ending in {a:g}-{b:g} h" for name, _, (a, b) in order)
        words.append(f"{where}: " + ("no converged solve" if J is None else f"{J * job.f_obj:.6g} {job.unit}".rstrip()))
    record["phase_order"] = ("a phase end or the end of the run that optimize times can fall on either side of "
                             "an addition; coarse solves per order: " + "; ".join(words) + ". Kept the best.")


SCENARIO_BATCH = 16  # scenarios re-simulated together as one system in a verification


def _scenario_runs(sim, schedule, T, inputs) -> list:
    """The runs of ``schedule`` in every scenario but the nominal (the first), made
    SCENARIO_BATCH at a time as one CVODES system (:meth:`Simulator.run_in_batches`,
    with tolerances at least as strict per run as one run's): a Trajectory per
    scenario, None for the nominal, which is simulated on its own exactly as
    ``optfeed check`` simulates it, and for every scenario of a batch that failed
    (each is then simulated on its own, so that a failure names its scenario). All
    None for a problem with phases or additions, or fewer than three scenarios."""
    runs = [None] * len(inputs)
    if len(inputs) < 3:
        return runs
    x0 = np.column_stack([x for x, _ in inputs[1:]])
    p = np.column_stack([c for _, c in inputs[1:]])
    for cols, batch in sim.run_in_batches(schedule, T, x0, p, SCENARIO_BATCH):
        for k, traj in zip(cols, batch):
            runs[1 + k] = traj
    return runs


def _seed_guesses(job, seeds) -> list:
    """Known good feeds as starts: each schedule averaged onto the base pump grid and
    simulated like any candidate feed."""
    from .solve import Guess

    out = []
    M = job.settings.pump_steps
    for label, schedule, T in seeds:
        edges = np.linspace(0.0, T, M + 1)
        segs = schedule.segments(job.full.feed_names, T)
        steps = np.zeros((M, job.full.nu))
        for k in range(M):
            a, b = edges[k], edges[k + 1]
            for seg in segs:
                lo, hi = max(a, seg.start), min(b, seg.end)
                if hi > lo:
                    tt = np.linspace(lo, hi, 9)
                    steps[k] += np.trapezoid(seg.rates(tt), tt, axis=0) / (b - a)
        sched = piecewise_constant(job.full.feed_names, edges[:-1], steps)
        try:
            traj = job.simulator.run(sched, T, min_points=max(400, 4 * M),
                                     **job.switch_kwargs(getattr(schedule, "switch_times", None)))
        except Exception:  # noqa: BLE001 - a seed the integrator cannot follow is left out
            continue
        J = job.full.end_value(traj.final, T, traj.u[-1])
        out.append(Guess(label, steps, T, traj.t, traj.x, float(J), traj, profile="seeded"))
    return out


def combine(values, sc: ScenarioSet, maximize: bool = True) -> float:
    """The scenarios' objectives made one, as the NLP makes them (equal weights): the
    mean, the worst, or the mean less k standard deviations (plus, when minimising)."""
    values = np.asarray(values, dtype=float)
    if sc.combine == "worst":
        return float(values.min() if maximize else values.max())
    w = sc.weights
    mean = float(w @ values)
    if sc.combine == "mean_std":
        std = float(np.sqrt(w @ (values - mean) ** 2))
        return mean - sc.risk * std if maximize else mean + sc.risk * std
    return mean


def _worst_reports(per_scenario) -> tuple:
    """Per limit, the report of the scenario where it comes closest to (or furthest
    past) its bound."""
    return tuple(min(reps, key=lambda r: r.min_slack) for reps in zip(*per_scenario))


def design_bounds(lim, margin: float) -> tuple:
    """(lower, upper) the optimizer designs to (internal units): the limit's own bounds
    moved inward by the engineering margin (``vessel.margin``), except for pumps,
    whose range is the machine's."""
    if lim.kind == "pump" or not margin:
        return lim.lower, lim.upper
    lo = None if lim.lower is None else lim.lower + margin * abs(lim.lower)
    hi = None if lim.upper is None else lim.upper - margin * abs(lim.upper)
    return lo, hi


def optimize(problem, workers: int | None = None, on_progress=None, time_limit: float | None = None,
             set: dict | None = None, scenarios: ScenarioSet | None = None,
             samples: int | None = None, seed: int | None = None) -> OptimizeResult:
    """Find the feed profile that optimises the problem's objective inside every limit.

    Parameters
    ----------
    problem : Problem or path
    workers : int, optional
        Processes for the starts (default: the free cores, at most one per start).
    on_progress : callable, optional
        ``on_progress(text, done, total)`` as the job moves on (done/total may be None).
    time_limit : float, optional
        Seconds for the whole job (default: ``solver.time_limit``, else none).
    set : dict, optional
        Values of the problem to change first, by dotted path as in sweep files:
        ``{"parameters.mu_max": "0.5 1/h", "solver.starts": 2}``. (The name
        shadows the builtin ``set`` inside this function.)
    scenarios : ScenarioSet, optional
        Optimise one shared pump profile over these scenarios (every limit held in
        each); default: the scenarios of the problem's ``uncertainty`` section
        (:func:`optfeed.uncertainty.scenario_set`), if it has one. Scenarios that
        are all the same problem (e.g. ``count: 1``, or zero spread) leave the
        nominal problem alone.
    samples, seed : int, optional
        With an ``uncertainty`` section: the Monte Carlo sample that judges the
        answer and the nominal optimum side by side (default: the section's
        ``monte_carlo``); ``result.uncertainty`` and ``result.nominal.uncertainty``.

    Returns
    -------
    OptimizeResult
        Never labelled optimal unless the solver converged and the re-simulated
        schedule passes ``optfeed check`` with the objective confirmed.

    Raises
    ------
    KeyboardInterrupt
        On Ctrl-C, within an IPOPT iteration or so; nothing is returned.
    """
    t_start = time.perf_counter()
    problem = as_problem(problem, set)  # a file or a Problem, with overrides by dotted path
    if problem.objective is None:
        raise InputError.one(problem.source, None, "objective", "optimize needs an objective "
                             "(e.g. objective: {maximize: product_mass, product: P})")
    limit = time_limit if time_limit is not None else problem.settings.time_limit
    deadline = None if limit is None else time.monotonic() + limit
    if scenarios is None and problem.uncertainty is not None:
        from .model import build_model

        scenarios = scenario_set(problem, build_model(problem))
    scenarios = merge_identical(scenarios)
    when = next((ph for ph in problem.phases if ph.end.kind == "when"), None)
    if scenarios is not None and when is not None:
        raise InputError([Issue(problem.source, None, f"{when.key}.until",
                                "a phase that ends on a condition cannot be optimised over uncertainty scenarios "
                                "yet (each scenario meets the condition at its own time); check the schedule "
                                "with --uncertainty instead, or end the phase at a time")])
    say = on_progress or (lambda *a: None)
    with interrupt_guard():
        if scenarios is None:
            result = _optimize(problem, workers, on_progress, deadline, t_start)
            return _judged_over_samples(result, problem, samples, seed, workers, say, deadline)
        # one pump profile over the scenarios, started (among others) from the
        # nominal optimum, which is also reported beside it
        say("the nominal problem", None, None)
        nominal = _optimize(problem, workers, on_progress, deadline, t_start)
        say(f"one feed profile for {scenarios.count} scenarios", None, None)
        seeds = [] if nominal.schedule is None else [("the nominal optimum", nominal.schedule, nominal.end_time)]
        robust = _optimize(problem, workers, on_progress, deadline, t_start, scenarios, seeds)
        robust = _judged_over_samples(robust, problem, samples, seed, workers, say, deadline, "the answer")
        nominal = _judged_over_samples(nominal, problem, samples, seed, workers, say, deadline, "the nominal optimum")
        return replace(robust, nominal=nominal, seconds=time.perf_counter() - t_start)


def _judged_over_samples(result, problem, samples, seed, workers, say, deadline, what: str = "the answer"):
    """The result with its schedule judged over the Monte Carlo sample of the problem's
    uncertain values (``result.uncertainty``), when it has an uncertainty section and
    a schedule; the status is not changed by it (the figures stand beside it)."""
    if problem.uncertainty is None or result.schedule is None:
        return result
    from .montecarlo import monte_carlo

    def progress(text, done, total):
        say(f"Monte Carlo, {what}: {text}", done, total)

    # the answer's own problem: with the amounts optimize chose for its additions written in
    mc = monte_carlo(result.problem, result.schedule, result.end_time, samples=samples, seed=seed, workers=workers,
                     on_progress=progress, deadline=deadline)
    return replace(result, uncertainty=mc)


def _optimize(problem, workers, on_progress, deadline, t_start, scenarios=None, seeds=()) -> OptimizeResult:
    """The job; ``seeds`` are (label, schedule, end time) of known good feeds tried as
    starts before the candidate feeds (e.g. the nominal optimum, for a scenario solve)."""
    job = _Job(problem, on_progress, deadline, merge_identical(scenarios))
    s = job.settings
    record = {"problem_file": problem.source, "problem_digest": problem_digest(problem),
              "settings": dict(vars(s), elements=s.elements), **stamp()}

    def result(status, message, **kw):
        base = dict(status=status, message=message, problem=problem, objective_label=job.label,
                    objective_unit=job.unit, objective_nlp=None, objective_sim=None, end_time=None, limits=(),
                    starts=(), spread=None, verification=None, outcome=None,
                    seconds=time.perf_counter() - t_start, record=record)
        base.update(kw)
        return OptimizeResult(**base)

    blocked = _blocked_at_start(job)
    if blocked:
        return result(st.INFEASIBLE, f"before solving: {blocked}")

    job.progress("simulating initial feeds", 0, s.starts)
    # a scenario solve starts from the nominal optimum (its multistart is done), not
    # from every default feed again (measured: a default feed cost 35 s of an 8-scenario
    # solve's 85 s and ended at its iteration limit)
    guesses = _seed_guesses(job, seeds) + ([] if seeds else make_guesses(problem, job.full, s.starts))
    if not guesses:
        return result(st.FAILED, "the integrator could not follow any of the initial feeds")
    diagnosis = _always_broken(job, guesses)
    if diagnosis:
        record["diagnosis"] = diagnosis
        job.progress(f"warning: {diagnosis}", None, None)
    scaling = scaling_for(problem, job.lean, guesses, job.full)
    data = job.data(scaling)
    job.plan(guesses)
    _choose_order(job, data, guesses, record)
    coarse = job.nlp(Grid(s.pump_steps, s.pump_steps, s.degree))
    fine = job.nlp(Grid(s.pump_steps, s.elements, s.degree))
    # build the solvers the starts use before they fork, so no process builds its own
    for profile in sorted({g.profile for g in guesses}):
        _solver(coarse, profile, s.tolerance, COARSE_ITER)
    _solver(fine, "near", s.tolerance, s.max_iter)

    # 1 and 2: every start on the coarse grid, then every distinct optimum on the fine grid
    workers = min(len(guesses), workers or cpu_count())
    coarse_starts = _run_all(job, [("coarse", coarse, data, g) for g in guesses], workers, "start")
    if interrupted():
        raise KeyboardInterrupt
    groups = _distinct(job, coarse, data, coarse_starts)
    record["local_optima_coarse"] = len(groups)
    # the best coarse optimum first; the others only where the coarse grid's error
    # could hide a better fine-grid optimum (see _worth_refining)
    groups.sort(key=lambda g: job.sense * coarse_starts[g[0]].objective)

    def fine_jobs(gs):
        return [("fine", fine, data, (guesses[i], coarse_starts[i])) for i, _ in gs]

    fine_starts = _run_all(job, fine_jobs(groups[:1]), workers, "refining optimum") if groups else []
    if interrupted():
        raise KeyboardInterrupt
    skipped = []
    if groups:
        refine, skipped = _worth_refining(job, groups, coarse_starts, fine_starts[0])
        if refine[1:]:
            fine_starts += _run_all(job, fine_jobs(refine[1:]), workers, "refining optimum")
        if interrupted():
            raise KeyboardInterrupt
        groups = refine
    if skipped:
        record["coarse_optima_not_refined"] = len(skipped)
    summaries, spread = _summaries(job, guesses, coarse_starts, groups, fine_starts, skipped)
    converged = [(fs, groups[k]) for k, fs in enumerate(fine_starts) if fs.status == "converged"
                 and fs.objective is not None]
    if not converged:
        return _no_answer(job, result, coarse_starts + fine_starts, summaries, coarse, fine, data, diagnosis)

    # 3: verify, best first; keep the best answer that verifies
    best, first_unverified = _verify_best_first(job, converged, fine, data, scaling)
    if best is None and skipped and not _stop_now(job):
        # none of the optima that could win verified: those left out are refined after
        # all, since one of them may verify (a multistart never loses a verified answer
        # by meeting a better optimum that does not verify)
        job.progress("no refined optimum verified: refining the coarse optima left out", None, None)
        more = _run_all(job, fine_jobs(skipped), workers, "refining optimum")
        if interrupted():
            raise KeyboardInterrupt
        extra = [(fs, g) for fs, g in zip(more, skipped) if fs.status == "converged" and fs.objective is not None]
        groups, fine_starts, skipped = groups + skipped, fine_starts + more, []
        record.pop("coarse_optima_not_refined", None)
        summaries, spread = _summaries(job, guesses, coarse_starts, groups, fine_starts)
        best, unverified = _verify_best_first(job, extra, fine, data, scaling)
        first_unverified = first_unverified or unverified
        converged += extra
    record["local_optima_fine"] = len({round(fs.objective, 6) for fs, _ in converged})

    # 4: a pump grid fine enough
    if best is not None and s.refine_grid and not _stop_now(job):
        best = _refine_with_rivals(job, best, converged, fine, data, scaling, record)

    # 5: pumps as they are: off, or at least their minimum setting
    if best is not None and any(f.min_on > f.min_rate for f in problem.feeds) and not _stop_now(job):
        best = _pump_minimum(job, best, scaling, record)

    chosen = best or first_unverified
    return _final(job, result, chosen, summaries, spread, record, diagnosis)


def _verify_best_first(job, converged, fine, data, scaling):
    """Verify the converged fine answers [(start, group)], best first, until none
    left could beat the verified answer in hand: (best verified answer or None, the
    first answer that did not verify or None)."""
    maximize = job.problem.objective.sense == "maximize"
    ordered = sorted(converged, key=lambda c: -c[0].objective if maximize else c[0].objective)
    best, first_unverified = None, None
    for fs, _ in ordered:
        if best is not None and not job.better(fs.objective, best.start.objective):
            break  # cannot beat the verified answer in hand
        ans = _verified(job, _Answer(fs, fine, data, label=fs.label), scaling)
        if ans.verification.verified and (best is None or job.better(ans.start.objective, best.start.objective)):
            best = ans
        elif first_unverified is None:
            first_unverified = ans
        if _stop_now(job):
            break
    return best, first_unverified


def _stop_now(job) -> bool:
    if interrupted():
        raise KeyboardInterrupt
    return job.deadline is not None and time.monotonic() > job.deadline


# ---------------------------------------------------------------------- stages


def _stage(task):
    """One start's stage in a worker (or in this process): ('coarse', nlp, data,
    guess) solves from a simulated feed; ('fine', nlp, data, (guess, coarse start))
    re-simulates a coarse answer and solves it on the fine grid."""
    kind, nlp, data, payload = task
    job = _STAGE_JOB
    s = job.settings
    if kind == "coarse":
        g = payload
        w0 = nlp.pack(data, g.steps_u, g.T, g.times, states_for(job.lean, job.full, g.states),
                      switches=getattr(g.trajectory, "switches", None))
        st_ = solve(nlp, data, w0, g.label, profile=g.profile, tolerance=s.tolerance,
                    max_iter=min(COARSE_ITER, s.max_iter), deadline=job.deadline, report=job.report,
                    guess_objective=g.objective)
        if st_.status in ("iteration limit", "failed") and s.max_iter > st_.iterations:
            # the adaptive barrier rescues some starts (and explores another basin)
            second = solve(nlp, data, w0, g.label + " (adaptive barrier)", profile="adaptive",
                           tolerance=s.tolerance, max_iter=min(COARSE_ITER, s.max_iter - st_.iterations),
                           deadline=job.deadline, report=job.report, guess_objective=g.objective)
            second.iterations += st_.iterations
            second.seconds += st_.seconds
            st_ = second if second.status == "converged" or st_.status != "converged" else st_
        return st_
    g, cs = payload
    cu = _COARSE_NLP.unpack(cs.w, data)
    try:
        w0 = job.pack_from_schedule(nlp, data, cu.u_steps, cu.T, t_steps=cu.t_steps, switches=cu.switches)
    except Exception:  # noqa: BLE001 - a coarse answer the integrator cannot follow: start from the guess
        w0 = nlp.pack(data, g.steps_u, g.T, g.times, states_for(job.lean, job.full, g.states),
                      switches=getattr(g.trajectory, "switches", None))
    st_ = _near_solve(job, nlp, data, w0, g.label, s.max_iter, guess_objective=g.objective)
    if st_.status in ("iteration limit", "failed") and s.max_iter > st_.iterations:
        second = solve(nlp, data, w0, g.label + " (cold restart)", profile="cold", tolerance=s.tolerance,
                       max_iter=s.max_iter - st_.iterations, deadline=job.deadline, report=job.report,
                       guess_objective=g.objective)
        second.iterations += st_.iterations
        second.seconds += st_.seconds
        st_ = second if second.status == "converged" else st_
    return st_


def _near_solve(job, nlp, data, w0, label, max_iter, **kw) -> Start:
    """A solve from a point near its optimum without multipliers (a coarse optimum
    re-simulated on the fine grid, a refined pump grid): profile 'near' (13-42
    iterations on the published problems)."""
    s = job.settings
    return solve(nlp, data, w0, label, profile="near", tolerance=s.tolerance, max_iter=max_iter,
                 deadline=job.deadline, report=job.report, **kw)


_STAGE_JOB = None  # the job the stage workers see (set before forking)
_COARSE_NLP = None


def _run_all(job, tasks, workers, word) -> list[Start]:
    """Run stage tasks (in forked workers when workers > 1); results in task order.
    A task whose turn never came (time limit, Ctrl-C) is reported as 'not run'."""
    global _STAGE_JOB, _COARSE_NLP
    _STAGE_JOB = job
    _COARSE_NLP = job.nlp(Grid(job.settings.pump_steps, job.settings.pump_steps, job.settings.degree))
    out: dict[int, Start] = {}
    total = len(tasks)

    def label_of(i):
        payload = tasks[i][3]
        return payload.label if isinstance(payload, Guess) else payload[0].label

    def done(i, kind, payload, seconds):
        if kind == "ok":
            out[i] = payload
        else:
            out[i] = _empty_start(label_of(i), "failed", str(payload)[:200])
        s_ = out[i]
        val = "-" if s_.objective is None else f"{s_.objective * job.f_obj:.6g}"
        job.progress(f"{word} {len(out)}/{total}: {s_.status}, objective {val} {job.unit}".rstrip(), len(out),
                     total)

    if workers <= 1 or total == 1:
        for i, task in enumerate(tasks):
            if _stop_now(job):
                break
            done(i, "ok", _stage(task), 0.0)
    else:
        run_killable(list(enumerate(tasks)), _stage, workers, done,
                     should_stop=lambda: interrupted() or (job.deadline is not None and
                                                           time.monotonic() > job.deadline),
                     on_progress=lambda i, text: job.progress(text, None, None))
    return [out.get(i) or _empty_start(label_of(i), "not run", "its turn never came") for i in range(total)]


def _empty_start(label, status, why) -> Start:
    return Start(label, status, why, None, 0, 0.0, np.zeros(0), np.zeros(0), np.zeros(0))


def _distinct(job, nlp, data, starts) -> list[tuple[int, list[int]]]:
    """Group converged coarse answers that are the same optimum: (first index, members)."""
    groups: list[tuple[int, list[int]]] = []
    for i, s_ in enumerate(starts):
        if s_.status != "converged" or s_.objective is None:
            continue
        u = nlp.unpack(s_.w, data).u_steps
        for first, members in groups:
            f = starts[first]
            same_J = abs(f.objective - s_.objective) <= DISTINCT_REL * max(abs(f.objective), 1e-12)
            uf = nlp.unpack(f.w, data).u_steps
            same_u = np.max(np.abs(uf - u)) <= 1e-3 * max(np.max(data.pump_max), 1e-12)
            if same_J and same_u:
                members.append(i)
                break
        else:
            groups.append((i, [i]))
    return groups


def _worth_refining(job, groups, coarse_starts, best_fine):
    """Which coarse optima (groups, best first) to solve on the fine grid, given the
    fine answer of the best: (refined, skipped).

    A coarse optimum is refined when its coarse objective is within REFINE_WITHIN
    times the coarse grid's error of the best one, that error e being how far the
    best moved from the coarse grid to the fine one. This is a heuristic, not a
    bound: it assumes the other optima's grid errors are of the same size as the
    best's. One left out (behind by b > 2e) overtakes the best only if refining
    gains it more than b - e where the best gained e (or, if the best lost e, more
    than b - e > e): a grid error several times the best's. Measured on the
    published problems and the demo: the optima left out were all worse on the fine
    grid, or the same optimum (Park-Ramirez: four coarse optima 1-6 % apart, one on
    the fine grid, 0.9 % from the best coarse one). If the best's fine solve failed,
    every coarse optimum is refined; if no refined one verifies, the others are
    refined after all (see _optimize)."""
    first = coarse_starts[groups[0][0]]
    if best_fine.status != "converged" or best_fine.objective is None:
        return groups, []
    error = abs(best_fine.objective - first.objective)
    refine, skipped = groups[:1], []
    for g in groups[1:]:
        (refine if _within_reach(job, first.objective, coarse_starts[g[0]].objective, error) else skipped).append(g)
    return refine, skipped


def _within_reach(job, best: float, other: float, error: float) -> bool:
    """Whether an optimum at objective ``other`` lies close enough behind the best's
    (``best``) that a grid error of ``error`` (what refining moved the best) could
    let it overtake: within REFINE_WITHIN times that error (plus DISTINCT_REL)."""
    return job.sense * (other - best) <= REFINE_WITHIN * error + DISTINCT_REL * abs(best)


def _summaries(job, guesses, coarse_starts, groups, fine_starts, skipped=()):
    """A StartSummary per start, best first, and the spread of the fine answers;
    ``skipped``: groups of coarse optima that were not worth refining."""
    fine_of = {}
    for (first, members), fs in zip(groups, fine_starts):
        for m in members:
            fine_of[m] = (first, fs)
    left_out = {m for _, members in skipped for m in members}
    rows = []
    for i, cs in enumerate(coarse_starts):
        label = guesses[i].label
        if i in left_out:
            rows.append(StartSummary(label + " (coarse grid only: too far below the best coarse optimum to "
                                     "overtake it on the fine grid)", cs.status, cs.ipopt_status,
                                     None if cs.objective is None else cs.objective * job.f_obj,
                                     cs.iterations, cs.seconds))
            continue
        if i in fine_of:
            first, fs = fine_of[i]
            if first != i:
                label += f" (same optimum as start {first + 1} on the coarse grid)"
                rows.append(StartSummary(label, fs.status, fs.ipopt_status,
                                         None if fs.objective is None else fs.objective * job.f_obj,
                                         cs.iterations, cs.seconds))
                continue
            rows.append(StartSummary(label, fs.status, fs.ipopt_status,
                                     None if fs.objective is None else fs.objective * job.f_obj,
                                     cs.iterations + fs.iterations, cs.seconds + fs.seconds))
        else:
            why = cs.status if cs.status != "converged" else "converged"
            rows.append(StartSummary(label + " (coarse grid only)", why, cs.ipopt_status,
                                     None if cs.objective is None else cs.objective * job.f_obj,
                                     cs.iterations, cs.seconds))
    sense = job.problem.objective.sense
    rows.sort(key=lambda r: (r.status != "converged", r.objective is None,
                             -(r.objective or 0) if sense == "maximize" else (r.objective or 0)))
    values = [fs.objective for fs in fine_starts if fs.status == "converged" and fs.objective is not None]
    spread = None
    if values:
        best = max(values) if sense == "maximize" else min(values)
        spread = (max(values) - min(values)) / max(abs(best), 1e-12)
    return tuple(rows), spread


def _excess(job, ver) -> dict:
    """Limit name -> amount (internal units) by which the re-simulation passes the
    bound the optimizer designs to (the limit's own, or inside it by the engineering
    margin) beyond the verification tolerance."""
    out = {}
    margin = job.problem.vessel.margin
    for lim, rep in zip(job.full_limits, ver.limits):
        if lim.kind in ("pump", "setting", "phase pump"):
            continue
        slack = rep.min_slack / lim.factor  # to the limit itself, internal units
        bound = lim.upper if rep.side == "max" else lim.lower
        lo, hi = design_bounds(lim, margin)
        designed = hi if rep.side == "max" else lo
        inside = 0.0 if bound is None or designed is None else abs(bound - designed)
        amount = inside - slack  # how far past the designed bound
        if amount > REL_TOL * lim.scale() + 1e-12 * lim.scale():
            out[lim.name] = amount
    return out


def _verified(job, ans: _Answer, scaling) -> _Answer:
    """Verify an answer; if a limit is exceeded between collocation points, keep the
    NLP that much further from it and solve again (bounds only, warm start)."""
    s = job.settings
    ans.verification = job.verify(ans.nlp, ans.data, ans.start)
    for round_ in range(1, MAX_BACKOFF_ROUNDS + 1):
        ver = ans.verification
        excess = _excess(job, ver)
        if not excess or ver.objective_rel_diff > s.verify_tolerance or _stop_now(job):
            break
        trial = dict(ans.backoff)
        for name, amount in excess.items():
            trial[name] = trial.get(name, 0.0) + 1.5 * amount
        job.progress(f"keeping clear of {', '.join(excess)} between collocation points (round {round_})",
                     None, None)
        data = job.data(scaling, trial, ans.pump)
        st_ = solve(ans.nlp, data, ans.start.w, ans.start.label + ", backed off", profile="warm",
                    tolerance=s.tolerance, max_iter=s.max_iter, warm=(ans.start.lam_g, ans.start.lam_x),
                    deadline=job.deadline, report=job.report)
        if st_.status != "converged" or st_.objective is None:
            break
        st_.iterations += ans.start.iterations
        ans = _Answer(st_, ans.nlp, data, job.verify(ans.nlp, data, st_), trial, ans.label, ans.pump)
    return ans


def next_change(changes) -> float | None:
    """The relative change of the objective the next grid doubling is expected to
    bring, from the changes of the doublings so far: the last one times the ratio of
    the last two, when they shrink (a geometric series, as a discretisation error
    falls by a constant factor per halving of the step); None when fewer than two
    are known or they do not shrink (no estimate)."""
    if len(changes) < 2 or not 0 < changes[-1] < changes[-2]:
        return None
    return changes[-1] * changes[-1] / changes[-2]


def _refine_with_rivals(job, best: _Answer, converged, fine, data, scaling, record) -> _Answer:
    """Refine the best answer's pump grid (:func:`_refine_grid`), then every other
    distinct fine-grid optimum that the refinement's own gain could let overtake it
    (:func:`_within_reach`, the rule that picks the coarse optima to refine), verified
    first; the best refined answer wins. Local optima of one problem gain unequally
    from a finer pump grid: on Park-Ramirez two fine optima 0.012 % apart ended
    0.14 % apart, the lower one ahead, after refinement."""
    before, own_label = best.start.objective, best.label
    best = _refine_grid(job, best, scaling, record)
    if not job.better(best.start.objective, before):
        return best
    gain = abs(best.start.objective - before)
    rivals, seen = [], [before]
    for fs, _ in sorted(converged, key=lambda c: job.sense * c[0].objective):
        if fs.label == own_label:
            continue  # the best's own fine optimum: its back-off can move the objective either way
        if job.better(fs.objective, before) or not _within_reach(job, before, fs.objective, gain):
            continue
        if any(abs(fs.objective - o) <= DISTINCT_REL * max(abs(o), 1e-12) for o in seen):
            continue  # the same optimum as one already taken
        seen.append(fs.objective)
        rivals.append(fs)
    for fs in rivals:
        if _stop_now(job):
            break
        ans = _verified(job, _Answer(fs, fine, data, label=fs.label), scaling)
        if not ans.verification.verified:
            continue
        own = {}
        ans = _refine_grid(job, ans, scaling, own)
        record["rivals_refined"] = record.get("rivals_refined", 0) + 1
        if job.better(ans.start.objective, best.start.objective):
            best = ans
            record.update(own)
    return best


def _refine_grid(job, best: _Answer, scaling, record) -> _Answer:
    """Double the pump grid until the objective changes by less than grid_tolerance,
    or until the next doubling is expected to: once two doublings have shrunk the
    change, the next change is estimated as the last one times the ratio of the last
    two (a geometric series, as a discretisation error converges), and the doubling
    is not solved when that estimate is below the tolerance. A sequence whose changes
    do not shrink gives no estimate, and the next grid is solved."""
    s = job.settings
    grid = best.nlp.grid
    gap = None
    changes = []
    while grid.pump_steps * 2 <= s.max_pump_steps and not _stop_now(job):
        expected = next_change(changes)
        if expected is not None:
            if expected <= s.grid_tolerance:
                record["grid_refinement"] = (
                    f"stopped at {grid.pump_steps} pump steps: the last two doublings changed the objective by "
                    f"{changes[-2]:.3%} and {changes[-1]:.3%}, so the next is expected to change it by about "
                    f"{expected:.3%}, below solver.grid_tolerance ({s.grid_tolerance:.3%})")
                record["grid_gap_expected"] = expected
                break
        M2 = grid.pump_steps * 2
        N2 = grid.elements if grid.elements % M2 == 0 else M2 * max(1, grid.elements // M2)
        N2 = max(N2, M2)
        new_grid = Grid(M2, N2, grid.degree)
        job.progress(f"refining the pump grid: {M2} steps", None, None)
        nlp = job.nlp(new_grid)
        label = best.label + f", {M2} pump steps"
        moved = best.nlp.split_steps(nlp, best.start.w, best.start.lam_g, best.start.lam_x)
        if moved is not None:  # the same elements: start exactly at the old optimum, multipliers and all
            w0, lam_g, lam_x = moved
            st_ = solve(nlp, best.data, w0, label, profile="warm", tolerance=s.tolerance,
                        max_iter=min(s.max_iter, REFINE_ITER), warm=(lam_g, lam_x), deadline=job.deadline,
                        report=job.report)
        else:  # finer elements too: start from the simulated schedule, with a capped budget
            un = best.nlp.unpack(best.start.w, best.data)
            if nlp.phased:
                w0 = job.pack_from_schedule(nlp, best.data, un.u_steps, un.T, best.verification.trajectory,
                                            t_steps=un.t_steps, switches=un.switches)
            else:
                steps = np.repeat(un.u_steps, 2, axis=0)
                w0 = job.pack_from_schedule(nlp, best.data, steps, un.T, best.verification.trajectory)
            st_ = _near_solve(job, nlp, best.data, w0, label, min(s.max_iter, REFINE_ITER))
        if st_.status != "converged" or st_.objective is None:
            record["grid_refinement"] = f"stopped at {grid.pump_steps} pump steps: the {M2}-step solve {st_.status}"
            break
        cand = _verified(job, _Answer(st_, nlp, best.data, label=best.label, backoff=dict(best.backoff)), scaling)
        if not cand.verification.verified:
            record["grid_refinement"] = (f"stopped at {grid.pump_steps} pump steps: the {M2}-step answer did not "
                                         f"verify ({cand.verification.message})")
            break
        change = abs(cand.start.objective - best.start.objective) / max(abs(cand.start.objective), 1e-12)
        job.progress(f"{M2} pump steps: objective {cand.start.objective * job.f_obj:.7g} {job.unit} "
                     f"({change:.3%} change, {cand.start.iterations} iterations)", None, None)
        if job.better(cand.start.objective, best.start.objective) or change <= s.grid_tolerance:
            gap = change
            improved = job.better(cand.start.objective, best.start.objective)
            if improved:
                best = cand
            grid = new_grid
            changes.append(change)
            if change <= s.grid_tolerance:
                break
        else:
            record["grid_refinement"] = f"stopped at {grid.pump_steps} pump steps: {M2} steps gave a worse optimum"
            break
    record["grid_gap_relative"] = gap
    return best


def _pump_minimum(job, best: _Answer, scaling, record) -> _Answer:
    """A pump that is either off or runs at least ``min_on`` makes the problem
    combinatorial. Solved honestly in two steps: the relaxed answer (any rate in the
    range) fixes the on/off pattern (a step is on where the relaxed rate reaches half
    the minimum), then the problem is solved again with each step held off or at
    least at the minimum, and verified. Both objectives are recorded."""
    s = job.settings
    un = best.nlp.unpack(best.start.w, best.data)
    u = un.u_steps.T  # (nu, M)
    lo, hi = np.zeros_like(u), np.zeros_like(u)
    switched = {}
    for j, f in enumerate(job.problem.feeds):
        if f.min_on > f.min_rate:
            on = u[j] >= 0.5 * f.min_on
            lo[j] = np.where(on, f.min_on, f.min_rate)
            hi[j] = np.where(on, f.max_rate, f.min_rate)
            switched[f.name] = {"steps_on": int(on.sum()), "steps_off": int((~on).sum()),
                                "steps_raised_to_minimum": int((on & (u[j] < f.min_on)).sum())}
        else:
            lo[j], hi[j] = f.min_rate, f.max_rate
    already = all(np.all((u[j] <= 1e-12 * f.max_rate) | (u[j] >= f.min_on * (1 - 1e-9)))
                  for j, f in enumerate(job.problem.feeds) if f.min_on > f.min_rate)
    if already:
        job.relaxed_pumps = False
        best = _verified(job, best, scaling)
        record["pump_minimum"] = {"note": "the relaxed answer already keeps every pump off or at its minimum",
                                  "feeds": switched}
        return best
    job.relaxed_pumps = False
    job.progress("fixing the pumps' on/off pattern and solving again", None, None)
    pump = (lo, hi)
    data = job.data(scaling, best.backoff, pump)
    lbx, ubx, _, _ = best.nlp.bounds(data)
    w0 = np.clip(best.start.w, lbx, ubx)
    st_ = solve(best.nlp, data, w0, best.label + ", pumps off or at their minimum", profile="near",
                tolerance=s.tolerance, max_iter=s.max_iter, deadline=job.deadline, report=job.report)
    relaxed = best.start.objective * job.f_obj
    if st_.status == "converged" and st_.objective is not None:
        ans = _verified(job, _Answer(st_, best.nlp, data, label=best.label, backoff=dict(best.backoff), pump=pump),
                        scaling)
        record["pump_minimum"] = {"relaxed_objective": relaxed, "objective": st_.objective * job.f_obj,
                                  "feeds": switched, "note": "on/off pattern of the relaxed answer fixed, then "
                                  "solved again with each step off or at least at the pump's minimum"}
        return ans
    record["pump_minimum"] = {"relaxed_objective": relaxed, "feeds": switched,
                              "note": f"solving with the on/off pattern fixed ended {st_.status}"}
    bad = replace(best.verification, verified=False,
                  message=f"the answer runs a pump below its minimum setting (min_on), and solving again with "
                          f"the on/off pattern fixed ended {st_.status}")
    return _Answer(best.start, best.nlp, best.data, bad, best.backoff, best.label)


# ---------------------------------------------------------------------- the result


def _final(job, result, ans: _Answer | None, summaries, spread, record, diagnosis) -> OptimizeResult:
    s = job.settings
    timed_out = job.deadline is not None and time.monotonic() > job.deadline
    if ans is None:
        return result(st.FAILED, "no answer to verify", starts=summaries, spread=spread)
    ver, best, nlp, data = ans.verification, ans.start, ans.nlp, ans.data
    if job.relaxed_pumps and ver.verified:  # stopped before the pumps' minimum settings were held
        broken = [r.name for r in ver.limits if r.kind == "setting" and r.violated]
        if broken:
            ver = replace(ver, verified=False, message=f"{ver.message}; but '{broken[0]}' is broken: the search "
                          "stopped before the pumps' minimum settings were held")
    un = nlp.unpack(best.w, data)
    record["grid"] = {"pump_steps": nlp.grid.pump_steps, "elements": nlp.grid.elements, "degree": nlp.grid.degree}
    margin = job.problem.vessel.margin
    if margin:
        designed = {}
        for lim in job.full_limits:
            lo, hi = design_bounds(lim, margin)
            if lim.kind != "pump" and (lo, hi) != (lim.lower, lim.upper):
                designed[lim.name] = {"min": None if lo is None else lo * lim.factor,
                                      "max": None if hi is None else hi * lim.factor, "unit": lim.unit}
        record["margin"] = {"fraction": margin, "designed_to": designed,
                            "note": "marginal values are per unit of the designed bound"}
        kept_margin = f"; every limit kept {margin:.0%} inside its bound (vessel.margin)"
    else:
        kept_margin = ""
    if ans.backoff:
        by_name = {l.name: l for l in job.limits}
        record["backoff"] = {n: {"amount": v * by_name[n].factor, "unit": by_name[n].unit}
                             for n, v in ans.backoff.items()}
    marg = nlp.marginals(best.lam_g, best.lam_x, data)
    values_out = []
    for lim, rep in zip(job.full_limits, ver.limits):
        up, low = marg.get(lim.name, (0.0, 0.0))
        up, low = float(up * job.f_obj / lim.factor), float(low * job.f_obj / lim.factor)
        # active: it holds the optimum back (the one rule, optfeed.marginals)
        values_out.append(LimitValue(rep, is_active(rep, up, low, best.objective * job.f_obj), up, low))
    if "end time" in marg:
        up, low = marg["end time"]
        record["end_time_marginal_per_h"] = (up if abs(up) >= abs(low) else -low) * job.f_obj
    outcome = outcome_of(job.full, ver.trajectory, un.T) if ver.trajectory is not None else None
    kept = ""
    if ans.backoff:
        kept = "; kept clear of " + ", ".join(
            f"'{n}' by {v['amount']:.3g} {unit_words(v['unit'])}" for n, v in record["backoff"].items())
    if best.ipopt_status != "Solve_Succeeded":
        kept += f"; IPOPT: {best.ipopt_status.replace('_', ' ').lower()}"
    kept += kept_margin
    pm = record.get("pump_minimum", {})
    if "objective" in pm:
        kept += (f"; pumps off or at least their minimum setting: the relaxed answer's on/off pattern fixed and "
                 f"solved again ({pm['relaxed_objective']:.6g} relaxed, {pm['objective']:.6g} {job.unit} as "
                 "the pumps can run)")
    gap = record.get("grid_gap_relative")
    if gap is not None:
        kept += f"; pump grid {nlp.grid.pump_steps} steps (last refinement changed the objective by {gap:.2%}"
        expected = record.get("grid_gap_expected")
        kept += ")" if expected is None else f"; the next is expected to change it by about {expected:.2%})"
    if ver.verified and not timed_out:
        status, message = st.OPTIMAL_VERIFIED, f"{ver.message}{kept}"
    elif ver.verified:
        status = st.TIME_LIMIT
        message = (f"the search did not finish; the best answer found before the deadline is verified "
                   f"({ver.message}){kept}")
    else:
        status = st.CONVERGED_NOT_VERIFIED
        message = (f"{ver.message}; refine the grid "
                   "(solver.elements_per_step, degree)")
    points = _full_points(job, un)
    objective_sim = None if ver.objective_sim is None else ver.objective_sim * job.f_obj
    if job.scenarios is not None and ver.trajectory is not None:
        sc = job.scenarios
        sims = [c.objective_sim for c in job.scenario_checks]
        nlps = nlp.scenario_objectives(best.w, data)
        objective_sim = None if None in sims else combine(np.array(sims), sc, job.sense < 0) * job.f_obj
        record["scenarios"] = {
            "count": sc.count, "objective_over_scenarios": sc.combine, "k": sc.risk,
            "labels": list(sc.labels),
            "objective_nlp": [float(v) * job.f_obj for v in nlps],
            "objective_resimulated": [None if v is None else float(v) * job.f_obj for v in sims],
            "verified": [bool(c.verified) for c in job.scenario_checks],
            "weights": [float(w) for w in sc.weights],
            "values": _scenario_values(job.problem, sc),
        }
    extra = {}
    if job.choosing:  # the answer's problem: the additions' amounts as chosen (planned.yaml)
        extra["problem"] = job.decided(un.amounts)[0]
        record["chosen_amounts"] = [
            {"addition": job.problem.additions[j].key, "time_h": job.problem.additions[j].time, "species": sp,
             "amount": v, "min": job.problem.additions[j].chosen[sp][0], "max": job.problem.additions[j].chosen[sp][1]}
            for j, d in sorted(un.amounts.items()) for sp, v in sorted(d.items())]
    return result(
        status, message, objective_nlp=best.objective * job.f_obj,
        objective_sim=objective_sim,
        end_time=un.T, limits=tuple(values_out), starts=summaries, spread=spread, verification=ver,
        outcome=outcome, points=points, **extra,
    )


def _scenario_values(problem, sc) -> dict:
    """Each uncertain value in every scenario, in the unit it is written in:
    ``{"mu_max [1/h]": [...], ...}`` (internal units where it has none)."""
    units = {v.name: v.unit for v in problem.uncertainty.values} if problem.uncertainty else {}
    out = {}
    for name, row in zip(sc.names, sc.values):
        unit = units.get(name, "")
        f = factor_to(unit) if unit else 1.0
        out[f"{name} [{unit or 'internal units'}]"] = [float(v) * f for v in row]
    return out


def _full_points(job, un) -> dict:
    """Collocation points with every state of the full model: the amounts fed that
    the NLP does not carry follow exactly from the pump steps."""
    full, lean = job.full, job.lean
    x = np.full((len(un.t_points), full.nx), np.nan)
    for i, n in enumerate(lean.state_names):
        x[:, full.index(n)] = un.x_points[:, i]
    edges = un.t_steps
    cum = np.vstack([np.zeros(un.u_steps.shape[1]), np.cumsum(np.diff(edges)[:, None] * un.u_steps, axis=0)])
    for n in full.state_names:
        if n.startswith("fed_") and n not in lean.state_names:
            sp = n[4:]
            conc = np.array([f.composition.get(sp, 0.0) for f in job.problem.feeds])
            k = np.clip(np.searchsorted(edges, un.t_points, side="right") - 1, 0, len(edges) - 2)
            fed = cum[k] + (un.t_points - edges[k])[:, None] * un.u_steps[k]
            x[:, full.index(n)] = fed @ conc
    return {"t": un.t_points, "x": x, "u": un.u_points}


def _no_answer(job, result, starts, summaries, coarse, fine, data, diagnosis) -> OptimizeResult:
    """No start converged: say why, naming the limit in words and what to relax, and
    re-simulate the closest point's pump schedule so that the run folder still holds
    its figures and limit table (never labelled an answer)."""
    statuses = {s_.status for s_ in starts}
    if "interrupted" in statuses:
        raise KeyboardInterrupt
    closest, closest_nlp, worst = None, None, math.inf
    for s_ in starts:
        if not s_.w.size:
            continue
        nlp = fine if s_.w.size == fine.n_w else coarse
        v = nlp.violations(s_.w, data)
        rel = max([val / data.scale[n] for n, val in v.items() if n in data.scale] + [v["model equations"]])
        if rel < worst:
            closest, closest_nlp, worst = s_, nlp, rel
    where, extra = "", {}
    if closest is not None:
        name, amount = _worst_violation(job, closest_nlp, data, closest.w)
        try:
            ver = job.verify(closest_nlp, data, closest)
        except Exception:  # noqa: BLE001 - the diagnosis is a help, never a new failure
            ver = None
        broken = []
        if ver is not None and ver.trajectory is not None:
            un = closest_nlp.unpack(closest.w, data)
            extra = dict(verification=ver, end_time=un.T, points=_full_points(job, un),
                         objective_sim=None if ver.objective_sim is None else ver.objective_sim * job.f_obj,
                         outcome=outcome_of(job.full, ver.trajectory, un.T),
                         limits=tuple(LimitValue(rep, False, 0.0, 0.0) for rep in ver.limits))
            broken = [(lim, rep) for lim, rep in zip(job.full_limits, ver.limits) if rep.violated]
        if broken:
            lim, rep = max(broken, key=lambda lr: lr[0].relative_excess(lr[1]))
            where = (f"; the closest schedule the solver found breaks '{lim.name}' from {rep.first_violation:.4g} h "
                     f"by up to {rep.worst_violation:.4g} {rep.unit}".rstrip() +
                     " (its figures and limit table are in the run folder)")
        elif name:
            where = f"; the solver's closest point misses '{name}' by {amount}"
    lead = f"{diagnosis}; " if diagnosis else ""
    if statuses & {"time limit", "not run"} and job.deadline is not None and time.monotonic() > job.deadline:
        return result(st.TIME_LIMIT, f"{lead}no start converged before the deadline{where}",
                      starts=summaries, **extra)
    if "iteration limit" in statuses:
        return result(st.ITERATION_LIMIT, f"{lead}no start converged within its iteration budget{where}",
                      starts=summaries, **extra)
    if statuses <= {"infeasible"}:
        return result(st.INFEASIBLE, f"{lead}no start found a feed profile that meets every limit "
                      f"(IPOPT detected local infeasibility from each){where}", starts=summaries, **extra)
    return result(st.FAILED, f"{lead}IPOPT ended with {', '.join(sorted({s_.ipopt_status for s_ in starts}))}"
                  f"{where}", starts=summaries, **extra)


def _worst_violation(job, nlp, data, w):
    v = nlp.violations(w, data)
    units = {l.name: (l.factor, l.unit) for l in job.limits}
    rel = {n: val / data.scale[n] for n, val in v.items() if n != "model equations" and n in data.scale}
    if not rel or max(rel.values()) <= 1e-6:
        if v.get("model equations", 0) > 1e-6:
            return "model equations", f"{v['model equations']:.3g} (scaled residual)"
        return "", ""
    name = max(rel, key=rel.get)
    f, unit = units[name]
    return name, f"{v[name] * f:.4g} {unit}".rstrip()


def _blocked_at_start(job) -> str:
    """A path limit that no pump setting can meet at t = 0, or a first phase that
    would end as it starts, described; '' if none."""
    feeds = job.problem.feeds
    first = job.problem.phases[0] if job.problem.phases else None
    if first is not None and first.end.kind == "when":
        m = models_like(job.full)[0]
        u = np.array([first.pumps.get(f.name, (f.min_rate, f.max_rate))[0] for f in feeds])
        left = float(condition_function(m, first.end)(0.0, job.full.x0, u, phase_constants(m, first, m.p0)))
        if left <= 0:
            return (f"phase '{first.name}' would end as the run starts: '{first.end.text}' already holds at t = 0 "
                    f"(key {first.key}.until); start it from initial values on the other side, or leave the "
                    "phase out")
    corners = list(itertools.product(*[(f.min_rate, f.max_rate) for f in feeds]))[:64]
    first = job.problem.phases[0].name if job.problem.phases else None
    path = [l for l in job.full_limits if not l.at_end and l.kind not in ("pump", "setting", "phase pump")
            and l.phase in (None, first)]
    if not path:
        return ""
    g = limit_function(job.full, path)
    values = np.array([np.array(g(0.0, job.full.x0, np.array(c))).ravel() for c in corners])
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
                    f"at every combination of pump limits (key {lim.key})").replace("  ", " ")
    return ""


def _always_broken(job, guesses) -> str:
    """Limits that every trial feed breaks (pumps off, pumps at their maximum, and
    the initial feeds), with the earliest time, in words; '' if none."""
    feeds = job.problem.feeds
    T = job.T
    trials = [g.trajectory for g in guesses if g.trajectory is not None]
    for label, rates in (("pumps off", [f.min_rate for f in feeds]), ("pumps at maximum", [f.max_rate for f in feeds])):
        sched = piecewise_constant(job.full.feed_names, [0.0], np.array([rates]))
        try:
            trials.append(job.simulator.run(sched, T, min_points=400))
        except Exception:  # noqa: BLE001 - a feed the integrator cannot follow says nothing here
            continue
    if not trials:
        return ""
    broken = None
    for traj in trials:
        reports, _ = judge(job.full, job.full_limits, traj)
        names = {r.name: r for r in reports if r.violated and r.kind not in ("pump", "setting", "phase pump")}
        if broken is None:
            broken = {n: [r] for n, r in names.items()}
        else:
            broken = {n: v + [names[n]] for n, v in broken.items() if n in names}
        if not broken:
            return ""
    parts = []
    by_name = {l.name: l for l in job.full_limits}
    for name, reps in broken.items():
        first = min(r.first_violation for r in reps)
        least = min(r.worst_violation for r in reps)
        lim = by_name[name]
        key = lim.key if lim.kind in ("volume", "oxygen", "heat") else f"{lim.key}.{reps[0].side}"
        parts.append(f"every trial feed (pumps off, pumps at maximum and the initial feeds) breaks '{name}', "
                     f"the earliest at {first:.3g} h: relax {key} by at least {least:.3g} {lim.unit}".rstrip() +
                     " or change what drives it before then (initial values, kinetics)")
    return "; ".join(parts)
