"""Files a person uses as they are, and words that agree.

summary.json keys that scripts and sweeps read; schedule.csv that `check` reads back
exactly; CSV headers with real units; 'ACTIVE' by one rule; tiny slacks shown as 0;
sweep summary.csv with units in the header and numbers in the cells; `--json | head`.

References: the check job's own judgement of the written schedule.csv (an
independent CVODES run); pint for the unit conversions in the sweep summary.
"""

import csv
import dataclasses
import json
import subprocess
import sys
import textwrap

import pytest

import optfeed
from optfeed.limits import LimitReport
from optfeed.report import write_optimize_run
from optfeed.schedule import load_schedule
from optfeed.units import UREG

from conftest import CONFIGS, OXYGEN, ROOT



@pytest.fixture(scope="module")
def optimized(tmp_path_factory):
    folder = tmp_path_factory.mktemp("opt")
    problem_file = folder / "oxygen.yaml"
    problem_file.write_text(textwrap.dedent(OXYGEN))
    from optfeed.optimize import optimize

    result = optimize(problem_file)
    assert result.status == "optimal, verified", result.message
    run = write_optimize_run(result, folder / "run", figures=False)
    return problem_file, result, run


def test_summary_json_keeps_the_nlp_objective_and_the_keys_scripts_read(optimized):
    _, result, run = optimized
    s = json.loads((run / "summary.json").read_text())
    obj = s["objective"]
    assert obj["nlp"] == result.objective_nlp and obj["resimulated"] == result.objective_sim
    assert obj["value"] == result.objective_sim and obj["unit"] == "g" and obj["label"] == result.objective_label
    assert obj["relative_difference"] == pytest.approx(abs(obj["resimulated"] - obj["nlp"]) / abs(obj["nlp"]))
    assert "backoff" in s["record"]  # this problem is backed off, and its NLP value is still there
    for key in ("job", "status", "exit_code", "message", "problem", "objective", "end_time_h", "verification",
                "limits", "solver", "finals", "warnings", "record", "caution"):
        assert key in s, key
    for lim in s["limits"]:
        for key in ("name", "unit", "min", "max", "smallest_slack", "at_h", "first_violation_h",
                    "worst_violation", "active", "marginal_max", "marginal_min", "marginal_unit"):
            assert key in lim, key
    assert {f["name"] for f in s["finals"]} >= {"X", "S", "V", "product mass"}
    assert s["solver"]["starts"][0]["iterations"] > 0


def test_schedule_csv_is_the_verified_schedule_exactly_and_passes_check(optimized):
    problem_file, result, run = optimized
    text = (run / "schedule.csv").read_text()
    back = load_schedule(run / "schedule.csv", ["sugar"], result.end_time)
    assert back.feeds["sugar"].rates == result.schedule.feeds["sugar"].rates  # bit for bit
    assert back.feeds["sugar"].times == result.schedule.feeds["sugar"].times
    rate_cells = [line.split(",")[1] for line in text.splitlines() if line[:1].isdigit()]
    assert all(len(c) <= 10 for c in rate_cells), rate_cells  # no 17-digit noise
    c = optfeed.check(problem_file, run / "schedule.csv")
    assert c.status == "within limits"
    assert c.outcome.objective.value == pytest.approx(result.objective_sim, rel=1e-8)


def test_csv_headers_name_real_units(optimized):
    _, _, run = optimized
    for name in ("trajectory.csv", "points.csv", "limits.csv"):
        header = (run / name).read_text().splitlines()[0]
        assert "internal" not in header, (name, header)
    header = (run / "points.csv").read_text().splitlines()[0]
    assert header == "time [h],X [g/L],S [g/L],V [L],S fed [g],sugar [mL/h]"
    rows = list(csv.reader((run / "trajectory.csv").read_text().splitlines()))
    times = [float(r[0]) for r in rows[1:]]
    assert all(b > a for a, b in zip(times, times[1:]))  # one row per time


def test_active_means_the_limit_holds_the_optimum_back(optimized):
    from optfeed.marginals import is_active

    _, result, run = optimized
    otr = next(v for v in result.limits if v.name == "OTR ceiling")
    assert otr.active and otr.report.min_slack > 0  # kept clear by the back-off, and still ACTIVE
    # one rule in every output: report.txt, limits.csv and summary.json agree with the result
    report = (run / "report.txt").read_text()
    summary = {lim["name"]: lim["active"] for lim in json.loads((run / "summary.json").read_text())["limits"]}
    csv_rows = {r["limit"]: r["active"] for r in csv.DictReader((run / "limits.csv").read_text().splitlines())}
    for v in result.limits:
        word = "ACTIVE" if v.active else "slack "
        assert f"  {word} {v.name}" in report
        assert summary[v.name] is v.active and csv_rows[v.name] == str(v.active)
    # the rule is the marginal value, not the distance: 0.3 % clear with a marginal value
    # is active; on the bound with none is not
    rep = otr.report
    clear = dataclasses.replace(rep, min_slack=0.003 * rep.upper)
    assert is_active(clear, otr.marginal_max, 0.0, result.objective_nlp)
    assert not is_active(dataclasses.replace(rep, min_slack=0.0), 1e-9, 0.0, result.objective_nlp)


