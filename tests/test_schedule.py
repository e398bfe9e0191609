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


# ------------------------------------------------------------ rounding, exact files


def _feed(name="f", unit="mL/h", max_rate=0.12, min_rate=0.0):
    from optfeed.problem import Feed

    return Feed(name, {}, min_rate, max_rate, unit)


@pytest.mark.parametrize("unit,max_rate", [("mL/h", 0.12), ("L/h", 2.5), ("L/day", 0.5), ("uL/min", 0.0003)])
def test_rounded_schedule_reads_back_bit_for_bit(tmp_path, unit, max_rate):
    from optfeed.schedule import round_schedule

    rng = np.random.default_rng(11)
    times = np.sort(rng.uniform(0, 40, 30))
    times[0] = 0.0
    rates = rng.uniform(0, max_rate, 30)
    rates[3:6] = 1e-9 * max_rate  # the NLP's "off"
    rates[7] = max_rate * (1 + 1e-9)  # a hair above the pump's maximum
    feed = _feed(unit=unit, max_rate=max_rate)
    s = round_schedule(piecewise_constant(["f"], times, rates), [feed], end_time=41.0)
    text = schedule_csv_text(s, {"f": unit})
    path = tmp_path / "s.csv"
    path.write_text(text)
    back = load_schedule(path, ["f"], 41.0)
    assert back.feeds["f"].rates == s.feeds["f"].rates  # exactly, every bit
    assert back.feeds["f"].times == s.feeds["f"].times
    got = np.array(s.feeds["f"].rates)
    assert np.all(got[3:6] == 0.0) and ",0\n" in text  # the pump off is an exact zero, written 0
    assert got.max() <= max_rate and got.min() >= 0.0
    cells = [line.split(",")[1] for line in text.splitlines()[2:]]
    assert all(len(c) <= 12 and "e" not in c for c in cells), cells  # short, no exponent


def test_rounding_keeps_the_volume_fed_on_track():
    # each step's rounding error is carried into the next: the volume fed by every
    # step boundary stays within half a rounding step x one step length of the exact one
    from optfeed.schedule import round_schedule

    rng = np.random.default_rng(5)
    n, dt = 200, 0.25
    times = np.arange(n) * dt
    rates = rng.uniform(0.001, 0.12, n)  # L/h on a 120 mL/h pump
    s = round_schedule(piecewise_constant(["f"], times, rates), [_feed()], end_time=n * dt, resolution=1e-4)
    step = 0.01e-3  # L/h: 1e-4 of 120 mL/h is 0.012, taken down to 0.01 mL/h
    drift = np.cumsum((np.array(s.feeds["f"].rates) - rates) * dt)
    assert np.abs(drift).max() <= 0.5 * step * dt * (1 + 1e-9)
    plain = np.cumsum((np.round(rates / step) * step - rates) * dt)
    assert np.abs(plain).max() > 5 * np.abs(drift).max()  # rounding each step alone drifts further


def test_semicolons_and_decimal_commas(write):
    comma = write("c.csv", "# interpolation: constant\ntime [h],glucose [L/h],glucose growth [1/h]\n"
                           "0,0,0\n6,0.12,0.25\n16,1.4,0\n")
    semi = write("s.csv", "# interpolation: constant\ntime [h];glucose [L/h];glucose growth [1/h]\n"
                          "0;0;0\n6;0,12;0.25\n16;1,4;0\n")
    a, b = load_schedule(comma, ["glucose"], 30.0), load_schedule(semi, ["glucose"], 30.0)
    assert a.feeds == b.feeds


@pytest.mark.parametrize("text,match", [
    ("time [h];f [L/h]\n0;0\n6;1.200,5\n", r"no thousands separators"),
    ("time [h],f [L/h]\n0,0\n6,0,12\n", r"decimal comma .* need ';' between the columns"),
    ("time [h];f [L/h],x\n0;0\n", r"the header mixes ',' and ';'"),
])
def test_csv_separator_mistakes_say_how_to_write_it(write, text, match):
    with pytest.raises(InputError, match=match):
        load_schedule(write("bad.csv", text), ["f"], 10.0)
