"""Vessel and process limits as objects that can judge a trajectory.

:func:`build_limits` turns a model's problem into a list of :class:`Limit`: each pump's
range, the working volume, the OTR ceiling, the heat-removal ceiling, and every path
or end bound of the problem file. A limit holds its CasADi expression in
(t, x, u, p), so the same object gives the optimizer its constraint and judges any
simulated schedule (:func:`judge`).

:func:`judge` is the one judgement of a simulated run: ``optfeed check`` and the
verification of an optimizer's answer both call it on the same samples. It does not
trust the samples alone: around every local peak of a limit's use (and next to every
pump change, where the samples sit on both sides of the change) it integrates again
with a finer output to find the extremum between samples, and it locates the moment
a limit is first crossed by narrowing down between samples, to well under a second.

With phases (:mod:`optfeed.phases`) every sample is judged with the model and the
constants of the phase it lies in. A phase's own limits (``phases[i].limits``) hold
only over that phase's time window (``Limit.phase``). A phase's pump range
(``phases[i].feeds``) is a limit named ``pump <feed> in <phase>`` (kind 'phase
pump'), judged on the schedule as written: the volume it asks that pump for outside
the phase's range, within the phase's window, may be at most
:data:`PHASE_PUMP_ALLOWANCE` of the working volume. (The pump controller keeps a
pump that a phase turns off off whatever the schedule asks; the allowance keeps a
phase end found by event detection a hair after the schedule's step from counting
as a breach, while any real feeding in the wrong phase does.)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import casadi as ca
import numpy as np

from .calls import call
from .model import Model
from .simulate import Trajectory
from .units import factor_to

REL_TOL = 1e-6
ABS_TOL = 1e-9

# judging between samples: local peaks of use closer to the bound than this fraction
# of the limit's scale are refined (the closest one always), at most MAX_REFINED per
# limit, each by up to REFINE_ROUNDS rounds of re-integration; a peak is settled
# sooner when it lies at the interval's end (a point judged already) or the parabola
# through the three outputs around it puts its top less than SETTLED violation
# tolerances beyond the highest output (measured on the robust optimum's Monte Carlo:
# the second and third rounds moved the peaks by under 0.013 tolerances); a first
# crossing is narrowed down by CROSSING_ROUNDS rounds (each divides the interval by
# the dense output's 40)
REFINE_BAND = 0.02
MAX_REFINED = 40
REFINE_ROUNDS = 3
SETTLED = 0.1
CROSSING_ROUNDS = 5
PHASE_PUMP_ALLOWANCE = 1e-4  # of the working volume: what a schedule may ask outside a phase's pump range


def bound_scale(lower, upper) -> float:
    """The largest non-zero |bound|, or 1.0 if every bound is zero (or absent)."""
    values = [abs(v) for v in (lower, upper) if v is not None and v != 0]
    return max(values) if values else 1.0


@dataclass(frozen=True)
class Limit:
    """One limit: ``lower <= g(t, x, u, p) <= upper`` over the run, or at its end.

    Attributes
    ----------
    name : str
    kind : str
        'pump', 'setting' (a pump's minimum setting when on; judged only), 'volume',
        'oxygen', 'heat', 'path' or 'end'.
    expr : casadi.SX
        g(t, x, u, p), internal units.
    lower, upper : float or None
        Internal units.
    unit : str
        Unit for reports; ``factor`` converts internal values to it.
    factor : float
    at_end : bool
    key : str
        Key path in the problem file.
    state : int or None
        Index of the state when g is exactly one state (then the optimizer imposes
        it as a bound on that state's variables rather than as a constraint row).
    on_pump : bool
        g depends on the pump rates (then it jumps where a pump changes).
    phase : str or None
        The phase whose time window the limit holds in (None: the whole run).
        Kind 'phase pump' is a pump's range in that phase (g = the rate, L/h),
        judged by the volume asked outside it (see the module docstring).
    """

    name: str
    kind: str
    expr: object
    lower: float | None
    upper: float | None
    unit: str
    factor: float
    at_end: bool
    key: str
    state: int | None = None
    on_pump: bool = False
    phase: str | None = None

    def scale(self) -> float:
        """Magnitude that relative slack and violations are measured against
        (internal units): the largest non-zero bound, or 1 for bounds of zero."""
        return bound_scale(self.lower, self.upper)

    def tolerance(self, rel_tol: float = REL_TOL) -> float:
        """Violation tolerance, internal units."""
        return rel_tol * self.scale() + ABS_TOL

    def relative_excess(self, report) -> float:
        """Worst violation in ``report`` (a LimitReport of this limit) relative to the scale."""
        return (report.worst_violation / self.factor) / self.scale()

    def slack(self, values) -> tuple[np.ndarray, np.ndarray]:
        """(slack, side) of g ``values`` (internal units): distance to the nearest
        bound (negative = violated) and which bound ('max' or 'min') it is."""
        values = np.asarray(values, dtype=float)
        side = np.full(values.shape, "max", dtype="<U3")
        if self.lower is not None:
            upper = np.inf if self.upper is None else self.upper - values
            side = np.where(values - self.lower < upper, "min", side)
        return self.margin(values), side

    def margin(self, values) -> np.ndarray:
        """The slack alone (what :meth:`slack` returns first): the judgement's
        narrowing asks for it thousands of times per run and never for the side."""
        values = np.asarray(values, dtype=float)
        if self.upper is None and self.lower is None:
            return np.full(values.shape, np.inf)
        if self.lower is None:
            return self.upper - values
        if self.upper is None:
            return values - self.lower
        return np.minimum(self.upper - values, values - self.lower)


@dataclass(frozen=True)
class LimitReport:
    """How a trajectory used one limit (all values in ``unit``).

    Attributes
    ----------
    name, kind, unit : str
    lower, upper : float or None
    min_slack : float
        Smallest distance to the nearest bound (negative = violated).
    time_min_slack : float
        When it occurs, h.
    side : str
        'min' or 'max': the bound that the smallest slack is measured to.
    first_violation : float or None
        First time (h) the limit is broken beyond tolerance, or None.
    worst_violation : float
        Largest amount by which it is broken (0 if never).
    peak_use : float or None
        Largest value as % of the upper bound (upper bounds above zero only).
    at_end : bool
    key : str
    """

    name: str
    kind: str
    unit: str
    lower: float | None
    upper: float | None
    min_slack: float
    time_min_slack: float
    side: str
    first_violation: float | None
    worst_violation: float
    peak_use: float | None
    at_end: bool
    key: str

    @property
    def violated(self) -> bool:
        return self.first_violation is not None


def _state_index(model: Model, expr) -> int | None:
    for k in range(model.nx):
        if ca.is_equal(ca.SX(expr), model.x[k]):
            return k
    return None


def build_limits(model: Model, phases: bool = False) -> list[Limit]:
    """Every limit of the model's problem over the whole run, in report order; with
    ``phases`` also each phase's pump ranges (kind 'phase pump') and own limits,
    each with its ``phase`` (what ``check`` judges; the optimizer takes a phase's
    limits per phase, :func:`optfeed.phases.phase_limits`)."""
    p = model.problem
    out = []

    def add(name, kind, expr, lower, upper, unit, factor, at_end, key, phase=None):
        expr = ca.SX(expr)
        out.append(Limit(name, kind, expr, lower, upper, unit, factor, at_end, key,
                         None if kind in ("pump", "phase pump") else _state_index(model, expr),
                         bool(ca.depends_on(expr, model.u)), phase))

    for j, f in enumerate(p.feeds):
        add(f"pump {f.name}", "pump", model.u[j], f.min_rate, f.max_rate, f.unit, factor_to(f.unit), False,
            f"feeds.{f.name}")
        if f.min_on > f.min_rate:
            # off, or at least min_on: g = min(u, min_on - u) is how far a rate lies inside
            # the forbidden band (0, min_on); judged only (optimize fixes an on/off pattern)
            add(f"pump {f.name} minimum setting", "setting", ca.fmin(model.u[j], f.min_on - model.u[j]), None, 0.0,
                f.unit, factor_to(f.unit), False, f"feeds.{f.name}.min_on")
    v = p.vessel
    add("working volume", "volume", model.x[model.index("V")], None, v.working_volume, v.unit,
        factor_to(v.unit), False, "vessel.working_volume")
    if v.oxygen is not None:
        add("OTR ceiling", "oxygen", model.values["OUR"], None, v.oxygen.transfer_max, v.oxygen.unit,
            factor_to(v.oxygen.unit), False, "vessel.oxygen.transfer_max")
    if v.heat is not None:
        add("heat removal", "heat", model.values["heat_load"], None, v.heat.removal_max, v.heat.unit,
            factor_to(v.heat.unit), False, "vessel.heat.removal_max")
    for b in p.bounds:
        unit = b.unit
        add(b.name, "end" if b.at_end else "path", model.expression(b.expression), b.lower, b.upper, unit,
            factor_to(unit) if unit else 1.0, b.at_end, b.key)
    if phases:
        from .phases import phase_limits

        feeds = {f.name: (j, f) for j, f in enumerate(p.feeds)}
        for ph in p.phases:
            for name, (lo, hi) in ph.pumps.items():
                j, f = feeds[name]
                add(f"pump {name} in {ph.name}", "phase pump", model.u[j], lo, hi, f.unit, factor_to(f.unit),
                    False, f"{ph.key}.feeds", ph.name)
            out += phase_limits(model, ph)
    return out


def limit_function(model: Model, limits, p=None) -> ca.Function:
    """(t, x, u) -> g of every limit, with the constants fixed at ``p`` (default p0)."""
    return model.function("g", [ca.vertcat(*[ca.SX(l.expr) for l in limits])], p=p)


def evaluate(model: Model, limits, traj: Trajectory) -> np.ndarray:
    """g of every limit at every sample: shape (n_samples, n_limits), internal units
    (each sample with its phase's model and constants)."""
    return _values(_phase_functions(model, limits, traj), traj, len(limits))


class _LimitValues:
    """(t, x, u) -> g of every limit at given constants: one CasADi Function in
    (t, x, u, p) per model and list of limits, built once and kept on the model
    (with its mapped copies, one per number of samples), so that judging another
    sample costs no Function construction."""

    def __init__(self, model: Model, limits, exprs, p):
        key = tuple(id(l) for l in limits)
        cache = model.__dict__.setdefault("_limit_values", {})
        if key not in cache:  # the limits are kept with it so that their ids stay theirs
            fn = model.function_p("g", [ca.vertcat(*exprs())])
            cache[key] = (list(limits), fn, {})
        _, self._fn, self._maps = cache[key]
        self._p = np.asarray(model.p0 if p is None else p, dtype=float)
        self.n_limits = len(limits)

    def __call__(self, t, x, u) -> np.ndarray:
        """g at samples (t, x, u): shape (len(t), n_limits), internal units."""
        return self._mapped(None, len(t), t, x, u)

    def one(self, i: int, t, x, u) -> np.ndarray:
        """g of limit ``i`` alone at samples (t, x, u): shape (len(t),) (the
        judgement's re-integrations need one limit at a time; the others cost as
        much again each)."""
        return self._mapped(i, len(t), t, x, u)[:, 0]

    def _mapped(self, i, n, t, x, u) -> np.ndarray:
        """Limit ``i`` (all of them for None) at the ``n`` samples: shape (n, limits)."""
        f = self._maps.get((i, n))
        if f is None:
            fn = self._fn
            ins = fn.sx_in()
            out = fn.call(ins)[0]
            # dense, so that the buffer below holds every value (a limit that is
            # structurally zero, or constant, would otherwise have no entry)
            fn = ca.Function("g" if i is None else f"g{i}", ins, [ca.densify(out if i is None else out[i])],
                             ["t", "x", "u", "p"], ["g"])
            f = self._maps[(i, n)] = fn.map(f"{fn.name()}_{n}", "serial", n, [3], [])  # p shared
        (g,) = call(f, {"t": t, "x": x, "u": u, "p": self._p}, ["g"])
        return g.reshape(n, -1)  # column-major (limits, n) is C-ordered (n, limits)


def _phase_functions(model: Model, limits, traj: Trajectory) -> list:
    """(t, x, u) -> g of every limit, one :class:`_LimitValues` per phase of ``traj``
    (one without phases), each with that phase's model and constants."""
    models = traj.phase_models
    if traj.phase is None or not models:
        return [_LimitValues(model, limits, lambda: [ca.SX(l.expr) for l in limits], traj.constants)]
    out, rebuilt = [], {}
    for k, m in enumerate(models):
        if m is model:
            def exprs():
                return [ca.SX(l.expr) for l in limits]
        else:
            def exprs(m=m):
                if id(m) not in rebuilt:
                    rebuilt[id(m)] = {l.name: l for l in build_limits(m, phases=True)}
                mine = rebuilt[id(m)]
                old = ca.vertcat(model.t, model.x, model.u, model.p)
                new = ca.vertcat(m.t, m.x, m.u, m.p)
                return [ca.SX(mine[l.name].expr) if l.name in mine else ca.substitute(ca.SX(l.expr), old, new)
                        for l in limits]
        out.append(_LimitValues(m, limits, exprs, traj.phase_constants(k)))
    return out


def _values(fs, traj, n_limits) -> np.ndarray:
    if len(fs) == 1:
        return fs[0](traj.t, traj.x, traj.u)
    g = np.empty((len(traj.t), n_limits))
    for k, f in enumerate(fs):
        sel = traj.phase == k
        if sel.any():
            g[sel] = f(traj.t[sel], traj.x[sel], traj.u[sel])
    return g


def _fn(fs, traj, k):
    """The limit Function for sample ``k``'s phase."""
    return fs[0] if len(fs) == 1 else fs[traj.phase[k]]


def phase_window(traj: Trajectory, name: str) -> np.ndarray:
    """Boolean mask of the samples of ``traj`` that lie in phase ``name``."""
    from .phases import phases_of

    names = [ph.name for ph in phases_of(traj._simulator.model.problem)] if traj._simulator else []
    if traj.phase is None or name not in names:
        return np.zeros(len(traj.t), dtype=bool)
    return traj.phase == names.index(name)


def asked_outside(traj: Trajectory, j: int, lower: float, upper: float, t0: float, t1: float):
    """The volume (L) the schedule of ``traj`` asks pump ``j`` for outside
    [``lower``, ``upper``] L/h between ``t0`` and ``t1`` h, with the running total
    as (times h, volumes L): (total, times, volumes). Each schedule stretch is
    integrated by the trapezoid rule over 256 intervals (exact for steps)."""
    times, vols, total = [t0], [0.0], 0.0
    for seg in traj.requested:
        a, b = max(seg.start, t0), min(seg.end, t1)
        if not b > a:
            continue
        tt = np.linspace(a, b, 257)
        rate = seg.rates(tt)[:, j]
        excess = np.maximum(rate - upper, 0.0) + np.maximum(lower - rate, 0.0)
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (excess[1:] + excess[:-1]) * np.diff(tt))])
        times += list(tt[1:])
        vols += list(total + cum[1:])
        total += float(cum[-1])
    return total, np.array(times), np.array(vols)


