"""The ``uncertainty`` section of a problem file, and the covariance file it may name.

The section gives distributions to values the problem file already holds (a
parameter, an initial value, a feed composition), around the value written there::

    uncertainty:
      parameters:
        mu_max: {distribution: normal, sd: 0.03 1/h}
        K_i: {distribution: lognormal, relative_sd: 20 %}
        Y_XS: {distribution: uniform, min: 0.42 g/g, max: 0.48 g/g}
      initial:                                   # species, and V (the initial volume)
        X: {distribution: lognormal, relative_sd: 15 %}
      feeds:
        concentrate: {S: {distribution: normal, sd: 8 g/L}}
      covariance: covariance.csv                 # a multivariate normal of the values it names
      scenarios: {count: 8, seed: 1, method: latin_hypercube, objective: mean}
      monte_carlo: {samples: 200, seed: 1}

A bare number for ``sd``, ``min`` or ``max`` is in the unit the value itself is
written in (``K_s: 500 mg/L`` with ``sd: 50`` is 50 mg/L); a number with a unit must
have the value's dimension. The covariance file is a CSV with named rows and
columns and units in the header (see :func:`read_covariance`).

:func:`check_uncertainty` checks the section and returns the plain
:class:`~optfeed.problem.spec.Uncertainty`; every problem is recorded as an issue
naming the file, line and key (the covariance file's own line and cell for a fault
inside it).
"""

from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError, Issue
from ..paths import inside
from ..units import parse_quantity, to_internal, written_unit
from .spec import Uncertain, Uncertainty

MAX_SCENARIOS = 256  # blocks of the optimizer's NLP
MAX_SAMPLES = 100_000  # Monte Carlo re-simulations
MAX_SEED = 2**32 - 1
MAX_K = 10.0
MAX_COVARIANCE_NAMES = 200
SYMMETRY_TOL = 1e-6  # |c_ij - c_ji| relative to sqrt(c_ii c_jj): a file written to 7 digits passes
MIN_EIGENVALUE = 1e-10  # of the correlation matrix; below: not positive definite

# a row's name with its unit, if given (as the header of the project's CSV tables)
HEADER_RE = re.compile(r"^\s*(?P<name>[^\[\]]+?)\s*(?:\[(?P<unit>[^\]]*)\])?\s*$")


@dataclass(frozen=True)
class _Nominal:
    """A value of the problem file that can be made uncertain."""

    target: str  # 'constant' or 'initial'
    ref: str  # Model.constant_names entry or state name
    value: float  # internal
    unit: str  # as written ('' for internal units)
    dims: object  # pint dimensionality of the value as written
    known_dims: bool  # False for a parameter written as a bare number (internal units, any dimension)
    factor: float  # internal value of 1 ``unit``


def _nominal(value, kind: str, target: str, ref: str) -> _Nominal | None:
    try:
        q = parse_quantity(value, kind)
        internal = to_internal(q)
        unit = written_unit(value, kind)
        factor = to_internal(parse_quantity(f"1 {unit}", "any")) if unit else 1.0
    except ValueError:
        return None  # reported where the value is checked
    return _Nominal(target, ref, internal, unit, q.dimensionality, bool(unit), factor)


def nominal_values(raw) -> dict:
    """Every value of a (schema-checked) problem file that may be uncertain:
    name (``mu_max``, ``initial.X``, ``initial.V``, ``feeds.concentrate.S``) -> _Nominal.
    Values that do not parse are left out (they are reported elsewhere)."""
    out = {}
    for name, value in raw.parameters.items():
        n = _nominal(value, "any", "constant", name)
        if n:
            out[name] = n
    for name, sp in raw.species.items():
        n = _nominal(sp.initial, "amount", "initial", name)
        if n:
            out[f"initial.{name}"] = n
    n = _nominal(raw.vessel.initial_volume, "volume", "initial", "V")
    if n:
        out["initial.V"] = n
    for feed, fd in raw.feeds.items():
        for species, value in fd.composition.items():
            n = _nominal(value, "amount", "constant", f"{feed}.{species}")
            if n:
                out[f"feeds.{feed}.{species}"] = n
    return out


