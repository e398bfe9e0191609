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
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np

from .model import Model
from .simulate import Trajectory
from .units import factor_to

REL_TOL = 1e-6
ABS_TOL = 1e-9

# judging between samples: local peaks of use closer to the bound than this fraction
# of the limit's scale are refined (the closest one always), at most MAX_REFINED per
# limit, each by REFINE_ROUNDS rounds of re-integration; a first crossing is narrowed
# down by CROSSING_ROUNDS rounds (each divides the interval by the dense output's 40)
REFINE_BAND = 0.02
MAX_REFINED = 40
REFINE_ROUNDS = 3
CROSSING_ROUNDS = 5


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
        slack = np.full(values.shape, np.inf)
        side = np.full(values.shape, "max", dtype=object)
        if self.upper is not None:
            slack = self.upper - values
        if self.lower is not None:
            low = values - self.lower
            side = np.where(low < slack, "min", side)
            slack = np.minimum(slack, low)
        return slack, side


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


def build_limits(model: Model) -> list[Limit]:
    """Every limit of the model's problem, in report order."""
    p = model.problem
    out = []

    def add(name, kind, expr, lower, upper, unit, factor, at_end, key):
        expr = ca.SX(expr)
        out.append(Limit(name, kind, expr, lower, upper, unit, factor, at_end, key,
                         None if kind == "pump" else _state_index(model, expr),
                         bool(ca.depends_on(expr, model.u))))

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
    return out


def limit_function(model: Model, limits, p=None) -> ca.Function:
    """(t, x, u) -> g of every limit, with the constants fixed at ``p`` (default p0)."""
    return model.function("g", [ca.vertcat(*[ca.SX(l.expr) for l in limits])], p=p)


def evaluate(model: Model, limits, traj: Trajectory) -> np.ndarray:
    """g of every limit at every sample: shape (n_samples, n_limits), internal units."""
    f = limit_function(model, limits, traj.constants)
    return _apply(f, traj.t, traj.x, traj.u, len(limits))


def _apply(f, t, x, u, n_limits) -> np.ndarray:
    n = len(t)
    values = f.map(n)(np.asarray(t)[None, :], np.asarray(x).T, np.asarray(u).T)
    return np.array(values).reshape(n_limits, n).T


def judge(model: Model, limits, traj: Trajectory, rel_tol: float = REL_TOL) -> tuple:
    """A :class:`LimitReport` per limit for trajectory ``traj``; also returns the
    per-sample use (% of the upper bound) as a dict name -> array. A limit counts as
    broken where it is exceeded by more than ``rel_tol`` of its bound; extrema and
    first crossings between samples are found as the module docstring says."""
    f = limit_function(model, limits, traj.constants)
    g = _apply(f, traj.t, traj.x, traj.u, len(limits))
    reports, use = [], {}
    for i, lim in enumerate(limits):
        if lim.at_end:
            values, times = g[-1:, i], traj.t[-1:]
            extra_t, extra_v = np.zeros(0), np.zeros(0)
        else:
            values, times = g[:, i], traj.t
            extra_t, extra_v = _between_samples(traj, f, i, lim, values)
        all_t = np.concatenate([times, extra_t])
        all_v = np.concatenate([values, extra_v])
        slack, side = lim.slack(all_v)
        k = int(np.argmin(slack))
        tol = lim.tolerance(rel_tol)
        first = None
        if slack[k] < -tol:
            first = _first_crossing(traj, f, i, lim, values, extra_t, extra_v, tol)
        peak = None
        if lim.upper is not None and lim.upper > 0:
            if not lim.at_end:  # an end bound says nothing about the run before the end
                use[lim.name] = 100.0 * g[:, i] / lim.upper
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


def _between_samples(traj, f, i, lim, values):
    """Extra (times, values) of limit ``i`` found by re-integrating around the
    samples where its slack has a local minimum."""
    if lim.kind in ("pump", "setting") or traj.piece is None or traj._simulator is None:
        return np.zeros(0), np.zeros(0)
    slack, _ = lim.slack(values)
    minima = _local_minima(slack, traj.piece)
    if len(minima) == 0:
        return np.zeros(0), np.zeros(0)
    band = REFINE_BAND * lim.scale()
    least = slack[minima].min()
    closest = minima[slack[minima] <= least + 1e-12 * lim.scale()]  # ties included
    chosen = minima[slack[minima] < band]
    chosen = chosen[np.argsort(slack[chosen])][:MAX_REFINED]
    chosen = np.union1d(chosen, closest)
    # a sample at a piece boundary is also the first (or last) sample of the next (or
    # previous) piece: the extremum may lie on either side of it
    n = len(traj.t)
    twins = [k + 1 for k in chosen if k + 1 < n and traj.t[k + 1] == traj.t[k]]
    twins += [k - 1 for k in chosen if k > 0 and traj.t[k - 1] == traj.t[k]]
    chosen = np.union1d(chosen, np.array(twins, dtype=int))
    ts, vs = [], []
    for k in chosen:
        lo = k - 1 if k > 0 and traj.piece[k - 1] == traj.piece[k] else k
        hi = k + 1 if k + 1 < len(traj.t) and traj.piece[k + 1] == traj.piece[k] else k
        if hi == lo:
            continue
        t_lo, x_lo, t_hi = traj.t[lo], traj.x[lo], traj.t[hi]
        for _ in range(REFINE_ROUNDS):
            t, x, u = traj.between(lo, t_lo, x_lo, t_hi)
            v = _apply(f, t, x, u, f.size1_out(0))[:, i]
            s, _ = lim.slack(v)
            j = int(np.argmin(s))
            ts.append(t[j]), vs.append(v[j])
            a, b = max(j - 1, 0), min(j + 1, len(t) - 1)
            t_lo, x_lo, t_hi = t[a], x[a], t[b]
            if t_hi <= t_lo:
                break
    return np.array(ts), np.array(vs)


def _first_crossing(traj, f, i, lim, values, extra_t, extra_v, tol) -> float:
    """First time (h) the slack of limit ``i`` drops below -tol, located between
    samples by narrowing the interval where it first happens."""
    slack, _ = lim.slack(values)
    bad = np.nonzero(slack < -tol)[0]
    t_bad = traj.t[bad[0]] if len(bad) else np.inf
    if len(extra_t):
        s_extra, _ = lim.slack(extra_v)
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
    for _ in range(CROSSING_ROUNDS):
        t, x, u = traj.between(k, t_lo, x_lo, t_hi)
        s, _ = lim.slack(_apply(f, t, x, u, f.size1_out(0))[:, i])
        j = int(np.argmax(s < -tol))
        if not s[j] < -tol or j == 0:
            break
        t_lo, x_lo, t_hi = t[j - 1], x[j - 1], t[j]
        s_lo, s_hi = s[j - 1], s[j]
    else:
        # linear interpolation in the last, tiny interval
        return float(t_lo + (t_hi - t_lo) * (s_lo + tol) / (s_lo - s_hi))
    return float(t_hi)
