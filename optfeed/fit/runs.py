"""Runs files: the past runs a model is calibrated against, and what to estimate.

A runs file (YAML) names the parameters to estimate, the measurement error of each
measured quantity, and the runs::

    estimate:                          # parameters of the problem file to fit
      mu_max: {min: 0.2 1/h, max: 1.2 1/h, start: 0.5 1/h}
      K_s: {min: 0.005 g/L, max: 2 g/L}          # start: the problem file's value
    errors:                            # per measured quantity (default below)
      X: {absolute: 0.05 g/L, relative: 5 %}   # a bare absolute error is in the data column's unit
    error_model: trusted               # or: scaled (default: trusted if 'errors' is given)
    starts: 4                          # NLP solves: the given start, then Latin-hypercube guesses
    seed: 1
    runs:
      - name: batch
        data: batch.csv                # time [h], then one column per measured quantity
        initial: {X: 0.1 g/L, S: 20 g/L, V: 2 L}   # values that differ from the problem file
      - name: fed
        data: fed.csv
        schedule: fed_schedule.csv     # the schedule actually applied (as check reads it)
        parameters: {Y_XS: 0.48}       # known values that differed in this run
        feeds: {glucose: {S: 300 g/L}} # feed compositions that differed
        sample_volume: 10 mL           # taken out at every sampling time (optional)
        end_time: 30 h                 # default: the last sampling time

A bare number (no unit) in ``estimate``, a run's ``parameters`` or ``feeds`` is in
the unit the problem file writes that value in (internal units where the problem
file writes a bare number too); an absolute error without a unit is in the unit of
that quantity's data column (or its species'). A written unit must have the right
dimension.

Data CSV: a header ``time [h], X [g/L], S [g/L], OUR [mmol/L/h]`` (any species, ``V``,
a named rate, ``OUR`` or ``heat_load``, each with its unit), empty cells for samples
not taken. A sample at time 0 is the run's start, not a measurement: give it under
``initial``. Every path lies in the runs file's folder or below it.

Measurement error: the standard deviation of a measured value y is
sqrt(absolute^2 + (relative * y)^2). Defaults: absolute 2 % of the largest value of
that quantity over all runs, relative 5 %.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..csvfile import header_cell, read_table, unit_factor
from ..errors import InputError, Issue
from ..model import Model, build_model, composition_name
from ..paths import inside
from ..problem.yamlio import key_text, read_yaml
from ..schedule import Schedule, load_schedule, piecewise_constant
from ..units import describe, factor_to, parse_quantity, to_internal, written_unit

DEFAULT_ABSOLUTE = 0.02  # of the largest measured value of the quantity
DEFAULT_RELATIVE = 0.05
DEFAULT_STARTS = 4  # as optimize's solver.starts; each start is one NLP solve
MAX_RUNS = 200
_KEYS = {"estimate", "errors", "error_model", "starts", "seed", "runs", "description"}
_RUN_KEYS = {"name", "data", "schedule", "initial", "parameters", "feeds", "sample_volume", "end_time"}


@dataclass(frozen=True)
class Estimate:
    """A parameter to estimate: bounds and start, internal units; ``unit`` as written."""

    name: str
    lower: float
    upper: float
    start: float
    unit: str


@dataclass(frozen=True)
class ErrorModel:
    """Standard deviation of a measured value y: sqrt(absolute^2 + (relative*y)^2),
    internal units; ``given`` says whether the runs file stated it."""

    absolute: float
    relative: float
    given: bool


@dataclass(frozen=True)
class Run:
    """One past run, in internal units.

    times : (n,) sampling times, h (above 0, increasing)
    values : dict quantity -> (n,) measured values, NaN where not taken
    units : dict quantity -> unit written in the data file
    x0 : initial state, in the layout of the fit's model (:func:`fit_model`)
    constants : the model's constant vector for this run
    schedule : the applied schedule (pumps off for a batch)
    sample_volume : L taken out at each sampling time
    end_time : h
    """

    name: str
    data_file: str
    times: np.ndarray
    values: dict
    units: dict
    x0: np.ndarray
    constants: np.ndarray
    schedule: Schedule
    sample_volume: float
    end_time: float


@dataclass(frozen=True)
class Runs:
    """A checked runs file."""

    source: str
    estimates: tuple
    errors: dict  # quantity -> ErrorModel
    trusted: bool
    starts: int
    seed: int
    runs: tuple
    quantities: tuple  # every measured quantity, in first-seen order
    data: dict = field(repr=False, default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(sum(np.isfinite(v).sum() for r in self.runs for v in r.values.values()))


def measurable(model: Model) -> dict:
    """Quantities a data column may name -> their internal dimension text source:
    species (their unit), 'V', named rates, OUR and heat_load."""
    p = model.problem
    out = {s.name: ("species", s.unit) for s in p.species}
    out["V"] = ("volume", p.vessel.unit)
    for name in model.values:
        if name not in ("F_total",):
            out.setdefault(name, ("value", None))
    return out


def require_one_phase(problem) -> None:
    """Bad input: a fit models every run as one phase with no additions (its NLP and
    its re-simulations know neither a phase's own model nor a bolus)."""
    for key in ("phases", "additions"):
        if getattr(problem, key):
            try:
                line = read_yaml(problem.source)[1].own((key,))
            except (InputError, OSError):
                line = None
            raise InputError.one(problem.source, line, key,
                                 f"optfeed fit models each run as one phase without additions; the problem's "
                                 f"'{key}' would be left out of the fit: fit a problem file without them")


def fit_model(problem) -> Model:
    """The model a fit works with: the problem's, without the objective's integral
    state J_int. A fit never reads the objective, and an integral it cannot follow
    (a pole where a substrate passes some value) must not stop it: with J_int in its
    re-simulations such a fit failed at every guess."""
    return build_model(problem, integral=False)


def load_runs(path, problem, model: Model | None = None) -> Runs:
    """Read and check a runs file against ``problem`` and its fit model (``model``,
    default :func:`fit_model`'s, whose layout the runs' initial states take).

    Raises
    ------
    InputError
        Naming the runs file (or a data or schedule file), the line and the key.
    ValueError
        Where ``model`` holds the objective's integral state (a model for optimize,
        not the fit's).
    """
    require_one_phase(problem)
    if model is None:
        model = fit_model(problem)
    elif "J_int" in model.state_names:
        raise ValueError("load_runs needs the fit's model, fit_model(problem): this one holds the "
                         "objective's integral state J_int")
    path = str(path)
    data, lines = read_yaml(path)
    base = Path(path).parent
    issues: list[Issue] = []

    def fail(loc, message):
        issues.append(Issue(path, lines.get(loc), key_text(loc), message))

    def stop():
        if issues:
            raise InputError(sorted(issues, key=lambda i: i.line or 0))

    if not isinstance(data, dict):
        raise InputError.one(path, lines.get(()), "", "expected a mapping with 'estimate' and 'runs'")
    for k in data:
        if k not in _KEYS:
            close = difflib.get_close_matches(str(k), sorted(_KEYS), n=1)
            fail((k,), "unknown key" + (f"; did you mean {close[0]!r}?" if close else
                                        f"; expected one of: {', '.join(sorted(_KEYS))}"))
    for k in ("estimate", "runs"):
        if k not in data:
            fail((), f"'{k}' is missing")
    stop()
    estimates = _estimates(data["estimate"], problem, fail)
    starts, seed = data.get("starts", DEFAULT_STARTS), data.get("seed", 1)
    if isinstance(starts, bool) or not isinstance(starts, int) or not 1 <= starts <= 64:
        fail(("starts",), f"a whole number of starts from 1 to 64 is needed, got {starts!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        fail(("seed",), f"a whole, non-negative seed is needed, got {seed!r}")
    runs_in = data["runs"]
    if not isinstance(runs_in, list) or not runs_in:
        fail(("runs",), "expected a list of runs (at least one)")
    elif len(runs_in) > MAX_RUNS:
        fail(("runs",), f"{len(runs_in)} runs; at most {MAX_RUNS}")
    stop()
    runs = []
    names = set()
    for i, r in enumerate(runs_in):
        run = _run(r, i, base, path, lines, problem, model, fail, issues.append)
        if run is not None:
            if run.name in names:
                fail(("runs", i, "name"), f"run name {run.name!r} is used twice")
            names.add(run.name)
            runs.append(run)
    stop()
    quantities = tuple(dict.fromkeys(q for r in runs for q in r.values))
    errors = _errors(data.get("errors", {}), quantities, runs, problem, fail)
    model_word = data.get("error_model", "trusted" if "errors" in data else "scaled")
    if model_word not in ("trusted", "scaled"):
        fail(("error_model",), f"expected 'trusted' or 'scaled', got {model_word!r}")
    n = sum(int(np.isfinite(v).sum()) for r in runs for v in r.values.values())
    if estimates and n <= len(estimates):
        fail(("runs",), f"{n} measured value(s) for {len(estimates)} parameter(s) to estimate: a fit needs "
                        "more measurements than parameters")
    stop()
    return Runs(path, tuple(estimates), errors, model_word == "trusted", starts, seed, tuple(runs), quantities,
                data)


def _estimates(spec, problem, fail) -> list[Estimate]:
    if not isinstance(spec, dict) or not spec:
        fail(("estimate",), "expected a mapping of parameter name -> {min, max, start}")
        return []
    out = []
    for name, b in spec.items():
        loc = ("estimate", name)
        if name not in problem.parameters:
            close = difflib.get_close_matches(str(name), list(problem.parameters), n=3)
            fail(loc, f"{name!r} is not a parameter of {problem.source}" +
                 (f"; did you mean {', '.join(map(repr, close))}?" if close else ""))
            continue
        if not isinstance(b, dict) or set(b) - {"min", "max", "start"} or not {"min", "max"} <= set(b):
            fail(loc, "expected {min: ..., max: ..., start: ...} (start optional)")
            continue
        unit = problem.parameter_units.get(name, "")
        got = {}
        for k in ("min", "max", "start"):
            if k not in b:
                continue
            try:
                got[k] = value_in(b[k], unit, name)
            except ValueError as exc:
                fail(loc + (k,), str(exc))
        if "min" in got and "max" in got:
            if got["min"] >= got["max"]:
                fail(loc, f"min {b['min']!r} is not below max {b['max']!r}")
                continue
            start = got.get("start", problem.parameters[name])
            shown = unit or written_unit(b["min"], "any")
            if not got["min"] <= start <= got["max"]:
                f = factor_to(shown) if shown else 1.0
                fail(loc + ("start",), f"the start value ({start * f:g} {shown or 'internal units'}) lies outside "
                     f"min..max ({got['min'] * f:g} .. {got['max'] * f:g})"
                     + ("" if "start" in got else " (the problem file's value is the default start)"))
                continue
            out.append(Estimate(name, got["min"], got["max"], start, shown))
    return out


def _run(r, i, base, path, lines, problem, model, fail, keep) -> Run | None:
    """One run, checked; None after recording its issues. ``fail(loc, message)``
    records an issue at the runs file; ``keep(issue)`` one found inside a data or
    schedule file, which names that file's own line and cell."""
    loc = ("runs", i)

    def passed_on(exc, key, text):
        """The issues of a file the run names: at their own line of that file, or
        (the file itself at fault: missing, empty, binary) at the runs file's key."""
        for issue in exc.issues:
            if issue.line is not None and issue.file != path:
                keep(issue)
            else:
                fail(loc + (key,), issue.message if issue.file == path else f"{text}: {issue.message}")

    if not isinstance(r, dict):
        fail(loc, "expected a mapping with 'data' (and name, schedule, initial, ...)")
        return None
    for k in r:
        if k not in _RUN_KEYS:
            close = difflib.get_close_matches(str(k), sorted(_RUN_KEYS), n=1)
            fail(loc + (k,), "unknown key" + (f"; did you mean {close[0]!r}?" if close else
                                              f"; expected one of: {', '.join(sorted(_RUN_KEYS))}"))
    if "data" not in r:
        fail(loc, "'data' is missing: name the run's data file (CSV)")
        return None
    name = str(r.get("name", f"run {i + 1}"))
    try:
        data_file = inside(r["data"], base, path, lines.get(loc + ("data",)), key_text(loc + ("data",)), "data file")
    except InputError as exc:
        for issue in exc.issues:
            fail(loc + ("data",), issue.message)
        return None
    x0 = model.x0.copy()
    for sname, value in (r.get("initial") or {}).items():
        kloc = loc + ("initial", sname)
        if sname not in model.state_names or sname.startswith("fed_") or sname == "J_int":
            fail(kloc, f"{sname!r} is not a species of the problem (or V)")
            continue
        kind = "volume" if sname == "V" else "amount"
        try:
            q = parse_quantity(value, kind)
            v = to_internal(q)
        except ValueError as exc:
            fail(kloc, str(exc))
            continue
        if sname != "V":
            unit = problem.species_by_name(sname).unit
            if written_unit(value, kind) and q.dimensionality != parse_quantity(f"1 {unit}", "amount").dimensionality:
                fail(kloc, f"{value!r} has dimension {describe(q.dimensionality)}, but {sname!r} is in {unit}")
                continue
        if v < 0 or (sname == "V" and v <= 0):
            fail(kloc, f"initial value {value!r} must be {'above zero' if sname == 'V' else 'zero or more'}")
            continue
        x0[model.index(sname)] = v
    constants = model.p0.copy()
    for pname, value in (r.get("parameters") or {}).items():
        kloc = loc + ("parameters", pname)
        if pname not in problem.parameters:
            fail(kloc, f"{pname!r} is not a parameter of the problem")
            continue
        try:
            constants[model.constant_index(pname)] = value_in(value, problem.parameter_units.get(pname, ""), pname)
        except ValueError as exc:
            fail(kloc, str(exc))
    for fname, comp in (r.get("feeds") or {}).items():
        kloc = loc + ("feeds", fname)
        if fname not in model.feed_names:
            fail(kloc, f"{fname!r} is not a feed of the problem")
            continue
        if not isinstance(comp, dict):
            fail(kloc, "expected {species: concentration}")
            continue
        for sname, value in comp.items():
            cname = composition_name(fname, sname)
            if cname not in model.constant_names:
                fail(kloc + (sname,), f"feed {fname!r} carries no {sname!r} in the problem file")
                continue
            try:
                constants[model.constant_index(cname)] = value_in(value, problem.species_by_name(sname).unit, sname)
            except ValueError as exc:
                fail(kloc + (sname,), str(exc))
    sample_volume = 0.0
    if "sample_volume" in r:
        try:
            sample_volume = to_internal(parse_quantity(r["sample_volume"], "volume"))
            if sample_volume < 0:
                raise ValueError(f"a sample volume cannot be negative, got {r['sample_volume']!r}")
        except ValueError as exc:
            fail(loc + ("sample_volume",), str(exc))
    end_time = None
    if "end_time" in r:
        try:
            end_time = to_internal(parse_quantity(r["end_time"], "time"))
            if end_time <= 0:
                raise ValueError("the run's end time must be above zero")
        except ValueError as exc:
            fail(loc + ("end_time",), str(exc))
    try:
        times, values, units = _read_data(data_file, model, problem)
    except InputError as exc:
        passed_on(exc, "data", r["data"])
        return None
    if end_time is None:
        end_time = float(times[-1])
    elif times[-1] > end_time * (1 + 1e-12):
        fail(loc + ("end_time",), f"the data file has samples up to {times[-1]:g} h, after the run's end "
                                  f"({end_time:g} h)")
        return None
    if sample_volume * len(times) >= x0[model.index("V")]:
        fail(loc + ("sample_volume",), "the samples would take out the whole broth")
        return None
    schedule = None
    if r.get("schedule") is not None:
        try:
            sfile = inside(r["schedule"], base, path, lines.get(loc + ("schedule",)),
                           key_text(loc + ("schedule",)), "schedule")
            schedule = load_schedule(sfile, model.feed_names, end_time)
        except InputError as exc:
            passed_on(exc, "schedule", r["schedule"])
            return None
    else:
        schedule = piecewise_constant(model.feed_names, [0.0], np.zeros((1, model.nu)), "pumps off (a batch run)")
    return Run(name, str(data_file), times, values, units, x0, constants, schedule, sample_volume, end_time)


def _read_data(path, model, problem):
    """(times, {quantity: values with NaN}, {quantity: unit}) of a run's data file."""
    table = read_table(path)
    header_line, header = table.header
    known = measurable(model)
    issues, columns = [], []
    for c, cell in enumerate(header):
        got = header_cell(path, header_line, cell, c, "X [g/L]")
        if isinstance(got, Issue):
            issues.append(got)
            continue
        name, unit = got
        if c == 0:
            if name.lower() != "time":
                issues.append(Issue(str(path), header_line, cell, "the first column must be 'time [h]' (any time unit)"))
                continue
            got = unit_factor(path, header_line, cell, unit, "time")
        else:
            if name not in known:
                close = difflib.get_close_matches(name, list(known), n=3)
                issues.append(Issue(str(path), header_line, cell, f"{name!r} is not a species, V, a named rate, OUR or "
                                    "heat_load of the problem" + (f"; did you mean {', '.join(map(repr, close))}?"
                                                                 if close else "")))
                continue
            what, expected = known[name]
            got = unit_factor(path, header_line, cell, unit, "volume" if what == "volume" else "any")
            if not isinstance(got, Issue) and expected:
                want = parse_quantity(f"1 {expected}", "any").dimensionality
                if got[1].dimensionality != want:
                    got = Issue(str(path), header_line, cell, f"unit {unit!r} has dimension "
                                f"{describe(got[1].dimensionality)}, but {name!r} is in {expected}")
        if isinstance(got, Issue):
            issues.append(got)
            continue
        columns.append((name, unit, got[0], cell))
    if issues:
        raise InputError(issues)
    names = [c[0] for c in columns[1:]]
    if len(set(names)) != len(names):
        raise InputError.one(path, header_line, "", "a quantity has two columns")
    if not names:
        raise InputError.one(path, header_line, "", "no measured quantity: add a column such as 'X [g/L]'")
    table.check_width()
    times, values = [], {n: [] for n in names}
    for lineno, cells in table.rows[1:]:
        t = table.number(lineno, columns[0][3], cells[0]) * columns[0][2]
        if times and t <= times[-1]:
            raise InputError.one(path, lineno, columns[0][3], f"time {cells[0]} does not come after the row before")
        if t < 0:
            raise InputError.one(path, lineno, columns[0][3], f"time {cells[0]} is negative")
        row = {}
        for (name, _, factor, cell), text in zip(columns[1:], cells[1:]):
            v = table.number(lineno, cell, text, empty_ok=True)
            row[name] = math.nan if v is None else v * factor
        if t == 0:
            continue  # the run's start: initial values, not a measurement
        times.append(t)
        for n in names:
            values[n].append(row[n])
    if not times:
        raise InputError.one(path, None, "", "no sample after time 0")
    return np.array(times), {n: np.array(v) for n, v in values.items()}, {c[0]: c[1] for c in columns[1:]}


def quantity_unit(q, runs, problem) -> str | None:
    """The unit a quantity is written in: its data columns' unit where every run that
    measures it writes the same, else its species' (or the vessel's, for V); None
    where neither tells (a named rate written in several units)."""
    units = {r.units[q] for r in runs if q in r.units}
    if len(units) == 1:
        return units.pop()
    if q == "V":
        return problem.vessel.unit
    if any(s.name == q for s in problem.species):
        return problem.species_by_name(q).unit
    return None


def _errors(spec, quantities, runs, problem, fail) -> dict:
    if not isinstance(spec, dict):
        fail(("errors",), "expected a mapping of quantity -> {absolute, relative}")
        return {}
    out = {}
    for name in spec:
        if name not in quantities:
            fail(("errors", name), f"{name!r} is not measured in any run (measured: {', '.join(quantities)})")
    for q in quantities:
        largest = max((float(np.nanmax(np.abs(r.values[q]))) for r in runs if q in r.values
                       and np.isfinite(r.values[q]).any()), default=0.0)
        e = spec.get(q)
        if e is None:
            out[q] = ErrorModel(DEFAULT_ABSOLUTE * largest or 1e-12, DEFAULT_RELATIVE, False)
            continue
        loc = ("errors", q)
        if not isinstance(e, dict) or set(e) - {"absolute", "relative"} or not e:
            fail(loc, "expected {absolute: ..., relative: ...}")
            continue
        unit = quantity_unit(q, runs, problem)
        absolute = relative = 0.0
        try:
            if "absolute" in e:
                absolute = _absolute(e["absolute"], q, unit)
        except ValueError as exc:
            fail(loc + ("absolute",), str(exc))
            continue
        try:
            if "relative" in e:
                relative = to_internal(parse_quantity(e["relative"], "fraction"))
        except ValueError as exc:
            fail(loc + ("relative",), str(exc))
            continue
        if absolute < 0 or relative < 0 or absolute + relative <= 0:
            fail(loc, "absolute and relative errors cannot be negative, and not both zero")
            continue
        out[q] = ErrorModel(absolute, relative, True)
    return out


def _absolute(value, q, unit) -> float:
    """An absolute measurement error in internal units: a bare number is in the
    quantity's unit (``unit``); a written unit must have its dimension."""
    if unit is None and not written_unit(value, "any"):
        parse_quantity(value, "any")  # the message for a yes/no or a text that is no number
        raise ValueError(f"give the absolute error of {q!r} with its unit (the runs write {q!r} in "
                         "different units, so a bare number is ambiguous)")
    return value_in(value, unit or "", q)


def value_in(value, unit: str, name: str) -> float:
    """``value`` in internal units, where a bare number is in ``unit`` (the unit the
    problem file, or the data, writes ``name`` in; '' for internal units) and a
    written unit must have the dimension of ``unit``.

    Raises ValueError with a message for people."""
    q = parse_quantity(value, "any")
    if not unit:
        return to_internal(q)
    ref = parse_quantity(f"1 {unit}", "any")
    if not written_unit(value, "any"):
        return to_internal(q.magnitude * ref)
    if q.dimensionality != ref.dimensionality:
        raise ValueError(f"{value!r} has dimension {describe(q.dimensionality)}, but {name!r} is in {unit} "
                         f"({describe(ref.dimensionality)})")
    return to_internal(q)
