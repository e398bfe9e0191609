"""Makes the INVENTED run data of configs/inhibited_product_runs.yaml.

Not a measurement of anything: the runs are simulated from configs/inhibited_product.yaml
with the 'true' values below (chosen by us, a little off the file's) and given
seeded normal noise of the error model the runs file states. Run from the repository:

    python configs/runs/make_inhibited_product_runs.py

It rewrites the data files named in the runs file (the sampling times and columns
are read from them; only the values change).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from optfeed.fit.runs import load_runs
from optfeed.fit.simulate import Sampler
from optfeed.model import build_model
from optfeed.problem import load_problem

HERE = Path(__file__).resolve().parent
TRUTH = {"mu_max": 0.32, "K_i": 15.0, "Y_XS": 0.48, "alpha": 0.55}  # 1/h, g/L, g/g, g/g (invented)
SEED = 2026


def main() -> None:
    problem = load_problem(HERE.parent / "inhibited_product.yaml")
    model = build_model(problem)
    runs = load_runs(HERE.parent / "inhibited_product_runs.yaml", problem, model)
    sampler = Sampler(model, list(TRUTH))
    rng = np.random.default_rng(SEED)
    for run in runs.runs:
        c = np.array(run.constants, dtype=float)
        for name, value in TRUTH.items():
            c[model.constant_index(name)] = value
        values, _ = sampler.values(run, c)
        path = Path(run.data_file)
        head = [line for line in path.read_text().splitlines() if line.startswith("#")]
        names = list(run.values)
        rows = [f"time [h]," + ",".join(f"{q} [{run.units[q]}]" for q in names)]
        for k, t in enumerate(run.times):
            cells = []
            for q in names:
                if not np.isfinite(run.values[q][k]):
                    cells.append("")  # a sample not taken stays so
                    continue
                e = runs.errors[q]
                y = values[q][k]
                sd = np.hypot(e.absolute, e.relative * y)
                cells.append(f"{max(y + sd * rng.standard_normal(), 0.0):.3f}")
            rows.append(f"{t:g}," + ",".join(cells))
        path.write_text("\n".join(head + rows) + "\n")


if __name__ == "__main__":
    main()
