"""Benchmark of the Monte Carlo verification (`check --uncertainty`): samples per
second with one and two worker processes, and where a sample's time goes
(simulation, the limit judgement, the rest), printed as figures and ratios.

The schedule is the invented push plan of configs/inhibited_product_uncertain.yaml
(near its limits, so the judgement refines many peaks). Both runs happen in this
process, one after the other, on the same 200 samples.

Run:  python benchmarks/montecarlo_benchmark.py [--samples N] [--optimize]

--optimize also times `optimize` on the nominal problem (default settings), for the
ratio Monte Carlo time / solve time.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import optfeed  # noqa: E402
from optfeed.limits import build_limits, judge  # noqa: E402
from optfeed.model import build_model  # noqa: E402
from optfeed.montecarlo import monte_carlo  # noqa: E402
from optfeed.simulate import Simulator  # noqa: E402

PROBLEM = ROOT / "configs" / "inhibited_product_uncertain.yaml"
PLAN = ROOT / "configs" / "inhibited_product_push_plan.yaml"


def parts(repeats: int = 20) -> tuple[float, float]:
    """Seconds per nominal run: (simulation, judgement)."""
    p = optfeed.load_problem(PROBLEM)
    m = build_model(p)
    sim, limits = Simulator(m), build_limits(m)
    plan = optfeed.load_schedule(PLAN, m.feed_names, 40.0)
    t0 = time.perf_counter()
    for _ in range(repeats):
        traj = sim.run(plan, 40.0)
    t1 = time.perf_counter()
    for _ in range(repeats):
        judge(m, limits, traj)
    t2 = time.perf_counter()
    return (t1 - t0) / repeats, (t2 - t1) / repeats


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--samples", type=int, default=200)
    ap.add_argument("--optimize", action="store_true")
    args = ap.parse_args()
    simulate_s, judge_s = parts()
    print(f"one nominal run: simulation {simulate_s * 1e3:.1f} ms, judgement {judge_s * 1e3:.1f} ms")
    rates = {}
    results = {}
    for workers in (1, 2):
        r = monte_carlo(PROBLEM, PLAN, samples=args.samples, seed=1, workers=workers)
        rates[workers] = r.samples_per_second
        results[workers] = r
        print(f"{workers} worker(s): {args.samples} samples in {r.seconds:.2f} s = {r.samples_per_second:.1f} "
              f"samples/s ({r.seconds / args.samples * 1e3:.1f} ms per sample, nominal run included)")
    same = [x.status for x in results[1].runs] == [x.status for x in results[2].runs]
    print(f"ratio 2 workers / 1 worker: {rates[2] / rates[1]:.2f} (same verdicts: {same})")
    print(f"any limit broken: {results[2].any_limit.broken} of {results[2].judged}")
    if args.optimize:
        t0 = time.perf_counter()
        o = optfeed.optimize(optfeed.load_problem(PROBLEM))
        solve = time.perf_counter() - t0
        print(f"optimize (nominal, default settings): {solve:.1f} s, {o.status}; Monte Carlo of {args.samples} "
              f"samples on 2 workers / solve time = {results[2].seconds / solve:.2f}")


if __name__ == "__main__":
    main()
