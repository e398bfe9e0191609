"""How much rounding a pump schedule costs: objective and limits at several resolutions.

For each problem: optimize once without rounding, then round the optimal pump schedule
at several resolutions (optfeed.schedule.round_schedule) and judge each with the check
job. Prints, per resolution, the change in the objective relative to the unrounded
schedule, the worst limit excess relative to its bound (the check tolerance is 1e-6),
and the check status.

    .venv/bin/python benchmarks/schedule_rounding.py            # shipped and published problems
    .venv/bin/python benchmarks/schedule_rounding.py configs/inhibited_product.yaml
"""

from __future__ import annotations

import sys
from pathlib import Path

import optfeed
from optfeed import verify as verify_module
from optfeed.check import check
from optfeed.limits import bound_scale
from optfeed.schedule import round_schedule

ROOT = Path(__file__).resolve().parents[1]
PROBLEMS = ["configs/inhibited_product.yaml", "tests/published/park_ramirez.yaml", "tests/published/ethanol.yaml",
            "tests/published/penicillin.yaml", "configs/fast_microbe.yaml"]
RESOLUTIONS = [1e-3, 1e-4, 1e-5, 1e-6]


def worst_excess(result) -> tuple[float, str]:
    worst, name = 0.0, ""
    for r in result.limits:
        rel = r.worst_violation / bound_scale(r.lower, r.upper)
        if rel > worst:
            worst, name = rel, r.name
    return worst, name


def main(paths) -> None:
    real_round = verify_module.round_schedule
    verify_module.round_schedule = lambda schedule, feeds, end_time=None: schedule  # the raw NLP schedule
    try:
        for path in paths:
            problem = optfeed.load_problem(ROOT / path, set={"solver.starts": 2})
            opt = optfeed.optimize(problem)
            if opt.schedule is None:
                print(f"{path}: no answer ({opt.status})")
                continue
            T = opt.end_time
            base = check(problem, opt.schedule, end_time=T if problem.horizon.free else None)
            J0 = base.outcome.objective.value
            print(f"{path}: {opt.status}; unrounded objective {J0:.8g} {base.outcome.objective.unit}; "
                  f"worst excess {worst_excess(base)[0]:.1e}")
            for res in RESOLUTIONS:
                rounded = real_round(opt.schedule, problem.feeds, end_time=T, resolution=res)
                c = check(problem, rounded, end_time=T if problem.horizon.free else None)
                w, name = worst_excess(c)
                dJ = (c.outcome.objective.value - J0) / abs(J0)
                print(f"  resolution {res:.0e}: objective {dJ:+.1e} (relative), worst limit excess {w:.1e}"
                      f"{' (' + name + ')' if name else ''}, {c.status}")
    finally:
        verify_module.round_schedule = real_round


if __name__ == "__main__":
    main(sys.argv[1:] or PROBLEMS)
