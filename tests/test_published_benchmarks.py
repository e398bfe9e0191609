"""optimize against published fed-batch optimal-control benchmarks, default settings.

Each problem file in tests/published/ names its source. Best-known objective values:

* Park-Ramirez secreted protein, tf = 15 h: 32.686 (Luus 1995, iterative dynamic
  programming), as tabulated in later method comparisons (secondary source); the
  original 1988 paper reports 32.47, a sub-optimal profile of the same problem.
* Ethanol (Chen and Hwang 1990), free end time: about 20839 at tf about 61.2 h
  (from memory; later work reports about 20842).
* Penicillin (Cuthrell and Biegler 1989, case III), free end time: 87.69 to 87.99
  over the literature (from memory); we compare with 87.99, the best of these.
* Lee-Ramirez induced foreign protein (two feeds, Q = 0, tf = 10 h): about 1.0 (from
  memory, as reported by Balsa-Canto et al. 2001; we are not sure of the digits after
  the first two, and the model's numbers in the problem file are from memory too).
  So the band is 1.5 % rather than 0.5 %; what pins the value more tightly is an
  independent implementation: benchmarks/reference_lee_ramirez.py, the same model
  written by hand in raw CasADi (textbook collocation, one start, 40 pump steps),
  reaches 1.00960 re-simulated, and optfeed's grid is at least that fine, so it must
  not end below it (1e-4 relative allowed for the verification's rounding).

The task sets the bar at 0.5 % of the best-known value, from default settings.
"""

import pytest

from conftest import ROOT

PUBLISHED = ROOT / "tests" / "published"

CASES = [
    ("park_ramirez.yaml", 32.686, None, 5e-3),
    ("ethanol.yaml", 20839.0, 61.2, 5e-3),
    ("penicillin.yaml", 87.99, None, 5e-3),  # optimum is flat in tf beyond ~135 h: tf not pinned
    ("lee_ramirez.yaml", 1.0, None, 1.5e-2),  # remembered as about 1.0: see the module docstring
]

# re-simulated optimum of benchmarks/reference_lee_ramirez.py (40 pump steps, raw CasADi)
LEE_RAMIREZ_REFERENCE = 1.00960


@pytest.mark.parametrize("name,best_known,tf,rel", CASES)
def test_reaches_best_known_optimum(name, best_known, tf, rel, optimized):
    r = optimized(PUBLISHED / name)
    assert r.status == "optimal, verified", r.message
    assert r.objective_sim == pytest.approx(best_known, rel=rel)
    assert r.objective_nlp == pytest.approx(best_known, rel=rel)
    if name == "lee_ramirez.yaml":
        assert r.objective_sim >= LEE_RAMIREZ_REFERENCE * (1 - 1e-4)
    if name == "park_ramirez.yaml":
        # within 0.1 % of the best-known optimum (or above it: a finer pump grid than
        # Luus's), not the 80-step answer of a local optimum that a finer grid helps
        # less (32.650: the rival optimum's grid must be refined too)
        assert r.objective_sim >= best_known * (1 - 1e-3)
    if tf is not None:
        assert r.end_time == pytest.approx(tf, abs=1.0)
    assert r.exit_code == 0
