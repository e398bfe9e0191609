"""Monte Carlo verification: a schedule judged over a fresh sample of the uncertain values.

:func:`monte_carlo` draws independent samples of the values a problem's
``uncertainty`` section makes uncertain (:func:`optfeed.uncertainty.scenario_set`
with method 'random', its own random stream: never the optimizer's scenario points),
simulates the schedule for each with CVODES (:class:`optfeed.simulate.Simulator`)
and judges every run with :func:`optfeed.limits.judge`, exactly as ``optfeed check``
judges the nominal run. The samples are shared out over processes (one model and
integrator per process); a sample whose simulation fails counts as such and is
reported, never dropped. The nominal run is integrated as ``check`` integrates it
(CVODES' BDF method); the samples with BDF or Adams' method, whichever needed less
work on the nominal run (:func:`optfeed.simulate.cheaper_method`; the same
tolerances either way).

For each limit the probability of breaking it is estimated as the fraction of the
simulated samples that break it, with a 95 % Wilson score interval
(:func:`wilson_interval`), which keeps its coverage for fractions near 0 or 1 and
for small samples, where the textbook normal-approximation interval does not.
"""

from __future__ import annotations

import math
import multiprocessing as mp
import pickle
import time
from dataclasses import dataclass, field

import numpy as np

from . import status as st
from .errors import InputError, SimulationError, TimeLimitReached

Z95 = 1.959963984540054  # standard normal quantile of 0.975
BAND_POINTS = 600  # time points kept per band (plus both sides of every pump change)
CHUNKS_PER_WORKER = 8  # samples are shared out in this many pieces per process
# samples integrated together as one system (see _chunk); 200 samples go in 8 batches
# of 25 (measured on the robust optimum, 2 workers: 4.5 % less wall time than 13 of 16,
# the two processes' shares equal)
BATCH = 32
BROKEN_SHOWN = 20  # runs that break a limit kept for its figure
NOT_RUN = "not run"  # a sample not simulated before the time limit: left out of every fraction


def wilson_interval(k: int, n: int, z: float = Z95) -> tuple[float, float]:
    """The Wilson score interval for a proportion: ``k`` successes in ``n`` trials.

    From E. B. Wilson, "Probable inference, the law of succession, and statistical
    inference", J. Am. Stat. Assoc. 22 (1927) 209-212: with p = k/n,

        (p + z^2/(2n) +- z sqrt(p(1-p)/n + z^2/(4n^2))) / (1 + z^2/n).

    Returns (low, high); (0, 1) for n = 0.
    """
    if n <= 0:
        return 0.0, 1.0
    p = k / n
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z / denom * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


@dataclass(frozen=True)
class LimitRisk:
    """How often one limit is broken over the sample (values in the limit's unit).

    Attributes
    ----------
    name, kind, unit, key : str
    lower, upper : float or None
        The limit's bounds.
    broken : int
        Samples whose run breaks the limit (as ``optfeed check`` judges it).
    judged : int
        Samples whose simulation reached the end of the run.
    probability : float or None
        broken / judged (None if no sample was judged).
    low, high : float or None
        95 % Wilson interval of the probability.
    nominal_broken : bool or None
        Whether the nominal run breaks it (None if the nominal run failed).
    margin_p5, margin_p50 : float or None
        5th percentile and median of the smallest margin (slack) over the judged
        samples; negative: broken.
    """

    name: str
    kind: str
    unit: str
    key: str
    lower: float | None
    upper: float | None
    broken: int
    judged: int
    probability: float | None
    low: float | None
    high: float | None
    nominal_broken: bool | None
    margin_p5: float | None = None
    margin_p50: float | None = None


@dataclass(frozen=True)
class SampleRun:
    """One sample: its values and what its run did.

    Attributes
    ----------
    index : int
        0-based, in drawing order.
    values : tuple of float
        The uncertain values of the sample, each in its unit (``MonteCarloResult.units``).
    status : str
        'within limits', 'limit broken', 'simulation failed' or 'not run' (the
        time limit came first).
    objective : float or None
        In the objective's unit.
    margins : tuple of float or None
        Smallest margin of each limit (``MonteCarloResult.limits`` order, their units).
    broken : tuple of str
        Names of the limits the run breaks.
    message : str
        Why the simulation failed ('' otherwise).
    """

    index: int
    values: tuple
    status: str
    objective: float | None
    margins: tuple | None
    broken: tuple
    message: str = ""


