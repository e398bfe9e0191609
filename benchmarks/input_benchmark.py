"""Benchmark of reading large inputs: time against size, printed as ratios.

Every reader should be linear in the size of what it reads. For each input the
script times a size n and a size 10 n and prints the ratio (about 10 for linear
work, about 100 for quadratic):

* a problem file with n chained rates (r_i uses r_(i-1)), read by ``load_problem``;
* a YAML schedule with n rows, read by ``load_schedule`` and split into segments;
* a CSV schedule with n rows, read the same way;
* a sweep of n cases (one grid axis), counted and built by ``load_sweep``.

Run:  python benchmarks/input_benchmark.py          # about a minute
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from optfeed import load_problem, load_schedule  # noqa: E402
from optfeed.sweep import load_sweep  # noqa: E402

OK_PROBLEM = (ROOT / "tests" / "bad_input" / "ok_problem.yaml").read_text()


def chained_rates(folder: Path, n: int) -> float:
    rates = "rates:\n  mu: monod(S, mu_max, K_s)\n" + "".join(
        f"  r{i}: {'mu' if i == 0 else f'r{i - 1}'} * 1.0\n" for i in range(n))
    path = folder / f"chain{n}.yaml"
    path.write_text(OK_PROBLEM.replace("rates:\n  mu: monod(S, mu_max, K_s)\n", rates))
    t0 = time.perf_counter()
    load_problem(path)
    return time.perf_counter() - t0


def yaml_rows(folder: Path, n: int) -> float:
    path = folder / f"rows{n}.yaml"
    path.write_text("feeds:\n  glucose:\n" + "".join(f"    - {{time: {i * 9.0 / n:.6f}, rate: 0.001}}\n"
                                                     for i in range(n)))
    t0 = time.perf_counter()
    load_schedule(path, ["glucose"], 10.0).segments(["glucose"], 10.0)
    return time.perf_counter() - t0


def csv_rows(folder: Path, n: int) -> float:
    path = folder / f"rows{n}.csv"
    path.write_text("time [h],glucose [L/h]\n" + "".join(f"{i * 9.0 / n:.6f},0.001\n" for i in range(n)))
    t0 = time.perf_counter()
    load_schedule(path, ["glucose"], 10.0).segments(["glucose"], 10.0)
    return time.perf_counter() - t0


def sweep_cases(folder: Path, n: int) -> float:
    (folder / "ok_problem.yaml").write_text(OK_PROBLEM)
    path = folder / f"sweep{n}.yaml"
    path.write_text(f"problems: ok_problem.yaml\njob: optimize\ngrid:\n  parameters.mu_max: {{linspace: [0.3, 0.5, {n}]}}\n")
    t0 = time.perf_counter()
    load_sweep(path)
    return time.perf_counter() - t0


def main() -> None:
    folder = Path(tempfile.mkdtemp())
    rows = [("chained rates", chained_rates, 300), ("YAML schedule rows", yaml_rows, 1000),
            ("CSV schedule rows", csv_rows, 5000), ("sweep cases", sweep_cases, 100)]
    print(f"{'input':<20} {'n':>7} {'time n':>9} {'10 n':>8} {'time 10 n':>10} {'ratio':>6}")
    for label, func, n in rows:
        func(folder, n)  # warm up (imports, caches)
        small = func(folder, n)
        large = func(folder, 10 * n)
        print(f"{label:<20} {n:>7} {small:>8.3f}s {10 * n:>8} {large:>9.3f}s {large / small:>6.1f}")
    print("ratio ~10: linear; ~100: quadratic")


if __name__ == "__main__":
    main()
