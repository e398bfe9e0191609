"""Benchmark of optimize over scenarios: how the cost of one shared pump profile
grows with the number of scenarios S it carries, printed as figures and ratios.

Part 1, one NLP: the fine grid of configs/inhibited_product_uncertain.yaml (40 pump
steps x 4 elements, Radau degree 3) with S = 1, 2, 4, 8, 16 scenario blocks, solved
to convergence from the same simulated feed with the 'near' profile (building the
solver included): iterations, CPU of the solve and per iteration, and their ratios to
S = 1 (linear growth is a ratio of S). ``--automatic-scaling`` adds, for comparison,
the CPU per iteration over the first iterations with MUMPS' automatic scaling choice
(what optfeed used before it named the scaling for several blocks).

Part 1b (``--stage``), the scenario stage as optimize runs it: the nominal problem is
solved once, then for each S the scenario solve is run from the nominal optimum as
``optimize`` does (coarse grid, fine grid, verification with back-off, pump-grid
refinement) in one process, one worker, its solvers built afresh: CPU of the stage and its ratio to S = 2 (at
S = 1 the seed is already the optimum, so S = 2 is the base), the CPU spent building
(the NLPs with their assembled derivatives, their expansion where it is made, the
IPOPT solvers), and the IPOPT iterations of all its solves.

Part 2, the whole job: ``optimize`` with S = 1 (the nominal problem), 4 and 8
scenarios, wall time and the Monte Carlo figures of the answer beside the nominal
optimum's (probability of breaking any limit, mean objective).

Run:  python benchmarks/scenario_benchmark.py [--sizes 1,2,4,8,16] [--automatic-scaling] [--stage] [--whole]
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
from optfeed.transcription import FeedNLP, Grid  # noqa: E402
from optfeed.uncertainty import scenario_set  # noqa: E402

O = importlib.import_module("optfeed.optimize")
S_ = importlib.import_module("optfeed.solve")
PROBLEM = ROOT / "configs" / "inhibited_product_uncertain.yaml"
AUTOMATIC_UP_TO = 8  # beyond this the automatic scaling takes too long to be worth printing


def one_solve(count: int, max_iter: int = 3000, automatic: bool = False):
    """The fine NLP with ``count`` scenarios solved from the first start's simulated
    feed: (Start, variables, CPU seconds of building and solving)."""
    p = optfeed.load_problem(PROBLEM)
    sc = O.merge_identical(scenario_set(p, build_model(p), count=count))
    job = O._Job(p, None, None, sc)
    s = job.settings
    guesses = S_.make_guesses(p, job.full, s.starts)
    data = job.data(S_.scaling_for(p, job.lean, guesses, job.full))
    t0 = time.process_time()
    fine = job.nlp(Grid(s.pump_steps, s.elements, s.degree))
    w0 = job.pack_from_schedule(fine, data, guesses[0].steps_u, guesses[0].T)
    original = S_.ipopt_options

    def options(tol, profile, copies=1):
        out = original(tol, profile, copies)
        out.pop("ipopt.mumps_scaling", None)  # MUMPS chooses (77, its default)
        return out

    if automatic:
        S_.ipopt_options = options
    try:
        st = S_.solve(fine, data, w0, "benchmark", profile="near", max_iter=max_iter)
    finally:
        S_.ipopt_options = original
    return st, fine.n_w, time.process_time() - t0


def part_nlp(sizes, automatic: bool, iterations: int) -> None:
    print("1. One NLP, fine grid, solved from the same simulated feed (CPU; the solve includes building its solver)")
    head = f"   {'S':>3} {'variables':>9} | {'it':>4} {'solve s':>8} {'ratio':>6} {'ms/it':>7} {'ratio':>6} | status"
    if automatic:
        head += f"  | automatic scaling, first {iterations} it: ms/it ratio"
    print(head)
    base, base_auto = None, None
    for n in sizes:
        st, nw, cpu = one_solve(n)
        per = st.seconds / max(st.iterations, 1)
        base = base or (cpu, per)
        line = (f"   {n:>3} {nw:>9} | {st.iterations:>4} {cpu:>8.2f} {cpu / base[0]:>6.1f} {1e3 * per:>7.1f} "
                f"{per / base[1]:>6.1f} | {st.status}")
        if automatic and n <= AUTOMATIC_UP_TO:
            a, _, _ = one_solve(n, max_iter=iterations, automatic=True)
            pa = a.seconds / max(a.iterations, 1)
            base_auto = base_auto or pa
            line += f"  | {1e3 * pa:>7.1f} {pa / base_auto:>6.1f}"
        print(line, flush=True)
    print("   ratio = against S = 1; linear growth would be a ratio of S")


def part_stage(sizes) -> None:
    import casadi as ca

    print("\n1b. The scenario stage of optimize, from the nominal optimum (CPU, one process, one worker)")
    p = optfeed.load_problem(PROBLEM)
    nominal = O._optimize(p, 1, None, None, time.perf_counter())
    seeds = [("the nominal optimum", nominal.schedule, nominal.end_time)]
    built, iterations = [0.0], [0]
    nlpsol, solve, get_nlp, derivatives = ca.nlpsol, O.solve, O.get_nlp, FeedNLP.derivatives

    def timed(fn):  # CPU of building: NLPs with their assembled derivatives, their expansion, IPOPT solvers
        def wrapped(*args, **kw):
            t = time.process_time()
            out = fn(*args, **kw)
            built[0] += time.process_time() - t
            return out
        return wrapped

    def counted_solve(*args, **kw):
        st = solve(*args, **kw)
        iterations[0] += st.iterations
        return st

    print(f"   {'S':>3} | {'CPU s':>7} {'ratio':>6} | {'building s':>10} | {'it':>4} | status, objective over scenarios")
    base = None
    ca.nlpsol, O.solve, O.get_nlp, FeedNLP.derivatives = timed(nlpsol), counted_solve, timed(get_nlp), timed(derivatives)
    try:
        for n in sizes:
            built[0], iterations[0] = 0.0, 0
            sc = O.merge_identical(scenario_set(p, build_model(p), count=n))
            S_.clear_cache()  # every stage builds its own solvers, as in a fresh process
            t = time.process_time()
            r = O._optimize(p, 1, None, None, time.perf_counter(), sc, seeds)
            cpu = time.process_time() - t
            if n >= 2 and base is None:
                base = (n, cpu)
            ratio = f"{cpu / base[1]:>6.1f}" if base else f"{'':>6}"
            print(f"   {n:>3} | {cpu:>7.2f} {ratio} | {built[0]:>10.2f} | {iterations[0]:>4} | {r.status}, "
                  f"{r.objective_nlp:.4f} {r.objective_unit}", flush=True)
    finally:
        ca.nlpsol, O.solve, O.get_nlp, FeedNLP.derivatives = nlpsol, solve, get_nlp, derivatives
    if base:
        print(f"   ratio = against S = {base[0]}; linear growth would be a ratio of S / {base[0]}")


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
    ap.add_argument("--automatic-scaling", action="store_true",
                    help="also time the first iterations with MUMPS' automatic scaling (up to 8 scenarios)")
    ap.add_argument("--iterations", type=int, default=30, help="iterations timed with the automatic scaling")
    ap.add_argument("--stage", action="store_true", help="also time the scenario stage of optimize (part 1b)")
    ap.add_argument("--whole", action="store_true", help="also time the whole optimize at S = 1, 4, 8")
    args = ap.parse_args()
    part_nlp([int(x) for x in args.sizes.split(",")], args.automatic_scaling, args.iterations)
    if args.stage:
        part_stage([int(x) for x in args.sizes.split(",")])
    if args.whole:
        part_whole([1, 4, 8])


if __name__ == "__main__":
    main()
