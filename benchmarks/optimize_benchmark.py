"""Speed of `optfeed optimize` and of sweeps, against hand-written raw CasADi references.

Prints figures and ratios, all measured in one run (quote the ratios: the machine is
shared and seconds move with its load; CPU seconds move less than wall seconds).

1. **Per published problem** (tests/published/: Park-Ramirez, ethanol and penicillin
   with free end times, Lee-Ramirez with two feeds): the whole `optfeed optimize
   PROBLEM` command as a user runs it (default settings: multistart on the cores,
   pump-grid refinement, verification, every file and figure written), as a process
   of its own (and again with `--no-figures`, to show what the figures cost),
   against `benchmarks/reference_<problem>.py`, a single-start textbook direct
   collocation in raw CasADi on optfeed's default grid (40 pump steps x 4
   elements, Radau degree 3, IPOPT tolerance 1e-8), also a process of its own.
   Cost: CPU seconds (user + system) of the process and everything it started, from
   process start to exit, from wait4(2); optfeed's modules are byte-compiled first,
   as an installed package has them. Both objectives are re-simulated
   (optfeed's `objective.value`; the reference's own CVODES run at 1e-12).
2. **Elements 50 to 2000** (Park-Ramirez, 50 pump steps, 1 to 40 elements per step):
   optfeed with one start on a fixed grid (`starts: 1`, `refine_grid: false`) and
   the reference on the same grid (stopped at 500 iterations: from its cold start
   it needs thousands on the finest grids), each in a fresh process: IPOPT
   iterations, CPU per iteration, solve CPU and process CPU, and their growth
   against 50 elements.
3. **Sweep throughput**: `optfeed sweep` of 100 parameter-varied cases of the ethanol
   problem (4 states, default settings; mu_max and the ethanol inhibition constant
   sampled by Latin hypercube) with 1 and 2 workers, with case processes that keep
   their solvers (the default) and with a fresh process per case
   (`--fresh-process-per-case`): cases per minute (wall) and CPU per case.

Run:  python benchmarks/optimize_benchmark.py [--quick] [--parts 1,2,3] [--repeats N] [--cases N]

`--quick` runs each published problem once, elements 50/200/800, and 10 sweep cases.
"""

from __future__ import annotations

import argparse
import compileall
import json
import os
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from functools import partial
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "benchmarks"
PUBLISHED = ROOT / "tests" / "published"
PROBLEMS = ["park_ramirez", "ethanol", "penicillin", "lee_ramirez"]
print = partial(print, flush=True)  # noqa: A001 - figures appear as they are measured


def optfeed_command() -> list[str]:
    """The optfeed command as installed next to this Python (else via -m)."""
    script = Path(sys.executable).parent / "optfeed"
    return [str(script)] if script.exists() else [sys.executable, "-m", "optfeed.cli"]


def measured(cmd, cwd=None) -> dict:
    """Run ``cmd`` as a child process; its exit code, stdout, stderr, CPU seconds
    (user + system, with everything it started and waited for) and peak memory."""
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, text=True, cwd=cwd)
        _, status, ru = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t0
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        return {"code": proc.returncode, "stdout": out.read(), "stderr": err.read(),
                "cpu": ru.ru_utime + ru.ru_stime, "wall": wall, "rss_mb": ru.ru_maxrss / 1024}


def last_json(text: str) -> dict:
    for line in reversed(text.strip().splitlines()):
        if line.startswith("{"):
            return json.loads(line)
    raise ValueError(f"no JSON line in:\n{text[-2000:]}")


def median(values):
    return statistics.median(values) if values else float("nan")


# ---------------------------------------------------------------------- 1. published problems


def run_reference(name: str, *args) -> dict:
    m = measured([sys.executable, str(BENCH / f"reference_{name}.py"), *map(str, args)])
    if m["code"] != 0:
        raise RuntimeError(f"reference_{name}.py failed:\n{m['stderr'][-2000:]}")
    return {**m, **last_json(m["stdout"])}