def check_uncertainty(raw, source: str, lines, fail, issues: list) -> Uncertainty | None:
    """Check the ``uncertainty`` section of ``raw`` (a schema.ProblemIn).

    ``fail(loc, message)`` records an issue at the problem file; issues about the
    covariance file itself are appended to ``issues``. Returns None when the file
    has no section (or when it has faults, which are recorded).
    """
    u = raw.uncertainty
    if u is None:
        return None
    base = ("uncertainty",)
    nominals = nominal_values(raw)
    n_issues = len(issues)
    values = []

    def spread(name, spec, loc, what):
        nom = nominals.get(name)
        if nom is None:
            return  # the value itself is faulty (reported) or the name unknown (reported by the caller)
        got = _spread(name, spec, nom, loc, fail)
        if got is not None:
            values.append(got)

    for name, spec in u.parameters.items():
        loc = base + ("parameters", name)
        if name not in raw.parameters:
            fail(loc, f"{name!r} is not a parameter of this problem{_hint(name, raw.parameters)}")
            continue
        spread(name, spec, loc, "parameter")
    for name, spec in u.initial.items():
        loc = base + ("initial", name)
        if name not in raw.species and name != "V":
            fail(loc, f"{name!r} is not a species (or V, the initial volume){_hint(name, list(raw.species) + ['V'])}")
            continue
        spread(f"initial.{name}", spec, loc, "initial value")
    for feed, comp in u.feeds.items():
        if feed not in raw.feeds:
            fail(base + ("feeds", feed), f"{feed!r} is not a feed of this problem{_hint(feed, raw.feeds)}")
            continue
        carried = raw.feeds[feed].composition
        for species, spec in comp.items():
            loc = base + ("feeds", feed, species)
            if species not in carried:
                fail(loc, f"feed {feed!r} carries no {species!r} (its composition names "
                          f"{', '.join(carried) or 'nothing'}); an uncertain value needs a value in the file")
                continue
            spread(f"feeds.{feed}.{species}", spec, loc, "feed composition")

    matrix, cov_file = None, ""
    if u.covariance is not None:
        loc = base + ("covariance",)
        got = _covariance(u.covariance, source, lines, loc, nominals, fail, issues)
        if got is not None:
            names, matrix, cov_file = got
            given = {v.name: v for v in values}
            for name, row in zip(names, matrix):
                if name in given:
                    fail(_loc_of(given[name].key),
                         f"{name!r} is also in the covariance file {Path(cov_file).name}; give each value one "
                         "distribution")
                    continue
                nom = nominals[name]
                values.append(Uncertain(name, nom.target, nom.ref, "multivariate normal", nom.value,
                                        math.sqrt(row[names.index(name)]), None, None, nom.unit,
                                        ".".join(loc)))

    if not u.parameters and not u.initial and not u.feeds and u.covariance is None:
        fail(base, "names no uncertain value: give 'parameters', 'initial', 'feeds' or a 'covariance' file")

    s, m = u.scenarios, u.monte_carlo
    _count(s.count, 1, MAX_SCENARIOS, base + ("scenarios", "count"), "scenarios (the nominal one among them)", fail)
    _count(s.seed, 0, MAX_SEED, base + ("scenarios", "seed"), "a seed", fail)
    _count(m.samples, 1, MAX_SAMPLES, base + ("monte_carlo", "samples"), "Monte Carlo samples", fail)
    _count(m.seed, 0, MAX_SEED, base + ("monte_carlo", "seed"), "a seed", fail)
    k = 1.0
    if s.k is not None:
        if s.objective != "mean_std":
            fail(base + ("scenarios", "k"), f"k is used only with objective: mean_std (the mean less k standard "
                                            f"deviations), not with {s.objective!r}")
        elif not 0 <= s.k <= MAX_K:  # also refuses NaN
            fail(base + ("scenarios", "k"), f"must be between 0 and {MAX_K:g} (standard deviations), got {s.k:g}")
        else:
            k = float(s.k)
    if len(issues) > n_issues:
        return None
    if matrix is not None:
        # the covariance's values come last, in the file's order, matching the matrix
        matrix = tuple(tuple(float(x) for x in row) for row in matrix)
    return Uncertainty(
        values=tuple(values), covariance=matrix, covariance_file=cov_file, scenarios=int(s.count),
        scenario_seed=int(s.seed), method=s.method, combine=s.objective, k=k, samples=int(m.samples),
        sample_seed=int(m.seed),
    )


def _loc_of(key: str) -> tuple:
    """``uncertainty.feeds.f.S`` -> the key path as a tuple."""
    return tuple(key.split("."))


