"""Vessel and process limits as objects that can judge a trajectory.

:func:`build_limits` turns a model's problem into a list of :class:`Limit`: each pump's
range, the working volume, the OTR ceiling, the heat-removal ceiling, and every path
or end bound of the problem file. A limit holds its CasADi expression in (t, x, u), so
the same object gives the optimizer its constraint and judges any simulated schedule
(:func:`judge`).
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


def bound_scale(lower, upper) -> float:
    """The largest non-zero |bound|, or 1.0 if every bound is zero (or absent)."""
    values = [abs(v) for v in (lower, upper) if v is not None and v != 0]
    return max(values) if values else 1.0


@dataclass(frozen=True)
class Limit:
    """One limit: ``lower <= g(t, x, u) <= upper`` over the run, or at its end.

    Attributes
    ----------
    name : str
    kind : str
        'pump', 'volume', 'oxygen', 'heat', 'path' or 'end'.
    expr : casadi.SX
        g(t, x, u), internal units.
    lower, upper : float or None
        Internal units.
    unit : str
        Unit for reports; ``factor`` converts internal values to it.
    factor : float
    at_end : bool
    key : str
        Key path in the problem file.
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


def build_limits(model: Model) -> list[Limit]:
    """Every limit of the model's problem, in report order."""
    p = model.problem
    out = []
    for j, f in enumerate(p.feeds):
        out.append(Limit(f"pump {f.name}", "pump", model.u[j], f.min_rate, f.max_rate, f.unit,
                         factor_to(f.unit), False, f"feeds.{f.name}"))
    v = p.vessel
    out.append(Limit("working volume", "volume", model.x[model.index("V")], None, v.working_volume,
                     v.unit, factor_to(v.unit), False, "vessel.working_volume"))
    if v.oxygen is not None:
        out.append(Limit("OTR ceiling", "oxygen", model.values["OUR"], None, v.oxygen.transfer_max,
                         v.oxygen.unit, factor_to(v.oxygen.unit), False, "vessel.oxygen.transfer_max"))
    if v.heat is not None:
        out.append(Limit("heat removal", "heat", model.values["heat_load"], None, v.heat.removal_max,
                         v.heat.unit, factor_to(v.heat.unit), False, "vessel.heat.removal_max"))
    for b in p.bounds:
        unit = b.unit
        out.append(Limit(b.name, "end" if b.at_end else "path", model.expression(b.expression),
                         b.lower, b.upper, unit, factor_to(unit) if unit else 1.0, b.at_end, b.key))
    return out


def evaluate(model: Model, limits, traj: Trajectory) -> np.ndarray:
    """g of every limit at every sample: shape (n_samples, n_limits), internal units."""
    f = ca.Function("g", [model.t, model.x, model.u], [ca.vertcat(*[ca.SX(l.expr) for l in limits])])
    n = len(traj.t)
    values = f.map(n)(traj.t[None, :], traj.x.T, traj.u.T)
    return np.array(values).reshape(len(limits), n).T


def judge(model: Model, limits, traj: Trajectory, rel_tol: float = REL_TOL) -> tuple:
    """A :class:`LimitReport` per limit for trajectory ``traj``; also returns the
    per-sample use (% of the upper bound) as a dict name -> array. A limit counts as
    broken where it is exceeded by more than ``rel_tol`` of its bound."""
    g = evaluate(model, limits, traj)
    reports, use = [], {}
    for i, lim in enumerate(limits):
        values = g[-1:, i] if lim.at_end else g[:, i]
        times = traj.t[-1:] if lim.at_end else traj.t
        slack = np.full(values.shape, np.inf)
        side = np.full(values.shape, "max", dtype=object)
        if lim.upper is not None:
            slack = lim.upper - values
        if lim.lower is not None:
            low = values - lim.lower
            side = np.where(low < slack, "min", side)
            slack = np.minimum(slack, low)
        k = int(np.argmin(slack))
        broken = np.nonzero(slack < -lim.tolerance(rel_tol))[0]
        peak = None
        if lim.upper is not None and lim.upper > 0:
            if not lim.at_end:  # an end bound says nothing about the run before the end
                use[lim.name] = 100.0 * g[:, i] / lim.upper
            peak = float(np.max(100.0 * values / lim.upper))
        conv = lim.factor
        reports.append(LimitReport(
            name=lim.name, kind=lim.kind, unit=lim.unit,
            lower=None if lim.lower is None else lim.lower * conv,
            upper=None if lim.upper is None else lim.upper * conv,
            min_slack=float(slack[k]) * conv, time_min_slack=float(times[k]), side=str(side[k]),
            first_violation=float(times[broken[0]]) if len(broken) else None,
            worst_violation=float(max(0.0, -slack.min())) * conv,
            peak_use=peak, at_end=lim.at_end, key=lim.key,
        ))
    return tuple(reports), use
