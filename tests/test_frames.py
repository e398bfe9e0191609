"""DataFrames of results: units in the column names, values in the problem's units.

References: the shipped problem and schedule files as written (0.4e6 cells/mL of
viable cells at the start, 10 L initial volume and the daily pump steps in mL/h of
configs/animal_cell.yaml and animal_cell_plan.csv); pint for unit conversion; pandas
itself for what a unique index is.
"""

from __future__ import annotations

import csv

import numpy as np
import pytest

pd = pytest.importorskip("pandas")

import optfeed  # noqa: E402
from optfeed.units import UREG  # noqa: E402

from conftest import CONFIGS  # noqa: E402


@pytest.fixture(scope="module")
def cell():
    return optfeed.check(CONFIGS / "animal_cell.yaml", CONFIGS / "animal_cell_plan.csv")


def plan_rows():
    lines = [l for l in (CONFIGS / "animal_cell_plan.csv").read_text().splitlines() if l and not l.startswith("#")]
    rows = list(csv.reader(lines))
    return rows[0], [[float(c) for c in r] for r in rows[1:]]


def test_trajectory_frame_in_the_problem_units_with_one_row_per_time(cell):
    df = cell.trajectory_frame()
    assert df.index.name == "time [h]" and df.index.is_unique and df.index.is_monotonic_increasing
    first = df.iloc[0]
    assert first["Xv [cells/mL]"] == pytest.approx(0.4e6, rel=1e-12)  # as written in the file
    assert first["V [L]"] == pytest.approx(10.0, rel=1e-12)
    last = df.iloc[-1]
    assert last["Ab [mg/L]"] == pytest.approx(cell.outcome.get("Ab").value, rel=1e-12)
    assert df.index[-1] == pytest.approx(12 * 24)
    # pump changes are marked at the plan's step times; the row holds the new rate
    header, rows = plan_rows()
    day = UREG.Quantity(1, "day").to("h").magnitude  # pint, not our own factor
    steps = [r[0] * day for r in rows[1:]]
    changed = list(df.index[df["pump change"]])
    assert changed == pytest.approx(steps)
    for r in rows[1:]:
        at = df.loc[df.index[np.argmin(np.abs(df.index - r[0] * day))]]
        assert at["glucose [mL/h]"] == pytest.approx(r[1], rel=1e-12)
        assert at["nutrients [mL/h]"] == pytest.approx(r[2], rel=1e-12)


def test_trajectory_keeps_every_distinct_time(cell):
    traj = cell.trajectory
    df = cell.trajectory_frame()
    distinct = np.unique(np.round(traj.t, 9))
    assert len(df) == len(distinct)


def test_schedule_frame_matches_the_plan_as_written(cell):
    header, rows = plan_rows()
    df = cell.schedule_frame()
    assert list(df.columns) == ["glucose [mL/h]", "nutrients [mL/h]"]
    day = UREG.Quantity(1, "day").to("h").magnitude
    assert list(df.index) == pytest.approx([r[0] * day for r in rows])
    assert df["glucose [mL/h]"].tolist() == pytest.approx([r[1] for r in rows], rel=1e-12)
    assert df["nutrients [mL/h]"].tolist() == pytest.approx([r[2] for r in rows], rel=1e-12)


def test_limits_frame(cell):
    df = cell.limits_frame()
    assert list(df.index) == [r.name for r in cell.limits]
    assert df.loc["lactate ceiling", "max [unit]"] == pytest.approx(5.0)  # 5 g/L in the problem file
    assert df.loc["lactate ceiling", "unit"] == "g/L"
    assert df["smallest margin [unit]"].tolist() == pytest.approx([r.min_slack for r in cell.limits])
    assert df["first broken [h]"].isna().all()  # the plan is within limits


def test_a_result_without_a_run_says_so():
    from dataclasses import replace

    r = optfeed.check(CONFIGS / "animal_cell.yaml", CONFIGS / "animal_cell_plan.csv")
    with pytest.raises(ValueError, match="no simulated run"):
        replace(r, trajectory=None).trajectory_frame()
