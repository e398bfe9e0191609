"""What a fit hands on: the problem file with the estimates written in
(``fitted.yaml``) and the covariance of the estimates (``covariance.csv``).

fitted.yaml is the user's own problem file, edited: each estimated parameter's line
``name: value`` gets the estimate, in the unit the file wrote (its comment and every
other line stay as they were), and a comment block on top gives each estimate's
intervals. Where a value cannot be edited in place (a parameter inside a one-line
``{...}`` mapping, a value changed by ``set=``/``--set`` that the file leaves at its
default, a problem built in code) the file is written out again from its data, with
the same comment block. Either way the text is read back and checked before it is
returned: ``optfeed optimize fitted.yaml`` runs as it is.

covariance.csv is exactly the form the ``uncertainty`` section of a problem file
reads (:func:`optfeed.problem.uncertain.read_covariance`)::

    # comment lines, among them the estimates: mu_max = 0.4975 1/h, K_s = 0.1864 g/L
    parameter,mu_max [1/h],K_s [g/L]
    mu_max [1/h],5.3e-06,1.2e-05
    K_s [g/L],1.2e-05,0.000216

The header names each parameter with its unit; each row names one of them again
(with the same unit); the entry in row i, column j is in unit_i * unit_j. The means
are not in the table: a problem's uncertainty section centres every value on the
value its own file holds, and fitted.yaml holds the estimates. So
``uncertainty: {covariance: covariance.csv}`` added to fitted.yaml draws around the
fit.
"""

from __future__ import annotations

import math
import re

import numpy as np

from ..errors import InputError
from ..problem.dotted import set_path
from ..problem.yamlio import read_text, read_yaml

# a block-style line holding one plain scalar: indent, key, value (quoted or not), comment
_PLAIN_LINE = re.compile(r"""^(?P<head>\s*(?P<key>[A-Za-z_][A-Za-z0-9_]*)\s*:[ \t]+)(?P<value>"[^"\n]*"|'[^'\n]*'|"""
                         r"""[^\s#'"{}\[\],&*!|>][^#\n]*?)(?P<tail>[ \t]+#.*)?[ \t]*$""")


def value_text(value: float, unit: str, se: float | None = None) -> str:
    """A parameter value for a problem file: enough significant digits that rounding
    moves it by under a thousandth of its standard error (at least 6, at most 12),
    with its unit."""
    digits = 6
    if se is not None and math.isfinite(se) and se > 0 and value != 0:
        digits = int(min(12, max(6, math.ceil(math.log10(abs(value) / se)) + 3)))
    text = f"{value:.{digits}g}"
    return f"{text} {unit}" if unit else text


def comment_block(result, how: str, covariance_file: str = "covariance.csv") -> list[str]:
    """The lines (with '# ') that head fitted.yaml; ``how`` is 'edited' or 'rewritten'."""
    from ..report.text import fmt

    r = result
    out = [f"Fitted by optfeed fit ({r.status}) from {r.runs.source}: {len(r.runs.runs)} run(s), "
           f"{r.runs.n_samples} measured values; {r.record.get('created_utc', '')}.",
           f"This is {r.problem.source} with the estimates (and any value changed by --set) written in"
           + ("; every other line is as it was." if how == "edited" else
              ", written out again from its data: its comments and layout are not kept."),
           "Estimates, standard errors and 95 % confidence intervals (t distribution"
           + ("; profile likelihood intervals in brackets" if any(e.profile_low is not None or e.profile_high
                                                                   is not None for e in r.estimates) else "") + "):"]
    for e in r.estimates:
        unit = f" {e.unit}" if e.unit else " (internal units)"
        line = (f"  {e.name} = {fmt(e.value, 6)}{unit}; SE {fmt(e.se)}; 95 % CI {fmt(e.ci_low)} .. "
                f"{fmt(e.ci_high)}")
        if e.profile_low is not None or e.profile_high is not None:
            line += f" [profile {fmt(e.profile_low)} .. {fmt(e.profile_high)}]"
        out.append(line)
    out.append(f"Fit: {r.verdict}.")
    for flag in r.flags:
        out.append(f"Warning: {flag}.")
    out.append(f"The covariance of the estimates is in {covariance_file} (same folder as this file).")
    out.append("A calibrated model describes the runs it was fitted to: verify what you plan with it at small scale.")
    lines = []
    for text in out:
        lines += ["# " + t for t in _wrap(text, 86)]
    return lines


def _wrap(text: str, width: int) -> list[str]:
    import textwrap

    return textwrap.wrap(text, width, subsequent_indent="    ") or [""]


def fitted_yaml_text(result) -> tuple[str, str]:
    """(text of fitted.yaml, 'edited' or 'rewritten') for a fit result with estimates.

    Raises
    ------
    ValueError
        If neither form reads back as a valid problem with the estimates (a bug).
    """
    problem = result.problem
    changes = {("parameters", name): text for name, text in written_values(result).items()}
    text, how = None, "rewritten"
    try:
        original = read_text(problem.source)
        data0, lines = read_yaml(problem.source, text=original)
    except (InputError, OSError, TypeError):
        original = None
    if original is not None:
        wanted = dict(changes)
        # values changed by set= / --set are changed in the file too
        for path, value in _differences(data0, problem.data):
            wanted.setdefault(path, value if isinstance(value, (dict, list)) else _scalar_text(value))
        text = _edit_in_place(original, lines, wanted)
        if text is not None:
            text = "\n".join(comment_block(result, "edited")) + "\n" + text
            how = "edited"
    if text is None or not _reads_back(text, problem, result):
        data = _with_estimates(problem.data, result)
        text = "\n".join(comment_block(result, "rewritten")) + "\n" + _dump(data)
        how = "rewritten"
        if not _reads_back(text, problem, result):
            raise ValueError("the fitted problem file does not read back with the estimates")
    return text, how


