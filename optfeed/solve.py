"""IPOPT through CasADi: built solvers, initial feeds, one solve, and the status table.

Build once, solve many. :func:`get_nlp` returns the :class:`~optfeed.transcription.FeedNLP`
of a problem's structure from a per-process cache, so starts, back-off rounds and the
cases of a sweep that differ only in numbers reuse one graph. For each IPOPT option
profile (a cold start, a warm start...) the NLP builds its solver once; every
profile uses the NLP's own exact derivatives, assembled from its pieces' when the
NLP is built (:mod:`optfeed.derivatives`), so a solver costs little to build and
an iteration as little as on the NLP expanded to one scalar graph.

Every solve is watched after each IPOPT iteration (:class:`Watch`): it reports
progress, stops at a deadline (``--time-limit``) and stops at once on Ctrl-C, so an
interrupted run never carries on to an answer. Budgets are iteration counts, never
wall time, so a run's answer does not depend on how busy the machine is.
"""

from __future__ import annotations

import math
import os
import signal
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field

import casadi as ca
import numpy as np

from .errors import SimulationError
from .limits import build_limits
from .model import build_model
from .problem.spec import Problem
from .schedule import piecewise_constant
from .simulate import Simulator
from .phases import base_model, guess_switches, phase_limits
from .transcription import FeedNLP, Grid, NLPData, structure_key

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
    "User_Requested_Stop": "stopped",
    "Error_In_Step_Computation": "failed",
    "Not_Enough_Degrees_Of_Freedom": "failed",
    "Invalid_Number_Detected": "failed",
    "Invalid_Problem_Definition": "failed",
    "Invalid_Option": "failed",
    "Internal_Error": "failed",
    "Unrecoverable_Exception": "failed",
    "Insufficient_Memory": "failed",
}

# IPOPT option profiles, measured on the shipped examples and the published
# benchmarks. 'cold': a monotone barrier from a small initial mu suits starts from
# simulated feeds (near-feasible); 'adaptive' rescues some of the rest and explores
# other basins; 'near': from a good point without multipliers (a coarse answer moved
# to a finer grid; mu_init 1e-6: Park-Ramirez's 320-step refinement 56 -> 31
# iterations against 1e-5, the fine solves of the published problems 13-42, as
# before within four); 'seeded': from the optimum of a neighbouring problem,
# simulated on this one (the nominal optimum as the start of the scenario NLP:
# on configs/inhibited_product_uncertain.yaml's coarse grid 48 and 59 iterations
# at 4 and 8 scenarios against 80 and 98 from mu_init 1e-3; the scenario stage at
# 16 scenarios 13.7 against 22.8 s CPU, and at 8 and 16 a better optimum); 'warm':
# from a nearby solution with its multipliers (back-off rounds, a changed bound).
# 'calibration': the fit's NLP from its anchored course (optfeed.fit), with no
# least-squares estimate of the first multipliers (IPOPT starts them at zero) and
# mu_init 1e-4; IPOPT iterations over noise seeds of benchmarks/fit_benchmark.py's
# designs, one start, against 'cold': 1 run 707 -> 505 (seeds 1-24), 2 runs 440 ->
# 425, 4 runs 155 -> 161, 8 runs 198 -> 188 (seeds 1-5, 7, 11); with 4 starts (seeds
# 1-6) 779 -> 666 at 1 run, 1935 -> 1389 at 4; every start converged either way, the
# polished estimates the same to 1e-8. mu_init 1e-4 alone (with the multiplier
# estimate): one seed of 1 run took 523 iterations.
PROFILES = {
    "cold": {"ipopt.mu_strategy": "monotone", "ipopt.mu_init": 1e-3},
    "adaptive": {"ipopt.mu_strategy": "adaptive"},
    "calibration": {"ipopt.mu_strategy": "monotone", "ipopt.mu_init": 1e-4, "ipopt.constr_mult_init_max": 0},
    "near": {"ipopt.mu_strategy": "monotone", "ipopt.mu_init": 1e-6},
    "seeded": {"ipopt.mu_strategy": "monotone", "ipopt.mu_init": 1e-5},
    "warm": {"ipopt.warm_start_init_point": "yes", "ipopt.mu_init": 1e-6, "ipopt.warm_start_bound_push": 1e-9,
             "ipopt.warm_start_mult_bound_push": 1e-9, "ipopt.mu_strategy": "monotone"},
}