def judge(model: Model, limits, traj: Trajectory, rel_tol: float = REL_TOL, values=None,
          locate: bool = True) -> tuple:
    """A :class:`LimitReport` per limit for trajectory ``traj``; also returns the
    per-sample use (% of the upper bound) as a dict name -> array. A limit counts as
    broken where it is exceeded by more than ``rel_tol`` of its bound; extrema and
    first crossings between samples are found as the module docstring says. A
    limit of one phase is judged over that phase's samples only (its use is NaN
    elsewhere); a phase's pump range by the volume asked outside it. ``values``:
    :func:`evaluate` of the same trajectory, if computed already. ``locate``: narrow
    down the moment each broken limit is first crossed (False: its first_violation
    is the first judged time past the bound, a sample or a refined point; every
    verdict, extremum and margin is the same either way; the Monte Carlo, which
    reports no times, judges so)."""
    fs = _phase_functions(model, limits, traj)
    g = _values(fs, traj, len(limits)) if values is None else np.asarray(values, dtype=float)
    reports, use = [], {}
    for i, lim in enumerate(limits):
        window = None if lim.phase is None else phase_window(traj, lim.phase)
        if lim.kind == "phase pump":
            reports.append(_judge_phase_pump(model, lim, traj, window))
            continue
        if window is not None and not window.any():  # the phase never started
            reports.append(LimitReport(lim.name, lim.kind, lim.unit,
                                       None if lim.lower is None else lim.lower * lim.factor,
                                       None if lim.upper is None else lim.upper * lim.factor,
                                       math.nan, math.nan, "max", None, 0.0, None, lim.at_end, lim.key))
            continue
        if lim.at_end:
            values, times = g[-1:, i], traj.t[-1:]
            extra_t, extra_v = np.zeros(0), np.zeros(0)
        else:
            values, times = g[:, i], traj.t
            extra_t, extra_v = _between_samples(traj, fs, i, lim, values, window)
            if window is not None:
                values, times = values[window], times[window]
        all_t = np.concatenate([times, extra_t])
        all_v = np.concatenate([values, extra_v])
        slack, side = lim.slack(all_v)
        k = int(np.argmin(slack))
        tol = lim.tolerance(rel_tol)
        first = None
        if slack[k] < -tol:
            first = (_first_crossing(traj, fs, i, lim, g[:, i], extra_t, extra_v, tol, window) if locate
                     else float(all_t[slack < -tol].min()))
        peak = None
        if lim.upper is not None and lim.upper > 0:
            if not lim.at_end:  # an end bound says nothing about the run before the end
                use[lim.name] = 100.0 * g[:, i] / lim.upper
                if window is not None:
                    use[lim.name] = np.where(window, use[lim.name], np.nan)
            peak = float(np.max(100.0 * all_v / lim.upper))
        conv = lim.factor
        reports.append(LimitReport(
            name=lim.name, kind=lim.kind, unit=lim.unit,
            lower=None if lim.lower is None else lim.lower * conv,
            upper=None if lim.upper is None else lim.upper * conv,
            min_slack=float(slack[k]) * conv, time_min_slack=float(all_t[k]), side=str(side[k]),
            first_violation=first,
            worst_violation=float(max(0.0, -slack.min())) * conv,
            peak_use=peak, at_end=lim.at_end, key=lim.key,
        ))
    return tuple(reports), use


