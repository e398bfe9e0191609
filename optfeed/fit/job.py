"""The fit job: calibrate a problem's parameters against past runs.

1. Guesses: the given start, then ``starts - 1`` Latin-hypercube points within the
   bounds (log-spaced where a bound spans a decade or more). Each NLP starts from
   the guess's course pinned to the data at every sample
   (:func:`.simulate.anchored_run`); a guess that cannot be simulated starts with
   its measured states at the data and the others from the first guess's course
   (see :meth:`.transcription.FitNLP.pack`).
2. Every run is transcribed by the collocation blocks of :mod:`.transcription`, all in
   one NLP sharing the estimated parameters (the simultaneous approach), and solved
   with IPOPT from each start. A solve that stops with a finite answer short of
   IPOPT's convergence test goes on to the polish, which judges it.
3. The best answer is polished on the runs' exact re-simulation by Levenberg-Marquardt
   steps whose Jacobian comes from the CVODES sensitivity equations: this removes what
   remains of the collocation error, so the estimates are those of the model, not of
   its discretisation. The residuals reported are the re-simulation's, as optimize
   verifies its answers. The fit is 'fitted' when the polish ends at a stationary
   point of the re-simulated weighted least squares.
4. The statistics of :mod:`.statistics` from the exact Jacobian: covariance,
   intervals, correlation, identifiability, goodness of fit; profile likelihood
   intervals on request (each point re-estimates the other parameters on the
   re-simulated runs).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from .. import status as st
from ..errors import SimulationError
from ..problem.dotted import as_problem
from ..provenance import problem_digest, stamp
from ..simulate import Simulator
from ..solve import interrupt_guard, interrupted, solve
from ..units import factor_to
from .runs import Runs, fit_model, load_runs, require_one_phase
from .simulate import Sampler, anchored_run, simulate_run
from .statistics import Statistics, identifiability_words, uncertainty, verdict
from .transcription import get_fit_nlp, measurements

FITTED, NOT_CONVERGED, FAILED = st.FITTED, st.NOT_CONVERGED, st.FAILED
ELEMENTS_PER_RUN = 100    # collocation elements across a run (at least one per stretch)
NLP_TOLERANCE = 1e-8
POLISH_ITERATIONS = 60
ROUGH_TOLERANCE = 1e-6   # relative tolerance of the integrator that makes the NLP's initial courses
STATIONARY = 1e-9         # the polish ends when a Gauss-Newton step would gain less than this (relative chi-square)
# The re-simulation's own noise in chi-square, relative: CVODES (rtol 1e-10) takes
# other steps at neighbouring parameters, and chi-square moves by 3e-11 to 3e-9 of
# itself (standard deviation; at most 1e-7) beyond its smooth change, measured on
# the benchmark's designs at 1e-5 standard errors from the estimates. The polish
# may end on a step where the Gauss-Newton step's gain, the step's predicted change
# and its actual change all lie within it (see `polish`). 1e-8: above the spread of
# most draws and below the largest jumps; where the Gauss-Newton gain is below it,
# the optimum is within about 1e-4 of a standard error (the square root of 1e-8
# times chi-square, in units where a standard error raises chi-square by one).
NOISE = 1e-8


@dataclass(frozen=True)
class Estimate:
    """One estimated parameter; every value (plain floats) in ``unit``, the problem
    file's own (or the runs file's where the problem wrote none).

    value, se : the estimate and its standard error; ci_low, ci_high : its 95 %
    confidence interval (t distribution); start, lower, upper : its start and bounds;
    profile_low, profile_high : the 95 % profile likelihood interval (None when not
    computed, or when the profile does not cross the threshold within the bounds).
    """

    name: str
    unit: str
    value: float
    se: float
    ci_low: float
    ci_high: float
    start: float
    lower: float
    upper: float
    profile_low: float | None = None
    profile_high: float | None = None


@dataclass(frozen=True)
class FitResult:
    """What ``optfeed fit`` found.

    Attributes
    ----------
    status : str
        'fitted' (the re-simulated weighted least squares is at a stationary point),
        'not converged' (no start gave an answer, or the polish did not settle), or
        'failed' (no guess could even be simulated).
    message : str
    problem : Problem
    runs : Runs
    estimates : tuple of Estimate
    statistics : Statistics or None
        Internal units; see :mod:`optfeed.fit.statistics`.
    verdict : str
        Goodness of fit in words.
    flags : tuple of str
        Identifiability warnings (and other cautions about the fit) in words.
    residuals : list of dict
        Per run and quantity: the unit it is shown in, count, mean and RMS of the
        weighted residuals (from the re-simulation), and the times (h), measured and
        fitted values and sigma (internal units).
    trajectories : list
        Per run, the re-simulated Trajectory at the estimates.
    starts : list of dict
        Every start: where it came from, its guess, status, chi-square, iterations.
    spread : float or None
        Relative spread of chi-square over the converged starts.
    nlp_chi2, chi2 : float
        Chi-square of the NLP answer and of the polished, re-simulated one.
    seconds : float
    record : dict
    """

    status: str
    message: str
    problem: object
    runs: Runs
    estimates: tuple
    statistics: Statistics | None
    verdict: str
    flags: tuple
    residuals: list = field(default_factory=list)
    trajectories: list = field(default_factory=list, repr=False)
    starts: list = field(default_factory=list)
    spread: float | None = None
    nlp_chi2: float | None = None
    chi2: float | None = None
    seconds: float = 0.0
    record: dict = field(default_factory=dict)

    @property
    def exit_code(self) -> int:
        return st.exit_code(self.status)

    @property
    def values(self) -> dict:
        """name -> estimate (in its unit)."""
        return {e.name: e.value for e in self.estimates}

    def __repr__(self) -> str:
        est = ", ".join(f"{e.name}={e.value:.4g}±{e.se:.2g} {e.unit}".rstrip() for e in self.estimates)
        return f"FitResult({self.status!r}, {est}; {len(self.runs.runs)} run(s))"


class _Fitter:
    """The pieces every stage of one fit shares."""

    def __init__(self, problem, runs: Runs, model=None):
        self.problem, self.runs = problem, runs
        self.model = fit_model(problem) if model is None else model
        # the NLP's initial courses and scale only: a looser integrator (8 runs: 0.13
        # -> 0.075 s for both); every re-simulation that is reported or judged uses
        # the Sampler or `sim`, at the project's tolerances
        self.rough = Simulator(self.model, rtol=ROUGH_TOLERANCE, atol=ROUGH_TOLERANCE * 1e-2)
        self._sim = None
        self.names = [e.name for e in runs.estimates]
        self.sampler = Sampler(self.model, self.names)
        self.index = [self.model.constant_index(n) for n in self.names]
        self.lower = np.array([e.lower for e in runs.estimates])
        self.upper = np.array([e.upper for e in runs.estimates])
        self.start = np.array([e.start for e in runs.estimates])
        self.scale = np.maximum(np.abs(self.start), 1e-12)
        self.simulations = 0

    @property
    def sim(self) -> Simulator:
        """The model's Simulator at the project's tolerances, built on first use: a
        fit reports the courses of the polish's last step (the Sampler's), and
        needs it only where the looser integrator fails or where the polish ended
        on a trial it did not take (see :meth:`courses`)."""
        if self._sim is None:
            self._sim = Simulator(self.model)
        return self._sim

    def sigma(self, quantity, y):
        e = self.runs.errors[quantity]
        return np.sqrt(e.absolute ** 2 + (e.relative * np.asarray(y, dtype=float)) ** 2)

    def constants(self, run, theta):
        c = np.array(run.constants, dtype=float)
        c[self.index] = theta
        return c

    def simulate(self, theta, rough: bool = False):
        """Every run densely re-simulated at ``theta`` (for figures and reports; with
        ``rough``, by the looser integrator, for the NLP's scale)."""
        sim = self.rough if rough else self.sim
        return [simulate_run(sim, run, self.constants(run, theta)) for run in self.runs.runs]

    def anchored(self, theta):
        """Every run's initial course for the NLP at ``theta`` (see
        :func:`.simulate.anchored_run`), by the looser integrator, or by the
        project's where the looser one fails (a guess is not given up on because
        of a starting point's tolerance)."""
        try:
            return [anchored_run(self.rough, run, self.constants(run, theta)) for run in self.runs.runs]
        except SimulationError:
            return [anchored_run(self.sim, run, self.constants(run, theta)) for run in self.runs.runs]

    def state_scale(self, thetas, courses) -> np.ndarray:
        """Each state's largest magnitude over the runs, the NLP's scale for it: from
        the first of ``thetas`` whose runs simulate without the data (looser
        integrator, then the project's), else from ``courses`` (anchored courses,
        which stay finite where a free run from a poor guess does not)."""
        for theta in thetas:
            for rough in (True, False):
                try:
                    trajs = self.simulate(theta, rough=rough)
                except SimulationError:
                    continue
                return np.max([np.max(np.abs(tr.x), axis=0) for tr in trajs], axis=0)
        return np.max([np.max(np.abs(tr.x), axis=0) for tr in courses], axis=0)

    def residuals(self, theta, jacobian: bool = False):
        """Weighted residuals (model - measured) / sigma of the exact re-simulation at
        ``theta``, in the order the NLP measures them (run, sampling time, quantity:
        :func:`.transcription.measurements`);
        with ``jacobian`` also their derivatives (n, p) from the sensitivities (and
        the runs' courses are kept for :meth:`courses`).

        Raises SimulationError where the integrator cannot follow a run."""
        out, jac, courses = [], [], []
        for run in self.runs.runs:
            self.simulations += 1
            values, der, course = self.sampler.values(run, self.constants(run, theta), jacobian)
            courses.append(course)
            # (sampling time, quantity) tables; row by row, the measured ones
            y = np.column_stack(list(run.values.values()))
            sigma = np.column_stack([self.sigma(q, v) for q, v in run.values.items()])
            measured = np.isfinite(y)
            model = np.column_stack([values[q] for q in run.values])
            out.append(((model - y) / sigma)[measured])
            if jacobian:
                slopes = np.stack([der[q] for q in run.values], axis=1)  # (times, quantities, parameters)
                jac.append((slopes / sigma[..., None])[measured])
        r = np.concatenate(out)
        if not jacobian:
            return r
        self._courses = (np.array(theta, dtype=float), courses)
        return r, np.concatenate(jac).reshape(len(r), len(theta))

    def courses(self, theta) -> list:
        """Every run's course at ``theta`` (a Trajectory each, as :meth:`simulate`
        gives them): those of the last call of :meth:`residuals` with its Jacobian
        where it was made at ``theta`` (the polish's last step usually is),
        else simulated now."""
        kept = getattr(self, "_courses", None)
        if kept is not None and np.array_equal(kept[0], np.asarray(theta, dtype=float)):
            return kept[1]
        return self.simulate(theta)

    def chi2(self, theta) -> float:
        """Chi-square of the re-simulation at ``theta`` (inf where it cannot be simulated)."""
        try:
            r = self.residuals(theta)
        except SimulationError:
            return float("inf")
        value = float(r @ r)
        return value if np.isfinite(value) else float("inf")

    def latin_hypercube(self, k: int, seed: int) -> list:
        """``k`` Latin-hypercube points within the bounds (log-spaced where a bound spans
        a decade or more)."""
        if k <= 0:
            return []
        rng = np.random.default_rng(seed)
        u = (np.array([rng.permutation(k) for _ in self.names]).T + rng.uniform(size=(k, len(self.names)))) / k
        log = (self.lower > 0) & (self.upper / np.where(self.lower > 0, self.lower, 1.0) >= 10)
        lo = np.where(log, np.log(np.where(self.lower > 0, self.lower, 1.0)), self.lower)
        hi = np.where(log, np.log(np.where(self.upper > 0, self.upper, 1.0)), self.upper)
        return [np.where(log, np.exp(lo + row * (hi - lo)), lo + row * (hi - lo)) for row in u]

    def guesses(self):
        """[(label, theta)]: the given start, then Latin-hypercube points."""
        out = [("the given start", self.start.copy())]
        points = self.latin_hypercube(self.runs.starts - 1, self.runs.seed)
        out += [(f"Latin-hypercube guess {i + 1}", th) for i, th in enumerate(points)]
        return out

    def polish(self, theta, fixed=None, max_iterations: int = POLISH_ITERATIONS):
        """Levenberg-Marquardt on the re-simulated residuals from ``theta``, within the
        bounds; parameters where ``fixed`` is True stay where they are.

        Returns (theta, residuals, jacobian, converged, iterations)."""
        theta = np.clip(np.asarray(theta, dtype=float), self.lower, self.upper)
        fixed = np.zeros(len(theta), bool) if fixed is None else np.asarray(fixed, bool)
        r, J = self.residuals(theta, jacobian=True)
        lam = 1e-3
        converged = False
        it = 0
        # the second-order part of chi-square's Hessian (sum r_i d2 r_i), which
        # Gauss-Newton leaves out, by symmetric rank-one secant updates from the
        # accepted steps (y = (J_new - J_old)^T r_new, as structured quasi-Newton
        # methods for least squares do): where it matters, as for K_s from one batch
        # run, the pure Gauss-Newton steps overshoot and zig-zag (one noise seed: 16
        # simulations with sensitivities, each step 0.7 times the one before)
        second = np.zeros((len(theta), len(theta)))
        for it in range(1, max_iterations + 1):
            if interrupted():
                raise KeyboardInterrupt
            cost = float(r @ r)
            g = J.T @ r
            # a parameter on a bound whose gradient points out of the box stays there
            free = ~fixed & ~((theta <= self.lower) & (g > 0)) & ~((theta >= self.upper) & (g < 0))
            if not free.any():
                converged = True
                break
            Jf, gf = J[:, free], g[free]
            try:
                gn = np.linalg.lstsq(Jf, -r, rcond=None)[0]
            except np.linalg.LinAlgError:
                gn = np.zeros(free.sum())
            if -(gf @ gn) <= STATIONARY * max(cost, 1.0):
                converged = True
                break
            improved = simulated = ended = False
            noise = NOISE * max(cost, 1.0)
            # near the optimum chi-square moves by its own noise (NOISE), while the
            # residuals and their slopes, from which the step comes, hardly move:
            # where the undamped Gauss-Newton step itself would gain less than the
            # noise, a step that the linearised residuals say changes chi-square by
            # less than the noise, and that changes it by less than the noise, is
            # taken whichever way chi-square moved, and it ends the polish
            # (comparing chi-square alone, one noise seed's polish stopped 3e-4
            # standard errors short of the optimum, and another's damping grew
            # through 16 more rejected simulations). All three must be small: a
            # step cut short by a bound or by the damping also changes chi-square
            # little, far from the optimum; and one whose linear model predicts a
            # rise (the secant term, a bounded step) can still gain a lot
            near = -(gf @ gn) <= noise
            while lam < 1e12:
                try:
                    trial = np.clip(theta + self._bounded_step(theta, r, J, free, lam, second), self.lower,
                                    self.upper)
                except np.linalg.LinAlgError:
                    lam *= 10
                    continue
                try:
                    rt, Jt = self.residuals(trial, jacobian=True)
                except SimulationError:
                    lam *= 10
                    continue
                simulated = True
                gained = cost - float(rt @ rt) if np.all(np.isfinite(rt)) else -np.inf
                predicted = cost - float(np.sum((r + J @ (trial - theta)) ** 2))
                ended = near and abs(predicted) <= noise and abs(gained) <= noise
                if gained > 0 or ended:
                    gain = gained
                    second = _secant_update(second, trial - theta, (Jt - J).T @ rt)
                    theta, r, J = trial, rt, Jt
                    lam = max(lam / 5, 1e-9)
                    improved = True
                    break
                lam *= 10
            if not improved:
                # no step gains anything: a (bounded) stationary point; unless no trial
                # could even be simulated, which says nothing about stationarity
                converged = simulated
                break
            if ended or gain <= 1e-15 * max(cost, 1.0):
                converged = True
                break
        return theta, r, J, converged, it

    def _bounded_step(self, theta, r, J, free, lam, second=None):
        """A Levenberg-Marquardt step from ``theta`` for the parameters where ``free``
        is True, kept within the bounds: a parameter whose step would cross its bound
        is put on the bound, and the step of the others is computed again with it
        there (the linearised residuals r + J d), until no step crosses a bound.
        Clipping the step instead leaves the others where the unbounded step put
        them (measured on a batch run whose K_s ends at its lower bound: 11
        simulations with sensitivities where one step would do).

        A heuristic, not the bounded least-squares step: a parameter put on its
        bound stays there for this step even where the others' new step would
        pull it back inside, so the step can differ from the bounded optimum
        (scipy's lsq_linear: in about a quarter of random cases, and in a few it
        lowers the linearised cost less than no step). The polish rejects a step
        that does not lower chi-square and raises the damping, so this costs
        simulations, never the estimates' correctness.

        ``second``: the secant estimate of the Hessian's second-order part, added to
        J^T J where the sum stays positive definite on the free parameters (else the
        step is the plain Levenberg-Marquardt one)."""
        d = np.zeros(len(theta))
        free = free.copy()
        while free.any():
            Jf = J[:, free]
            A = Jf.T @ Jf
            rhs = -(Jf.T @ (r + J @ d))
            if second is not None and second.any():
                B = A + second[np.ix_(free, free)]
                if np.linalg.eigvalsh(B)[0] > 1e-12 * max(np.trace(A), 1e-300):
                    A, rhs = B, rhs - (second @ d)[free]
            step = np.linalg.solve(A + lam * np.diag(np.maximum(np.diag(A), 1e-300)), rhs)
            trial = theta[free] + step
            lo, hi = self.lower[free], self.upper[free]
            out = (trial < lo) | (trial > hi)
            idx = np.flatnonzero(free)
            if not out.any():
                d[idx] = step
                break
            d[idx[out]] = np.clip(trial[out], lo[out], hi[out]) - theta[idx[out]]
            free[idx[out]] = False
        return d


def _secant_update(S, s, y):
    """``S`` updated by a symmetric rank-one step so that S s = y (skipped where the
    update would be ill-conditioned)."""
    v = y - S @ s
    vs = float(v @ s)
    if abs(vs) <= 1e-8 * np.linalg.norm(v) * np.linalg.norm(s) or not np.isfinite(vs):
        return S
    return S + np.outer(v, v) / vs


def fit(problem, runs, profile: bool = False, on_progress=None, set: dict | None = None) -> FitResult:
    """Calibrate the parameters a runs file names against its runs.

    Parameters
    ----------
    problem : Problem or path
    runs : path of a runs file (see :mod:`optfeed.fit.runs`) or a Runs
    profile : bool
        Also compute profile likelihood intervals (each point re-estimates the other
        parameters on the re-simulated runs).
    on_progress : callable, optional
        ``on_progress(text, done, total)`` as the job moves on: ``done`` of ``total``
        stages (the starts, the polish, each profile) are finished.
    set : dict, optional
        Overrides of the problem by dotted path, as in sweep files.

    Returns
    -------
    FitResult

    Raises
    ------
    InputError
        For a bad problem, runs or data file.

    Example
    -------
    >>> import optfeed
    >>> r = optfeed.fit("configs/inhibited_product.yaml", "configs/inhibited_product_runs.yaml")
    >>> r.status, r.values                                   # doctest: +SKIP
    """
    t0 = time.perf_counter()
    problem = as_problem(problem, set)
    model = None  # the model that read the runs file, used again by the fit
    if isinstance(runs, Runs):
        require_one_phase(problem)  # (load_runs checks the problem it reads a runs file for)
    else:
        model = fit_model(problem)
        runs = load_runs(runs, problem, model)
    with interrupt_guard():
        return _fit(problem, runs, profile, on_progress or (lambda text, done, total: None), t0, model)


def _fit(problem, runs, profile, progress, t0, model=None) -> FitResult:
    job = _Fitter(problem, runs, model)
    record = {"problem_file": problem.source, "runs_file": runs.source, "problem_digest": problem_digest(problem),
              **stamp()}

    def result(status, message, **kw):
        base = dict(status=status, message=message, problem=problem, runs=runs, estimates=(), statistics=None,
                    verdict="", flags=(), seconds=time.perf_counter() - t0, record=record)
        base.update(kw)
        return FitResult(**base)

    guesses = job.guesses()
    courses = {}  # guess -> its anchored course; a guess that cannot be simulated borrows the first one's
    for k, (_, theta) in enumerate(guesses):
        try:
            courses[k] = job.anchored(theta)
        except SimulationError:
            continue
    first = courses[min(courses)] if courses else None
    if first is None:
        return result(FAILED, "the runs cannot be simulated at the start values nor at any guess within the bounds: "
                      "check the initial values, the schedules and the bounds",
                      starts=[{"from": label, "guess": _floats(th), "status": "not run",
                               "message": "its simulation failed"} for label, th in guesses])
    # the states' scale from the first such guess simulated without the data (as
    # before the anchored courses: on 7 seeds of 1, 2 and 8 runs the anchored
    # course's maxima gave as many IPOPT iterations or a few more)
    xs = job.state_scale([guesses[k][1] for k in sorted(courses)], first)
    total = len(guesses) + 1 + (len(job.names) if profile else 0)
    progress("building the calibration NLP", 0, total)
    nlp = get_fit_nlp(job.model, runs.runs, job.names, ELEMENTS_PER_RUN)
    data = nlp.data(runs.runs, job.sigma, job.lower, job.upper, job.scale, np.where(xs > 1e-9, xs, 1.0))
    starts, best, best_theta, best_rank = [], None, None, None
    for k, (label, theta) in enumerate(guesses):
        if interrupted():
            raise KeyboardInterrupt
        w0 = nlp.pack(data, runs.runs, theta, courses.get(k, first), at_data=k not in courses)
        s = solve(nlp, data, w0, label, profile="calibration", tolerance=NLP_TOLERANCE, max_iter=1500)
        # a solve that stops with a finite answer (IPOPT often ends a calibration with an
        # error in its step computation once it sits at the optimum) is handed to the
        # polish, which judges stationarity on the re-simulated runs; only a solve with
        # nothing to hand on is tried again with the adaptive barrier
        if s.status not in ("converged", "interrupted") and (s.objective is None or s.status in (
                "infeasible", "iteration limit")):
            s2 = solve(nlp, data, w0, label + " (adaptive barrier)", profile="adaptive", tolerance=NLP_TOLERANCE,
                       max_iter=1500)
            s2.iterations += s.iterations
            s2.seconds += s.seconds
            if s2.status == "converged" or (s2.objective or np.inf) < (s.objective or np.inf):
                s = s2
        if s.status == "interrupted" or interrupted():
            raise KeyboardInterrupt
        chi2 = None if s.objective is None else 2.0 * s.objective
        estimate = np.clip(nlp.theta(s.w, data), job.lower, job.upper) if s.w.size else None
        starts.append({"from": label, "guess": _floats(theta), "status": s.status, "chi2": chi2,
                       "iterations": int(s.iterations), "seconds": float(s.seconds),
                       "estimate": None if estimate is None else _floats(estimate)})
        progress(f"start {k + 1}/{len(guesses)}: {s.status}" + ("" if chi2 is None else f", chi-square {chi2:.6g}"),
                 k + 1, total)
        # the best start: a converged one by its chi-square; among starts that stopped
        # short, by the chi-square of their estimate re-simulated (an NLP iterate that
        # is not feasible can have a small objective and a poor fit)
        if s.objective is not None:
            rank = (True, -chi2) if s.status == "converged" else (
                False, -(job.chi2(estimate) if estimate is not None else np.inf))
            if best is None or rank > best_rank:
                best, best_theta, best_rank = s, estimate, rank
    if best is None:
        return result(NOT_CONVERGED, "no start gave an answer: widen the bounds, give a better start, or check "
                      "that the data and the model describe the same runs", starts=starts)
    values = [s["chi2"] for s in starts if s.get("status") == "converged"]
    spread = (max(values) - min(values)) / max(min(values), 1e-300) if len(values) > 1 else 0.0
    nlp_chi2 = 2.0 * best.objective

    progress("polishing on the re-simulated runs (Levenberg-Marquardt, CVODES sensitivities)", len(guesses), total)
    try:
        theta, r, J, settled, polish_iterations = job.polish(best_theta)
    except SimulationError as exc:
        return result(NOT_CONVERGED, f"the best answer of the NLP cannot be re-simulated: {exc}", starts=starts,
                      spread=spread, nlp_chi2=nlp_chi2)
    stats_ = uncertainty(job.names, theta, J, r, runs.trusted)
    moved = np.abs(theta - best_theta) / np.where(stats_.se > 0, stats_.se, np.inf)
    record["elements_per_run"] = ELEMENTS_PER_RUN
    record["polish"] = {"nlp_chi2": nlp_chi2, "chi2": stats_.chi2, "iterations": polish_iterations,
                        "moved_standard_errors": float(np.max(moved)) if moved.size else 0.0}
    record["simulations"] = job.simulations
    flags = list(stats_.flags)
    at_bound = [n for n, v, lo, hi in zip(job.names, theta, job.lower, job.upper)
                if min(v - lo, hi - v) <= 1e-6 * max(abs(hi - lo), 1e-300)]
    flags += [f"{n} ended at a bound of its range: widen the range or read it as a limit, not an estimate"
              for n in at_bound]
    trajs = job.courses(theta)
    for run, traj in zip(runs.runs, trajs):
        for sp in problem.species:
            x = traj.state(sp.name)
            tol = 1e-6 * max(np.abs(x).max(), 1e-12)
            if x.min() < -tol:
                k = int(np.argmax(x < -tol))
                flags.append(f"at the estimates the model drives {sp.name} below zero in run {run.name!r} "
                             f"from {traj.t[k]:.3g} h: check the model (an uptake that goes on without substrate?)")
    profiles = _profiles(job, theta, stats_, lambda text, j: progress(text, len(guesses) + 1 + j, total)) \
        if profile else {}
    estimates = []
    for i, e in enumerate(runs.estimates):
        f = factor_to(e.unit) if e.unit else 1.0
        pl, ph = profiles.get(e.name, (None, None))
        estimates.append(Estimate(e.name, e.unit, *(float(v * f) for v in (
            theta[i], stats_.se[i], stats_.ci_low[i], stats_.ci_high[i], e.start, e.lower, e.upper)),
            None if pl is None else float(pl * f), None if ph is None else float(ph * f)))
    residuals = _residual_table(job, r)
    status = FITTED if settled else NOT_CONVERGED
    head = (f"{len(estimates)} parameter(s) from {runs.n_samples} measured values in {len(runs.runs)} run(s)"
            if settled else f"the polish on the re-simulated runs did not settle in {polish_iterations} steps; "
            "the values below are the last ones reached")
    message = f"{head}; {verdict(stats_, runs.trusted)}"
    if identifiability_words(stats_):
        message += f"; {identifiability_words(stats_)}"
    if flags:
        message += f"; {len(flags)} warning(s) about what the data can tell"
    return result(status, message, estimates=tuple(estimates), statistics=stats_, verdict=verdict(stats_, runs.trusted),
                  flags=tuple(flags), residuals=residuals, trajectories=trajs, starts=starts, spread=spread,
                  nlp_chi2=nlp_chi2, chi2=stats_.chi2)


def _floats(v) -> list:
    return [float(x) for x in np.asarray(v, dtype=float).ravel()]


def display_unit(q, runs, problem) -> str:
    """The unit a measured quantity is shown in: its data columns' (or its species')
    unit; where runs write a named rate in several units, the first run's."""
    from .runs import quantity_unit

    return quantity_unit(q, runs, problem) or next(r.units[q] for r in runs if q in r.units)


def _residual_table(job, r) -> list:
    """Per run and quantity, the weighted residuals ``r`` (those of the polish's last
    re-simulation, in :meth:`_Fitter.residuals`' order) with the fitted values they
    come from (measured + sigma * residual): the runs are not simulated again."""
    out = []
    units = {q: display_unit(q, job.runs.runs, job.problem) for q in job.runs.quantities}
    place = {}  # (run, quantity) -> positions of its residuals in r
    order = measurements(job.runs.runs)
    for at, (i, _, q) in enumerate(order):
        place.setdefault((i, q), []).append(at)
    assert len(order) == len(r)
    for i, run in enumerate(job.runs.runs):
        for q, y in run.values.items():
            ok = np.isfinite(y)
            sig = job.sigma(q, y[ok])
            w = np.asarray(r)[place.get((i, q), [])]
            out.append({"run": run.name, "quantity": q, "unit": units[q], "count": int(ok.sum()),
                        "mean": float(w.mean()) if ok.any() else None,
                        "rms": float(np.sqrt((w ** 2).mean())) if ok.any() else None,
                        "times": _floats(run.times[ok]), "measured": _floats(y[ok]),
                        "fitted": _floats(y[ok] + sig * w), "sigma": _floats(sig)})
    return out


def _profiles(job, theta, stats_, progress) -> dict:
    """Profile likelihood 95 % interval of each parameter (internal units): at each
    fixed value the others are re-estimated on the re-simulated runs (warm from the
    neighbouring point); the end is where chi-square has risen by the 95 % quantile
    of chi-square with one degree of freedom (times s^2 for a scaled error model),
    found by interpolating the signed root of the rise and refining it."""
    from scipy import stats

    threshold = float(stats.chi2.ppf(0.95, 1)) * stats_.scale
    base = stats_.chi2
    out = {}
    for j, name in enumerate(job.names):
        progress(f"profile likelihood of {name}", j)
        fixed = np.zeros(len(theta), bool)
        fixed[j] = True

        def rise(v, warm):
            trial = warm.copy()
            trial[j] = v
            th, r, _, _, _ = job.polish(trial, fixed=fixed, max_iterations=30)
            return max(float(r @ r) - base, 0.0), th

        ends = []
        for direction in (-1.0, 1.0):
            se = stats_.se[j]
            step = se if np.isfinite(se) and se > 0 else 0.1 * max(abs(theta[j]), job.scale[j])
            step = max(step, 1e-6 * job.scale[j])
            prev_v, prev_d, warm, found = theta[j], 0.0, theta.copy(), None
            for _ in range(30):
                v = min(max(prev_v + direction * step, job.lower[j]), job.upper[j])
                if v == prev_v:
                    break
                try:
                    d, th = rise(v, warm)
                except SimulationError:
                    break
                if d >= threshold:
                    # the signed root of the rise is close to linear in the parameter
                    a, b, lo_v, hi_v = np.sqrt(prev_d), np.sqrt(d), prev_v, v
                    for _refine in range(3):
                        guess = lo_v + (hi_v - lo_v) * (np.sqrt(threshold) - a) / (b - a)
                        dg, thg = rise(guess, warm)
                        if abs(np.sqrt(dg) - np.sqrt(threshold)) < 1e-3 * np.sqrt(threshold):
                            break
                        if dg < threshold:
                            lo_v, a, warm = guess, np.sqrt(dg), thg
                        else:
                            hi_v, b = guess, np.sqrt(dg)
                    found = float(guess)
                    break
                prev_v, prev_d, warm = v, d, th
                step *= 1.6
            ends.append(found)
        out[name] = (ends[0], ends[1])
    return out
