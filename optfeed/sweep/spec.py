"""Sweep files: a base problem (or several) and the values to vary, expanded into cases.

A sweep file (YAML)::

    problems: fast_microbe.yaml        # a file, a list of files, or a glob; relative
                                       # to the sweep file
    job: optimize                      # or: check (then give schedule:)
    schedule: plan.csv                 # for check
    time_limit: 20 min                 # per case
    grid:                              # Cartesian product of every entry
      vessel.oxygen.transfer_max: [100 mmol/L/h, 150 mmol/L/h]
      parameters.mu_max: {linspace: [0.4, 0.8, 5], unit: 1/h}
    zip:                               # varied together, equal lengths
      feeds.glucose.max_rate: [1 L/h, 2 L/h]
      vessel.working_volume: [60 L, 80 L]
    sample:                            # random or Latin-hypercube samples, seeded
      method: latin_hypercube          # or: random
      count: 20
      seed: 1
      ranges:
        parameters.K_s: {min: 0.01, max: 0.1, unit: g/L}

Value lists can also be ``{range: [start, stop, step], unit: ...}`` (stop excluded)
or ``{linspace: [start, stop, count], unit: ...}``. The cases are the product of
(problems) x (grid) x (zip) x (samples); each section is optional. A dotted path
must name a value that exists in the problem file (list items by index:
``limits.0.max``) or a key it leaves at its default (``solver.starts``); anything
else is bad input, reported before any case starts (see
:mod:`optfeed.problem.dotted`, shared with ``--set``).
"""

from __future__ import annotations

import copy
import glob
import hashlib
import itertools
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError, Issue
from ..problem import problem_from_data
from ..problem.dotted import PathError, set_path
from ..problem.yamlio import read_text, read_yaml
from ..provenance import problem_digest
from ..units import parse_quantity, to_internal

JOBS = ("optimize", "check")
_KEYS = {"problems", "job", "schedule", "time_limit", "grid", "zip", "sample", "description", "name"}


@dataclass(frozen=True)
class Case:
    """One variant to run.

    Attributes
    ----------
    key : str
        Identity of the case: a hash of the resolved problem, the job and the
        schedule's text. A case with the same key is never computed twice.
    label : str
        Short text for people: problem name and the values that differ.
    values : dict
        Dotted path -> value as written (or sampled), plus 'problem' (file name).
    data : dict
        The problem file's data with the values applied (picklable, plain).
    source : str
        The problem file it came from.
    """

    key: str
    label: str
    values: dict
    data: dict
    source: str


@dataclass(frozen=True)
class Sweep:
    """A checked sweep: its cases and how to run them."""

    name: str
    source: str
    job: str
    schedule_path: str | None
    schedule_text: str | None
    time_limit: float  # s
    cases: tuple
    varied: tuple  # dotted paths that vary, in file order
    grid_paths: tuple  # the grid's paths (for heat maps)


