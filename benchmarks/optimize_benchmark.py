"""Benchmark of `optfeed optimize` on a published problem (prints figures and ratios).

1. The tool against a hand-written baseline on the Park-Ramirez secreted-protein
   problem (tests/published/park_ramirez.yaml): single shooting with scipy
   (solve_ivp, LSODA, rtol 1e-8, plus SLSQP with finite-difference gradients) on the
   same piecewise-constant pump grid, from a constant half-maximum feed. The tool
   runs with its default settings (multistart on the free cores). Both run in this
   process, one after the other; the ratios are what to quote.
2. Solve time and peak memory against the number of finite elements (50 to 800),
   each measured in a fresh process (peak resident memory from getrusage).

Run:  python benchmarks/optimize_benchmark.py [--quick]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from optfeed.model import build_model  # noqa: E402
from optfeed.optimize import optimize  # noqa: E402
from optfeed.problem import load_problem  # noqa: E402

PROBLEM = ROOT / "tests" / "published" / "park_ramirez.yaml"


def with_settings(problem, **kw):
    return dataclasses.replace(problem, settings=dataclasses.replace(problem.settings, **kw))


def scipy_single_shooting(problem, steps: int, start_fraction: float = 0.5):
    """Maximise the objective over piecewise-constant feeds with solve_ivp + SLSQP."""
    from scipy.integrate import solve_ivp
    from scipy.optimize import minimize

    model = build_model(problem)
    f = model.function("f", [model.rhs])
    T = problem.horizon.end_time
    edges = np.linspace(0.0, T, steps + 1)
    fmax = problem.feeds[0].max_rate
    n_sim = [0]

    def simulate(u):
        n_sim[0] += 1
        x = model.x0.copy()
        for k in range(steps):
            sol = solve_ivp(lambda t, y, uk=u[k]: np.array(f(t, y, [uk])).ravel(), (edges[k], edges[k + 1]), x,
                            method="LSODA", rtol=1e-8, atol=1e-10)
            x = sol.y[:, -1]
        return float(model.end_value(x, T))

    u0 = np.full(steps, start_fraction * fmax)
    t0 = time.perf_counter()
    res = minimize(lambda u: -simulate(u), u0, method="SLSQP", bounds=[(0.0, fmax)] * steps,
                   options={"maxiter": 500, "ftol": 1e-9})
    seconds = time.perf_counter() - t0
    return {"objective": simulate(res.x), "seconds": seconds, "simulations": n_sim[0], "success": bool(res.success),
            "message": res.message}


def tool(problem, steps: int):
    """The tool as a user runs it: default settings (multistart on the free cores)."""
    p = with_settings(problem, pump_steps=steps)
    t0 = time.perf_counter()
    r = optimize(p)
    return {"objective": r.objective_sim, "seconds": time.perf_counter() - t0, "status": r.status,
            "solver_seconds": sum(s.seconds for s in r.starts), "iterations": sum(s.iterations for s in r.starts)}


def one_size(elements: int) -> dict:
    """Run in a child process: optimise with `elements` finite elements, report time and peak memory."""
    problem = load_problem(PROBLEM)
    steps = 25
    p = with_settings(problem, pump_steps=steps, elements_per_step=elements // steps, starts=1)
    t0 = time.perf_counter()
    r = optimize(p, workers=1)
    wall = time.perf_counter() - t0
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"elements": elements, "seconds": wall, "solver_seconds": sum(s.seconds for s in r.starts),
            "iterations": sum(s.iterations for s in r.starts), "peak_mb": peak_mb,
            "objective": r.objective_sim, "status": r.status}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer sizes")
    ap.add_argument("--one-size", type=int, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one_size:
        print(json.dumps(one_size(args.one_size)))
        return

    problem = load_problem(PROBLEM)
    steps = 30
    print(f"Park-Ramirez secreted protein, tf = 15 h, {steps} piecewise-constant pump steps\n")
    ours = tool(problem, steps)
    base = scipy_single_shooting(problem, steps)
    print(f"  optfeed (collocation + IPOPT): objective {ours['objective']:.4f}  time {ours['seconds']:.2f} s"
          f"  ({ours['status']}, {problem.settings.starts} starts, {ours['iterations']} iterations in all)")
    print(f"  scipy single shooting (SLSQP): objective {base['objective']:.4f}  time {base['seconds']:.2f} s"
          f"  ({base['simulations']} simulations; {base['message']})")
    print(f"  ratio: baseline time / optfeed time = {base['seconds'] / ours['seconds']:.1f}")
    print(f"  objective difference: optfeed - baseline = {ours['objective'] - base['objective']:+.4f} "
          f"({(ours['objective'] - base['objective']) / abs(base['objective']):+.2%})\n")

    sizes = [50, 100, 200, 400, 800] if not args.quick else [50, 200]
    print("Solve time and peak memory against finite elements (25 pump steps, degree 3, one start):")
    print(f"  {'elements':>8} {'wall s':>8} {'IPOPT s':>8} {'iter':>5} {'peak MB':>8} {'s per element':>14} objective")
    rows = []
    for n in sizes:
        out = subprocess.run([sys.executable, __file__, "--one-size", str(n)], capture_output=True, text=True,
                             check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append(r)
        print(f"  {n:>8} {r['seconds']:>8.2f} {r['solver_seconds']:>8.2f} {r['iterations']:>5} {r['peak_mb']:>8.0f}"
              f" {r['solver_seconds'] / n * 1000:>11.2f} ms {r['objective']:.4f}")
    first, last = rows[0], rows[-1]
    grow = last["elements"] / first["elements"]
    print(f"\n  elements x{grow:.0f}: IPOPT time x{last['solver_seconds'] / first['solver_seconds']:.1f}, "
          f"iterations x{last['iterations'] / first['iterations']:.1f}, "
          f"time per iteration x{(last['solver_seconds'] / last['iterations']) / (first['solver_seconds'] / first['iterations']):.1f}, "
          f"peak memory x{last['peak_mb'] / first['peak_mb']:.1f}")


if __name__ == "__main__":
    main()
