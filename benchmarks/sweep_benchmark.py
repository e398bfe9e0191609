"""Benchmark of `optfeed sweep`: cases per minute with one and two workers, and the
store's overhead per case (prints figures and ratios).

The sweep optimizes the published ethanol problem (tests/published/ethanol.yaml,
free end time) for 8 pump sizes, with 2 starts per case so each case is a few
seconds of work. Both runs happen in this process, one after the other.

Run:  python benchmarks/sweep_benchmark.py
"""

from __future__ import annotations

import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from optfeed.sweep import load_sweep, run_sweep  # noqa: E402
from optfeed.sweep.spec import Case  # noqa: E402
from optfeed.sweep.store import Store  # noqa: E402

CASES = 8


def sweep_file(folder: Path) -> Path:
    problem = (ROOT / "tests" / "published" / "ethanol.yaml").read_text()
    (folder / "ethanol.yaml").write_text(problem.replace("objective:", "solver: {starts: 2}\nobjective:"))
    path = folder / "bench.yaml"
    path.write_text("problems: ethanol.yaml\njob: optimize\ntime_limit: 10 min\n"
                    f"grid:\n  feeds.u.max_rate: {{linspace: [8, 12, {CASES}]}}\n")
    return path


def store_overhead(n: int = 2000) -> float:
    """Seconds per case for queue + mark running + finish + read back, on disk."""
    folder = Path(tempfile.mkdtemp())
    try:
        store = Store(folder / "s.sqlite")
        cases = [Case(f"k{i}", f"case {i}", {"x": i}, {}, "p.yaml") for i in range(n)]
        t0 = time.perf_counter()
        store.queue(cases, "optimize")
        for c in cases:
            store.mark_running(c.key)
            store.finish(c.key, {"status": "optimal, verified", "exit_code": 0, "objective": 1.0,
                                 "figures": {"a": 1.0}, "message": "ok", "run_dir": "x", "seconds": 1.0})
        store.rows()
        store.close()
        return (time.perf_counter() - t0) / n
    finally:
        shutil.rmtree(folder)


def main():
    folder = Path(tempfile.mkdtemp())
    try:
        sweep = load_sweep(sweep_file(folder))
        rates = {}
        for workers in (1, 2):
            t0 = time.perf_counter()
            r = run_sweep(sweep, folder / f"out{workers}", workers=workers)
            seconds = time.perf_counter() - t0
            ok = sum(1 for row in r.rows if row["status"] == "optimal, verified")
            rates[workers] = len(sweep.cases) / seconds * 60
            print(f"  {workers} worker(s): {len(sweep.cases)} cases ({ok} optimal, verified) in {seconds:.1f} s"
                  f" = {rates[workers]:.1f} cases/min")
        print(f"  ratio 2 workers / 1 worker: {rates[2] / rates[1]:.2f}")
        per_case = store_overhead()
        mean_case = 60.0 / rates[1]
        print(f"  store overhead: {per_case * 1000:.2f} ms per case ({per_case / mean_case:.4%} of a mean case here)")
    finally:
        shutil.rmtree(folder)


if __name__ == "__main__":
    main()