def load_sweep(path) -> Sweep:
    """Read and check a sweep file and expand it into cases (all resolved and checked).

    Raises
    ------
    InputError
        Naming the sweep file (or the problem file), the line and the key.
    """
    path = str(path)
    data, lines = read_yaml(path)
    base = Path(path).parent

    def fail(loc, msg):
        raise InputError.one(path, lines.get(loc), ".".join(map(str, loc)), msg)

    if not isinstance(data, dict):
        fail((), "expected a mapping with 'problems' and the values to vary")
    for k in data:
        if k not in _KEYS:
            fail((k,), f"unknown key; expected one of: {', '.join(sorted(_KEYS))}")
    if "problems" not in data:
        fail((), "'problems' is missing: name the base problem file(s)")
    files = _problem_files(data["problems"], base, fail)
    job = data.get("job", "optimize")
    if job not in JOBS:
        fail(("job",), f"expected one of {', '.join(JOBS)}, got {job!r}")
    schedule_path = schedule_text = None
    if job == "check":
        if "schedule" not in data:
            fail(("job",), "job 'check' needs a schedule file under 'schedule'")
        schedule_path = str((base / str(data["schedule"])).resolve())
        schedule_text = read_text(schedule_path)
    elif "schedule" in data:
        fail(("schedule",), "a schedule is only used with job: check")
    if isinstance(data.get("time_limit"), (int, float)):
        fail(("time_limit",), "give the time limit with its unit, e.g. '20 min'")
    try:
        limit = to_internal(parse_quantity(data.get("time_limit", "30 min"), "time")) * 3600.0
    except ValueError as exc:
        fail(("time_limit",), str(exc))
    if limit <= 0:
        fail(("time_limit",), "must be above zero")

    axes = []  # list of lists of dicts path -> value
    grid_paths = ()
    if "grid" in data:
        grid = _mapping(data["grid"], ("grid",), fail)
        grid_paths = tuple(grid)
        lists = [[(p, v) for v in _values(grid[p], ("grid", p), fail)] for p in grid]
        axes.append([dict(combo) for combo in itertools.product(*lists)])
    if "zip" in data:
        z = _mapping(data["zip"], ("zip",), fail)
        lists = {p: _values(z[p], ("zip", p), fail) for p in z}
        lengths = {len(v) for v in lists.values()}
        if len(lengths) > 1:
            fail(("zip",), f"every list under 'zip' needs the same length, got {sorted(lengths)}")
        axes.append([dict(zip(lists, combo)) for combo in zip(*lists.values())])
    if "sample" in data:
        axes.append(_samples(data["sample"], fail))
    varied = tuple(dict.fromkeys(p for axis in axes for combo in axis[:1] for p in combo))

    cases, seen = [], set()
    for file in files:
        base_data, base_lines = read_yaml(file)
        for combo in itertools.product(*axes) if axes else [()]:
            values = {}
            for part in combo:
                values.update(part)
            case_data = copy.deepcopy(base_data)
            for dotted, value in values.items():
                _set_path(case_data, dotted, value, path, lines, file)
            try:
                problem = problem_from_data(case_data, file, base_lines)
            except InputError as exc:
                where = ", ".join(f"{k} = {v}" for k, v in values.items())
                raise InputError([Issue(i.file, i.line, i.key, f"{i.message} (in the case {where})")
                                  for i in exc.issues]) from None
            if job == "check":
                _check_schedule(schedule_path, problem)
            key = _case_key(problem, job, schedule_text)
            if key in seen:
                continue
            seen.add(key)
            label = Path(file).stem + "".join(f" {k.split('.')[-1]}={_short(v)}" for k, v in values.items())
            cases.append(Case(key, label, {"problem": Path(file).name, **values}, case_data, file))
    return Sweep(
        name=str(data.get("name") or Path(path).stem), source=path, job=job, schedule_path=schedule_path,
        schedule_text=schedule_text, time_limit=float(limit), cases=tuple(cases), varied=varied,
        grid_paths=grid_paths,
    )


def _check_schedule(schedule_path, problem) -> None:
    from ..check import run_length
    from ..schedule import load_schedule

    load_schedule(schedule_path, [f.name for f in problem.feeds], run_length(problem))


def _case_key(problem, job, schedule_text) -> str:
    h = hashlib.sha256()
    h.update(problem_digest(problem).encode())
    h.update(job.encode())
    h.update((schedule_text or "").encode())
    return h.hexdigest()[:20]


def _short(v) -> str:
    from .outputs import number

    n, unit = number(v)
    if n == n:  # a number, possibly with a unit
        return f"{n:.4g}" + (f" {unit}" if unit else "")
    return str(v)


def _problem_files(spec, base: Path, fail) -> list[str]:
    items = spec if isinstance(spec, list) else [spec]
    files = []
    for i, item in enumerate(items):
        loc = ("problems", i) if isinstance(spec, list) else ("problems",)
        if not isinstance(item, str):
            fail(loc, "expected a file name or a glob")
        matches = sorted(glob.glob(str(base / item)))
        if not matches:
            fail(loc, f"no problem file matches {item!r} (relative to the sweep file)")
        files += [str(Path(m)) for m in matches]
    return list(dict.fromkeys(files))


def _mapping(value, loc, fail) -> dict:
    if not isinstance(value, dict) or not value:
        fail(loc, "expected a mapping of dotted path -> values")
    return value