def _judge_phase_pump(model, lim, traj, window) -> LimitReport:
    """A phase's pump range, judged by the volume asked outside it (module docstring);
    the report is in the vessel's volume unit, its upper bound the allowance."""
    vessel = model.problem.vessel
    unit = vessel.unit
    conv = factor_to(unit)
    allowance = PHASE_PUMP_ALLOWANCE * vessel.working_volume
    j = model.feed_names.index(lim.name[len("pump "):].rsplit(" in ", 1)[0])
    if window is None or not window.any() or not traj.requested:
        total, t0, times, vols = 0.0, 0.0, np.zeros(1), np.zeros(1)
    else:
        t0, t1 = float(traj.t[window][0]), float(traj.t[window][-1])
        total, times, vols = asked_outside(traj, j, lim.lower, lim.upper, t0, t1)
    first = None
    if total > allowance:
        k = int(np.argmax(vols > allowance))  # >= 1: the running total starts at 0
        a, b = vols[k - 1], vols[k]  # linear within the quadrature interval
        first = float(times[k - 1] + (times[k] - times[k - 1]) * (allowance - a) / (b - a))
    return LimitReport(
        name=lim.name, kind=lim.kind, unit=unit, lower=None, upper=allowance * conv,
        min_slack=(allowance - total) * conv, time_min_slack=float(times[-1]) if len(times) else float(t0),
        side="max", first_violation=first, worst_violation=max(0.0, total - allowance) * conv,
        peak_use=100.0 * total / allowance, at_end=False, key=lim.key,
    )


