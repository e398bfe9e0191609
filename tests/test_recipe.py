"""Pump recipes: setpoints a controller can take, and the rounded recipe checked again.

References: the exact integral of a schedule written by hand from its file (steps:
rate x duration; linear interpolation: trapezoids, exact for straight lines);
scipy.integrate.quad for the integral of an exponential or linear pump law; Python's
datetime arithmetic for clock times; the check job run on the recipe's own
schedule.csv (a round trip through the file a user would hand to a colleague).
"""

from __future__ import annotations

import csv
import datetime as dt
import math

import numpy as np
import pytest
from scipy.integrate import quad

import optfeed
from optfeed.cli import main
from optfeed.errors import InputError
from optfeed.recipe import _law_integral, default_resolution, recipe, round_setpoint, write_recipe_run
from optfeed.report import write_check_run

from conftest import CONFIGS


@pytest.fixture(scope="module")
def ramp_run(tmp_path_factory):
    """The inhibited_product plan (piecewise linear, within limits), checked."""
    folder = tmp_path_factory.mktemp("recipe") / "run"
    r = optfeed.check(CONFIGS / "inhibited_product.yaml", CONFIGS / "inhibited_product_plan.yaml")
    write_check_run(r, folder, figures=False)
    return r, folder


def test_delivered_volume_matches_the_schedule_and_setpoints_are_settable(ramp_run):
    _, folder = ramp_run
    rec = recipe(folder, unit="mL/min", step="10 min", start="2026-12-04 08:00", resolution="0.01 mL/min")
    # the plan by hand: rows (h, mL/h) joined linearly, last rate held to 40 h
    rows = [(0, 0), (6, 4), (12, 15), (20, 28), (30, 30), (36, 20), (40, 20)]
    exact = sum((t1 - t0) * (r0 + r1) / 2 for (t0, r0), (t1, r1) in zip(rows, rows[1:]))  # mL
    col = rec.header.index("concentrate delivered [mL]")
    assert rec.rows[-1][col] == pytest.approx(exact, abs=0.005 * 40 * 60)  # within half a step of resolution
    assert rec.rows[-1][col] == pytest.approx(exact, rel=1e-3)
    rate = rec.header.index("concentrate [mL/min]")
    for row in rec.rows:
        assert abs(row[rate] * 100 - round(row[rate] * 100)) < 1e-9  # multiples of 0.01 mL/min
        assert 0 <= row[rate] <= 120 / 60  # the pump's range, 120 mL/h
    # clock times: the start plus the elapsed time
    for row in rec.rows:
        elapsed = dt.timedelta(minutes=row[rec.header.index("elapsed [min]")])
        assert row[rec.header.index("clock time")] == str(dt.datetime(2026, 12, 4, 8, 0) + elapsed)
        h, m, s = map(int, row[rec.header.index("elapsed [h:mm:ss]")].split(":"))
        assert dt.timedelta(hours=h, minutes=m, seconds=s) == elapsed
    assert rec.rows[0][-1] == "start" and rec.rows[-1][-1].startswith("end of run")
    assert rec.rows[-1][rate] == 0.0
    # the change is tiny and the check status and objective are reported
    assert rec.status == "within limits" and rec.exit_code == 0
    assert abs(rec.objective_relative) < 1e-3
    assert "stays within all" in rec.message


def test_recipe_folder_round_trips_through_check(ramp_run, tmp_path):
    _, folder = ramp_run
    rec = recipe(folder, unit="mL/h", step="15 min")
    out = write_recipe_run(rec, tmp_path / "recipe", figures=False)
    assert sorted(p.name for p in out.iterdir()) == ["limits.csv", "recipe.csv", "report.html", "report.txt",
                                                     "schedule.csv", "summary.json"]
    with (out / "recipe.csv").open() as fh:
        table = list(csv.reader(fh))
    assert table[0] == rec.header and len(table) == len(rec.rows) + 1
    again = optfeed.check(CONFIGS / "inhibited_product.yaml", out / "schedule.csv")
    assert again.status == rec.status
    assert again.outcome.objective.value == pytest.approx(rec.check.outcome.objective.value, rel=1e-9)
    html = (out / "report.html").read_text()
    assert '<h1 id="status">The rounded recipe stays within every limit</h1>' in html


def test_coarse_rounding_is_reported_not_hidden(ramp_run):
    _, folder = ramp_run
    fine = recipe(folder, unit="mL/h", step="1 min", resolution="0.01 mL/h")
    coarse = recipe(folder, unit="mL/h", step="2 h", resolution="10 mL/h")
    assert abs(coarse.objective_difference) > 10 * abs(fine.objective_difference)
    assert coarse.largest_rounding["concentrate"] >= 1.0  # mL/h
    assert "objective" in coarse.message and "%" in coarse.message


