"""Final values of a run: titer, product mass, volume, fed amounts and the objective."""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from .model import Model
from .simulate import Trajectory
from .units import UREG, factor_to


@dataclass(frozen=True)
class Figure:
    """A named value with its unit (for reports)."""

    label: str
    value: float
    unit: str


@dataclass(frozen=True)
class Outcome:
    """End-of-run values.

    Attributes
    ----------
    finals : tuple of Figure
        Every species at the end (its own unit), the volume (L), each amount fed, and
        titer and product mass if the objective names a product.
    objective : Figure or None
        The objective's value at the end of the run, in its own sense (not negated).
    objective_internal : float or None
        The same in internal units (what the optimizer compares).
    """

    finals: tuple
    objective: Figure | None
    objective_internal: float | None

    def get(self, label: str) -> Figure:
        return next(f for f in self.finals if f.label == label)


@functools.lru_cache(maxsize=64)
def extensive_unit(unit: str) -> str:
    """Unit of (a concentration in ``unit``) times litres: g/L -> g, mmol/L -> mmol
    (cached: a Monte Carlo asks for the same few units for every sample)."""
    dims = (UREG.Quantity(1, unit) * UREG.Quantity(1, "L")).dimensionality
    if dims == UREG.Quantity(1, "g").dimensionality:
        return "g"
    if dims == UREG.Quantity(1, "mmol").dimensionality:
        return "mmol"
    return ""


def objective_label(model: Model) -> tuple[str, str]:
    """(label, unit) of the objective."""
    obj = model.problem.objective
    if obj is None:
        return "", ""
    p = model.problem.species_by_name(obj.product) if obj.product else None
    label, unit = {
        "titer": (f"titer of {obj.product}", p.unit if p else ""),
        "product_mass": (f"mass of {obj.product}", extensive_unit(p.unit) if p else ""),
        "productivity": (f"productivity of {obj.product} (per h of run + turnaround)", f"{p.unit}/h" if p else ""),
        "yield": (f"yield of {obj.product} on fed {obj.substrate}", ""),
        "expression": (f"{obj.expression.text}" if obj.expression else "", ""),
    }[obj.quantity]
    if obj.quantity == "yield":
        unit = _yield_unit(model.problem, obj)
    elif obj.quantity == "expression":
        unit = _expression_unit(model.problem, obj)
    if obj.integral is not None:
        label += f" + integral of {obj.integral.text}"
        unit = "" if obj.quantity != "expression" else unit
    return f"{obj.sense} {label}", unit


def _yield_unit(problem, obj) -> str:
    """Product formed per substrate fed: 'g/g' for two mass concentrations (a unit
    for people; the value is the same ratio), else '' (internal units)."""
    p, s = problem.species_by_name(obj.product), problem.species_by_name(obj.substrate)
    up, us = extensive_unit(p.unit), extensive_unit(s.unit)
    return f"{up}/{us}" if up and us else ""


def _expression_unit(problem, obj) -> str:
    """The unit of an objective expression, from the dimension inference ('' if it
    cannot tell: the value is then in internal units)."""
    from .dimensions import Inference, unit_for

    if obj.expression is None:
        return ""
    t = Inference(problem).infer(obj.expression, ("objective", "expression"))
    return "" if t.dims is None else unit_for(t.dims)


def outcome_of(model: Model, traj: Trajectory, tf: float) -> Outcome:
    """The :class:`Outcome` of a trajectory ending at ``tf`` (h)."""
    p = model.problem
    xf = traj.final
    finals = []
    for s in p.species:
        finals.append(Figure(s.name, float(xf[model.index(s.name)]) * factor_to(s.unit), s.unit))
    V = float(xf[model.index("V")])
    finals.append(Figure("V", V * factor_to(p.vessel.unit), p.vessel.unit))
    for name in model.state_names:
        if name.startswith("fed_"):
            s = p.species_by_name(name[4:])
            unit = extensive_unit(s.unit) or ""
            finals.append(Figure(f"{s.name} fed", float(xf[model.index(name)]) * (factor_to(unit) if unit else 1.0), unit))
    obj = p.objective
    if obj is not None and obj.product:
        s = p.species_by_name(obj.product)
        finals.append(Figure("titer", float(xf[model.index(s.name)]) * factor_to(s.unit), s.unit))
        unit = extensive_unit(s.unit)
        finals.append(Figure("product mass", float(xf[model.index(s.name)]) * V * (factor_to(unit) if unit else 1.0), unit))
    objective = internal = None
    if obj is not None:
        # with the run's own constants and initial state (a scenario's, not always the file's)
        internal = float(model.end_value(np.asarray(xf), tf, traj.u[-1], p=traj.constants, x0=traj.x[0]))
        label, unit = objective_label(model)
        objective = Figure(label, internal * (factor_to(unit) if unit else 1.0), unit)
    return Outcome(tuple(finals), objective, internal)