def _local_minima(slack, piece) -> np.ndarray:
    """Sample indices where the slack is no larger than at its neighbours within the
    same piece (a piece's first and last samples count, so pump changes are covered)."""
    n = len(slack)
    left = np.ones(n, dtype=bool)
    right = np.ones(n, dtype=bool)
    same_prev = np.zeros(n, dtype=bool)
    same_prev[1:] = piece[1:] == piece[:-1]
    left[1:] = ~same_prev[1:] | (slack[1:] <= slack[:-1])
    same_next = np.zeros(n, dtype=bool)
    same_next[:-1] = piece[:-1] == piece[1:]
    right[:-1] = ~same_next[:-1] | (slack[:-1] <= slack[1:])
    interior = same_prev | same_next
    return np.nonzero(left & right & interior)[0]


def _between_samples(traj, fs, i, lim, values, window=None):
    """Extra (times, values) of limit ``i`` found by re-integrating around the
    samples where its slack has a local minimum (within ``window``, a sample mask)."""
    if lim.kind in ("pump", "setting") or traj.piece is None or traj._simulator is None:
        return np.zeros(0), np.zeros(0)
    slack = lim.margin(values)
    if window is not None:
        slack = np.where(window, slack, np.inf)
    minima = _local_minima(slack, traj.piece)
    if len(minima) == 0:
        return np.zeros(0), np.zeros(0)
    # inside a flat stretch (the slack equal to both neighbours in the same piece,
    # e.g. a volume that stays put while the pump is off) nothing lies between the
    # samples to find: only the stretch's ends are refined
    flat = 1e-12 * lim.scale()
    inner = (minima > 0) & (minima < len(slack) - 1)
    k_in = minima[inner]
    same = (traj.piece[k_in - 1] == traj.piece[k_in]) & (traj.piece[k_in + 1] == traj.piece[k_in])
    with np.errstate(invalid="ignore"):  # inf - inf outside a phase's window: not level
        level = (np.abs(slack[k_in] - slack[k_in - 1]) <= flat) & (np.abs(slack[k_in] - slack[k_in + 1]) <= flat)
    keep = np.ones(len(minima), dtype=bool)
    keep[np.nonzero(inner)[0][same & level]] = False
    minima = minima[keep]
    if len(minima) == 0:
        return np.zeros(0), np.zeros(0)
    band = REFINE_BAND * lim.scale()
    least = slack[minima].min()
    closest = minima[slack[minima] <= least + flat]  # ties included
    chosen = minima[slack[minima] < band]
    chosen = chosen[np.argsort(slack[chosen])][:MAX_REFINED]
    chosen = np.union1d(chosen, closest)
    # a sample at a piece boundary is also the first (or last) sample of the next (or
    # previous) piece: the extremum may lie on either side of it
    n = len(traj.t)
    twins = [k + 1 for k in chosen if k + 1 < n and traj.t[k + 1] == traj.t[k]]
    twins += [k - 1 for k in chosen if k > 0 and traj.t[k - 1] == traj.t[k]]
    chosen = np.union1d(chosen, np.array(twins, dtype=int))
    # every chosen minimum's interval is narrowed round by round; each round
    # integrates all the intervals still open side by side (Trajectory.between_many)
    open_ = []  # [sample index, t_lo, x_lo, t_hi, found (t, v) pairs]
    for k in chosen:
        lo = k - 1 if k > 0 and traj.piece[k - 1] == traj.piece[k] else k
        hi = k + 1 if k + 1 < len(traj.t) and traj.piece[k + 1] == traj.piece[k] else k
        if hi == lo:
            continue
        open_.append([lo, traj.t[lo], traj.x[lo], traj.t[hi], []])
    found = [item[4] for item in open_]
    settle = SETTLED * lim.tolerance()
    for _ in range(REFINE_ROUNDS):
        if not open_:
            break
        runs = traj.between_many([(lo, t_lo, x_lo, t_hi) for lo, t_lo, x_lo, t_hi, _ in open_])
        fns = [_fn(fs, traj, item[0]) for item in open_]
        if all(f is fns[0] for f in fns):  # one evaluation of the limits for the whole round
            g = fns[0].one(i, np.concatenate([r[0] for r in runs]), np.vstack([r[1] for r in runs]),
                           np.vstack([r[2] for r in runs]))
            values = np.split(g, np.cumsum([len(r[0]) for r in runs])[:-1])
        else:
            values = [f.one(i, *r) for f, r in zip(fns, runs)]
        still = []
        for item, (t, x, u), v in zip(open_, runs, values):
            s = lim.margin(v)
            j = int(np.argmin(s))
            item[4].append((t[j], v[j]))
            a, b = max(j - 1, 0), min(j + 1, len(t) - 1)
            item[1], item[2], item[3] = t[a], x[a], t[b]
            # settled: the least slack at the interval's end (a point judged already:
            # e.g. a volume that rises to a pump change), or a parabola that puts the
            # true extremum within `settle` of the outputs' least
            inside = 0 < j < len(t) - 1
            if item[3] > item[1] and inside and s[j] - vertex(t[a:b + 1], s[a:b + 1]) >= settle:
                still.append(item)
        open_ = still
    pairs = [pair for per in found for pair in per]  # minimum by minimum, round by round
    return np.array([t for t, _ in pairs]), np.array([v for _, v in pairs])


