"""Schedules: file formats, segment laws, and the CSV round trip."""

import math

import numpy as np
import pytest

from optfeed.errors import InputError
from optfeed.schedule import load_schedule, piecewise_constant, schedule_csv_text


def test_csv_and_yaml_describe_the_same_schedule(write):
    csv_path = write("s.csv", """
        # interpolation: constant
        time [h], a [L/h], a growth [1/h], b [mL/h]
        0, 0.1, 0, 0
        2, 0.2, 0.1, 50
        """)
    yaml_path = write("s.yaml", """
        feeds:
          a:
            - {time: 0 h, rate: 100 mL/h}
            - {time: 120 min, rate: 0.2 L/h, growth: 0.1 1/h}
          b:
            - {time: 0, rate: 0}
            - {time: 2, rate: 0.05}
        """)
    s1 = load_schedule(csv_path, ["a", "b"], 5.0)
    s2 = load_schedule(yaml_path, ["a", "b"], 5.0)
    t = np.linspace(0, 5, 11)
    for s in (s1, s2):
        segs = s.segments(["a", "b"], 5.0)
        assert [(g.start, g.end) for g in segs] == [(0.0, 2.0), (2.0, 5.0)]
        rates = segs[1].rates(t[t >= 2])
        np.testing.assert_allclose(rates[:, 0], 0.2 * np.exp(0.1 * (t[t >= 2] - 2)), rtol=1e-12)
        np.testing.assert_allclose(rates[:, 1], 0.05, rtol=1e-12)


def test_linear_interpolation_segments(write):
    path = write("lin.csv", "# interpolation: linear\ntime [h],f [L/h]\n0,0\n4,1\n6,0.5\n")
    s = load_schedule(path, ["f"], 10.0)
    segs = s.segments(["f"], 10.0)
    values = {t: g.rates(np.array([t]))[0, 0] for g in segs for t in (g.start, 0.5 * (g.start + g.end))}
    assert values[2.0] == pytest.approx(0.5)
    assert values[5.0] == pytest.approx(0.75)
    assert values[8.0] == pytest.approx(0.5)  # holds its last rate


def test_exponential_law_continues_past_split(write):
    # b's change at 3 h splits the run into two segments; a's single exponential
    # row must carry on across the split, not restart
    path = write("e.yaml", """
        feeds:
          a: [{time: 0, rate: 1, growth: 0.2}]
          b: [{time: 0, rate: 0}, {time: 3, rate: 1}]
        """)
    s = load_schedule(path, ["a", "b"], 6.0)
    segs = s.segments(["a", "b"], 6.0)
    assert len(segs) == 2
    assert segs[1].rates(np.array([4.0]))[0, 0] == pytest.approx(math.exp(0.2 * 4.0), rel=1e-14)


def test_round_trip_piecewise_constant(write, tmp_path):
    s = piecewise_constant(["glc", "aa"], [0.0, 1.25, 7.5], [[0.0, 0.1], [0.123456789012, 0.2], [0.3, 0.0]])
    path = tmp_path / "rt.csv"
    path.write_text(schedule_csv_text(s, {"aa": "mL/h"}))
    back = load_schedule(path, ["glc", "aa"], 10.0)
    assert back.feeds["glc"].rates == s.feeds["glc"].rates
    np.testing.assert_allclose(back.feeds["aa"].rates, s.feeds["aa"].rates, rtol=1e-15)
    assert back.feeds["glc"].times == (0.0, 1.25, 7.5)


@pytest.mark.parametrize("text,match", [
    ("time [h],f [L/h]\n0,0.1\n2,0.2\n1,0.3\n", "does not come after"),
    ("time [h],f [L/h]\n1,0.1\n", "first row must be at time 0"),
    ("time [h],f [L/h]\n0,-0.1\n", "negative"),
    ("time [h],f [L/h]\n0,abc\n", "expected a number, got 'abc'"),
    ("time [h],f [kg/h]\n0,1\n", "dimension"),
    ("time [h],g [L/h]\n0,1\n", "feed has no schedule"),
    ("time [h],f\n0,1\n", "unit in brackets"),
    ("time [h],f [L/h]\n0,1\n20,1\n", "at or after the end"),
    ("# interpolation: linear\ntime [h],f [L/h],f growth [1/h]\n0,1,0.1\n", "only allowed with interpolation: constant"),
])
def test_bad_schedules(write, text, match):
    path = write("bad.csv", text)
    with pytest.raises(InputError, match=match) as info:
        load_schedule(path, ["f"], 10.0)
    assert str(path) in str(info.value)