@pytest.mark.parametrize("a, b, k", [(0.3, 0.0, 0.25), (0.1, 0.02, 0.0), (2.0, 0.0, -0.4), (1.0, 0.5, 1e-12)])
def test_law_integral_against_quad(a, b, k):
    ref, _ = quad(lambda t: (a + b * t) * math.exp(k * t), 0.4, 3.1, epsabs=1e-13, epsrel=1e-13)
    assert _law_integral(a, b, k, 0.4, 3.1) == pytest.approx(ref, rel=1e-10)


def test_exponential_segment_means_keep_the_volume(tmp_path):
    # fast_microbe's plan has an exponential segment (growth 0.25 1/h from 6 h to 16 h)
    r = optfeed.check(CONFIGS / "fast_microbe.yaml", CONFIGS / "fast_microbe_plan.csv")
    folder = write_check_run(r, tmp_path / "run", figures=False)
    rec = recipe(folder, unit="L/h", step="30 min", resolution="0.000001 L/h")
    ref, _ = quad(lambda t: 0.12 * math.exp(0.25 * (t - 6)), 6, 16, epsrel=1e-12)
    exact = ref + 1.4 * 14  # L
    col = rec.header.index("glucose delivered [L]")
    assert rec.rows[-1][col] == pytest.approx(exact, abs=1e-6 * 30 + 1e-9)
    assert rec.status == "limit broken"  # the plan breaks the OTR ceiling, and so does its recipe
    assert "already broke" in rec.message


def test_rounding_rules():
    assert round_setpoint(1.234, 0.01, 0, 2) == 1.23
    assert round_setpoint(1.999, 0.01, 0, 1.995) == 1.99  # never above the pump's maximum
    assert round_setpoint(0.004, 0.01, 0, 2) == 0.0
    assert round_setpoint(0.2, 0.5, 0.3, 2) == 0.5  # never below a non-zero minimum
    assert default_resolution(120.0) == 0.1  # a 120 mL/h pump sets 0.1 mL/h
    assert default_resolution(2.5) == 0.001


def test_bad_input_names_the_key(ramp_run, tmp_path, capsys):
    _, folder = ramp_run
    with pytest.raises(InputError, match=r"no such run folder"):
        recipe(tmp_path / "missing")
    with pytest.raises(InputError, match=r"--unit: .*unknown unit"):
        recipe(folder, unit="mL/fortnite")
    with pytest.raises(InputError, match=r"--step: .*expected a time"):
        recipe(folder, step="1 L")
    with pytest.raises(InputError, match=r"--step: .*with its unit"):
        recipe(folder, step="5")
    with pytest.raises(InputError, match=r"--start: .*date and clock time"):
        recipe(folder, start="next Tuesday")
    changed = tmp_path / "changed.yaml"
    changed.write_text((CONFIGS / "inhibited_product.yaml").read_text().replace("K_s: 0.3 g/L", "K_s: 0.4 g/L"))
    rec = recipe(folder, problem=changed, step="1 h")  # asked for: checked against it, and said so
    assert "differs from the run's" in rec.message
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputError, match=r"summary.json: missing"):
        recipe(empty)
    # on the command line: exit 2, one message, nothing written
    code = main(["recipe", str(folder), "--unit", "parsec/h", "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2 and "--unit" in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


def test_a_changed_problem_file_is_refused(tmp_path):
    problem = tmp_path / "p.yaml"
    problem.write_text((CONFIGS / "animal_cell.yaml").read_text())
    r = optfeed.check(problem, CONFIGS / "animal_cell_plan.csv")
    folder = write_check_run(r, tmp_path / "run", figures=False)
    problem.write_text(problem.read_text().replace("k_d: 0.004 1/h", "k_d: 0.005 1/h"))
    with pytest.raises(InputError, match=r"p.yaml: .*has changed since the run"):
        recipe(folder)
    problem.unlink()
    with pytest.raises(InputError, match=r"record.problem_file: .*no longer exists"):
        recipe(folder)


def test_cli_writes_the_recipe_folder(ramp_run, tmp_path, capsys):
    _, folder = ramp_run
    code = main(["recipe", str(folder), "--unit", "mL/min", "--step", "1 min", "--start", "2026-12-04 08:00",
                 "--out", str(tmp_path / "rec"), "--no-figures", "--quiet"])
    out = capsys.readouterr().out
    assert code == 0 and out.startswith("within limits:")
    header = (tmp_path / "rec" / "recipe.csv").read_text().splitlines()[0]
    assert header == ("step,elapsed [h:mm:ss],elapsed [min],clock time,concentrate [mL/min],"
                      "concentrate delivered [mL],note")
    assert np.isfinite(float((tmp_path / "rec" / "recipe.csv").read_text().splitlines()[-1].split(",")[5]))
