"""What every job's result object shares: a short repr for notebooks, and tables.

A result holds a whole problem, a dense trajectory and per-limit reports; the
dataclass repr of all that fills a notebook cell. :func:`result_repr` says, on one
line, what a person looks for first: the status, the objective with its unit, the
run length, and the limits that hold the answer back or were broken.
"""

from __future__ import annotations

from .report.text import fmt


def _short(text: str, n: int = 90) -> str:
    return text if len(text) <= n else text[: n - 3] + "..."


def result_repr(r) -> str:
    """One line: ``CheckResult(status='within limits', problem='x', ...)``."""
    parts = [f"status={r.status!r}", f"problem={r.problem.name!r}"]
    objective_nlp = getattr(r, "objective_nlp", None)
    if objective_nlp is not None:  # optimize
        unit = f" {r.objective_unit}" if r.objective_unit else ""
        sim = r.objective_sim
        parts.append(f"objective={fmt(sim if sim is not None else objective_nlp, 6)}{unit}")
    elif getattr(r, "outcome", None) is not None and r.outcome.objective is not None:
        o = r.outcome.objective
        parts.append(f"objective={fmt(o.value, 6)}{' ' + o.unit if o.unit else ''}")
    if getattr(r, "end_time", None) is not None:
        parts.append(f"end_time={fmt(r.end_time, 6)} h")
    limits = getattr(r, "limits", ())
    active = [v.name for v in limits if getattr(v, "active", False)]
    broken = [v.name for v in limits if getattr(v, "violated", False)]
    if active:
        parts.append(f"active={active!r}")
    if broken:
        parts.append(f"broken={broken!r}")
    mc = getattr(r, "uncertainty", None)
    if mc is not None and hasattr(mc, "any_limit"):  # a Monte Carlo result beside the nominal verdict
        parts.append(f"monte_carlo='{mc.any_limit.broken} of {mc.judged} samples break a limit"
                     + (f", {mc.failed} failed'" if mc.failed else "'"))
    if getattr(r, "starts", None):
        parts.append(f"starts={len(r.starts)}")
    parts.append(f"message={_short(r.message)!r}")
    return f"{type(r).__name__}({', '.join(parts)})"


def result_trajectory_table(r) -> dict:
    """The result's simulated run as columns (see :func:`optfeed.tables.trajectory_columns`)."""
    if r.trajectory is None:
        return {}
    from .model import build_model
    from .tables import trajectory_columns

    return trajectory_columns(build_model(r.problem), r.trajectory)
