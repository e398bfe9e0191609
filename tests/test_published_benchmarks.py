"""optimize against published fed-batch optimal-control benchmarks, default settings.

Each problem file in tests/published/ names its source. Best-known objective values:

* Park-Ramirez secreted protein, tf = 15 h: 32.686 (Luus 1995, iterative dynamic
  programming), as tabulated in later method comparisons (secondary source); the
  original 1988 paper reports 32.47, a sub-optimal profile of the same problem.
* Ethanol (Chen and Hwang 1990), free end time: about 20839 at tf about 61.2 h
  (from memory; later work reports about 20842).
* Penicillin (Cuthrell and Biegler 1989, case III), free end time: 87.69 to 87.99
  over the literature (from memory); we compare with 87.99, the best of these.

The task sets the bar at 0.5 % of the best-known value, from default settings.
"""

import pytest

from conftest import ROOT

PUBLISHED = ROOT / "tests" / "published"

CASES = [
    ("park_ramirez.yaml", 32.686, None),
    ("ethanol.yaml", 20839.0, 61.2),
    ("penicillin.yaml", 87.99, None),  # optimum is flat in tf beyond ~135 h: tf not pinned
]


@pytest.mark.parametrize("name,best_known,tf", CASES)
def test_reaches_best_known_optimum(name, best_known, tf, optimized):
    r = optimized(PUBLISHED / name)
    assert r.status == "optimal, verified", r.message
    assert r.objective_sim == pytest.approx(best_known, rel=5e-3)
    assert r.objective_nlp == pytest.approx(best_known, rel=5e-3)
    if tf is not None:
        assert r.end_time == pytest.approx(tf, abs=1.0)
    assert r.exit_code == 0