def vertex(t, s) -> float:
    """The extremum's value of the parabola through three points (t, s); the middle
    value where they lie on a line (or two times coincide)."""
    (t0, t1, t2), (s0, s1, s2) = t, s
    d0, d2 = t0 - t1, t2 - t1
    den = d0 * d2 * (d0 - d2)
    if den == 0:
        return float(s1)
    # s = s1 + b (t - t1) + c (t - t1)^2 through the three points
    c = ((s0 - s1) * d2 - (s2 - s1) * d0) / den
    b = ((s2 - s1) * d0 ** 2 - (s0 - s1) * d2 ** 2) / den
    return float(s1 - b * b / (4 * c)) if c > 0 else float(s1)


def _first_crossing(traj, fs, i, lim, values, extra_t, extra_v, tol, window=None) -> float:
    """First time (h) the slack of limit ``i`` drops below -tol, located between
    samples by narrowing the interval where it first happens (within ``window``)."""
    slack = lim.margin(values)
    if window is not None:
        slack = np.where(window, slack, np.inf)
    bad = np.nonzero(slack < -tol)[0]
    t_bad = traj.t[bad[0]] if len(bad) else np.inf
    if len(extra_t):
        s_extra = lim.margin(extra_v)
        early = extra_t[s_extra < -tol]
        if len(early) and early.min() < t_bad:
            t_bad = float(early.min())
    if lim.at_end:
        return float(traj.t[-1])
    if traj._simulator is None or traj.piece is None:
        return float(t_bad)
    # the last sample before the first violation, in the same piece
    k = int(np.searchsorted(traj.t, t_bad, side="left")) - 1
    if len(bad) and traj.t[bad[0]] == t_bad:
        k = bad[0] - 1
    if k < 0 or traj.piece[k] != traj.piece[min(k + 1, len(traj.t) - 1)] or slack[k] < -tol:
        return float(t_bad)  # violated from the start of a piece (a pump change) or of the run
    t_lo, x_lo, t_hi = traj.t[k], traj.x[k], float(t_bad)
    f = _fn(fs, traj, k)
    for _ in range(CROSSING_ROUNDS):
        t, x, u = traj.between(k, t_lo, x_lo, t_hi)
        s = lim.margin(f.one(i, t, x, u))
        j = int(np.argmax(s < -tol))
        if not s[j] < -tol or j == 0:
            break
        t_lo, x_lo, t_hi = t[j - 1], x[j - 1], t[j]
        s_lo, s_hi = s[j - 1], s[j]
    else:
        # linear interpolation in the last, tiny interval
        return float(t_lo + (t_hi - t_lo) * (s_lo + tol) / (s_lo - s_hi))
    return float(t_hi)