@dataclass(frozen=True)
class Band:
    """A limited quantity over the sample, for a fan figure (values in ``unit``).

    t : times, h; p5, p50, p95 : percentiles over the judged samples at each time;
    nominal : the nominal run (NaN if it failed); lower, upper : the limit's bounds;
    at_end : the bound holds at the end of the run only; broken : the runs of the
    first :data:`BROKEN_SHOWN` samples that break the limit, shape (k, len(t)).
    """

    name: str
    kind: str
    unit: str
    at_end: bool
    lower: float | None
    upper: float | None
    t: np.ndarray = field(repr=False)
    p5: np.ndarray = field(repr=False)
    p50: np.ndarray = field(repr=False)
    p95: np.ndarray = field(repr=False)
    nominal: np.ndarray = field(repr=False)
    broken: np.ndarray = field(repr=False, default=None)


@dataclass(frozen=True)
class MonteCarloResult:
    """A schedule judged over a Monte Carlo sample of the uncertain values.

    Attributes
    ----------
    samples : int
        Samples drawn.
    seed : int
    judged : int
        Samples whose simulation reached the end of the run.
    failed : int
        Samples whose simulation failed (counted, never dropped).
    failed_interval : tuple
        95 % Wilson interval of the probability that a run fails to simulate.
    not_run : int
        Samples not simulated because the time limit was reached first (left out
        of every fraction; 0 without a time limit).
    any_limit : LimitRisk
        Breaking at least one limit.
    limits : tuple of LimitRisk
        One per limit, in report order.
    objective_label, objective_unit : str
    objective : dict or None
        'mean', 'p5', 'p50', 'p95' (and 'nominal') of the objective over the
        judged samples, in ``objective_unit``; None without an objective.
    names, units : tuple of str
        The uncertain values and the unit each is shown in.
    distributions : tuple of str
        Each value's distribution, in words ('normal, sd 0.03 1/h').
    runs : tuple of SampleRun
        Every sample, in drawing order.
    bands : tuple of Band
        Every limited quantity except the pumps: the fan over the sample.
    nominal_status : str
        The check status of the nominal run.
    seconds : float
        Wall time of the simulations.
    workers : int
        Processes used.
    integration_method : str
        CVODES' multistep method the samples were integrated with, 'bdf' or 'adams'
        (:func:`optfeed.simulate.cheaper_method`; the nominal run is always
        integrated with 'bdf', as ``check`` integrates it, and so is a sample that
        Adams' method could not finish).
    """

    samples: int
    seed: int
    judged: int
    failed: int
    failed_interval: tuple
    any_limit: LimitRisk
    limits: tuple
    objective_label: str
    objective_unit: str
    objective: dict | None
    names: tuple
    units: tuple
    distributions: tuple
    runs: tuple = field(repr=False)
    bands: tuple = field(repr=False)
    nominal_status: str = ""
    seconds: float = 0.0
    workers: int = 1
    not_run: int = 0
    integration_method: str = "bdf"

    @property
    def samples_per_second(self) -> float:
        return self.samples / self.seconds if self.seconds > 0 else math.inf

    def __repr__(self) -> str:
        p = self.any_limit.probability
        risk = "-" if p is None else f"{p:.1%} ({self.any_limit.low:.1%}..{self.any_limit.high:.1%})"
        return (f"MonteCarloResult(samples={self.samples}, seed={self.seed}, any limit broken={risk}, "
                f"failed={self.failed}, nominal={self.nominal_status!r})")


