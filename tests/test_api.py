"""The Python API where Python users look: top-level jobs, overrides by dotted path,
schedules built in code, short reprs, trajectories as plain columns.

References: pint for unit conversions (the display columns, the overridden values);
a problem file edited by hand for the overrides (the same problem, the same digest).
"""

import subprocess
import sys

import numpy as np
import pytest

import optfeed
from optfeed.errors import InputError
from optfeed.provenance import problem_digest
from optfeed.schedule import piecewise_constant
from optfeed.units import UREG

from conftest import CONFIGS, ROOT

IP = CONFIGS / "inhibited_product.yaml"
IP_PLAN = CONFIGS / "inhibited_product_plan.yaml"
AC = CONFIGS / "animal_cell.yaml"
AC_PLAN = CONFIGS / "animal_cell_plan.csv"


def test_top_level_names_are_the_job_functions_and_the_modules_stay_importable():
    # a fresh interpreter, so that import order is as a user's script has it
    code = """
import optfeed
import optfeed.sweep.spec, optfeed.sweep.outputs, optfeed.cli, optfeed.report.files
from optfeed.optimize import optimize, OptimizeResult
from optfeed.check import check, run_length, CheckResult
from optfeed.validate import validate
from optfeed.sweep import load_sweep, run_sweep
assert optfeed.optimize is optimize, optfeed.optimize
assert optfeed.check is check and optfeed.validate is validate
assert optfeed.sweep is run_sweep
assert optfeed.load_problem.__module__ == "optfeed.problem.load"
for name in ("OptimizeResult", "CheckResult", "ValidateResult", "SweepResult", "Problem", "Schedule"):
    assert isinstance(getattr(optfeed, name), type), name
print("ok")
"""
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "ok"


def test_overrides_give_the_problem_the_edited_file_gives(write):
    # the same change made by hand in the file: the same resolved problem
    edited = write("ip.yaml", IP.read_text().replace("mu_max: 0.35 1/h", "mu_max: 0.5 1/h")
                   + "solver: {starts: 2}\n")
    by_hand = optfeed.load_problem(edited)
    overridden = optfeed.load_problem(IP, set={"parameters.mu_max": "0.5 1/h", "solver.starts": 2})
    assert problem_digest(overridden) == problem_digest(by_hand)
    assert overridden.settings.starts == 2  # the file has no solver section: the key is added
    # the value is converted like any other: 30 1/day is 1.25 1/h (pint)
    p = optfeed.load_problem(IP, set={"parameters.mu_max": "30 1/day"})
    assert p.parameters["mu_max"] == pytest.approx(UREG.Quantity(30, "1/day").to("1/h").magnitude, rel=1e-15)


def test_overrides_reach_every_job(tmp_path):
    # the animal-cell plan needs more than 6 mmol/L/h of oxygen late in the run
    base = optfeed.check(AC, AC_PLAN)
    low = optfeed.check(AC, AC_PLAN, set={"vessel.oxygen.transfer_max": "6 mmol/L/h"})
    assert base.status == "within limits" and low.status == "limit broken"
    assert low.violations[0].name == "OTR ceiling"
    v = optfeed.validate(optfeed.load_problem(AC), AC_PLAN, set={"vessel.working_volume": "15 L"})
    assert v.problem.vessel.working_volume == 15.0 and v.exit_code == 0


@pytest.mark.parametrize("overrides,key,match", [
    ({"parameters.mu_mx": 1}, "parameters.mu_mx", r"no value at this path .*did you mean 'mu_max'"),
    ({"solver.strats": 2}, "solver.strats", r"did you mean 'starts'"),
    ({"species.Z.initial": 1}, "species.Z.initial", r"'Z' not found"),
    ({"limits.3.max": 1}, "limits.3.max", r"the list has 1 items"),
    ({"limits.\u00b2.max": 1}, "limits.\u00b2.max", r"no item '\u00b2'"),  # a digit to isdigit(), not to int()
    ({"vessel.working_volume.x": 1}, "vessel.working_volume.x", r"is a single value"),
    ({"parameters.mu_max": [1, 2]}, "parameters.mu_max", r"single value"),
])
def test_bad_override_is_bad_input_naming_the_key(overrides, key, match):
    with pytest.raises(InputError, match=match) as info:
        optfeed.load_problem(IP, set=overrides)
    assert info.value.issues[0].key == key