def run_optfeed(name: str, work: Path, figures: bool = True) -> dict:
    out = work / f"{name}-{time.monotonic_ns()}"
    m = measured([*optfeed_command(), "optimize", str(PUBLISHED / f"{name}.yaml"), "--out", str(out), "--quiet",
                  *([] if figures else ["--no-figures"])])
    summary = json.loads((out / "summary.json").read_text())
    shutil.rmtree(out, ignore_errors=True)
    rec = summary.get("record", {})
    return {**m, "status": summary["status"], "objective": summary["objective"]["value"],
            "objective_nlp": summary["objective"]["nlp"], "end_time": summary.get("end_time_h"),
            "grid": rec.get("grid", {}), "optima": rec.get("local_optima_fine"),
            "iterations": sum(s["iterations"] for s in summary["solver"]["starts"])}


def part_published(repeats: int, work: Path) -> None:
    print("\n1. The whole `optfeed optimize` command against a single-start raw CasADi script "
          f"(CPU of each process, median of {repeats})")
    print(f"   {'problem':<13} {'optfeed CPU':>11} {'ref CPU':>8} {'ratio':>6} {'no figures':>10}   "
          f"{'optfeed objective':>18} "
          f"{'reference objective':>19} {'optfeed vs ref':>14}   optfeed: status, final grid; reference: status, "
          "iterations")
    ratios = {}
    for name in PROBLEMS:
        opt, ref, bare = [], [], []
        for _ in range(repeats):  # interleaved, so a change in the machine's load hits all three
            ref.append(run_reference(name))
            opt.append(run_optfeed(name, work))
            bare.append(run_optfeed(name, work, figures=False))
        o_cpu, r_cpu = median([r["cpu"] for r in opt]), median([r["cpu"] for r in ref])
        b_cpu = median([r["cpu"] for r in bare])
        o, r = opt[0], ref[0]
        diff = (o["objective"] - r["objective"]) / abs(r["objective"])
        ratios[name] = o_cpu / r_cpu
        grid = o["grid"]
        print(f"   {name:<13} {o_cpu:>10.2f}s {r_cpu:>7.2f}s {o_cpu / r_cpu:>6.2f} {b_cpu / r_cpu:>10.2f}   "
              f"{o['objective']:>18.7g} "
              f"{r['objective']:>19.7g} {diff:>+14.4%}   {o['status']}, {grid.get('pump_steps')}x"
              f"{grid.get('elements', 0) // max(grid.get('pump_steps', 1), 1)}; {r['status']}, {r['iterations']} it")
        if o.get("end_time") and r.get("end_time") and abs(o["end_time"] - r["end_time"]) > 1e-6:
            print(f"   {'':<13} end time: optfeed {o['end_time']:.3f} h, reference {r['end_time']:.3f} h")
    print("   ratio = optfeed CPU / reference CPU (target: at most 1.0 on every problem); 'no figures': the same "
          "command with --no-figures (what the figures cost: drawing them and writing their SVG)")
    print("   objectives re-simulated; "
          f"largest ratio {max(ratios.values()):.2f} ({max(ratios, key=ratios.get)})")


# ---------------------------------------------------------------------- 2. elements 50 to 2000

ONE_START = textwrap.dedent("""
    import dataclasses, json, sys
    import optfeed
    from optfeed.problem import load_problem

    job = sys.modules["optfeed.optimize"]  # the module (the package binds the name to the function)

    stages = []  # every IPOPT solve of the run: (elements of its grid, iterations, CPU s)
    real = job.solve

    def solve(nlp, *a, **k):
        st = real(nlp, *a, **k)
        stages.append((nlp.grid.elements, st.iterations, st.seconds))
        return st

    job.solve = solve  # instrumentation of this measurement only
    p = load_problem(sys.argv[1])
    s = dataclasses.replace(p.settings, pump_steps=int(sys.argv[2]), elements_per_step=int(sys.argv[3]),
                            starts=1, refine_grid=False)
    r = job.optimize(dataclasses.replace(p, settings=s), workers=1)
    n = s.pump_steps * s.elements_per_step
    fine = [x for x in stages if x[0] == n]
    print(json.dumps({"status": r.status, "objective": r.objective_sim, "stages": stages,
                      "iterations": sum(x[1] for x in stages), "cpu_solve": sum(x[2] for x in stages),
                      "fine_iterations": sum(x[1] for x in fine), "fine_cpu": sum(x[2] for x in fine)}))
""")