def _hint(name, known) -> str:
    close = difflib.get_close_matches(name, list(known), n=3)
    return f"; did you mean {', '.join(map(repr, close))}?" if close else ""


def _count(value, lo, hi, loc, what, fail) -> None:
    if not lo <= value <= hi:
        fail(loc, f"must be between {lo} and {hi} ({what}), got {value}")


def _amount(value, nom: _Nominal, loc, fail, what: str):
    """A value with the nominal's dimension, internal units; a bare number is in
    the unit the nominal is written in. None after recording an issue."""
    bare = written_unit(value, "any") == ""  # no unit written
    try:
        if bare:
            q = parse_quantity(value, "any")  # a number (no unit): in the nominal's unit
            return to_internal(q) * nom.factor
        q = parse_quantity(value, "any")
        internal = to_internal(q)
    except ValueError as exc:
        fail(loc, str(exc))
        return None
    if nom.known_dims and q.dimensionality != nom.dims:
        fail(loc, f"{value!r} has dimension {_dims(q.dimensionality)}, but the value is written in "
                  f"{nom.unit!r} ({_dims(nom.dims)}); give the {what} in a unit of that kind, or as a bare "
                  f"number in {nom.unit}")
        return None
    return internal


def _dims(d) -> str:
    from ..units import describe

    return describe(d) if len(d) else "dimensionless"


def _spread(name, spec, nom: _Nominal, loc, fail) -> Uncertain | None:
    """Check one distribution; the Uncertain, or None after recording issues."""
    key = ".".join(loc)
    dist = spec.distribution
    ok = True
    if dist == "uniform":
        for side in ("sd", "relative_sd"):
            if getattr(spec, side) is not None:
                fail(loc + (side,), f"a uniform distribution is given by 'min' and 'max', not by {side!r}")
                ok = False
        if spec.min is None or spec.max is None:
            fail(loc, "a uniform distribution needs 'min' and 'max'")
            return None
        lo = _amount(spec.min, nom, loc + ("min",), fail, "minimum")
        hi = _amount(spec.max, nom, loc + ("max",), fail, "maximum")
        if lo is None or hi is None or not ok:
            return None
        if lo > hi:
            fail(loc, f"min {spec.min!r} is above max {spec.max!r}")
            return None
        if not lo <= nom.value <= hi:
            fail(loc, f"the value in the file ({_show(nom)}) lies outside min..max ({spec.min!r}..{spec.max!r}); "
                      "the nominal scenario is the file's value, so it must be a possible one")
            return None
        return Uncertain(name, nom.target, nom.ref, dist, nom.value, (hi - lo) / math.sqrt(12.0), lo, hi,
                         nom.unit, key)
    for side in ("min", "max"):
        if getattr(spec, side) is not None:
            fail(loc + (side,), f"a {dist} distribution is given by 'sd' or 'relative_sd' around the file's "
                                f"value, not by {side!r} (that is for 'uniform')")
            ok = False
    if dist == "lognormal" and nom.value <= 0:
        fail(loc, f"a lognormal distribution holds positive values only, but the value in the file is "
                  f"{_show(nom)}; use 'normal'")
        return None
    if (spec.sd is None) == (spec.relative_sd is None):
        fail(loc, f"a {dist} distribution needs its standard deviation: give 'sd' (in the value's unit) or "
                  "'relative_sd' (a fraction of the value, e.g. 10 %), not both")
        return None
    if spec.sd is not None:
        sd = _amount(spec.sd, nom, loc + ("sd",), fail, "standard deviation")
        if sd is not None and sd < 0:
            fail(loc + ("sd",), f"standard deviation {spec.sd!r} is negative")
            sd = None
    else:
        sd = None
        try:
            q = parse_quantity(spec.relative_sd, "any")
            rel = to_internal(q)
            if len(q.dimensionality):
                fail(loc + ("relative_sd",), f"{spec.relative_sd!r} has dimension {_dims(q.dimensionality)}; a "
                                             "relative standard deviation is a fraction such as 0.1 or 10 %")
            elif rel < 0:
                fail(loc + ("relative_sd",), f"relative standard deviation {spec.relative_sd!r} is negative")
            elif nom.value == 0:
                fail(loc + ("relative_sd",), f"the value in the file is 0, so a relative standard deviation "
                                             "gives none; give 'sd' in the value's unit")
            else:
                sd = rel * abs(nom.value)
        except ValueError as exc:
            fail(loc + ("relative_sd",), str(exc))
    if sd is None or not ok:
        return None
    return Uncertain(name, nom.target, nom.ref, dist, nom.value, float(sd), None, None, nom.unit, key)


