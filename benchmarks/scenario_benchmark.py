"""Benchmark of optimize over scenarios: how the cost of one shared pump profile
grows with the number of scenarios S it carries, printed as figures and ratios.

Part 1, one NLP: the fine grid of configs/inhibited_product_uncertain.yaml (40 pump
steps x 4 elements, Radau degree 3) with S = 1, 2, 4, 8, 16 scenario blocks, solved
from the same simulated feed with the 'near' profile; CPU per IPOPT iteration and
its ratio to S = 1 (linear growth is a ratio of S), with both MUMPS orderings
(approximate minimum fill, the single-block choice, and nested dissection, the
choice for several blocks).

Part 2, the whole job: ``optimize`` with S = 1 (the nominal problem), 4 and 8
scenarios, wall time and the Monte Carlo figures of the answer beside the nominal
optimum's (probability of breaking any limit, mean objective).

Run:  python benchmarks/scenario_benchmark.py [--sizes 1,2,4,8,16] [--iterations 30] [--whole]
"""

from __future__ import annotations

import argparse
import importlib
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import optfeed  # noqa: E402
from optfeed.model import build_model  # noqa: E402
from optfeed.transcription import Grid  # noqa: E402
from optfeed.uncertainty import scenario_set  # noqa: E402

O = importlib.import_module("optfeed.optimize")
S_ = importlib.import_module("optfeed.solve")
PROBLEM = ROOT / "configs" / "inhibited_product_uncertain.yaml"
AMF_UP_TO = 4


def per_iteration(count: int, order: int, iterations: int) -> tuple[float, int]:
    """CPU seconds per IPOPT iteration on the fine grid with ``count`` scenarios."""
    p = optfeed.load_problem(PROBLEM)
    sc = O.merge_identical(scenario_set(p, build_model(p), count=count))
    job = O._Job(p, None, None, sc)
    s = job.settings
    guesses = S_.make_guesses(p, job.full, s.starts)
    data = job.data(S_.scaling_for(p, job.lean, guesses, job.full))
    fine = job.nlp(Grid(s.pump_steps, s.elements, s.degree))
    w0 = job.pack_from_schedule(fine, data, guesses[0].steps_u, guesses[0].T)
    original = S_.ipopt_options

    def options(tol, profile, copies=1):
        return {**original(tol, profile, copies), "ipopt.mumps_pivot_order": order}

    S_.ipopt_options = options
    try:
        st = S_.solve(fine, data, w0, "benchmark", profile="near", max_iter=iterations + order)  # a solver per order
    finally:
        S_.ipopt_options = original
    return st.seconds / max(st.iterations, 1), fine.n_w


def part_nlp(sizes, iterations: int) -> None:
    print(f"1. One NLP, fine grid, first {iterations} iterations from the same feed (CPU per iteration)")
    print(f"   {'S':>3} {'variables':>9} | {'AMF ms/it':>9} {'ratio':>6} | {'METIS ms/it':>11} {'ratio':>6}")
    base = {}
    for n in sizes:
        cells = []
        for order in (2, 5):
            if order == 2 and n > AMF_UP_TO:
                cells.append(f"{'-':>9} {'':>6}" if not cells else f"{'-':>11} {'':>6}")
                continue
            sec, nw = per_iteration(n, order, iterations)
            base.setdefault(order, sec)
            width = 9 if order == 2 else 11
            cells.append(f"{1e3 * sec:>{width}.1f} {sec / base[order]:>6.1f}")
        print(f"   {n:>3} {nw:>9} | {cells[0]} | {cells[1]}", flush=True)
    print("   ratio = against S = 1 with the same ordering; linear growth would be a ratio of S")
    print(f"   AMF is not run above {AMF_UP_TO} scenarios: at 8 a single iteration took minutes")


def part_whole(sizes) -> None:
    print("\n2. The whole optimize (wall time, this machine's cores), Monte Carlo of 200 samples each")
    print(f"   {'S':>3} {'seconds':>8} {'status':<20} {'mean obj':>9} {'P(any broken)':>14} | nominal optimum: "
          f"{'mean obj':>9} {'P(any broken)':>14}")
    for n in sizes:
        t = time.perf_counter()
        r = optfeed.optimize(PROBLEM, set={"uncertainty.scenarios.count": n})
        sec = time.perf_counter() - t
        nom = r.nominal or r
        a, b = r.uncertainty, nom.uncertainty
        print(f"   {n:>3} {sec:>8.1f} {r.status:<20} {a.objective['mean']:>9.3f} {a.any_limit.probability:>14.1%} | "
              f"{'':>16} {b.objective['mean']:>9.3f} {b.any_limit.probability:>14.1%}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1,2,4,8,16")
    ap.add_argument("--iterations", type=int, default=30)
    ap.add_argument("--whole", action="store_true", help="also time the whole optimize at S = 1, 4, 8")
    args = ap.parse_args()
    part_nlp([int(x) for x in args.sizes.split(",")], args.iterations)
    if args.whole:
        part_whole([1, 4, 8])


if __name__ == "__main__":
    main()