def _differences(a, b, path=()):
    """Scalar leaves where ``b`` differs from ``a`` (a key b has and a lacks included)."""
    if isinstance(b, dict) and isinstance(a, dict):
        for k, v in b.items():
            if k not in a:
                yield path + (k,), v
            else:
                yield from _differences(a[k], v, path + (k,))
    elif isinstance(b, list) and isinstance(a, list) and len(a) == len(b):
        for i, (x, y) in enumerate(zip(a, b)):
            yield from _differences(x, y, path + (i,))
    elif a != b or type(a) is not type(b):
        yield path, b


def _scalar_text(value) -> str:
    import yaml

    return yaml.safe_dump(value, default_flow_style=True).strip().removesuffix("...").strip()


def _edit_in_place(text: str, lines, changes: dict) -> str | None:
    """``text`` with the value of each key path of ``changes`` replaced on its own
    line; None if some path has no line of its own holding a plain value."""
    rows = text.split("\n")
    for path, value in changes.items():
        if isinstance(value, (dict, list)) or not path or isinstance(path[-1], int):
            return None
        line = lines.own(path)  # the key's own line, never an ancestor's
        if line is None or not 1 <= line <= len(rows):
            return None
        m = _PLAIN_LINE.match(rows[line - 1])
        if not m or m.group("key") != path[-1]:
            return None
        old = m.group("value").strip()
        quote = old[0] if old[:1] in ("'", '"') else ""
        rows[line - 1] = f"{m.group('head')}{quote}{value}{quote}{m.group('tail') or ''}"
    return "\n".join(rows)


def written_values(result) -> dict:
    """name -> the estimate as the problem file writes that parameter: in its unit
    there, or a bare number in internal units where the file writes a bare number."""
    from ..units import factor_to

    out = {}
    for e in result.estimates:
        to_internal = 1.0 / factor_to(e.unit) if e.unit else 1.0
        unit = result.problem.parameter_units.get(e.name, "")
        f = factor_to(unit) if unit else 1.0
        out[e.name] = value_text(e.value * to_internal * f, unit, e.se * to_internal * f)
    return out


def _with_estimates(data, result):
    import copy

    out = copy.deepcopy(data)
    for name, text in written_values(result).items():
        set_path(out, f"parameters.{name}", text, result.problem.source)
    return out


def _dump(data) -> str:
    import yaml

    return yaml.safe_dump(data, sort_keys=False, allow_unicode=False, width=100)


def _reads_back(text: str, problem, result) -> bool:
    """The text is a valid problem whose estimated parameters hold the estimates (to
    the digits written) and which is otherwise the problem that was fitted."""
    import dataclasses

    from ..problem.load import problem_from_data
    from ..provenance import problem_digest
    from ..units import factor_to

    try:
        data, lines = read_yaml(problem.source, text=text)
        back = problem_from_data(data, problem.source, lines)
    except InputError:
        return False
    for e in result.estimates:
        f = factor_to(e.unit) if e.unit else 1.0
        got = back.parameters.get(e.name)
        tol = 1e-3 * e.se if math.isfinite(e.se) and e.se > 0 else 1e-6 * abs(e.value)
        if got is None or abs(got * f - e.value) > max(tol, 1e-12 * abs(e.value)):
            return False
    # everything else unchanged: the problem with the read-back estimates has the same digest
    expected = dataclasses.replace(problem, name=back.name, parameters={
        **problem.parameters, **{e.name: back.parameters[e.name] for e in result.estimates}})
    return problem_digest(expected) == problem_digest(back)


def covariance_csv_text(result) -> str:
    """covariance.csv of a fit result with statistics (see the module docstring)."""
    from ..units import factor_to

    est = result.estimates
    stats = result.statistics
    f = np.array([factor_to(e.unit) if e.unit else 1.0 for e in est])
    cov = np.asarray(stats.covariance, dtype=float) * np.outer(f, f)
    lines = [f"# Covariance of the estimates of optfeed fit ({result.status}) for {result.problem.name}, from "
             f"{result.runs.source}.",
             "# Row i, column j is in unit_i * unit_j. The estimates (written into fitted.yaml): "
             + ", ".join(f"{e.name} = {_num(e.value)} {e.unit or '(internal units)'}".rstrip() for e in est) + ".",
             "# A problem's uncertainty section reads this file (covariance: covariance.csv) and draws around the "
             "values its own file holds.",
             "# Error model: " + ("the stated measurement error (trusted)" if result.runs.trusted else
                                 f"scaled by the residuals (s^2 = {stats.scale:.4g})") + "."]
    for e in est:
        if not e.unit:
            lines.append(f"# {e.name} is a bare number in the problem file: its values here are in optfeed's internal "
                         "units (g, L, h, mmol).")
    if not np.all(np.isfinite(cov)):
        lines.append("# Some entries are 'inf' or 'nan': the data cannot fix those parameters (see summary.json).")
    cells = [f"{e.name} [{e.unit or 'dimensionless'}]" for e in est]
    lines.append(",".join(["parameter"] + cells))
    for i, e in enumerate(est):
        lines.append(",".join([cells[i]] + [_num(v) for v in cov[i]]))
    return "\n".join(lines) + "\n"


def _num(v: float) -> str:
    return "nan" if v != v else ("inf" if v == math.inf else f"{v:.10g}")