def ipopt_options(tolerance: float, profile: str, copies: int = 1) -> dict:
    """IPOPT's options for a profile; ``copies``: copies of the model in the NLP that share
    decision columns (scenarios sharing a pump profile; a calibration NLP's runs, whose
    own copies of the parameters are tied by rows, count as one)."""
    return {
        "print_time": False,
        "ipopt.print_level": 0,
        "ipopt.sb": "yes",
        "ipopt.tol": tolerance,
        "ipopt.acceptable_tol": max(tolerance * 100, 1e-6),
        "ipopt.acceptable_iter": 10,
        # approximate minimum fill ordering: on one collocation block it keeps the
        # time per iteration linear in the element count, where MUMPS' automatic
        # choice grew about 4x faster (benchmarks/optimize_benchmark.py). Several
        # blocks sharing decisions: nested dissection (METIS), and MUMPS' iterative
        # row and column scaling named outright. With its automatic scaling choice
        # the factorization grew far faster than the blocks (8 scenarios: 22x the
        # CPU per iteration of one, 1.1 s of system time per solve; with scaling 7,
        # 9.6x; benchmarks/scenario_benchmark.py); any explicit scaling, or none,
        # measured alike, and the ordering then matters little (AMF 89, METIS 73 ms)
        "ipopt.mumps_pivot_order": 2 if copies == 1 else 5,
        **({} if copies == 1 else {"ipopt.mumps_scaling": 7}),
        # a short solve from a nearby answer of a scenario NLP of more than 8 blocks:
        # no permuting scaling (its matching grows about 150x from one block to
        # sixteen and is paid once per solve). Interleaved on the scenario stage: 16
        # scenarios 18.8/14.7 -> 14.6/12.3 s CPU, the same iterations and optimum; 8
        # alike; 4 about 7 % more (2.95/3.14 -> 3.15/3.36 s: slower warm solves). For
        # every solve it changed IPOPT's path (4 scenarios: 501 iterations from a cold
        # start, as from a simulated feed with the 'near' profile)
        **({"ipopt.mumps_permuting_scaling": 0} if copies > 8 and profile in ("warm", "near") else {}),
        # MUMPS' working space: 100 % more than its estimate, not IPOPT's default of
        # 1000 %; the larger one is allocated and zeroed at every factorization (16
        # scenarios: 5.3 s of system time per solve, 0.03 s with 100 %; one block:
        # the same iterations and CPU). IPOPT raises it by itself where it is too small
        "ipopt.mumps_mem_percent": 100,
        # the multipliers of the NLP's parameters are never read; computing them needs
        # a gradient of the Lagrangian that CasADi differentiates anew for every solver
        # built, even when the other derivatives are handed over (4 scenarios: a
        # second solver of one NLP built in 0.05 s instead of 1.1-1.5 s; the first,
        # which makes the derivatives, in 2.2 instead of 3.5-4.2 s)
        "calc_lam_p": False,
        "no_nlp_grad": True,
        **PROFILES[profile],
    }


# ---------------------------------------------------------------------- watching a solve


class Interrupted(Exception):
    """Ctrl-C arrived during a solve (raised after the solver has stopped cleanly)."""


class Watch(ca.Callback):
    """Called by IPOPT after every iteration: progress, deadline, Ctrl-C.

    One per built solver; what it watches for is set before each solve.
    """

    def __init__(self, nx: int, ng: int, np_: int):
        ca.Callback.__init__(self)
        self.nx, self.ng, self.np = nx, ng, np_
        self.reset()
        self.construct("watch", {})

    def reset(self, deadline: float | None = None, report=None, every: float = 2.0, label: str = "",
              lbg=None, ubg=None):
        self.deadline, self.report, self.every, self.label = deadline, report, every, label
        self.lbg, self.ubg = lbg, ubg
        self.iterations = 0
        self.stopped_for = None
        self._last = time.monotonic()

    # CasADi's Callback interface
    def get_n_in(self):
        return ca.nlpsol_n_out()

    def get_n_out(self):
        return 1

    def get_name_in(self, i):
        return ca.nlpsol_out(i)

    def get_name_out(self, i):
        return "ret"

    def get_sparsity_in(self, i):
        name = ca.nlpsol_out(i)
        if name == "f":
            return ca.Sparsity.scalar()
        if name in ("x", "lam_x"):
            return ca.Sparsity.dense(self.nx)
        if name in ("g", "lam_g"):
            return ca.Sparsity.dense(self.ng)
        return ca.Sparsity.dense(self.np)  # lam_p

    def eval(self, arg):
        self.iterations += 1
        now = time.monotonic()
        if _INTERRUPT.is_set():
            self.stopped_for = "interrupted"
            return [1]
        if self.deadline is not None and now > self.deadline:
            self.stopped_for = "time limit"
            return [1]
        if self.report is not None and now - self._last >= self.every:
            self._last = now
            infeasibility = None
            if self.lbg is not None and len(self.lbg):
                g = np.array(arg[2]).ravel()
                infeasibility = float(np.max(np.maximum(np.maximum(self.lbg - g, g - self.ubg), 0.0)))
            self.report(self.label, self.iterations, float(arg[1]), infeasibility)
        return [0]


