"""Sweep files: a base problem (or several) and the values to vary, expanded into cases.

A sweep file (YAML)::

    problems: fast_microbe.yaml        # a file, a list of files, or a glob; relative
                                       # to the sweep file, inside its folder
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
:mod:`optfeed.problem.dotted`, shared with ``--set``). The problem files and the
schedule must lie in the sweep file's folder or below it
(:func:`optfeed.paths.inside`); the cases are counted before any is built, and a
sweep of more than ``max_cases`` (default :data:`MAX_CASES`) is refused.
"""

from __future__ import annotations

import copy
import hashlib
import itertools
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError, Issue
from ..paths import glob_inside, inside, safe_folder_name, why_not_folder_name
from ..problem import problem_from_data
from ..problem.dotted import PathError, set_path
from ..problem.yamlio import key_text, read_text, read_yaml
from ..provenance import problem_digest
from ..units import parse_quantity, to_internal

JOBS = ("optimize", "check")
MAX_CASES = 10_000  # cases in one sweep unless the caller raises it (--max-cases)
MAX_AXIS = 100_000  # values on one axis (a range, linspace or sample count)
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


def load_sweep(path, max_cases: int | None = None) -> Sweep:
    """Read and check a sweep file and expand it into cases (all resolved and checked).

    Parameters
    ----------
    path : str or Path
        The sweep file. Problem files and the schedule it names must lie in its
        folder or below it.
    max_cases : int, optional
        Refuse a sweep of more cases than this (default :data:`MAX_CASES`). The
        cases are counted before any is built.

    Raises
    ------
    InputError
        Naming the sweep file (or the problem file), the line and the key.
    """
    path = str(path)
    max_cases = MAX_CASES if max_cases is None else max_cases
    data, lines = read_yaml(path)
    base = Path(path).parent

    def fail(loc, msg):
        raise InputError.one(path, lines.get(loc), ".".join(map(str, loc)), msg)

    if not isinstance(data, dict):
        fail((), "expected a mapping with 'problems' and the values to vary")
    for k in data:
        if k not in _KEYS:
            fail((k,), f"unknown key; expected one of: {', '.join(sorted(_KEYS))}")
    if "name" in data:
        why = why_not_folder_name(data["name"])
        if why:
            fail(("name",), why)
        name = data["name"]
    else:
        name = safe_folder_name(Path(path).stem)
    if "problems" not in data:
        fail((), "'problems' is missing: name the base problem file(s)")
    files = _problem_files(data["problems"], base, path, lines, fail)
    job = data.get("job", "optimize")
    if job not in JOBS:
        fail(("job",), f"expected one of {', '.join(JOBS)}, got {job!r}")
    schedule_path = schedule_text = None
    if job == "check":
        if "schedule" not in data:
            fail(("job",), "job 'check' needs a schedule file under 'schedule'")
        schedule_path, schedule_text = _schedule(data["schedule"], base, path, lines.get(("schedule",)))
    elif "schedule" in data:
        fail(("schedule",), "a schedule is only used with job: check")
    if _number(data.get("time_limit")):
        fail(("time_limit",), "give the time limit with its unit, e.g. '20 min'")
    try:
        limit = to_internal(parse_quantity(data.get("time_limit", "30 min"), "time")) * 3600.0
    except ValueError as exc:
        fail(("time_limit",), str(exc))
    if not 0 < limit < math.inf:
        fail(("time_limit",), "must be above zero and finite")

    # every axis is a list of values; the cases are their product: count first
    grid, grid_paths, zipped, sample_count = {}, (), {}, None
    if "grid" in data:
        g = _mapping(data["grid"], ("grid",), fail)
        grid_paths = tuple(g)
        grid = {p: _values(g[p], ("grid", p), fail) for p in g}
    if "zip" in data:
        z = _mapping(data["zip"], ("zip",), fail)
        zipped = {p: _values(z[p], ("zip", p), fail) for p in z}
        lengths = {len(v) for v in zipped.values()}
        if len(lengths) > 1:
            fail(("zip",), f"every list under 'zip' needs the same length, got {sorted(lengths)}")
    if "sample" in data:
        sample_count = _sample_count(data["sample"], fail)
    factors = [("problem file(s)", len(files))] + [(f"values of {p}", len(v)) for p, v in grid.items()]
    if zipped:
        factors.append(("zipped values", len(next(iter(zipped.values())))))
    if sample_count is not None:
        factors.append(("samples", sample_count))
    total = math.prod(n for _, n in factors)
    if total > max_cases:
        fail((), f"this sweep has {total:,} cases ({' x '.join(f'{n:,} {w}' for w, n in factors)}), more than "
                 f"the {max_cases:,} allowed; raise the cap (--max-cases {total}) if you mean it")

    axes = []  # list of lists of dicts path -> value
    if grid:
        axes.append([dict(combo) for combo in itertools.product(*[[(p, v) for v in vs] for p, vs in grid.items()])])
    if zipped:
        axes.append([dict(zip(zipped, combo)) for combo in zip(*zipped.values())])
    if sample_count is not None:
        axes.append(_samples(data["sample"], fail))
    varied = tuple(dict.fromkeys(p for axis in axes for combo in axis[:1] for p in combo))

    cases, seen, schedules_ok = [], set(), set()
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
                raise InputError([_case_issue(i, values, path, lines, file) for i in exc.issues]) from None
            if job == "check":
                _check_schedule(schedule_path, problem, schedules_ok)
            key = _case_key(problem, job, schedule_text)
            if key in seen:
                continue
            seen.add(key)
            label = Path(file).stem + "".join(f" {k.split('.')[-1]}={_short(v)}" for k, v in values.items())
            cases.append(Case(key, label, {"problem": Path(file).name, **values}, case_data, file))
    return Sweep(
        name=name, source=path, job=job, schedule_path=schedule_path,
        schedule_text=schedule_text, time_limit=float(limit), cases=tuple(cases), varied=varied,
        grid_paths=grid_paths,
    )