def monte_carlo(problem, schedule, end_time: float | None = None, samples: int | None = None,
                seed: int | None = None, workers: int | None = None, on_progress=None,
                deadline: float | None = None) -> MonteCarloResult:
    """Simulate ``schedule`` over a fresh Monte Carlo sample of ``problem``'s uncertain
    values and judge every run as ``optfeed check`` does.

    Parameters
    ----------
    problem : Problem or path
        Must have an ``uncertainty`` section.
    schedule : Schedule or path
    end_time : float, optional
        Run length, h (see :func:`optfeed.check.run_length`).
    samples : int, optional
        Default: the section's ``monte_carlo.samples`` (200).
    seed : int, optional
        Default: the section's ``monte_carlo.seed``.
    workers : int, optional
        Processes (default: the cores; one inside a process that may not start
        others, such as a sweep case).
    on_progress : callable, optional
        ``on_progress(text, done, total)`` as samples finish.
    deadline : float, optional
        A ``time.monotonic()`` time: samples not simulated by then are left out
        (and counted as not run).

    Returns
    -------
    MonteCarloResult

    Raises
    ------
    InputError
        For a problem without an uncertainty section, bad settings, or a bad file.
    """
    from .check import run_length
    from .limits import build_limits
    from .model import build_model
    from .outcome import objective_label
    from .problem.dotted import as_problem
    from .problem.uncertain import MAX_SAMPLES, MAX_SEED
    from .processes import cpu_count
    from .schedule import Schedule, checked_schedule, load_schedule
    from .simulate import METHODS, Simulator, cheaper_method
    from .uncertainty import scenario_set

    problem = as_problem(problem)
    from .phases import require_decided

    require_decided(problem, "Monte Carlo")
    u = problem.uncertainty
    if u is None:
        raise InputError.one(problem.source, None, "uncertainty",
                             "the problem has no 'uncertainty' section: add one to judge a schedule over "
                             "uncertain values")
    samples = u.samples if samples is None else samples
    seed = u.sample_seed if seed is None else seed
    for option, value, lo, hi in (("--samples", samples, 1, MAX_SAMPLES), ("--seed", seed, 0, MAX_SEED),
                                  ("--workers", 1 if workers is None else workers, 1, 256)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not lo <= value <= hi:
            raise InputError.one(option, None, option, f"must be a whole number from {lo} to {hi}, got {value!r}")
    tf = run_length(problem, end_time)
    model = build_model(problem)
    if isinstance(schedule, Schedule):
        schedule = checked_schedule(schedule, model.feed_names, tf, problem.phases)
    else:
        schedule = load_schedule(schedule, model.feed_names, tf, problem.phases)
    limits = build_limits(model, phases=True)
    sims = {m: Simulator(model, method=m) for m in METHODS}
    drawn = scenario_set(problem, model, count=int(samples), seed=int(seed), method="random", nominal=False)
    if workers is None:
        workers = cpu_count()
    if mp.current_process().daemon:  # a daemonic process (a sweep case) may not start others
        workers = 1
    workers = max(1, min(int(workers), int(samples)))

    t0 = time.perf_counter()
    # the nominal run is judged as `check` judges it (BDF); the samples are integrated
    # with the method that needs less work on it (simulate.cheaper_method)
    method, runs = cheaper_method(model, schedule, tf, sims, deadline)
    nominal = _simulate_one(model, limits, schedule, tf, model.p0, model.x0, sims["bdf"], deadline=deadline,
                            traj=runs["bdf"])
    _keep_built(problem, model, limits, sims[method])
    outs = _run_all(problem, schedule, tf, drawn, workers, on_progress, deadline, method)
    seconds = time.perf_counter() - t0
    return _result(model, limits, drawn, nominal, outs, int(samples), int(seed), seconds, workers,
                   objective_label(model), method)


# ------------------------------------------------------------------ simulating the samples


def _simulate_one(model, limits, schedule, tf, p, x0, simulator=None, deadline=None, traj=None) -> dict:
    """Simulate and judge one sample (or only judge ``traj``, its run simulated
    already); a plain dict (it crosses a process pipe)."""
    from .limits import evaluate, judge
    from .outcome import outcome_of
    from .report.figures import plot_indices
    from .simulate import Simulator

    sim = simulator or Simulator(model)
    if traj is None and deadline is not None and time.monotonic() > deadline:
        return {"status": NOT_RUN, "message": "the time limit was reached first"}
    try:
        if traj is None:
            traj = sim.run(schedule, tf, x0=x0, p=p, deadline=deadline)
        g = evaluate(model, limits, traj)
        reports, _ = judge(model, limits, traj, values=g, locate=False)  # the sample reports no crossing times
    except TimeLimitReached:
        return {"status": NOT_RUN, "message": "the time limit was reached first"}
    except SimulationError as exc:
        return {"status": st.SIMULATION_FAILED, "message": str(exc)}
    outcome = outcome_of(model, traj, tf)
    idx = plot_indices(traj.t, traj.u, BAND_POINTS)
    g = g[idx]
    broken = tuple(r.name for r in reports if r.violated)
    return {
        "status": st.LIMIT_BROKEN if broken else st.WITHIN_LIMITS, "message": "",
        "objective": None if outcome.objective is None else outcome.objective.value,
        "margins": tuple(r.min_slack for r in reports), "broken": broken,
        "t": traj.t[idx], "g": g.astype(np.float64),
    }


def _chunk(job, progress=None) -> list:
    """Simulate a piece of the sample in this process (one model and integrator);
    ``progress(1)`` after each sample (default: to the parent process, if any).

    Without phases or additions the samples are integrated ``batch`` at a time (the
    job's last entry; see :func:`batch_size`) as one system
    (:meth:`optfeed.simulate.Simulator.run_batch`), each run then judged on its own;
    a batch that fails is simulated again sample by sample, so that a failure is
    reported for the sample it belongs to, as before."""
    from .processes import report_progress

    problem, schedule, tf, constants, x0, deadline, batch, method = job
    model, limits, sim = _built(problem, method)
    fallback = None  # a BDF Simulator, built for the first sample the chosen method cannot finish
    out = []
    # a batch that fails or meets the time limit gives None: its samples are then
    # simulated one by one (to name the failing one, or to meet the limit each)
    for cols, trajs in sim.run_in_batches(schedule, tf, x0, constants, batch, deadline):
        for k, traj in zip(cols, trajs):
            d = _simulate_one(model, limits, schedule, tf, constants[:, k], x0[:, k], sim, deadline, traj)
            if d["status"] == st.SIMULATION_FAILED and sim.method != "bdf":
                # what Adams' method cannot finish is integrated again as `check` would
                # (BDF) before it counts as a failure
                from .simulate import Simulator

                fallback = fallback or Simulator(model)
                d = _simulate_one(model, limits, schedule, tf, constants[:, k], x0[:, k], fallback, deadline)
            out.append(d)
            (progress or report_progress)(1)
    return out


# (problem, its pickled bytes, model, limits, simulator) of the sample this process
# judges last: the chunks that a worker process runs one after the other (and, by
# fork, the parent, which keeps them before it starts the workers) share the model,
# the limits' Functions and the samples' integrators instead of building their own
# (measured: 13 chunks of 16 samples, each in a fresh process building its own, made
# two workers do 1.4 times the samples per second of one); the nominal run is
# integrated by the BDF Simulator (as `check`), which is the samples' too where BDF
# is the method chosen
_KEPT = None


def _keep_built(problem, model, limits, sim) -> None:
    """Keep ``model``, ``limits`` and the samples' Simulator ``sim`` of ``problem``
    for the chunks run after this in this process or its forks."""
    global _KEPT
    _KEPT = (problem, pickle.dumps(problem), model, limits, sim)


def _built(problem, method: str = "bdf"):
    """(model, limits, simulator using ``method``) of ``problem``: those kept, when
    they are of the same problem (the same object, or one pickled from an equal
    one) and method, else built."""
    from .limits import build_limits
    from .model import build_model
    from .simulate import Simulator

    if (_KEPT is not None and _KEPT[4].method == method
            and (_KEPT[0] is problem or _KEPT[1] == pickle.dumps(problem))):
        return _KEPT[2:]
    model = build_model(problem)
    limits = build_limits(model, phases=True)
    sim = Simulator(model, method=method)
    _keep_built(problem, model, limits, sim)
    return model, limits, sim


def batch_size(samples: int) -> int:
    """Samples integrated together: up to :data:`BATCH`, fewer for a small sample so
    that it still makes several batches. It depends on the sample's size only, and
    the batches are the same runs of consecutive samples however many processes share
    them, so every process count gives the same numbers."""
    return max(1, min(BATCH, math.ceil(samples / 8)))


def _run_all(problem, schedule, tf, drawn, workers, on_progress, deadline=None, method="bdf") -> list:
    """Every sample's dict, in drawing order (integrated with CVODES' ``method``)."""
    n = drawn.count
    batch = batch_size(n)
    total = [0]
    every = max(1, n // 10)  # about ten reports over the run

    def progress(step=1):
        before = total[0]
        total[0] += step
        if on_progress and (total[0] // every > before // every or total[0] == n):
            on_progress(f"Monte Carlo: {total[0]}/{n} samples simulated", total[0], n)

    if workers == 1:
        return _chunk((problem, schedule, tf, drawn.constants, drawn.x0, deadline, batch, method), progress)

    from .processes import run_killable

    size = batch * max(1, math.ceil(n / (workers * CHUNKS_PER_WORKER * batch)))  # whole batches
    starts = list(range(0, n, size))
    items = [(k, (problem, schedule, tf, drawn.constants[:, s:s + size], drawn.x0[:, s:s + size], deadline,
                  batch, method))
             for k, s in enumerate(starts)]
    results = {}

    def done(key, kind, payload, seconds):
        if kind == "ok":
            results[key] = payload
        else:
            count = min(size, n - starts[key])
            why = f"the process simulating it ended: {payload}"
            results[key] = [{"status": st.SIMULATION_FAILED, "message": why}] * count

    def late():
        return deadline is not None and time.monotonic() > deadline

    # processes that run chunk after chunk (each keeps what it built, see _KEPT)
    run_killable(items, _chunk, workers, done, on_progress=lambda key, payload: progress(payload), should_stop=late,
                 reuse=True)
    not_run = {"status": NOT_RUN, "message": "the time limit was reached first"}
    return [d for k, s in enumerate(starts) for d in results.get(k, [not_run] * min(size, n - s))]


# ------------------------------------------------------------------ the result


def _quantiles(values):
    if not len(values):
        return None, None
    return float(np.percentile(values, 5)), float(np.percentile(values, 50))


def _result(model, limits, drawn, nominal, outs, samples, seed, seconds, workers, label_unit,
            method="bdf") -> MonteCarloResult:
    from .units import factor_to

    u = model.problem.uncertainty
    units = tuple(v.unit for v in u.values)
    factors = [factor_to(v.unit) if v.unit else 1.0 for v in u.values]
    judged = [d for d in outs if d["status"] in (st.WITHIN_LIMITS, st.LIMIT_BROKEN)]
    n_failed = sum(d["status"] == st.SIMULATION_FAILED for d in outs)
    n_judged, n_not_run = len(judged), sum(d["status"] == NOT_RUN for d in outs)
    nominal_ok = nominal["status"] in (st.WITHIN_LIMITS, st.LIMIT_BROKEN)

    def risk(lim, broken, margins=(), nominal_broken=None):
        p = broken / n_judged if n_judged else None
        lo, hi = wilson_interval(broken, n_judged) if n_judged else (None, None)
        m5, m50 = _quantiles(margins)
        bounds = (None, None) if lim is None else tuple(None if b is None else b * lim.factor
                                                        for b in (lim.lower, lim.upper))
        name, kind, unit, key = ("any limit", "any", "", "") if lim is None else (lim.name, lim.kind, lim.unit,
                                                                                   lim.key)
        return LimitRisk(name, kind, unit, key, *bounds, broken, n_judged, p, lo, hi, nominal_broken, m5, m50)

    risks = []
    for i, lim in enumerate(limits):
        broken = sum(lim.name in d["broken"] for d in judged)
        risks.append(risk(lim, broken, [d["margins"][i] for d in judged],
                          (lim.name in nominal["broken"]) if nominal_ok else None))
    any_limit = risk(None, sum(bool(d["broken"]) for d in judged),
                     nominal_broken=bool(nominal["broken"]) if nominal_ok else None)

    objective = None
    label, unit = label_unit
    if model.problem.objective is not None:
        values = np.array([d["objective"] for d in judged if d["objective"] is not None], dtype=float)
        values = values[np.isfinite(values)]
        if len(values):
            objective = {"mean": float(values.mean()), "p5": float(np.percentile(values, 5)),
                         "p50": float(np.percentile(values, 50)), "p95": float(np.percentile(values, 95)),
                         "nominal": nominal.get("objective")}

    runs = []
    for k, d in enumerate(outs):
        values = tuple(float(x) * f for x, f in zip(drawn.values[:, k], factors))
        runs.append(SampleRun(k, values, d["status"], d.get("objective"), d.get("margins"), d.get("broken", ()),
                              d.get("message", "")))

    return MonteCarloResult(
        samples=samples, seed=seed, judged=n_judged, failed=n_failed,
        failed_interval=wilson_interval(n_failed, n_judged + n_failed), any_limit=any_limit, limits=tuple(risks),
        objective_label=label, objective_unit=unit, objective=objective, names=tuple(drawn.names), units=units,
        distributions=tuple(distribution_text(v) for v in u.values), runs=tuple(runs),
        bands=_bands(limits, nominal, judged), nominal_status=nominal["status"], seconds=seconds,
        workers=workers, not_run=n_not_run, integration_method=method,
    )


def _bands(limits, nominal, judged) -> tuple:
    """The fan of every limited quantity except the pumps, on the nominal run's times
    (every run of one schedule is sampled at the same times; a run sampled otherwise
    is interpolated onto them)."""
    nominal_ok = nominal["status"] in (st.WITHIN_LIMITS, st.LIMIT_BROKEN)
    ref = nominal if nominal_ok else (judged[0] if judged else None)
    if ref is None:
        return ()
    t = ref["t"]
    curves = []
    for d in judged:
        if len(d["t"]) == len(t) and np.array_equal(d["t"], t):
            curves.append(d["g"])
        else:
            curves.append(np.column_stack([np.interp(t, d["t"], d["g"][:, i]) for i in range(d["g"].shape[1])]))
    stack = np.array(curves) if curves else np.full((1,) + ref["g"].shape, np.nan)
    nominal_g = nominal["g"] if nominal_ok else np.full(ref["g"].shape, np.nan)
    bands = []
    for i, lim in enumerate(limits):
        if lim.kind == "pump":
            continue
        f = lim.factor
        if curves:
            p5, p50, p95 = (np.percentile(stack[:, :, i], q, axis=0) * f for q in (5, 50, 95))
        else:
            p5 = p50 = p95 = np.full(len(t), np.nan)
        rows = [k for k, d in enumerate(judged) if lim.name in d["broken"]][:BROKEN_SHOWN]
        broken = stack[rows, :, i] * f if rows else np.zeros((0, len(t)))
        bands.append(Band(lim.name, lim.kind, lim.unit, lim.at_end,
                          None if lim.lower is None else lim.lower * f, None if lim.upper is None else lim.upper * f,
                          t, p5, p50, p95, nominal_g[:, i] * f, broken))
    return tuple(bands)


def distribution_text(v) -> str:
    """An uncertain value's distribution in words, in its unit: 'normal, sd 0.03 1/h'."""
    from .report.text import fmt
    from .units import factor_to

    f = factor_to(v.unit) if v.unit else 1.0
    unit = f" {v.unit}" if v.unit else ""
    if v.distribution == "uniform":
        return f"uniform, {fmt(v.lower * f)} to {fmt(v.upper * f)}{unit}"
    return f"{v.distribution}, sd {fmt(v.sd * f)}{unit}"
