"""Benchmark of the Monte Carlo verification (`check --uncertainty`): samples per
second with one and two worker processes, and where a sample's time goes
(simulation, the limit judgement, the rest), printed as figures and ratios.

Two schedules of configs/inhibited_product_uncertain.yaml: its invented push plan,
and its robust optimum as `optimize` wrote it (tests/uncertain/
inhibited_product_robust_schedule.csv: 80 pump steps, on the OTR ceiling for hours,
so the judgement refines many peaks). Each is run with one and two worker processes
on the same 200 samples, and the CPU time per sample of one process is printed for
the samples integrated together (as `check` and `optimize` do) and one by one (the
per-sample path), with the same verdicts checked; batched also with Adams' method
(which `monte_carlo` chooses where it needs less work on the nominal run).

Run:  python benchmarks/montecarlo_benchmark.py [--samples N] [--optimize]

--optimize also times the robust `optimize` (default settings: 8 scenarios, which
itself runs the Monte Carlo of the robust and the nominal answers) and prints the
ratio Monte Carlo time / solve time, the solve time without its two Monte Carlo runs.
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
from optfeed.montecarlo import _chunk, batch_size, monte_carlo  # noqa: E402
from optfeed.uncertainty import scenario_set  # noqa: E402
from optfeed.simulate import Simulator  # noqa: E402

PROBLEM = ROOT / "configs" / "inhibited_product_uncertain.yaml"
PLAN = ROOT / "configs" / "inhibited_product_push_plan.yaml"
ROBUST = ROOT / "tests" / "uncertain" / "inhibited_product_robust_schedule.csv"


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


def cpu_per_sample(schedule, samples: int, batch: int, method: str = "bdf") -> tuple[float, list]:
    """CPU seconds per sample of one process simulating and judging ``samples``
    samples, ``batch`` at a time with CVODES' ``method``; and their verdicts."""
    p = optfeed.load_problem(PROBLEM)
    m = build_model(p)
    plan = optfeed.load_schedule(schedule, m.feed_names, 40.0)
    drawn = scenario_set(p, m, count=samples, seed=1, method="random", nominal=False)
    for size in {batch, samples % batch or batch}:  # the integrators built before the clock starts
        _chunk((p, plan, 40.0, drawn.constants[:, :size], drawn.x0[:, :size], None, batch, method), lambda k: None)
    t0 = time.process_time()
    out = _chunk((p, plan, 40.0, drawn.constants, drawn.x0, None, batch, method), lambda k: None)
    return (time.process_time() - t0) / samples, [(d["status"], d.get("broken")) for d in out]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--samples", type=int, default=200)
    ap.add_argument("--optimize", action="store_true")
    args = ap.parse_args()
    simulate_s, judge_s = parts()
    print(f"one nominal run of the push plan: simulation {simulate_s * 1e3:.1f} ms, judgement {judge_s * 1e3:.1f} ms")
    mc_seconds = {}
    for label, schedule in (("push plan", PLAN), ("robust optimum", ROBUST)):
        print(f"-- {label} ({schedule.name})")
        n, b = min(args.samples, 48), batch_size(args.samples)
        one, v1 = cpu_per_sample(schedule, n, 1)
        many, vb = cpu_per_sample(schedule, n, b)
        adams, va = cpu_per_sample(schedule, n, b, "adams")
        print(f"CPU per sample, one process, {n} samples: one by one {one * 1e3:.1f} ms, {b} together "
              f"{many * 1e3:.1f} ms (ratio {one / many:.2f}; same verdicts: {v1 == vb}); {b} together with "
              f"Adams' method {adams * 1e3:.1f} ms (ratio to BDF {adams / many:.2f}; same verdicts: {v1 == va})")
        rates, results = {}, {}
        for workers in (1, 2):
            r = monte_carlo(PROBLEM, schedule, samples=args.samples, seed=1, workers=workers)
            rates[workers], results[workers] = r.samples_per_second, r
            print(f"{workers} worker(s): {args.samples} samples in {r.seconds:.2f} s = {r.samples_per_second:.1f} "
                  f"samples/s ({r.seconds / args.samples * 1e3:.1f} ms per sample, nominal runs included; "
                  f"method chosen: {r.integration_method})")
        same = [x.status for x in results[1].runs] == [x.status for x in results[2].runs]
        print(f"ratio 2 workers / 1 worker: {rates[2] / rates[1]:.2f} (same verdicts: {same}); "
              f"any limit broken: {results[2].any_limit.broken} of {results[2].judged}")
        mc_seconds[label] = results[2].seconds
    if args.optimize:
        t0 = time.perf_counter()
        o = optfeed.optimize(optfeed.load_problem(PROBLEM))
        total = time.perf_counter() - t0
        nominal = getattr(o, "nominal", None)
        runs = (o.uncertainty, getattr(nominal, "uncertainty", None))
        mc = sum(x.seconds for x in runs if x is not None)
        solve = total - mc
        print(f"robust optimize (default settings): {total:.1f} s in all, {mc:.1f} s of it Monte Carlo, "
              f"{solve:.1f} s solving; {o.status}")
        print(f"Monte Carlo of {args.samples} samples on 2 workers (robust optimum) / solve time = "
              f"{mc_seconds['robust optimum'] / solve:.3f} (target under 0.10)")


if __name__ == "__main__":
    main()
