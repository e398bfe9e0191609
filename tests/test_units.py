"""Units: the same problem written in different units gives the same answer.

Conversions checked against pint (a general-purpose units library) and plain
arithmetic: 1 L/h = 1000 mL/h, 1 day = 24 h, 1 W = 1 J/s.
"""

import numpy as np
import pytest

import optfeed
from optfeed.units import factor_to, parse_quantity, to_internal

PROBLEM = """
    species:
      X: {{initial: {x0}}}
      S: {{initial: 1 g/L}}
    parameters: {{mu_max: {mu_max}, K_s: 0.1 g/L, Y_XS: 0.5}}
    rates: {{mu: "monod(S, mu_max, K_s)"}}
    reactions: {{X: mu * X, S: -mu / Y_XS * X}}
    feeds:
      sugar: {{composition: {{S: {s_f}}}, max_rate: {fmax}}}
    vessel: {{initial_volume: {v0}, working_volume: 3 L}}
    horizon: {{end_time: {tf}}}
"""


def run(write, tag, schedule_text, **values):
    problem = write(f"p_{tag}.yaml", PROBLEM.format(**values))
    schedule = write(f"s_{tag}.csv", schedule_text)
    return optfeed.check(problem, schedule)


def test_ml_per_h_and_l_per_h_give_identical_results(write):
    a = run(write, "a", "time [h],sugar [L/h]\n0,0.02\n5,0.05\n",
            x0="0.5 g/L", mu_max="0.4 1/h", s_f="400 g/L", fmax="0.2 L/h", v0="1.5 L", tf="10 h")
    b = run(write, "b", "time [min],sugar [mL/h]\n0,20\n300,50\n",
            x0="500 mg/L", mu_max="0.4 1/h", s_f="400 g/L", fmax="200 mL/h", v0="1500 mL", tf="600 min")
    c = run(write, "c", "time [h],sugar [L/day]\n0,0.48\n5,1.2\n",
            x0=0.5, mu_max="9.6 1/day", s_f=400, fmax="4.8 L/day", v0=1.5, tf=10)  # bare numbers: g/L, L/h, L, h
    for other in (b, c):
        np.testing.assert_allclose(other.trajectory.t, a.trajectory.t, rtol=1e-12)
        np.testing.assert_allclose(other.trajectory.x, a.trajectory.x, rtol=1e-9, atol=1e-12)
    # volumes are reported in the unit of the working volume (L in all three)
    assert b.outcome.get("V").value == pytest.approx(a.outcome.get("V").value, rel=1e-9)
    assert c.outcome.get("V").value == pytest.approx(a.outcome.get("V").value, rel=1e-9)
    # species are reported in the unit of their initial value: b wrote X in mg/L
    assert b.outcome.get("X").value == pytest.approx(1000 * a.outcome.get("X").value, rel=1e-9)


def test_wrong_dimension_is_rejected(write):
    path = write("bad.yaml", PROBLEM.format(x0="0.5 g/L", mu_max="0.4 1/h", s_f="400 g/L",
                                            fmax="0.2 kg/h", v0="1.5 L", tf="10 h"))
    with pytest.raises(optfeed.InputError, match=r"bad.yaml:\d+: feeds.sugar.max_rate: .*dimension.*flow"):
        optfeed.load_problem(path)


def test_feed_composition_must_match_species_dimension(write):
    path = write("bad2.yaml", PROBLEM.format(x0="0.5 g/L", mu_max="0.4 1/h", s_f="400 mmol/L",
                                             fmax="0.2 L/h", v0="1.5 L", tf="10 h"))
    with pytest.raises(optfeed.InputError, match=r"feeds.sugar.composition.S: .*species 'S' is in"):
        optfeed.load_problem(path)


@pytest.mark.parametrize("text,kind,internal", [
    ("200 mL/h", "flow", 0.2),
    ("0.3 1/h", "specific_rate", 0.3),
    ("7.2 1/day", "specific_rate", 0.3),
    ("500 mg/L", "concentration", 0.5),
    ("150 mmol/L/h", "oxygen_rate", 150.0),
    ("2 m^3", "volume", 2000.0),
    ("1e6 cells/mL", "concentration", 1e9),
    (12, "time", 12.0),
])
def test_internal_values(text, kind, internal):
    assert to_internal(parse_quantity(text, kind)) == pytest.approx(internal, rel=1e-12)


def test_power_round_trip():
    # 1 W = 1 J/s; internal power is g*dm^2/h^3, so 1 W = 1000 g * 100 dm^2 * 3600^3 / h^3
    assert to_internal(parse_quantity("1 W", "power")) == pytest.approx(1e5 * 3600.0**3, rel=1e-12)
    assert to_internal(parse_quantity("1.5 kW", "power")) * factor_to("W") == pytest.approx(1500.0)


@pytest.mark.parametrize("text,match", [
    ("10 kg", "dimension"),
    ("5 Lx", "unknown unit"),
    ("1 m**999", "exponent"),
    ("1 m**(9**9)", "number 9 inside unit"),
    ("ten L", "expected a number"),
])
def test_bad_quantities(text, match):
    with pytest.raises(ValueError, match=match):
        parse_quantity(text, "volume")


def test_units_are_read_without_importing_dask():
    # pint imports dask on its own import wherever dask is installed (dask arrays of
    # quantities, which optfeed never makes; 0.2 s CPU per process): optfeed's import
    # of pint leaves it out, and its conversions are pint's as before (1 mL/h =
    # 0.001 L/h, 1 W = 1 J/s, by definition). A fresh process: this one has dask already
    import subprocess
    import sys

    code = ("import sys, optfeed.cli, optfeed.optimize, optfeed.report\n"
            "from optfeed.units import parse_quantity, to_internal, factor_to\n"
            "assert not [m for m in sys.modules if m == 'dask' or m.startswith('dask.')], 'dask was imported'\n"
            "assert abs(to_internal(parse_quantity('200 mL/h', 'flow')) - 0.2) < 1e-15\n"
            "assert abs(factor_to('J/s') / factor_to('W') - 1) < 1e-12\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr[-2000:]
