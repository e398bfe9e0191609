"""The fit job: calibrate a problem's parameters against past runs.

1. Every run is transcribed by the collocation blocks of :mod:`.transcription`, all in
   one NLP sharing the estimated parameters (the simultaneous approach), and solved
   with IPOPT from several parameter guesses: the given start, then Latin-hypercube
   points within the bounds (log-spaced where a bound spans a decade or more).
2. The best answer is polished on the runs' exact re-simulation (CVODES) by
   Gauss-Newton steps, which removes what remains of the collocation error; the
   residuals reported are the re-simulation's, as optimize verifies its answers.
3. The statistics of :mod:`.statistics`: covariance, intervals, correlation,
   identifiability, goodness of fit; profile likelihood intervals on request.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from .. import status as st
from ..model import build_model
from ..problem.dotted import as_problem
from ..provenance import problem_digest, stamp
from ..simulate import Simulator
from ..solve import interrupt_guard, interrupted, solve
from .runs import Runs, load_runs
from .simulate import measured_model_values, simulate_run
from .statistics import Statistics, uncertainty, verdict
from .transcription import FitData, FitNLP

FITTED = "fitted"
NOT_CONVERGED = "not converged"
ELEMENTS_PER_RUN = 40
POLISH_STEPS = 8
FD_STEP = 1e-5


@dataclass(frozen=True)
class Estimate:
    """One estimated parameter (values in ``unit``, the problem file's own)."""

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
        'fitted' (converged and polished on the re-simulation), 'not converged', or
        'failed'.
    message : str
    problem : Problem
    runs : Runs
    estimates : tuple of Estimate
    statistics : Statistics or None
        Internal units; see :mod:`optfeed.fit.statistics`.
    verdict : str
        Goodness of fit in words.
    flags : tuple of str
        Identifiability warnings in words.
    residuals : list of dict
        Per run and quantity: count, mean and RMS of the weighted residuals (from the
        re-simulation), and the measured and fitted values.
    trajectories : list
        Per run, the re-simulated Trajectory at the estimates.
    starts : list of dict
        Every start: its guess, status, objective (chi-square), iterations.
    spread : float or None
        Relative spread of chi-square over converged starts.
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
        return st.EXIT_OK if self.status == FITTED else (st.EXIT_FAILED if self.status == "failed" else st.EXIT_NOT_OK)

    def __repr__(self) -> str:
        est = ", ".join(f"{e.name}={e.value:.4g}±{e.se:.2g} {e.unit}".rstrip() for e in self.estimates)
        return f"FitResult({self.status!r}, {est}; {len(self.runs.runs)} run(s))"


class _Fitter:
    """The pieces every stage of one fit shares."""

    def __init__(self, problem, runs: Runs):
        self.problem, self.runs = problem, runs
        self.model = build_model(problem)
        self.sim = Simulator(self.model)
        self.names = [e.name for e in runs.estimates]
        self.index = [self.model.constant_index(n) for n in self.names]
        self.lower = np.array([e.lower for e in runs.estimates])
        self.upper = np.array([e.upper for e in runs.estimates])
        self.start = np.array([e.start for e in runs.estimates])
        self.scale = np.maximum(np.abs(self.start), 1e-12)

    def sigma(self, quantity, y):
        e = self.runs.errors[quantity]
        return np.sqrt(e.absolute ** 2 + (e.relative * np.asarray(y, dtype=float)) ** 2)

    def constants(self, run, theta):
        c = np.array(run.constants, dtype=float)
        c[self.index] = theta
        return c

    def simulate(self, theta):
        return [simulate_run(self.sim, run, self.constants(run, theta)) for run in self.runs.runs]

    def residuals(self, theta, trajectories=None):
        """Weighted residuals of the exact re-simulation at ``theta``, in the order
        the NLP measures them (run, sampling time, quantity)."""
        trajectories = trajectories or self.simulate(theta)
        out = []
        for run, traj in zip(self.runs.runs, trajectories):
            values = measured_model_values(self.model, run, traj, self.constants(run, theta))
            for k in range(len(run.times)):
                for q, y in run.values.items():
                    if np.isfinite(y[k]):
                        out.append((values[q][k] - y[k]) / float(self.sigma(q, [y[k]])[0]))
        return np.array(out)

    def jacobian(self, theta):
        """Central differences of the re-simulated weighted residuals."""
        cols = []
        for j in range(len(theta)):
            h = FD_STEP * max(abs(theta[j]), self.scale[j])
            up, down = theta.copy(), theta.copy()
            up[j] = min(theta[j] + h, self.upper[j])
            down[j] = max(theta[j] - h, self.lower[j])
            cols.append((self.residuals(up) - self.residuals(down)) / (up[j] - down[j]))
        return np.column_stack(cols)

    def guesses(self):
        """The given start, then Latin-hypercube points within the bounds."""
        k = self.runs.starts - 1
        out = [self.start.copy()]
        if k <= 0:
            return out
        rng = np.random.default_rng(self.runs.seed)
        u = (np.array([rng.permutation(k) for _ in self.names]).T + rng.uniform(size=(k, len(self.names)))) / k
        log = (self.lower > 0) & (self.upper / np.where(self.lower > 0, self.lower, 1.0) >= 10)
        lo = np.where(log, np.log(np.where(self.lower > 0, self.lower, 1.0)), self.lower)
        hi = np.where(log, np.log(np.where(self.upper > 0, self.upper, 1.0)), self.upper)
        for row in u:
            v = lo + row * (hi - lo)
            out.append(np.where(log, np.exp(v), v))
        return out


def fit(problem, runs, profile: bool = False, on_progress=None, set: dict | None = None) -> FitResult:
    """Calibrate the parameters a runs file names against its runs.

    Parameters
    ----------
    problem : Problem or path
    runs : path of a runs file (see :mod:`optfeed.fit.runs`) or a Runs
    profile : bool
        Also compute profile likelihood intervals (one re-estimation per point).
    on_progress : callable, optional
        ``on_progress(text)``.
    set : dict, optional
        Overrides of the problem by dotted path, as in sweep files.

    Returns
    -------
    FitResult

    Raises
    ------
    InputError
        For a bad problem, runs or data file.
    """
    t0 = time.perf_counter()
    problem = as_problem(problem, set)
    model = build_model(problem)
    if not isinstance(runs, Runs):
        runs = load_runs(runs, problem, model)
    with interrupt_guard():
        return _fit(problem, runs, profile, on_progress or (lambda text: None), t0)


def _fit(problem, runs, profile, progress, t0) -> FitResult:
    job = _Fitter(problem, runs)
    record = {"problem_file": problem.source, "runs_file": runs.source, "problem_digest": problem_digest(problem),
              **stamp()}

    def result(status, message, **kw):
        base = dict(status=status, message=message, problem=problem, runs=runs, estimates=(), statistics=None,
                    verdict="", flags=(), seconds=time.perf_counter() - t0, record=record)
        base.update(kw)
        return FitResult(**base)

    first = job.simulate(job.start)
    xs = np.max([np.max(np.abs(tr.x), axis=0) for tr in first], axis=0)
    data = FitData(job.lower, job.upper, job.scale, np.where(xs > 1e-9, xs, 1.0))
    nlp = FitNLP(job.model, runs.runs, job.names, job.sigma, ELEMENTS_PER_RUN)
    starts, best = [], None
    for k, theta in enumerate(job.guesses()):
        if interrupted():
            raise KeyboardInterrupt
        label = "the given start" if k == 0 else f"Latin-hypercube guess {k}"
        try:
            trajs = first if k == 0 else job.simulate(theta)
        except Exception as exc:  # noqa: BLE001 - a guess the integrator cannot follow is skipped
            starts.append({"from": label, "guess": theta.tolist(), "status": "not run",
                           "message": f"its simulation failed: {exc}"})
            continue
        w0 = nlp.pack(data, theta, trajs)
        s = solve(nlp, data, w0, label, profile="cold", tolerance=1e-10, max_iter=1500)
        if s.status != "converged":
            s2 = solve(nlp, data, w0, label + " (adaptive barrier)", profile="adaptive", tolerance=1e-10,
                       max_iter=1500)
            if s2.status == "converged" or s.status != "converged":
                s2.iterations += s.iterations
                s = s2
        chi2 = None if s.objective is None else 2.0 * s.objective
        starts.append({"from": label, "guess": theta.tolist(), "status": s.status, "chi2": chi2,
                       "iterations": s.iterations, "seconds": s.seconds,
                       "estimate": nlp.theta(s.w, data).tolist() if s.w.size else None})
        progress(f"start {k + 1}/{runs.starts}: {s.status}" + ("" if chi2 is None else f", chi-square {chi2:.6g}"))
        if s.status == "converged" and s.objective is not None and (best is None or s.objective < best.objective):
            best = s
    if best is None:
        return result(NOT_CONVERGED, "no start converged: widen the bounds, give a better start, or check "
                      "that the data and the model describe the same runs", starts=starts)
    values = [s["chi2"] for s in starts if s.get("status") == "converged"]
    spread = (max(values) - min(values)) / max(min(values), 1e-300) if len(values) > 1 else 0.0
    theta = np.clip(nlp.theta(best.w, data), job.lower, job.upper)
    nlp_chi2 = 2.0 * best.objective

    # polish on the exact re-simulation (Gauss-Newton with halving steps, within the bounds)
    progress("polishing on the re-simulated runs")
    r = job.residuals(theta)
    for _ in range(POLISH_STEPS):
        J = job.jacobian(theta)
        step = np.linalg.lstsq(J, -r, rcond=None)[0]
        improved = False
        for alpha in (1.0, 0.5, 0.25, 0.125):
            trial = np.clip(theta + alpha * step, job.lower, job.upper)
            rt = job.residuals(trial)
            if rt @ rt < r @ r:
                theta, r, improved = trial, rt, True
                break
        if not improved or np.max(np.abs(alpha * step) / job.scale) < 1e-10:
            break
    J = job.jacobian(theta)
    stats_ = uncertainty(job.names, theta, J, r, runs.trusted)
    at_bound = [n for n, v, lo, hi in zip(job.names, theta, job.lower, job.upper)
                if min(v - lo, hi - v) <= 1e-6 * max(abs(hi - lo), 1e-300)]
    flags = list(stats_.flags) + [f"{n} ended at a bound of its range: widen the range or read it as a limit, "
                                  "not an estimate" for n in at_bound]
    trajs = job.simulate(theta)
    for run, traj in zip(runs.runs, trajs):
        for sp in problem.species:
            x = traj.state(sp.name)
            if x.min() < -1e-6 * max(np.abs(x).max(), 1e-12):
                k = int(np.argmax(x < -1e-6 * max(np.abs(x).max(), 1e-12)))
                flags.append(f"at the estimates the model drives {sp.name} below zero in run {run.name!r} "
                             f"from {traj.t[k]:.3g} h: check the model (an uptake that goes on without substrate?)")
    profiles = _profiles(job, nlp, data, best, theta, stats_, progress) if profile else {}
    estimates = []
    from ..units import factor_to

    for i, e in enumerate(runs.estimates):
        f = factor_to(e.unit) if e.unit else 1.0
        pl, ph = profiles.get(e.name, (None, None))
        estimates.append(Estimate(e.name, e.unit, theta[i] * f, stats_.se[i] * f, stats_.ci_low[i] * f,
                                  stats_.ci_high[i] * f, e.start * f, e.lower * f, e.upper * f,
                                  None if pl is None else pl * f, None if ph is None else ph * f))
    residuals = _residual_table(job, theta, trajs)
    change = abs(stats_.chi2 - nlp_chi2) / max(nlp_chi2, 1e-300)
    record["elements_per_run"] = ELEMENTS_PER_RUN
    record["polish"] = {"nlp_chi2": nlp_chi2, "chi2": stats_.chi2, "relative_change": change}
    message = (f"{len(estimates)} parameter(s) from {runs.n_samples} measured values in {len(runs.runs)} run(s); "
               f"{verdict(stats_, runs.trusted)}")
    if flags:
        message += f"; {len(flags)} identifiability warning(s)"
    return result(FITTED, message, estimates=tuple(estimates), statistics=stats_, verdict=verdict(stats_, runs.trusted),
                  flags=tuple(flags), residuals=residuals, trajectories=trajs, starts=starts, spread=spread,
                  nlp_chi2=nlp_chi2, chi2=stats_.chi2)


def _residual_table(job, theta, trajs) -> list:
    out = []
    for run, traj in zip(job.runs.runs, trajs):
        values = measured_model_values(job.model, run, traj, job.constants(run, theta))
        for q, y in run.values.items():
            ok = np.isfinite(y)
            w = (values[q][ok] - y[ok]) / job.sigma(q, y[ok])
            out.append({"run": run.name, "quantity": q, "count": int(ok.sum()),
                        "mean": float(w.mean()) if ok.any() else None,
                        "rms": float(np.sqrt((w ** 2).mean())) if ok.any() else None,
                        "times": run.times[ok].tolist(), "measured": y[ok].tolist(),
                        "fitted": values[q][ok].tolist(), "sigma": job.sigma(q, y[ok]).tolist()})
    return out


def _profiles(job, nlp, data, best, theta, stats_, progress) -> dict:
    """Profile likelihood 95 % interval of each parameter (internal units): the others
    re-estimated at each fixed value, warm-started from the neighbour."""
    from scipy import stats

    threshold = float(stats.chi2.ppf(0.95, 1)) * stats_.scale
    base = 2.0 * best.objective
    out = {}
    for j, name in enumerate(job.names):
        progress(f"profile of {name}")
        ends = []
        for direction in (-1.0, 1.0):
            step = stats_.se[j] if np.isfinite(stats_.se[j]) and stats_.se[j] > 0 else 0.1 * abs(theta[j])
            step = max(step, 1e-6 * job.scale[j]) * 0.5
            w, prev_v, prev_d, found = best.w, theta[j], 0.0, None
            for _ in range(30):
                v = theta[j] + direction * step
                v = min(max(v, job.lower[j]), job.upper[j])
                lo, hi = data.lower.copy(), data.upper.copy()
                lo[j] = hi[j] = v
                d2 = FitData(lo, hi, data.scale, data.x_scale)
                w0 = w.copy()
                nlp.W.put(w0, "theta", np.clip(nlp.W.get(w0, "theta").ravel(), lo / data.scale, hi / data.scale))
                s = solve(nlp, d2, w0, f"profile {name}", profile="cold", tolerance=1e-10, max_iter=800)
                if s.status != "converged":
                    break
                d = 2.0 * s.objective - base
                if d >= threshold:
                    found = prev_v + (v - prev_v) * (threshold - prev_d) / (d - prev_d)
                    break
                if v in (job.lower[j], job.upper[j]):
                    break
                w, prev_v, prev_d = s.w, v, d
                step *= 1.6
            ends.append(found)
        out[name] = (ends[0], ends[1])
    return out