def test_numeric_tables_are_written_as_the_csv_module_writes_them(tmp_path):
    """trajectory.csv and points.csv take a fast path for float arrays; its text is
    the standard library's csv.writer with each number formatted to 10 significant
    digits (the reference), for ordinary, tiny, huge and non-finite values alike."""
    import numpy as np

    from optfeed.report.files import write_csv

    rng = np.random.default_rng(3)
    rows = rng.normal(size=(300, 6)) * 10.0 ** rng.integers(-300, 300, size=(300, 6))
    rows[0, :5] = [np.nan, np.inf, -np.inf, -0.0, 1.0 / 3.0]
    write_csv(tmp_path / "fast.csv", ["t [h]", "X [g/L]", "S", "P", "V [L]", "F"], rows)
    with (tmp_path / "ref.csv").open("w", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["t [h]", "X [g/L]", "S", "P", "V [L]", "F"])
        for row in rows.tolist():
            w.writerow([format(v, ".10g") for v in row])
    assert (tmp_path / "fast.csv").read_text() == (tmp_path / "ref.csv").read_text()


def test_tiny_slacks_read_as_zero():
    from optfeed.report.text import limits_table

    rep = LimitReport("working volume", "volume", "L", None, 4.0, -3.7e-8, 40.0, "max", None, 3.7e-8, 100.0,
                      False, "vessel.working_volume")
    [row] = [line for line in limits_table([rep]) if "working volume" in line]
    assert "e-" not in row and "0 L (max)" in row

    from optfeed.report.text import tidy

    assert tidy(rep.min_slack, rep) == 0.0 and tidy(rep.worst_violation, rep) == 0.0
    assert tidy(-0.01, rep) == -0.01  # a real excess stays


def test_json_into_a_closed_pipe_ends_quietly(tmp_path):
    # the reader of stdout goes away before optfeed writes (as `optfeed ... --json | head` can)
    out = tmp_path / "run"
    proc = subprocess.Popen([sys.executable, "-m", "optfeed.cli", "check", str(CONFIGS / "inhibited_product.yaml"),
                             "--schedule", str(CONFIGS / "inhibited_product_plan.yaml"), "--json", "--out", str(out),
                             "--no-figures"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=ROOT)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait() == 0, err
    assert "Traceback" not in err and "BrokenPipe" not in err, err
    assert (out / "summary.json").exists()


def test_sweep_summary_csv_has_units_in_the_header_and_numbers_in_the_cells(tmp_path):
    from optfeed.sweep import run_sweep

    (tmp_path / "animal_cell.yaml").write_text((CONFIGS / "animal_cell.yaml").read_text())
    (tmp_path / "plan.csv").write_text((CONFIGS / "animal_cell_plan.csv").read_text())
    (tmp_path / "s.yaml").write_text("problems: animal_cell.yaml\njob: check\nschedule: plan.csv\n"
                                     "zip:\n  vessel.oxygen.transfer_max: [6 mmol/L/h, 0.012 mol/L/h]\n")
    run_sweep(tmp_path / "s.yaml", tmp_path / "out", workers=2)
    rows = list(csv.DictReader((tmp_path / "out" / "summary.csv").read_text().splitlines()))
    header = list(rows[0])
    assert "vessel.oxygen.transfer_max [mmol/L/h]" in header
    assert "objective [mg/L]" in header and "end time [h]" in header
    assert "smallest slack: OTR ceiling [mmol/L/h]" in header and "smallest slack: lactate ceiling [g/L]" in header
    # 0.012 mol/L/h is 12 mmol/L/h (pint), written as a number in the column's unit
    values = sorted(float(r["vessel.oxygen.transfer_max [mmol/L/h]"]) for r in rows)
    assert values == [6.0, pytest.approx(UREG.Quantity(0.012, "mol/L/h").to("mmol/L/h").magnitude)]
    numeric = [h for h in header if "[" in h]
    for r in rows:
        for h in numeric:
            float(r[h])  # every cell under a unit is a plain number
    low = next(r for r in rows if float(r["vessel.oxygen.transfer_max [mmol/L/h]"]) == 6.0)
    assert low["status"] == "limit broken" and float(low["smallest slack: OTR ceiling [mmol/L/h]"]) < 0


_QUANTITY = r"(\d+(?:\.\d+)?)\s*(g/L|mmol/L/h|kW|W|mL/h|L/h|L)\b"


@pytest.mark.parametrize("name", ["fast_microbe", "inhibited_product", "animal_cell"])
def test_shipped_descriptions_quote_the_files_own_values(name):
    # every quantity a description quotes is a value of the file (pint compares the units)
    import re

    from optfeed.problem.yamlio import read_yaml

    data, _ = read_yaml(CONFIGS / f"{name}.yaml")
    values = []

    def walk(node):
        if isinstance(node, dict):
            for v in node.values():
                walk(v)
        elif isinstance(node, list):
            for v in node:
                walk(v)
        elif isinstance(node, str):
            for num, unit in re.findall(_QUANTITY, node):
                values.append(UREG.Quantity(float(num), unit))

    walk({k: v for k, v in data.items() if k != "description"})
    for num, unit in re.findall(_QUANTITY, data["description"]):
        q = UREG.Quantity(float(num), unit)
        assert any(q.dimensionality == v.dimensionality and abs((q - v).to(unit).magnitude) < 1e-9 for v in values), \
            f"{name}: the description says {num} {unit}, which is no value of the file"