_INTERRUPT = threading.Event()


class interrupt_guard:
    """Context manager: Ctrl-C during the block sets a flag that every running solve
    sees after its current iteration (it then stops); on leaving, a pending Ctrl-C is
    raised as KeyboardInterrupt. Only in the main thread; elsewhere it does nothing."""

    def __enter__(self):
        _INTERRUPT.clear()
        self._old = None
        if threading.current_thread() is threading.main_thread():
            self._old = signal.signal(signal.SIGINT, lambda *a: _INTERRUPT.set())
        return self

    def __exit__(self, exc_type, exc, tb):
        if self._old is not None:
            signal.signal(signal.SIGINT, self._old)
        if _INTERRUPT.is_set() and exc_type is None:
            _INTERRUPT.clear()
            raise KeyboardInterrupt
        return False


def interrupted() -> bool:
    return _INTERRUPT.is_set()


# ---------------------------------------------------------------------- built solvers

_CACHE: OrderedDict = OrderedDict()
CACHE_SIZE = 12


def get_nlp(problem: Problem, model, limits, grid: Grid, free_time: bool, scenarios: int = 1,
            combine: str = "mean", smoothing: bool = False, stretches: tuple | None = None,
            phase_models: list | None = None) -> FeedNLP:
    """The FeedNLP of this problem's structure (built on first use, then reused);
    ``stretches`` and ``phase_models`` for a run with phases or additions."""
    key = structure_key(problem, grid, free_time, scenarios, combine, smoothing, stretches)
    if key in _CACHE:
        _CACHE.move_to_end(key)
        return _CACHE[key]
    nlp = FeedNLP(model, limits, grid, free_time, scenarios, combine, smoothing, stretches, phase_models)
    nlp.key = key
    _CACHE[key] = nlp
    while len(_CACHE) > CACHE_SIZE:
        _CACHE.popitem(last=False)
    return nlp


def cache_info() -> dict:
    return {"entries": len(_CACHE), "solvers": sum(len(n._solvers) for n in _CACHE.values())}


def clear_cache() -> None:
    _CACHE.clear()


# glibc hands a freed block above its mmap threshold (at most 32 MiB by itself) back
# to the system, and the next allocation of that size faults every page in anew.
# MUMPS allocates its factors at every factorization: on a 16-scenario NLP they
# pass 32 MiB, and that cost 2.6 s of system time in a 19.9 s solve (0.02 s with
# the thresholds below; the same iterations; benchmarks/scenario_benchmark.py).
# The environment variable OPTFEED_SYSTEM_MALLOC=1 leaves the C library as it is
# (for a notebook or a host program that tunes its own memory).
MMAP_THRESHOLD = 512 << 20  # bytes: blocks up to this come from the heap and are reused
MMAP_THRESHOLD_SMALL = 32 << 20  # what older glibc accepts at most on 64-bit systems
TRIM_THRESHOLD = 512 << 20  # bytes: free memory the heap keeps before it shrinks
_MEMORY_SET = False


