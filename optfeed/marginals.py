"""When a limit holds the optimum back: the one rule behind every 'ACTIVE'.

A limit is *active* when relaxing it would improve the optimum: its marginal value
(from IPOPT's multipliers) is not zero. How close the re-simulated run comes to the
bound is not the test: a limit the optimizer keeps a little clear of (a back-off
after re-simulation found it exceeded between collocation points, or a margin)
still holds the optimum back, and a limit touched in passing may not.

"Not zero" is measured as an elasticity: the relative gain in the objective per
relative relaxation of the bound, ``|marginal| * |bound| / |objective|``. Limits
that do not bind keep multipliers at the level of the solver's barrier parameter
(elasticities of 1e-7 and below on the shipped examples); a binding one has 1e-3
and more. The threshold sits between: relaxing the limit by 1 % of its bound must
be worth more than 1e-7 of the objective.
"""

from __future__ import annotations

from .limits import bound_scale

ACTIVE_ELASTICITY = 1e-5


def elasticity(marginal: float, report, objective: float | None) -> float:
    """|marginal| * (bound scale) / |objective|; ``report`` gives the bounds (display units)."""
    scale = bound_scale(report.lower, report.upper)
    return abs(marginal) * scale / max(abs(objective or 0.0), 1e-12)


def binding_sides(report, marginal_max: float, marginal_min: float, objective) -> tuple[bool, bool]:
    """(maximum binds, minimum binds) for a limit with ``report`` and its marginal values
    (objective unit per limit unit) at an optimum of value ``objective``."""
    return (elasticity(marginal_max, report, objective) > ACTIVE_ELASTICITY,
            elasticity(marginal_min, report, objective) > ACTIVE_ELASTICITY)


def is_active(report, marginal_max: float, marginal_min: float, objective) -> bool:
    """True if the limit holds the optimum back (either side binds)."""
    return any(binding_sides(report, marginal_max, marginal_min, objective))