def _case_issue(issue, values, sweep_file, sweep_lines, problem_file) -> Issue:
    """An issue found in one case: at the sweep file's key when a swept value caused
    it, else at the problem file with the case named."""
    key = re.sub(r"\[(\d+)\]", r".\1", issue.key)
    for dotted, value in values.items():
        if key == dotted or key.startswith(dotted + "."):
            return Issue(sweep_file, _line_of(sweep_lines, dotted), dotted,
                         f"{issue.message} (the value {value!r} in {Path(problem_file).name})")
    where = ", ".join(f"{k} = {v}" for k, v in values.items())
    return Issue(issue.file, issue.line, issue.key, f"{issue.message} (in the case {where})" if where else issue.message)


def _schedule(text, base, sweep_file, line):
    """(path, text) of a check sweep's schedule; problems with the path itself are
    reported at the sweep file's 'schedule' key, never with the file's contents."""
    path = inside(text, base, sweep_file, line, "schedule", what="schedule file")
    try:
        return str(path), read_text(path)
    except InputError as exc:
        raise InputError.one(sweep_file, line, "schedule", f"{text}: {exc.issues[0].message}") from None


def _check_schedule(schedule_path, problem, done: set) -> None:
    from ..check import run_length
    from ..schedule import load_schedule

    feeds, tf = tuple(f.name for f in problem.feeds), run_length(problem)
    ends = tuple((ph.name, ph.end.kind, ph.end.lower, ph.end.upper) for ph in problem.phases)
    if (feeds, tf, ends) not in done:  # the same feeds, run length and phases need one look only
        load_schedule(schedule_path, list(feeds), tf, problem.phases)
        done.add((feeds, tf, ends))


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


def _problem_files(spec, base: Path, sweep_file, lines, fail) -> list[str]:
    if isinstance(spec, list) and not spec:
        fail(("problems",), "the list is empty: name at least one problem file")
    items = spec if isinstance(spec, list) else [spec]
    files = []
    for i, item in enumerate(items):
        loc = ("problems", i) if isinstance(spec, list) else ("problems",)
        files += [str(m) for m in glob_inside(item, base, sweep_file, lines.get(loc), key_text(loc),
                                              what="problem file")]
    return list(dict.fromkeys(files))


def _mapping(value, loc, fail) -> dict:
    if not isinstance(value, dict) or not value:
        fail(loc, "expected a mapping of dotted path -> values")
    return value