def _reuse_freed_memory() -> None:
    """Raise the C library's thresholds for handing freed memory back (glibc's
    mallopt; elsewhere, or with OPTFEED_SYSTEM_MALLOC=1, nothing happens). Once per
    process, at the first solver. The trim threshold is set only when an mmap
    threshold was taken (setting either stops glibc's own adjustment of both)."""
    global _MEMORY_SET
    if _MEMORY_SET:
        return
    _MEMORY_SET = True
    if os.environ.get("OPTFEED_SYSTEM_MALLOC", "") not in ("", "0"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        if libc.mallopt(-3, MMAP_THRESHOLD) or libc.mallopt(-3, MMAP_THRESHOLD_SMALL):  # M_MMAP_THRESHOLD
            libc.mallopt(-1, TRIM_THRESHOLD)  # M_TRIM_THRESHOLD
    except (OSError, AttributeError):
        pass


def _solver(nlp, profile: str, tolerance: float, max_iter: int):
    """The built solver of ``nlp`` (a FeedNLP, or a calibration NLP) for this
    profile, on the NLP's own values and its assembled derivatives."""
    key = (profile, tolerance, max_iter)
    if key in nlp._solvers:
        return nlp._solvers[key]
    _reuse_freed_memory()
    opts = ipopt_options(tolerance, profile, nlp.copies)
    opts["ipopt.max_iter"] = int(max_iter)
    watch = Watch(nlp.n_w, nlp.n_g, nlp.P.size)
    opts["iteration_callback"] = watch
    opts.update(nlp.derivatives(few_iterations=profile == "warm"))
    solver = ca.nlpsol(f"optfeed_{profile}", "ipopt", nlp._sx, opts)
    nlp._solvers[key] = (solver, watch)
    return solver, watch


@dataclass
class Start:
    """One solve of the NLP.

    Attributes
    ----------
    label : str
        The initial feed it began from.
    status : str
        'converged', 'infeasible', 'iteration limit', 'time limit', 'interrupted',
        'failed', or 'not run' (its turn never came: time limit or Ctrl-C first).
    ipopt_status : str
    objective : float or None
        NLP objective J (internal units, its own sense), None if not finite.
    iterations : int
    seconds : float
        CPU time of the solve itself (never time spent waiting).
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


def solve(nlp: FeedNLP, data: NLPData, w0, label: str, *, profile: str = "cold", tolerance: float = 1e-8,
          max_iter: int = 3000, warm=None, deadline: float | None = None, report=None,
          guess_objective=None) -> Start:
    """One IPOPT solve from ``w0``; never raises for a solver failure.

    ``warm`` = (lam_g, lam_x), multipliers of a nearby solution (use with profile
    'warm'). ``deadline`` (time.monotonic) stops the solve ('time limit');
    ``report(label, iteration, objective, infeasibility)`` is called every few
    seconds with the NLP's own (scaled) objective and its largest constraint
    violation (scaled rows).
    """
    solver, watch = _solver(nlp, profile, tolerance, max_iter)
    args = nlp.arguments(data)
    watch.reset(deadline, report, label=label, lbg=args["lbg"], ubg=args["ubg"])
    if warm is not None:
        args["lam_g0"], args["lam_x0"] = warm
    c0 = time.process_time()
    try:
        res = solver(x0=w0, **args)
    except RuntimeError as exc:  # evaluation errors surface here
        return Start(label, "failed", f"error: {str(exc).splitlines()[-1][:120]}", None, watch.iterations,
                     time.process_time() - c0, np.asarray(w0, dtype=float), np.zeros(nlp.n_g), np.zeros(nlp.n_w),
                     guess_objective)
    seconds = time.process_time() - c0
    stats = solver.stats()
    ipopt_status = stats.get("return_status", "unknown")
    status = IPOPT_STATUS.get(ipopt_status, "failed")
    if status == "stopped":
        status = watch.stopped_for or "failed"
    w = np.array(res["x"]).ravel()
    J = nlp.objective_value(w, data)
    return Start(
        label=label, status=status, ipopt_status=ipopt_status,
        objective=J if math.isfinite(J) else None, iterations=int(stats.get("iter_count", 0)),
        seconds=seconds, w=w, lam_g=np.array(res["lam_g"]).ravel(), lam_x=np.array(res["lam_x"]).ravel(),
        guess_objective=guess_objective,
    )


# ---------------------------------------------------------------------- initial feeds


@dataclass
class Scaling:
    """Nominal magnitudes shared by every start (so their NLPs are identical).

    x : (nx,) states of the NLP's model; t : end time, h; objective : internal units.
    """

    x: np.ndarray
    t: float
    objective: float


@dataclass
class Guess:
    """A candidate feed, simulated: its pump steps (M, nu) L/h, run length T (h),
    the simulated states (of the full model) and objective; ``profile``, the IPOPT
    profile its first solve starts with ('cold' for a candidate feed, 'seeded' for
    the optimum of a neighbouring problem)."""

    label: str
    steps_u: np.ndarray
    T: float
    times: np.ndarray
    states: np.ndarray
    objective: float | None
    trajectory: object = field(default=None, repr=False)
    profile: str = "cold"


def end_time_info(problem: Problem):
    """(fixed end time or None, (min, max) bounds, nominal end time), h."""
    h = problem.horizon
    if h.free:
        return None, (h.min_end, h.max_end), h.guess
    return h.end_time, (h.end_time, h.end_time), h.end_time


# The order of the candidate feeds: a run with n starts tries the first n, so more
# starts only add candidates. They span the range: exponential feeds of several
# steepness, and constant feeds from low to the most the vessel can take.
SHAPES = (("exp", 3.0), ("const", 0.1), ("const", 0.5), ("exp", 6.0), ("const", 1.0), ("exp", 1.5),
          ("const", 0.25), ("exp", 10.0), ("const", 0.75))


def candidate_feeds(problem: Problem, T: float, M: int, count: int) -> list[tuple[str, np.ndarray]]:
    """Up to ``count`` distinct candidate pump programmes, (label, (M, nu) rates in L/h).

    Constant feeds are fractions of the largest useful constant rate: the pump
    maximum, or the rate that fills the vessel to 95 % of its room by the end if that
    is lower. Exponential feeds rise e^k-fold over the run to the same top, scaled
    so that they never feed more than that room either.
    """
    feeds = problem.feeds
    fmin = np.array([f.min_rate for f in feeds])
    fmax = np.array([f.max_rate for f in feeds])
    t_mid = (np.arange(M) + 0.5) * T / M
    room = 0.95 * (problem.vessel.working_volume - problem.vessel.initial_volume)
    dt = T / M

    def fit(rates):
        rates = np.clip(rates, fmin, fmax)
        fed = rates.sum() * dt
        base = fmin.sum() * T
        if fed > room and fed > base:
            extra = rates - fmin
            scale = max(0.0, (room - base) / max(extra.sum() * dt, 1e-300))
            rates = fmin + extra * min(1.0, scale)
        return rates

    out = []
    for kind, value in SHAPES:
        if kind == "const":
            rates = fit(np.tile(fmax, (M, 1)))  # the top constant feed that fits
            top = rates[0] - fmin
            rates = np.tile(fmin + value * top, (M, 1))
            label = f"constant feed at {value:.0%} of the largest that fits"
        else:
            prof = np.exp(value * (t_mid / T - 1.0))[:, None]
            rates = fit(fmin + prof * (fmax - fmin))
            label = f"exponential feed rising e^{value:g}-fold"
        if not any(np.allclose(rates, r, rtol=1e-6, atol=1e-12) for _, r in out):
            out.append((label, rates))
        if len(out) == count:
            return out
    k = 0
    while len(out) < count:  # more starts than shapes: random piecewise profiles, fixed seeds
        rng = np.random.default_rng(k)
        k += 1
        out.append((f"random feed #{k}", fit(fmin + rng.uniform(0, 1, (M, len(feeds))) * (fmax - fmin))))
    return out


def make_guesses(problem: Problem, model, count: int, M: int | None = None) -> list[Guess]:
    """Simulate the candidate feeds with the full model; drop those the integrator
    cannot follow."""
    fixed, bounds, T = end_time_info(problem)
    M = M or problem.settings.pump_steps
    sim = Simulator(model)
    out = []
    switches = {"switch_times": guess_switches(problem)} if problem.phases else {}
    for label, steps in candidate_feeds(problem, T, M, count):
        sched = piecewise_constant(model.feed_names, np.linspace(0, T, M + 1)[:-1], steps)
        try:
            traj = sim.run(sched, T, min_points=max(400, 4 * M), **switches)
        except SimulationError:
            continue
        J = model.end_value(traj.final, T, traj.u[-1]) if problem.objective is not None else None
        out.append(Guess(label, steps, T, traj.t, traj.x, None if J is None else float(J), traj))
    return out


def scaling_for(problem: Problem, nlp_model, guesses: list[Guess], full_model) -> Scaling:
    """Nominal magnitudes from the simulated guesses, for the NLP model's states."""
    idx = [full_model.index(n) for n in nlp_model.state_names]
    xs = np.max([np.max(np.abs(g.states[:, idx]), axis=0) for g in guesses], axis=0)
    xs = np.where(xs > 1e-9, xs, 1.0)
    js = [abs(g.objective) for g in guesses if g.objective is not None and math.isfinite(g.objective)]
    j = max(js) if js and max(js) > 1e-12 else 1.0
    _, _, T = end_time_info(problem)
    return Scaling(xs, float(T), float(j))


def states_for(nlp_model, full_model, states: np.ndarray) -> np.ndarray:
    """Columns of a full-model state array that the NLP model keeps."""
    return states[:, [full_model.index(n) for n in nlp_model.state_names]]


def models(problem: Problem):
    """(full model for simulation and reports, lean model for the NLP, its limits)."""
    full = base_model(problem)
    lean = base_model(problem, fed="used")
    limits = build_limits(lean)
    names = {l.name for l in limits}
    for ph in problem.phases:  # a phase's own limits: their bounds are data of every solve
        limits += [l for l in phase_limits(lean, ph) if l.name not in names]
    return full, lean, limits