REF_MAX_ITER = 500  # the reference's cold single start needs thousands of iterations on the finest grids


def part_elements(sizes, steps: int = 50) -> None:
    print(f"\n2. Elements {sizes[0]} to {sizes[-1]}: Park-Ramirez, {steps} pump steps, one start, fixed grid, "
          "a fresh process each")
    print(f"   {'':>8} | {'optfeed (coarse grid, then this grid)':<56} | {'reference (this grid)':<47} |")
    print(f"   {'elements':>8} | {'it':>9} {'ms/it':>6} {'solve':>7} {'total':>7} {'MB':>6} {'objective':>10} {'status':<4} | "
          f"{'it':>5} {'ms/it':>6} {'solve':>7} {'total':>7} {'MB':>6} {'objective':>10} | {'total ratio':>11}")
    rows = []
    for n in sizes:
        k = n // steps
        m = measured([sys.executable, "-c", ONE_START, str(PUBLISHED / "park_ramirez.yaml"), str(steps), str(k)])
        if m["code"] != 0:
            raise RuntimeError(m["stderr"][-2000:])
        o = {**m, **last_json(m["stdout"])}
        r = run_reference("park_ramirez", "--pump-steps", steps, "--elements-per-step", k, "--max-iter", REF_MAX_ITER)
        o_it = 1000 * o["fine_cpu"] / max(o["fine_iterations"], 1)
        r_it = 1000 * r["cpu_solve"] / max(r["iterations"], 1)
        rows.append((n, o, r, o_it, r_it))
        its = f"{o['iterations'] - o['fine_iterations']}+{o['fine_iterations']}"
        ok = "ok" if o["status"] == "optimal, verified" else o["status"]
        r_ok = "" if r["status"] == "Solve_Succeeded" else f" ({r['status']})"
        print(f"   {n:>8} | {its:>9} {o_it:>6.1f} {o['cpu_solve']:>6.1f}s {o['cpu']:>6.1f}s {o['rss_mb']:>6.0f} "
              f"{o['objective'] or float('nan'):>10.5g} {ok:<4} | {r['iterations']:>5} {r_it:>6.1f} "
              f"{r['cpu_solve']:>6.1f}s {r['cpu']:>6.1f}s {r['rss_mb']:>6.0f} {r['objective']:>10.5g} | "
              f"{o['cpu'] / r['cpu']:>11.2f}{r_ok}")
    n0, o0, r0, o_it0, r_it0 = rows[0]
    print(f"   growth against {n0} elements (optfeed: per iteration on this grid, total CPU | reference: per "
          "iteration, iterations, total CPU):")
    for n, o, r, o_it, r_it in rows[1:]:
        print(f"   {n:>8}: x{n / n0:<5g} optfeed x{o_it / o_it0:.2f} /it, x{o['cpu'] / o0['cpu']:.2f} total | "
              f"reference x{r_it / r_it0:.2f} /it, x{r['iterations'] / max(r0['iterations'], 1):.2f} it, "
              f"x{r['cpu'] / r0['cpu']:.2f} total")
    print("   it = IPOPT iterations (optfeed: coarse + this grid); ms/it = CPU per iteration on this grid; "
          f"solve = CPU in IPOPT; total = process CPU; MB = peak resident memory; the reference is stopped at {REF_MAX_ITER} iterations")


# ---------------------------------------------------------------------- 3. sweep throughput

SWEEP_PROBLEM = """
# tests/published/ethanol.yaml with its growth constants named, so that a sweep can vary them
name: ethanol_varied
species:
  X: {initial: 1, description: cell mass}
  S: {initial: 150, description: glucose}
  E: {initial: 0, description: ethanol}
parameters: {mu_max: 0.408, K_E: 16}
rates:
  g1: (mu_max/(1 + E/K_E))*(S/(0.22 + S))
  g2: (1/(1 + E/71.5))*(S/(0.44 + S))
reactions:
  X: g1*X
  S: -10*g1*X
  E: g2*X
feeds:
  u: {composition: {S: 150}, max_rate: 12}
vessel: {initial_volume: 10, working_volume: 200}
horizon:
  end_time: {min: 20 h, max: 100 h, guess: 60 h}
objective: {maximize: product_mass, product: E}
"""