def _show(nom: _Nominal) -> str:
    value = nom.value / nom.factor
    return f"{value:g} {nom.unit}".strip()


# ------------------------------------------------------------------ the covariance file


def canonical_name(name: str, nominals: dict) -> str | None:
    """The uncertain value a covariance file's row or column names: ``mu_max`` or
    ``parameters.mu_max`` (a parameter), ``initial.X``, ``feeds.concentrate.S``; None
    if it names none."""
    if name in nominals:
        return name
    if name.startswith("parameters.") and name[len("parameters."):] in nominals:
        return name[len("parameters."):]
    return None


def _covariance(text, source, lines, loc, nominals, fail, issues):
    """(names, matrix in internal units, file path) of the covariance file, or None
    after recording issues."""
    from ..csvfile import read_table

    line = lines.get(loc)
    try:
        path = inside(text, Path(source).parent, source, line, ".".join(loc), what="covariance file")
    except InputError as exc:
        issues.extend(exc.issues)
        return None
    try:
        names, matrix = read_covariance(read_table(path), nominals)
    except InputError as exc:
        for i in exc.issues:
            if i.line is None:  # the file itself: missing, a folder, too large, binary, empty...
                fail(loc, f"{text}: {i.message}")
            else:
                issues.append(i)
        return None
    # positive definite: look at the correlation matrix (unit-free), whose eigenvalues
    # say how far from singular the matrix is
    d = np.sqrt(np.diag(matrix))
    corr = matrix / np.outer(d, d)
    eig, vecs = np.linalg.eigh(corr)
    if eig[0] <= MIN_EIGENVALUE:
        vec = vecs[:, 0]
        order = np.argsort(-np.abs(vec))[:3]
        vec = vec if vec[order[0]] > 0 else -vec
        direction = " ".join(f"{'-' if vec[i] < 0 else '+'} {abs(vec[i]):.2g} {names[i]}" for i in order
                             if abs(vec[i]) > 1e-3).removeprefix("+ ")
        fail(loc, f"the covariance matrix in {Path(text).name} is not positive definite (smallest eigenvalue of "
                  f"its correlation matrix {eig[0]:.3g}): along {direction} (each scaled by its standard "
                  "deviation) it gives a variance of zero or less. A variance of zero, a correlation of exactly "
                  "+-1 or numbers rounded too far do this; a covariance matrix must be symmetric positive definite")
        return None
    return names, matrix, str(path)


