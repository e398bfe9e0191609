"""IPOPT through CasADi: initial guesses, multistart, and the status table.

Initial guesses come from simulating candidate feeds (constant fractions of the pump
range, exponential feeds growing to the maximum), each scaled down if it would
overfill the vessel. Each start is solved in its own process when more than one core
is free; every process builds its own model from the picklable Problem.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field

import casadi as ca
import numpy as np

from .collocation import Transcription
from .errors import SimulationError
from .limits import build_limits
from .model import build_model
from .processes import cpu_count, run_killable
from .problem.spec import Problem
from .schedule import piecewise_constant
from .simulate import Simulator

# IPOPT's return_status -> our word for how the solver ended
IPOPT_STATUS = {
    "Solve_Succeeded": "converged",
    "Solved_To_Acceptable_Level": "converged",
    "Feasible_Point_Found": "failed",  # feasible is not optimal
    "Infeasible_Problem_Detected": "infeasible",
    "Restoration_Failed": "failed",
    "Maximum_Iterations_Exceeded": "iteration limit",
    "Maximum_CpuTime_Exceeded": "time limit",
    "Maximum_WallTime_Exceeded": "time limit",
    "Search_Direction_Becomes_Too_Small": "failed",
    "Diverging_Iterates": "failed",
    "User_Requested_Stop": "failed",
    "Error_In_Step_Computation": "failed",
    "Not_Enough_Degrees_Of_Freedom": "failed",
    "Invalid_Number_Detected": "failed",
    "Invalid_Problem_Definition": "failed",
    "Invalid_Option": "failed",
    "Internal_Error": "failed",
    "Unrecoverable_Exception": "failed",
    "Insufficient_Memory": "failed",
}


@dataclass
class Scaling:
    """Nominal magnitudes shared by every start (so their NLPs are identical).

    x : (nx,) states; t : end time, h; objective : internal units.
    """

    x: np.ndarray
    t: float
    objective: float


@dataclass
class Start:
    """One start of the multistart.

    Attributes
    ----------
    label : str
        The initial feed it began from.
    status : str
        'converged', 'infeasible', 'iteration limit', 'time limit' or 'failed'.
    ipopt_status : str
        IPOPT's own return status.
    objective : float or None
        NLP objective J (internal units, its own sense), None if not finite.
    iterations : int
    seconds : float
        Wall time of the solve.
    w, lam_g, lam_x : ndarray
        Solution and multipliers.
    guess_objective : float or None
        J of the initial feed (re-simulated), for comparison.
    """

    label: str
    status: str
    ipopt_status: str
    objective: float | None
    iterations: int
    seconds: float
    w: np.ndarray = field(repr=False)
    lam_g: np.ndarray = field(repr=False)
    lam_x: np.ndarray = field(repr=False)
    guess_objective: float | None = None


@dataclass
class Guess:
    label: str
    steps_u: np.ndarray  # (M, nu), L/h
    T: float
    times: np.ndarray
    states: np.ndarray
    objective: float | None


def end_time_info(problem: Problem):
    """(fixed end time or None, (min, max) bounds, nominal end time), h."""
    h = problem.horizon
    if h.free:
        return None, (h.min_end, h.max_end), h.guess
    return h.end_time, (h.end_time, h.end_time), h.end_time


def candidate_feeds(problem: Problem, T: float, M: int, count: int) -> list[tuple[str, np.ndarray]]:
    """Up to ``count`` candidate pump programmes, (label, (M, nu) rates in L/h)."""
    feeds = problem.feeds
    fmin = np.array([f.min_rate for f in feeds])
    fmax = np.array([f.max_rate for f in feeds])
    t_mid = (np.arange(M) + 0.5) * T / M
    room = problem.vessel.working_volume - problem.vessel.initial_volume

    def fit(rates, label):
        rates = np.clip(rates, fmin, fmax)
        fed = rates.sum() * T / M
        if fed > 0.95 * room and fed > 0:
            extra = rates - fmin
            need = 0.95 * room - fmin.sum() * T
            scale = max(0.0, need / max(extra.sum() * T / M, 1e-300))
            rates = fmin + extra * min(1.0, scale)
            label += " (scaled to fit the vessel)"
        return label, rates

    shapes = []
    for kT, frac in ((3.0, None), (None, 0.25), (6.0, None), (None, 0.6), (1.5, None), (None, 0.1),
                     (10.0, None), (None, 0.9)):
        if kT is not None:
            prof = np.exp(kT * (t_mid / T - 1.0))[:, None]
            shapes.append(fit(fmin + prof * (fmax - fmin), f"exponential feed rising e^{kT:g}-fold to the pump maximum"))
        else:
            shapes.append(fit(np.tile(fmin + frac * (fmax - fmin), (M, 1)), f"constant {frac:.0%} of pump range"))
    while len(shapes) < count:  # more starts than shapes: random piecewise profiles, fixed seed
        rng = np.random.default_rng(len(shapes))
        shapes.append(fit(fmin + rng.uniform(0, 1, (M, len(feeds))) * (fmax - fmin), f"random #{len(shapes)}"))
    return shapes[:count]


def make_guesses(problem: Problem, model, count: int) -> list[Guess]:
    """Simulate the candidate feeds; drop those the integrator cannot follow."""
    fixed, bounds, T = end_time_info(problem)
    M = problem.settings.pump_steps
    sim = Simulator(model)
    out = []
    for label, steps in candidate_feeds(problem, T, M, count):
        sched = piecewise_constant(model.feed_names, np.linspace(0, T, M + 1)[:-1], steps)
        try:
            traj = sim.run(sched, T, min_points=max(400, 4 * M))
        except SimulationError:
            continue
        J = model.end_value(traj.final, T, traj.u[-1]) if problem.objective is not None else None
        out.append(Guess(label, steps, T, traj.t, traj.x, None if J is None else float(J)))
    return out


def scaling_for(problem: Problem, guesses: list[Guess]) -> Scaling:
    xs = np.max([np.max(np.abs(g.states), axis=0) for g in guesses], axis=0)
    xs = np.where(xs > 1e-9, xs, 1.0)
    js = [abs(g.objective) for g in guesses if g.objective is not None and math.isfinite(g.objective)]
    j = max(js) if js and max(js) > 1e-12 else 1.0
    _, _, T = end_time_info(problem)
    return Scaling(xs, float(T), float(j))


def transcribe(problem: Problem, scaling: Scaling, model=None, limits=None, backoff=None) -> Transcription:
    model = model or build_model(problem)
    limits = limits if limits is not None else build_limits(model)
    fixed, bounds, _ = end_time_info(problem)
    return Transcription(model, limits, problem.settings, fixed, bounds, scaling.x, scaling.t, scaling.objective,
                         backoff)


# Barrier strategies tried in turn until one converges. A monotone barrier from a
# small initial mu suits these problems (guesses from simulation are near-feasible);
# the adaptive strategy rescues some of the rest. Each but the last gets at most
# FIRST_PROFILE_ITER iterations (a start that wanders that long rarely converges
# with it), and all together at most solver.max_iter. Measured on the shipped
# examples and the published benchmarks.
IPOPT_PROFILES = (
    {"ipopt.mu_strategy": "monotone", "ipopt.mu_init": 1e-3},
    {"ipopt.mu_strategy": "adaptive"},
)
FIRST_PROFILE_ITER = 1000


def ipopt_options(settings, profile: dict | None = None, quiet: bool = True) -> dict:
    return {
        "expand": True,
        "print_time": False,
        "ipopt.print_level": 0 if quiet else 5,
        "ipopt.sb": "yes",
        "ipopt.max_iter": settings.max_iter,
        "ipopt.tol": settings.tolerance,
        "ipopt.acceptable_tol": max(settings.tolerance * 100, 1e-6),
        "ipopt.acceptable_iter": 10,
        # approximate minimum fill ordering: on collocation KKT systems it keeps the
        # time per iteration linear in the element count, where MUMPS' automatic
        # choice grew about 4x faster (benchmarks/optimize_benchmark.py)
        "ipopt.mumps_pivot_order": 2,
        **(profile if profile is not None else IPOPT_PROFILES[0]),
    }


WARM_PROFILE = {
    "ipopt.warm_start_init_point": "yes", "ipopt.mu_init": 1e-6, "ipopt.warm_start_bound_push": 1e-9,
    "ipopt.warm_start_mult_bound_push": 1e-9, "ipopt.mu_strategy": "monotone",
}


def solve_one(trans: Transcription, w0: np.ndarray, label: str, guess_objective=None, warm=None) -> Start:
    """Solve the NLP from ``w0``, trying each of :data:`IPOPT_PROFILES` until one
    converges; never raises for a solver failure. Iterations and time add up.

    ``warm`` = (lam_g, lam_x), multipliers of a nearby solution: then a warm start
    (small barrier, the given multipliers) is tried first."""
    best, iterations, seconds = None, 0, 0.0
    profiles = list(IPOPT_PROFILES)
    if warm is not None:
        profiles.insert(0, WARM_PROFILE)
    for k, profile in enumerate(profiles):
        left = trans.settings.max_iter - iterations  # max_iter bounds the start as a whole
        if left <= 0:
            break
        cap = min(left, FIRST_PROFILE_ITER) if k < len(profiles) - 1 else left
        profile = {**profile, "ipopt.max_iter": cap}
        start = _solve_profile(trans, w0, label, guess_objective, profile,
                               warm if "ipopt.warm_start_init_point" in profile else None)
        iterations += start.iterations
        seconds += start.seconds
        if best is None or start.status == "converged":
            best = start
        if start.status == "converged":
            break
    best.iterations, best.seconds = iterations, seconds
    if k > 0 and best.status == "converged":
        best.label += f" (after {k} fallback)"
    return best


def _solve_profile(trans, w0, label, guess_objective, profile, warm=None) -> Start:
    solver = ca.nlpsol("optfeed", "ipopt", trans.nlp, ipopt_options(trans.settings, profile))
    t0 = time.perf_counter()
    extra = {} if warm is None else {"lam_g0": warm[0], "lam_x0": warm[1]}
    try:
        res = solver(x0=w0, lbx=trans.lbx, ubx=trans.ubx, lbg=trans.lbg, ubg=trans.ubg, **extra)
    except RuntimeError as exc:  # evaluation errors surface here
        return Start(label, "failed", f"error: {str(exc).splitlines()[-1][:120]}", None, 0,
                     time.perf_counter() - t0, w0, np.zeros(trans.n_g), np.zeros(trans.n_w), guess_objective)
    seconds = time.perf_counter() - t0
    stats = solver.stats()
    ipopt_status = stats.get("return_status", "unknown")
    w = np.array(res["x"]).ravel()
    J = trans.objective_value(w)
    return Start(
        label=label, status=IPOPT_STATUS.get(ipopt_status, "failed"), ipopt_status=ipopt_status,
        objective=J if math.isfinite(J) else None, iterations=int(stats.get("iter_count", 0)),
        seconds=seconds, w=w, lam_g=np.array(res["lam_g"]).ravel(), lam_x=np.array(res["lam_x"]).ravel(),
        guess_objective=guess_objective,
    )


def _worker(args):
    problem, scaling, guess = args
    trans = transcribe(problem, scaling)
    w0 = trans.pack(guess.times, guess.states, guess.steps_u, guess.T)
    return solve_one(trans, w0, guess.label, guess.objective)


# A start still running when it has taken BUDGET_FACTOR times as long as the median
# converged start (and at least MIN_BUDGET_S) is stopped: the others have answered,
# and a start that wanders that long rarely finds a better optimum.
BUDGET_FACTOR = 3.0
MIN_BUDGET_S = 5.0


def multistart(problem: Problem, scaling: Scaling, guesses: list[Guess], workers: int | None = None,
               on_done=None) -> list[Start]:
    """Solve from every guess; in parallel processes when ``workers`` > 1 (default:
    the cores this process may use, at most one per start), in this process otherwise.

    ``on_done(start, n_done, n_total)`` is called as each start finishes. Returns the
    starts in the order of ``guesses``.
    """
    jobs = [(problem, scaling, g) for g in guesses]
    if workers is None:
        workers = min(len(jobs), cpu_count())
    if workers <= 1 or len(jobs) == 1:
        out = []
        for job in jobs:
            out.append(_worker(job))
            if on_done:
                on_done(out[-1], len(out), len(jobs))
        return out
    return _parallel(jobs, workers, on_done)


def _parallel(jobs, workers, on_done) -> list[Start]:
    results: dict[int, Start] = {}

    def done(i, kind, payload, seconds):
        if kind == "ok":
            results[i] = payload
        else:
            results[i] = _failed_start(jobs[i], payload, seconds, "time limit" if kind == "killed" else "failed")
        if on_done:
            on_done(results[i], len(results), len(jobs))

    def over_budget(i, seconds):
        times = sorted(s.seconds for s in results.values() if s.status == "converged")
        if times and seconds > max(MIN_BUDGET_S, BUDGET_FACTOR * times[len(times) // 2]):
            return f"stopped after {seconds:.0f} s, over the multistart time budget"
        return None

    run_killable(list(enumerate(jobs)), _worker, workers, done, over_budget)
    return [results[i] for i in range(len(jobs))]


def _failed_start(job, why: str, seconds: float, status: str = "failed") -> Start:
    guess = job[2]
    return Start(guess.label, status, why, None, 0, seconds, np.zeros(0), np.zeros(0), np.zeros(0), guess.objective)
