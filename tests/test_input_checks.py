"""More bad input: reserved names, constants that cannot be computed, run lengths,
and sweep files whose schedule or values do not fit. Each must be an InputError
naming the file and key, raised before anything runs."""

import math

import pytest

import optfeed
from optfeed.check import run_length
from optfeed.errors import InputError
from optfeed.sweep import load_sweep

from conftest import CONFIGS

BASE = """
species:
  X: {initial: 1 g/L}
  S: {initial: 1 g/L}
parameters: {mu_max: 0.5 1/h, Z: PARAM_Z}
rates:
  mu: RATE
reactions: {X: mu * X, S: -mu * X}
feeds:
  f: {composition: {S: 100 g/L}, max_rate: 0.1 L/h}
vessel: {initial_volume: 1 L, working_volume: 2 L}
horizon: {end_time: 10 h}
"""


def problem(write, rate="monod(S, mu_max, 0.1)", z="1", extra=""):
    return write("p.yaml", BASE.replace("RATE", rate).replace("PARAM_Z", z) + extra)


def test_state_names_are_reserved(write):
    path = write("p.yaml", BASE.replace("RATE", "mu_max").replace("PARAM_Z", "1").replace("Z: 1", "fed_S: 2"))
    with pytest.raises(InputError, match=r"p.yaml:\d+: parameters.fed_S: name 'fed_S' is reserved"):
        optfeed.load_problem(path)


def test_division_by_a_zero_parameter_is_reported_with_its_key(write):
    with pytest.raises(InputError, match=r"p.yaml:6: rates.mu: division by a constant zero"):
        optfeed.load_problem(problem(write, rate="mu_max / Z * S", z="0"))


def test_rate_law_of_constants_that_cannot_be_computed(write):
    with pytest.raises(InputError, match=r"rates.mu: log\(\) of constant arguments"):
        optfeed.load_problem(problem(write, rate="log(Z - 1) * S", z="1"))


def test_end_time_rules(write):
    p = optfeed.load_problem(problem(write))
    assert run_length(p) == 10.0
    assert run_length(p, 10.0) == 10.0
    with pytest.raises(InputError, match="fixes the end time at 10 h"):
        run_length(p, 12.0)
    for bad in (math.nan, math.inf, -1.0):
        with pytest.raises(InputError, match="above zero"):
            run_length(p, bad)
    free = optfeed.load_problem(write("free.yaml", BASE.replace("RATE", "mu_max").replace("PARAM_Z", "1").replace(
        "horizon: {end_time: 10 h}", "horizon: {end_time: {min: 5 h, max: 20 h, guess: 8 h}}")))
    assert run_length(free) == 8.0 and run_length(free, 15.0) == 15.0
    with pytest.raises(InputError, match="outside the allowed 5..20 h"):
        run_length(free, 25.0)


def test_problem_name_must_be_a_safe_folder_name(write):
    path = write("p.yaml", "name: ../../elsewhere\n" + BASE.replace("RATE", "mu_max").replace("PARAM_Z", "1"))
    with pytest.raises(InputError, match=r"p.yaml:1: name: name '../../elsewhere' is used for result folders"):
        optfeed.load_problem(path)


def sweep(tmp_path, body):
    (tmp_path / "animal_cell.yaml").write_text((CONFIGS / "animal_cell.yaml").read_text())
    (tmp_path / "plan.csv").write_text((CONFIGS / "animal_cell_plan.csv").read_text())
    path = tmp_path / "s.yaml"
    path.write_text("problems: animal_cell.yaml\n" + body)
    return path


def test_sweep_schedule_is_checked_before_anything_runs(tmp_path):
    (tmp_path / "bad.csv").write_text("time [h],glucose [mL/h],sugar [mL/h]\n0,1,1\n")
    with pytest.raises(InputError, match=r"bad.csv:1: nutrients: feed has no schedule"):
        load_sweep(sweep(tmp_path, "job: check\nschedule: bad.csv\n"))


def test_sweep_range_excludes_its_stop(tmp_path):
    s = load_sweep(sweep(tmp_path, "job: check\nschedule: plan.csv\n"
                                   "grid:\n  parameters.k_d: {range: [0.003, 0.006, 0.001]}\n"))
    assert [c.values["parameters.k_d"] for c in s.cases] == pytest.approx([0.003, 0.004, 0.005])


def test_sweep_time_limit_needs_a_unit(tmp_path):
    with pytest.raises(InputError, match=r"s.yaml:4: time_limit: give the time limit with its unit"):
        load_sweep(sweep(tmp_path, "job: check\nschedule: plan.csv\ntime_limit: 600\n"))