def read_covariance(table, nominals: dict):
    """A covariance file (an :class:`optfeed.csvfile.Table`) as ``(names, matrix)``,
    internal units.

    The format is that of the project's other CSV tables (``,`` or ``;`` between
    cells, a decimal comma with ``;``, ``#`` comment lines)::

        # covariance of the fitted parameters
        name, mu_max [1/h], K_s [g/L]
        mu_max [1/h], 4.0e-4, 1.0e-5
        K_s [g/L], 1.0e-5, 2.5e-3

    The first header cell labels the names (any text). Each further header cell
    names an uncertain value and its unit in brackets; each row starts with the
    name of one column (its unit may be repeated, and must then be the same), in any
    order. The entry of row i and column j is in unit_i * unit_j. Checked here:
    names, units, numbers, variances above zero, correlations within +-1, symmetry
    (to :data:`SYMMETRY_TOL`). Positive definiteness is checked by the caller.

    Raises
    ------
    InputError
        Naming the file, the line and the cell.
    """
    from ..csvfile import header_cell

    path = table.path
    header_line, header = table.header
    if len(header) - 1 > MAX_COVARIANCE_NAMES:
        raise InputError.one(path, header_line, "", f"the header names {len(header) - 1} values; a covariance "
                                                    f"file holds at most {MAX_COVARIANCE_NAMES}")
    if len(header) < 2:
        raise InputError.one(path, header_line, "", "the header names no value: expected e.g. "
                                                    "'name, mu_max [1/h], K_s [g/L]'")
    issues = []
    names, factors = [], []
    for k, cell in enumerate(header[1:], start=1):
        got = header_cell(path, header_line, cell, k, "mu_max [1/h]")
        if isinstance(got, Issue):
            issues.append(got)
            continue
        name = _named(got[0], got[1], nominals, path, header_line, cell, issues)
        if name is None:
            continue
        if name[0] in names:
            issues.append(Issue(path, header_line, cell, f"{name[0]!r} names a column twice"))
            continue
        names.append(name[0])
        factors.append(name[1])
    if issues:
        raise InputError(issues)
    table.check_width()
    n = len(names)
    matrix = np.full((n, n), np.nan)
    row_of = {}
    for lineno, cells in table.rows[1:]:
        label = cells[0]
        m = HEADER_RE.match(label)
        got = _named(m.group("name").strip(), m.group("unit"), nominals, path, lineno, label, issues) if m else None
        if got is None:
            if not m:
                issues.append(Issue(path, lineno, label or "(empty)", "expected the name of a column"))
            continue
        name, factor = got
        if name not in names:
            issues.append(Issue(path, lineno, label, f"row {name!r} has no column of the same name; rows and "
                                                     "columns name the same values"))
            continue
        i = names.index(name)
        if m.group("unit") is not None and not math.isclose(factor, factors[i], rel_tol=1e-12):
            issues.append(Issue(path, lineno, label, f"the row's unit differs from the unit of column "
                                                     f"{header[i + 1]!r}; give both the same unit"))
            continue
        if name in row_of:
            issues.append(Issue(path, lineno, label, f"row {name!r} appears twice (first at line {row_of[name]})"))
            continue
        row_of[name] = lineno
        for j, value_text in enumerate(cells[1:]):
            matrix[i, j] = table.number(lineno, header[j + 1], value_text) * factors[i] * factors[j]
    if not issues:
        for name in names:
            if name not in row_of:
                issues.append(Issue(path, header_line, name, f"no row for {name!r}: the matrix needs a row for "
                                                             "every column"))
    if issues:
        raise InputError(issues)
    for i, name in enumerate(names):
        if not matrix[i, i] > 0:
            issues.append(Issue(path, row_of[name], header[i + 1], f"the variance of {name!r} must be above zero, "
                                                                   f"got {matrix[i, i] / factors[i] ** 2:g}"))
    if issues:
        raise InputError(issues)
    d = np.sqrt(np.diag(matrix))
    for i in range(n):
        for j in range(i + 1, n):
            scale = d[i] * d[j]
            unit = factors[i] * factors[j]
            if abs(matrix[i, j] - matrix[j, i]) > SYMMETRY_TOL * scale:
                issues.append(Issue(path, row_of[names[j]], header[i + 1],
                                    f"the entry for ({names[j]}, {names[i]}) is {matrix[j, i] / unit:g} but the "
                                    f"entry for ({names[i]}, {names[j]}) is {matrix[i, j] / unit:g}; a covariance "
                                    "matrix is symmetric"))
            elif abs(matrix[i, j]) > scale * (1 + SYMMETRY_TOL):
                issues.append(Issue(path, row_of[names[i]], header[j + 1],
                                    f"the covariance of {names[i]!r} and {names[j]!r} gives a correlation of "
                                    f"{matrix[i, j] / scale:.4g}, beyond +-1"))
    if issues:
        raise InputError(issues)
    return names, 0.5 * (matrix + matrix.T)


def _named(text, unit, nominals, path, lineno, cell, issues):
    """(canonical name, internal value of 1 ``unit``) of a column or row name (a row
    without a unit takes its column's), or None after recording an issue."""
    from ..csvfile import unit_factor

    name = canonical_name(text, nominals)
    if name is None:
        issues.append(Issue(path, lineno, cell, f"{text!r} is not a parameter, initial value ('initial.X') or feed "
                                                f"composition ('feeds.<feed>.<species>') of the problem"
                                                f"{_hint(text, list(nominals))}"))
        return None
    nom = nominals[name]
    if unit is None or not unit.strip():
        return name, nom.factor
    got = unit_factor(path, lineno, cell, unit.strip(), "any")
    if isinstance(got, Issue):
        issues.append(got)
        return None
    factor, q = got
    if nom.known_dims and q.dimensionality != nom.dims:
        issues.append(Issue(path, lineno, cell, f"unit {unit.strip()!r} has dimension {_dims(q.dimensionality)}, "
                                                f"but {name} is written in {nom.unit!r} ({_dims(nom.dims)})"))
        return None
    return name, factor
