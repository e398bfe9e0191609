"""Phases and additions at run time: each phase's model and constants, and the jumps.

A problem without a ``phases`` section is one phase over the whole run. With one,
every phase shares the state vector of the problem's model (so a run's state passes
from one phase to the next unchanged) and differs in its right-hand side (rates it
replaces), its constants (values it changes) and the pumps' ranges.

Additions are state jumps ``x+ = jump(x-)`` at fixed times, in internal units (the
states are concentrations, the volume in L, the cumulative amounts fed):

* a sample of volume v: V -> V - v; concentrations unchanged;
* a bolus of volume v holding amounts m_i: V -> V + v; a species the feed dilutes
  -> (C V + m) / (V + v); its cumulative amount fed ``fed_<s>`` grows by m (a bolus
  counts as fed substrate for yields and caps).

Species with ``dilute: false`` (per-cell or extensive quantities) are left as they
are by both, and so are species whose balance is written in full (``derivatives``):
the tool cannot tell what they are; write such a quantity as a concentration if
samples or boluses should change it.
"""

from __future__ import annotations

import dataclasses

import casadi as ca
import numpy as np

from .model import Model, build_model
from .problem.spec import Addition, Phase, PhaseEnd, Problem


def phases_of(problem: Problem) -> tuple:
    """The run's phases: the file's, or one phase 'run' over the whole run."""
    return problem.phases or (Phase("run", PhaseEnd("run")),)


def phase_problem(problem: Problem, phase: Phase) -> Problem:
    """``problem`` with the rates and species rates that ``phase`` replaces.

    Its parameters are unchanged: a phase's values are constants
    (:func:`phase_constants`), so every phase's model has the same constants vector.
    """
    if not phase.rates:
        return problem
    rates = tuple((n, phase.rates.get(n, e)) for n, e in problem.rates)
    species = tuple(dataclasses.replace(s, rate=phase.rates[s.name]) if s.name in phase.rates else s
                    for s in problem.species)
    return dataclasses.replace(problem, rates=rates, species=species)


def _with_phase_bounds(problem: Problem) -> Problem:
    extra = tuple(b for ph in problem.phases for b in ph.bounds)
    return dataclasses.replace(problem, bounds=problem.bounds + extra) if extra else problem


def base_model(problem: Problem, fed: str = "all") -> Model:
    """The problem's own model (no phase's changes), with a ``fed_<s>`` state for
    every one that a phase's limits use too (``fed`` as in build_model)."""
    m = build_model(_with_phase_bounds(problem), fed=fed)
    m.problem = problem
    return m


def phase_models(problem: Problem, fed: str = "all") -> list[Model]:
    """One model per phase (the same object where a phase replaces no rate).

    ``fed`` as in :func:`optfeed.model.build_model`; a phase's own limits count as
    users of ``fed_<s>`` states.
    """
    return models_like(base_model(problem, fed))


def phase_constants(model: Model, phase: Phase, p):
    """The constants vector ``p`` (numeric, or CasADi) with ``phase``'s values in."""
    if not phase.parameters:
        return p
    if isinstance(p, (ca.MX, ca.SX)):
        entries = [p[i] for i in range(p.shape[0])]
        for name, value in phase.parameters.items():
            entries[model.constant_index(name)] = value
        return ca.vertcat(*entries)
    p = np.array(p, dtype=float, copy=True)
    for name, value in phase.parameters.items():
        p[..., model.constant_index(name)] = value
    return p


def jump(model: Model, addition: Addition, x, chosen: dict | None = None):
    """State right after ``addition`` from the state ``x`` right before it (numeric
    or CasADi; see the module docstring). ``chosen``: species -> amount (number or
    CasADi) for the amounts the addition leaves to optimize."""
    V_i = model.index("V")
    V = x[V_i]
    symbolic = isinstance(x, (ca.MX, ca.SX))
    entries = [x[i] for i in range(model.nx)]
    if addition.kind == "sample":
        entries[V_i] = V - addition.volume
    else:
        V_new = V + addition.volume
        amounts = {**addition.amounts, **(chosen or {})}
        for i, s in enumerate(model.problem.species):
            if s.dilute:
                entries[i] = (x[i] * V + amounts.get(s.name, 0.0)) / V_new
        for name, amount in amounts.items():
            key = f"fed_{name}"
            if key in model.state_names:
                k = model.index(key)
                entries[k] = x[k] + amount
        entries[V_i] = V_new
    return ca.vertcat(*entries) if symbolic else np.array([float(e) for e in entries])


def condition_function(model: Model, end: PhaseEnd) -> ca.Function:
    """(t, x, u, p) -> distance of a 'when' phase end from its level, above zero
    while the phase goes on and zero at its end: ``condition - level`` for a
    falling condition (``S < 0.5 g/L``), ``level - condition`` for a rising one."""
    value = model.expression(end.condition) - end.level
    return model.function_p("until", [value if end.falling else -value])


def models_like(model: Model) -> list[Model]:
    """One model per phase of ``model.problem`` with exactly ``model``'s states (the
    same ``fed_<s>`` states, however ``model`` was built); ``model`` itself where a
    phase replaces no rate."""
    problem = model.problem
    fed = [n[len("fed_"):] for n in model.state_names if n.startswith("fed_")]
    out = []
    for ph in phases_of(problem):
        if not ph.rates:
            out.append(model)
            continue
        m = build_model(phase_problem(problem, ph), fed=fed)
        m.problem = problem
        if m.state_names != model.state_names:  # cannot happen: rates do not change the states
            raise AssertionError("a phase changed the state vector")
        out.append(m)
    return out