def _number(v) -> bool:
    """A finite number, and not a yes/no value (YAML's true is an int to Python)."""
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _unit(spec, loc, fail) -> str:
    unit = spec.get("unit", "")
    if not isinstance(unit, str):
        fail(loc + ("unit",), f"expected a unit as text, like '1/h', got {unit!r}")
    if unit:
        try:
            parse_quantity(f"1 {unit}", "any")
        except ValueError as exc:
            fail(loc + ("unit",), str(exc))
    return unit


def _values(spec, loc, fail) -> list:
    if isinstance(spec, list):
        if not spec:
            fail(loc, "the list of values is empty")
        for i, v in enumerate(spec):
            if isinstance(v, float) and not math.isfinite(v):
                fail(loc + (i,), f"value {v!r} is not a finite number")
            if v is None:
                fail(loc + (i,), "an empty value (null) cannot be swept")
        return spec
    if isinstance(spec, dict):
        extra = set(spec) - {"range", "linspace", "unit"}
        if extra or ("range" in spec) == ("linspace" in spec):
            fail(loc, "expected a list, {range: [start, stop, step], unit: ...} or "
                      "{linspace: [start, stop, count], unit: ...}")
        unit = _unit(spec, loc, fail)
        nums = spec.get("range") if "range" in spec else spec.get("linspace")
        if not (isinstance(nums, list) and len(nums) == 3 and all(_number(n) for n in nums)):
            fail(loc, "range and linspace take three finite numbers")
        if "range" in spec:
            if not nums[2] > 0 or (nums[1] - nums[0]) / nums[2] > MAX_AXIS:
                fail(loc, f"range step must be above zero and give at most {MAX_AXIS} values")
            count = int(np.floor((nums[1] - nums[0]) / nums[2] - 1e-9)) + 1  # stop excluded
            values = [nums[0] + i * nums[2] for i in range(max(count, 0))]
        else:
            if int(nums[2]) != nums[2] or not 1 <= nums[2] <= MAX_AXIS:
                fail(loc, f"linspace count must be a whole number from 1 to {MAX_AXIS}")
            values = list(np.linspace(nums[0], nums[1], int(nums[2])))
        if not values:
            fail(loc, "gives no values")
        return [f"{float(v)!r} {unit}".strip() if unit else float(v) for v in values]
    fail(loc, "expected a list of values or a range/linspace")


def _sample_count(spec, fail) -> int:
    """Check a 'sample' section (without drawing anything) and return its count."""
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
    if not _number(count) or not isinstance(count, int) or not 1 <= count <= MAX_AXIS:
        fail(loc + ("count",), f"a whole number of samples from 1 to {MAX_AXIS} is needed")
    if not _number(seed) or not isinstance(seed, int) or not 0 <= seed < 2**63:
        fail(loc + ("seed",), "a whole-number seed from 0 up is needed, so the samples can be drawn again")
    ranges = _mapping(spec.get("ranges"), loc + ("ranges",), fail)
    for p, r in ranges.items():
        if not isinstance(r, dict) or set(r) - {"min", "max", "unit"} or "min" not in r or "max" not in r:
            fail(loc + ("ranges", p), "expected {min: ..., max: ..., unit: ...}")
        if not (_number(r["min"]) and _number(r["max"])) or r["min"] > r["max"]:
            fail(loc + ("ranges", p), "min and max must be finite numbers with min <= max")
        _unit(r, loc + ("ranges", p), fail)
    return count


def _samples(spec, fail) -> list:
    """The samples of a 'sample' section already checked by :func:`_sample_count`."""
    count, ranges = spec["count"], spec["ranges"]
    rng = np.random.default_rng(spec["seed"])
    paths = list(ranges)
    if spec.get("method", "latin_hypercube") == "random":
        u = rng.uniform(size=(count, len(paths)))
    else:  # one sample in each of `count` equal strata per dimension, strata shuffled
        u = (np.array([rng.permutation(count) for _ in paths]).T + rng.uniform(size=(count, len(paths)))) / count
    out = [dict() for _ in range(count)]
    for j, p in enumerate(paths):
        r = ranges[p]
        lo, hi = r["min"], r["max"]
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