def part_sweep(cases: int, work: Path) -> None:
    folder = work / "sweep"
    folder.mkdir()
    (folder / "ethanol_varied.yaml").write_text(SWEEP_PROBLEM)
    path = folder / "bench.yaml"
    path.write_text("problems: ethanol_varied.yaml\njob: optimize\ntime_limit: 10 min\n"
                    f"sample:\n  method: latin_hypercube\n  count: {cases}\n  seed: 1\n"
                    "  ranges:\n    parameters.mu_max: {min: 0.36, max: 0.45}\n"
                    "    parameters.K_E: {min: 14, max: 18}\n")
    print(f"\n3. Sweep of {cases} parameter-varied cases of the ethanol problem (optimize, default settings)")
    print(f"   {'workers':>7} {'case processes':<30} {'cases/min':>9} {'CPU/case':>9} {'wall':>8} {'peak MB':>8}  statuses")
    rates = {}
    for workers in (1, 2):
        for fresh in (False, True):
            out = folder / f"out-{workers}-{int(fresh)}"
            cmd = [*optfeed_command(), "sweep", str(path), "--out", str(out), "--workers", str(workers), "--quiet"]
            if fresh:
                cmd.append("--fresh-process-per-case")
            m = measured(cmd)
            rows = sqlite3.connect(out / "sweep.sqlite").execute("SELECT status FROM cases").fetchall()
            statuses = {}
            for (s,) in rows:
                statuses[s] = statuses.get(s, 0) + 1
            rate = cases / m["wall"] * 60
            rates[(workers, fresh)] = (rate, m["cpu"] / cases)
            kind = "a fresh process per case" if fresh else "kept, with their solvers"
            print(f"   {workers:>7} {kind:<30} {rate:>9.1f} {m['cpu'] / cases:>8.2f}s {m['wall']:>7.1f}s "
                  f"{m['rss_mb']:>8.0f}  {statuses}")
            shutil.rmtree(out, ignore_errors=True)
    for workers in (1, 2):
        (kept, kept_cpu), (fresh, fresh_cpu) = rates[(workers, False)], rates[(workers, True)]
        print(f"   {workers} worker(s): kept / fresh processes: x{kept / fresh:.2f} cases per minute, "
              f"x{fresh_cpu / kept_cpu:.2f} less CPU per case")
    print(f"   2 workers / 1 worker: x{rates[(2, False)][0] / rates[(1, False)][0]:.2f} (kept), "
          f"x{rates[(2, True)][0] / rates[(1, True)][0]:.2f} (fresh)")
    best = rates[(2, False)][0]
    print(f"   1000 such cases on 2 workers: about {1000 / best:.0f} min (target: under 30 min)")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--parts", default="1,2,3")
    ap.add_argument("--repeats", type=int, default=None, help="runs per published problem (median; default 3, quick 1)")
    ap.add_argument("--cases", type=int, default=None, help="sweep cases (default 100, quick 10)")
    args = ap.parse_args()
    parts = {int(x) for x in args.parts.split(",")}
    repeats = args.repeats or (1 if args.quick else 3)
    cases = args.cases or (10 if args.quick else 100)
    sizes = [50, 200, 800] if args.quick else [50, 100, 200, 400, 800, 1000, 2000]
    work = Path(tempfile.mkdtemp(prefix="optfeed-bench-"))
    # optfeed's modules compiled once, as an installed package has them (pip compiles
    # at install; an editable checkout writes them on first import, unless the
    # environment says PYTHONDONTWRITEBYTECODE, as some do: every process would then
    # compile ~60 modules again, about 0.13 s CPU that no user pays)
    compileall.compile_dir(str(ROOT / "optfeed"), quiet=1)
    print(f"optfeed benchmark on {os.cpu_count()} cores (load average {os.getloadavg()[0]:.1f} at the start)")
    t0 = time.perf_counter()
    try:
        if 1 in parts:
            part_published(repeats, work)
        if 2 in parts:
            part_elements(sizes)
        if 3 in parts:
            part_sweep(cases, work)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(f"\n(benchmark took {time.perf_counter() - t0:.0f} s; load average {os.getloadavg()[0]:.1f} at the end)")


if __name__ == "__main__":
    main()