def test_bad_override_value_is_blamed_on_the_override():
    with pytest.raises(InputError, match=r"has dimension \[mass\].*given as an override"):
        optfeed.check(IP, IP_PLAN, set={"vessel.working_volume": "3 kg"})


def test_cli_set_is_repeatable_and_checked(tmp_path, capsys):
    from optfeed.cli import main

    out = tmp_path / "r"
    rc = main(["check", str(AC), "--schedule", str(AC_PLAN), "--out", str(out), "--quiet",
               "--set", "vessel.oxygen.transfer_max=6 mmol/L/h", "--set", "parameters.k_d=0.004 1/h"])
    assert rc == 1 and "limit broken" in capsys.readouterr().out
    rc = main(["validate", str(AC), "--set", "parameters.k_dd=1", "--set", "no-equals-sign"])
    err = capsys.readouterr().err
    assert rc == 2
    assert "no-equals-sign: expected KEY=VALUE" in err
    rc = main(["validate", str(AC), "--set", "parameters.k_dd=1"])
    assert rc == 2 and "parameters.k_dd" in capsys.readouterr().err


def test_schedule_built_in_code_with_a_misspelt_feed_is_bad_input():
    problem = optfeed.load_problem(IP)
    typo = piecewise_constant(["concentrat"], [0.0, 10.0], [[0.0], [0.02]])
    with pytest.raises(InputError, match=r"'concentrat' is not a feed of this problem; did you mean 'concentrate'") \
            as info:
        optfeed.check(problem, typo)
    assert info.value.issues[0].file == "schedule built in code"
    with pytest.raises(InputError, match=r"expected 2 step time\(s\) x 1 feed\(s\)"):
        piecewise_constant(["concentrate"], [0.0, 10.0], [0.0, 0.01, 0.02])
    backwards = piecewise_constant(["concentrate"], [0.0, 10.0, 5.0], [[0.0], [0.02], [0.01]])
    with pytest.raises(InputError, match="does not come after"):
        optfeed.check(problem, backwards)


def test_reprs_are_one_short_line():
    problem = optfeed.load_problem(IP)
    result = optfeed.check(problem, IP_PLAN)
    for obj in (problem, result, optfeed.validate(problem)):
        text = repr(obj)
        assert "\n" not in text and len(text) < 320, text
    assert repr(result).startswith("CheckResult(status='within limits', problem='inhibited_product'")
    assert "g/L" in repr(result)  # the objective with its unit


def test_trajectory_table_in_display_units_with_one_row_per_time():
    problem = optfeed.load_problem(IP)
    schedule = piecewise_constant(["concentrate"], [0.0, 6.0, 20.0], [[0.0], [0.01], [0.03]])  # L/h
    result = optfeed.check(problem, schedule)
    table = result.trajectory_table()
    t = table["time [h]"]
    assert np.diff(t).min() > 1e-9  # not even samples a rounding error apart
    assert len(t) < len(result.trajectory.t)  # the simulation samples pump changes twice
    # the full run, row for row with the simulation, stays available (for tools that mark pump changes)
    from optfeed.model import build_model
    from optfeed.report.files import trajectory_table

    header, rows = trajectory_table(build_model(problem), result.trajectory)
    assert len(rows) == len(result.trajectory.t) and header == list(table)
    assert not any("internal" in name for name in table)
    assert {"X [g/L]", "V [L]", "concentrate [mL/h]", "mu [1/h]", "OUR [mmol/L/h]", "S fed [g]"} <= set(table)
    # the feed column in the feed's own unit (pint: 1 L/h = 1000 mL/h); from 6 h on the new rate
    rate = table["concentrate [mL/h]"]
    at6 = np.searchsorted(t, 6.0)
    assert t[at6] == 6.0
    assert rate[at6] == pytest.approx(UREG.Quantity(0.01, "L/h").to("mL/h").magnitude, rel=1e-12)
    assert rate[at6 - 1] == 0.0
    assert all(len(col) == len(t) for col in table.values())