def named_values(model: Model, traj, names, keep=None) -> np.ndarray:
    """Named quantities (``model.values``: rates, OUR, ...) at the samples ``keep``
    (indices; default all) of trajectory ``traj``, each sample with the model and
    constants of its phase: shape (len(names), len(keep)), internal units."""
    keep = np.arange(len(traj.t)) if keep is None else np.asarray(keep)
    t, x, u = traj.t[keep], traj.x[keep], traj.u[keep]
    models = traj.phase_models
    phase = None if traj.phase is None or not models else traj.phase[keep]
    out = np.empty((len(names), len(keep)))
    groups = [(model, traj.constants, np.ones(len(keep), dtype=bool))] if phase is None else \
        [(m, traj.phase_constants(k), phase == k) for k, m in enumerate(models)]
    for m, p, sel in groups:
        if not sel.any():
            continue
        fn = m.function("v", [ca.vertcat(*[m.values[n] for n in names])], p=p)
        n = int(sel.sum())
        out[:, sel] = np.array(fn.map(n)(t[sel][None, :], x[sel].T, u[sel].T)).reshape(len(names), n)
    return out


def guess_switches(problem: Problem) -> dict:
    """Phase name -> end time (h) to start from, for each phase that ``optimize``
    times (``until: {between: ...}``): its guess."""
    return {ph.name: ph.end.guess for ph in problem.phases if ph.end.kind == "between"}


def phase_limits(model: Model, phase: Phase) -> list:
    """The limits that ``phase`` adds (its ``limits``), in ``model``'s symbols, as
    :class:`optfeed.limits.Limit` (kind 'path', ``phase`` its name: judged over the
    phase's window only)."""
    from .limits import Limit, _state_index
    from .units import factor_to

    out = []
    for b in phase.bounds:
        expr = ca.SX(model.expression(b.expression))
        out.append(Limit(b.name, "path", expr, b.lower, b.upper, b.unit, factor_to(b.unit) if b.unit else 1.0,
                         False, b.key, _state_index(model, expr), bool(ca.depends_on(expr, model.u)), phase.name))
    return out


def decide(problem: Problem, amounts: dict | None = None) -> Problem:
    """``problem`` with every amount its additions leave to optimize written in:
    ``amounts`` maps an addition's index to {species: amount} (internal units);
    an amount not given takes the low end of its range (what the guesses are
    simulated with: adding the least keeps a start inside the limits)."""
    if all(a.decided for a in problem.additions):
        return problem
    out = []
    for j, a in enumerate(problem.additions):
        if a.decided:
            out.append(a)
            continue
        given = (amounts or {}).get(j, {})
        fixed = {s: float(given.get(s, lo)) for s, (lo, hi) in a.chosen.items()}
        out.append(dataclasses.replace(a, amounts={**a.amounts, **fixed}, chosen={}))
    return dataclasses.replace(problem, additions=tuple(out))


def require_decided(problem: Problem, job: str) -> None:
    """Bad input for a job that simulates (check, Monte Carlo) when an addition's
    amount is still a range for optimize to choose."""
    from .errors import InputError, Issue

    issues = [Issue(problem.source, a.line, f"{a.key}.amounts.{s}",
                    f"this amount is a range for optimize to choose; {job} needs a number: check the problem "
                    "optimize wrote with the amounts it chose (planned.yaml in its run folder), or write one here")
              for a in problem.additions for s in a.chosen]
    if issues:
        raise InputError(issues[:1])


def planned_data(problem: Problem, chosen: list) -> dict:
    """The problem file's data with the amounts optimize chose written in (for
    planned.yaml): each addition entry that left an amount to optimize becomes one
    entry per time (``at``), holding the amount chosen for that time, in the unit
    its range was written in. ``chosen`` is the record's list of
    {addition, time_h, species, amount}."""
    import copy

    from .units import factor_to, written_unit

    data = copy.deepcopy(problem.data)
    entries = data.get("additions") or []
    by_entry: dict = {}
    for c in chosen:
        i = int(c["addition"].split("[")[1].rstrip("]"))
        by_entry.setdefault(i, {}).setdefault(c["time_h"], {})[c["species"]] = c["amount"]
    out = []
    for i, entry in enumerate(entries):
        if i not in by_entry:
            out.append(entry)
            continue
        for t, amounts in sorted(by_entry[i].items()):
            new = {k: v for k, v in entry.items() if k not in ("at", "every", "start", "stop", "amounts")}
            new["amounts"] = {}
            for sp, value in (entry.get("amounts") or {}).items():
                if isinstance(value, dict):
                    unit = written_unit(value.get("max"), "any")
                    v = amounts[sp] * (factor_to(unit) if unit else 1.0)
                    new["amounts"][sp] = f"{v!r} {unit}".strip()  # every digit: checked as verified
                else:
                    new["amounts"][sp] = value
            new["at"] = f"{t:g} h"
            out.append(new)
    data["additions"] = out
    return data
