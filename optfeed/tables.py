"""Tables of a run for people: plain columns in display units, units in the column names.

:func:`trajectory_columns` is what ``result.trajectory_table()`` returns and what
``trajectory.csv`` holds: time, every species in the unit it was written in, the
volume, the amounts fed, the pump rates, and every named rate (``mu``, ``OUR``,
``heat_load``...) in a unit found by :mod:`optfeed.dimensions`. Times increase
strictly: the simulation restarts at every pump change and so samples that instant
twice (end of one segment, start of the next); the table keeps the second sample,
so at a pump change it shows the new rate, as a schedule does.
"""

from __future__ import annotations

import numpy as np

from .dimensions import Inference, dims_of, unit_for
from .outcome import extensive_unit
from .phases import named_values
from .units import factor_to

UNKNOWN = "internal: g, L, h, mmol"  # a named rate whose unit cannot be inferred


def column(name: str, unit: str) -> str:
    """'X [g/L]'; a dimensionless value says so: 'f [dimensionless]'."""
    return f"{name} [{unit or 'dimensionless'}]"


def _factor(unit: str) -> float:
    return 1.0 if unit in ("", UNKNOWN) else factor_to(unit)


def state_units(model) -> dict:
    """State name -> display unit: species as written, V as the vessel's, fed amounts
    as the extensive unit of their species, the objective's integral term as found."""
    p = model.problem
    units = {s.name: s.unit for s in p.species}
    units["V"] = p.vessel.unit
    for name in model.state_names:
        if name.startswith("fed_"):
            units[name] = extensive_unit(p.species_by_name(name[4:]).unit) or UNKNOWN
        elif name == "J_int":
            units[name] = _integral_unit(p)
    return units


def _integral_unit(problem) -> str:
    obj = problem.objective
    if obj is None or obj.integral is None:
        return UNKNOWN
    t = Inference(problem).infer(obj.integral, ("objective", "integral"))
    return UNKNOWN if t.dims is None else unit_for(t.dims * dims_of("h"))


def _state_label(name: str) -> str:
    if name.startswith("fed_"):
        return f"{name[4:]} fed"
    return {"J_int": "objective integral"}.get(name, name)


def trajectory_columns(model, traj, unique: bool = True) -> dict:
    """Columns of a simulated run: ``{'time [h]': array, 'X [g/L]': array, ...}``.

    Parameters
    ----------
    model : Model
    traj : Trajectory
        As simulated (internal units, pump changes sampled twice).
    unique : bool
        One row per time (see the module docstring for pump changes); False keeps
        every sample, row for row with ``traj.t``.

    Returns
    -------
    dict of str -> numpy.ndarray
        Plain float columns of equal length.
    """
    p = model.problem
    keep = unique_times(traj.t) if unique else np.arange(len(traj.t))
    t, x, u = traj.t[keep], traj.x[keep], traj.u[keep]
    cols = {"time [h]": t}
    units = state_units(model)
    for i, name in enumerate(model.state_names):
        cols[column(_state_label(name), units[name])] = x[:, i] * _factor(units[name])
    for j, f in enumerate(p.feeds):
        cols[column(f.name, f.unit)] = u[:, j] * factor_to(f.unit)
    names = [n for n in model.values if n != "F_total"]
    if names:
        inf = Inference(p)
        fixed = {"OUR": "mmol/L/h", "heat_load": "W", "D": "1/h"}
        vals = named_values(model, traj, names, keep)
        for n, row in zip(names, vals):
            unit = fixed.get(n) or inf.unit_of_rate(n) or UNKNOWN
            cols[column(n, unit)] = row * _factor(unit)
    return cols


def points_columns(model, points) -> dict:
    """Columns of the NLP's collocation points (``result.points``) in display units."""
    p = model.problem
    cols = {"time [h]": np.asarray(points["t"])}
    units = state_units(model)
    for i, name in enumerate(model.state_names):
        cols[column(_state_label(name), units[name])] = np.asarray(points["x"])[:, i] * _factor(units[name])
    for j, f in enumerate(p.feeds):
        cols[column(f.name, f.unit)] = np.asarray(points["u"])[:, j] * factor_to(f.unit)
    return cols


TIME_TOL = 1e-12  # relative to max(1 h, |t|): samples closer than this share a time


def unique_times(t) -> np.ndarray:
    """Indices that keep, of samples at the same time (within :data:`TIME_TOL`; the
    end of one integrated piece and the start of the next may differ in the last
    bit), the last one."""
    t = np.asarray(t, dtype=float)
    if len(t) == 0:
        return np.arange(0)
    apart = np.abs(np.diff(t)) > TIME_TOL * np.maximum(1.0, np.abs(t[1:]))
    return np.nonzero(np.append(apart, True))[0]
