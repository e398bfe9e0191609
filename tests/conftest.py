"""Shared helpers for the tests."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"

# our own scenario: biomass on a sugar feed, held back by the OTR ceiling (a quick solve)
OXYGEN = """
name: oxygen_limited
species:
  X: {initial: 2 g/L}
  S: {initial: 0.5 g/L}
parameters: {mu_max: 0.5 1/h, K_s: 0.1 g/L, Y_XS: 0.5}
rates:
  mu: monod(S, mu_max, K_s)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
feeds:
  sugar: {composition: {S: 200 g/L}, max_rate: 50 mL/h}
vessel:
  initial_volume: 1 L
  working_volume: 1.4 L
  oxygen: {uptake: 20 * mu * X + 1 * X, transfer_max: 40 mmol/L/h}
horizon: {end_time: 12 h}
objective: {maximize: product_mass, product: X}
solver: {pump_steps: 12, starts: 1}
"""

# (problem, proposed schedule, expected exit code of `optfeed check`)
EXAMPLES = [
    ("fast_microbe.yaml", "fast_microbe_plan.csv", 1),
    ("inhibited_product.yaml", "inhibited_product_plan.yaml", 0),
    ("animal_cell.yaml", "animal_cell_plan.csv", 0),
]


@pytest.fixture
def write(tmp_path):
    """write(name, text) -> path of a dedented file in tmp_path."""

    def _write(name, text):
        path = tmp_path / name
        path.write_text(textwrap.dedent(text).lstrip())
        return path

    return _write


_OPTIMIZED: dict = {}


@pytest.fixture(scope="session")
def optimized():
    """optimized(path, set=None) -> the OptimizeResult of that problem file with
    default settings (or these overrides), computed once per test session (optimize is deterministic: budgets are
    iteration counts), so several tests can judge one run."""
    from optfeed.optimize import optimize

    def get(path, set=None):
        key = (str(path), tuple(sorted((set or {}).items())))
        if key not in _OPTIMIZED:
            _OPTIMIZED[key] = optimize(path, set=set)
        return _OPTIMIZED[key]

    return get