def _values(spec, loc, fail) -> list:
    if isinstance(spec, list):
        if not spec:
            fail(loc, "the list of values is empty")
        return spec
    if isinstance(spec, dict):
        unit = spec.get("unit", "")
        extra = set(spec) - {"range", "linspace", "unit"}
        if extra or ("range" in spec) == ("linspace" in spec):
            fail(loc, "expected a list, {range: [start, stop, step], unit: ...} or "
                      "{linspace: [start, stop, count], unit: ...}")
        nums = spec.get("range") or spec.get("linspace")
        if not (isinstance(nums, list) and len(nums) == 3 and all(isinstance(n, (int, float)) for n in nums)):
            fail(loc, "range and linspace take three numbers")
        if "range" in spec:
            if nums[2] <= 0 or (nums[1] - nums[0]) / nums[2] > 100000:
                fail(loc, "range step must be above zero and give at most 100000 values")
            count = int(np.floor((nums[1] - nums[0]) / nums[2] - 1e-9)) + 1  # stop excluded
            values = [nums[0] + i * nums[2] for i in range(max(count, 0))]
        else:
            if int(nums[2]) != nums[2] or not 1 <= nums[2] <= 100000:
                fail(loc, "linspace count must be a whole number from 1 to 100000")
            values = list(np.linspace(nums[0], nums[1], int(nums[2])))
        if not values:
            fail(loc, "gives no values")
        return [f"{float(v)!r} {unit}".strip() if unit else float(v) for v in values]
    fail(loc, "expected a list of values or a range/linspace")


def _samples(spec, fail) -> list:
    loc = ("sample",)
    if not isinstance(spec, dict):
        fail(loc, "expected {method, count, seed, ranges}")
    extra = set(spec) - {"method", "count", "seed", "ranges"}
    if extra:
        fail(loc + (sorted(extra)[0],), "unknown key; expected method, count, seed, ranges")
    method = spec.get("method", "latin_hypercube")
    if method not in ("random", "latin_hypercube"):
        fail(loc + ("method",), f"expected random or latin_hypercube, got {method!r}")
    count, seed = spec.get("count"), spec.get("seed")
    if not isinstance(count, int) or not 1 <= count <= 100000:
        fail(loc + ("count",), "a whole number of samples from 1 to 100000 is needed")
    if not isinstance(seed, int):
        fail(loc + ("seed",), "a whole-number seed is needed, so the samples can be drawn again")
    ranges = _mapping(spec.get("ranges"), loc + ("ranges",), fail)
    rng = np.random.default_rng(seed)
    paths = list(ranges)
    if method == "random":
        u = rng.uniform(size=(count, len(paths)))
    else:  # one sample in each of `count` equal strata per dimension, strata shuffled
        u = (np.array([rng.permutation(count) for _ in paths]).T + rng.uniform(size=(count, len(paths)))) / count
    out = [dict() for _ in range(count)]
    for j, p in enumerate(paths):
        r = ranges[p]
        if not isinstance(r, dict) or set(r) - {"min", "max", "unit"} or "min" not in r or "max" not in r:
            fail(loc + ("ranges", p), "expected {min: ..., max: ..., unit: ...}")
        lo, hi = r["min"], r["max"]
        if not all(isinstance(v, (int, float)) for v in (lo, hi)) or lo > hi:
            fail(loc + ("ranges", p), "min and max must be numbers with min <= max")
        for i in range(count):
            v = lo + (hi - lo) * float(u[i, j])
            out[i][p] = f"{v!r} {r['unit']}" if r.get("unit") else v
    return out


def _set_path(data, dotted: str, value, sweep_file, sweep_lines, problem_file) -> None:
    try:
        set_path(data, dotted, value, problem_file)
    except PathError as exc:
        raise InputError.one(sweep_file, _line_of(sweep_lines, dotted), dotted, str(exc)) from None


def _line_of(lines, dotted):
    for section in ("grid", "zip"):
        line = lines.get((section, dotted))
        if line and lines.get((section,)) != line:
            return line
    return lines.get(("sample", "ranges", dotted))


def cases_json(values: dict) -> str:
    return json.dumps(values, sort_keys=True, default=str)
