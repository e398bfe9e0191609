"""Hardening of the input side, beyond the bad-input corpus: schedules whose pump law
runs away, long documents that are not alias bombs, names the expression language
cannot use, settings past their ranges, and the messages of a failed simulation.

References: the closed form of dX/dt = X^2 (separable; X(t) = X0 / (1 - X0 t), which
has no value from t = 1/X0 on); Python's own list of keywords (``keyword.kwlist``).
"""

import keyword
import math

import pytest

import optfeed
from optfeed import status as st
from optfeed.check import check
from optfeed.cli import main
from optfeed.errors import InputError
from optfeed.schedule import FeedRows, Schedule, load_schedule

BASE = """
species:
  X: {initial: 0.5 g/L}
  S: {initial: 5 g/L}
parameters: {mu_max: 0.4 1/h, K_s: 0.1 g/L, Y_XS: 0.5 g/g, PARAMS}
rates:
  mu: monod(S, mu_max, K_s)
reactions: {X: RATE_X, S: -mu / Y_XS * X}
feeds:
  glucose: {composition: {S: 400 g/L}, max_rate: 1 L/h}
vessel: {initial_volume: 5 L, working_volume: 10 L}
horizon: {end_time: 10 h}
SOLVER
"""


def problem_text(rate_x="mu * X", params="k: 1", solver=""):
    return BASE.replace("RATE_X", rate_x).replace("PARAMS", params).replace("SOLVER", solver)


def one_feed(rate, growth):
    return Schedule({"glucose": FeedRows((0.0,), (rate,), (growth,))})


# ---------------------------------------------------------------- failed simulations


def test_a_run_that_blows_up_names_the_quantity_and_the_time(write, capsys):
    # dX/dt = X^2 from X0 = 0.5 g/L has no value from t = 1/X0 = 2 h on (closed form)
    path = write("p.yaml", problem_text(rate_x="X * X"))
    r = check(optfeed.load_problem(path), one_feed(0.0, 0.0))
    assert r.status == st.SIMULATION_FAILED and r.exit_code == 3
    assert "X" in r.message.split(";")[1] or "X became" in r.message
    t = float(r.message.split("(at t = ")[1].split(" h")[0])
    assert 1.5 < t <= 2.0, r.message  # the integrator gives up shortly before the pole at 2 h
    assert not r.message.startswith("simulation failed")  # the status says so already
    sched = write("s.csv", "time [h],glucose [L/h]\n0,0\n")
    assert main(["check", str(path), "--schedule", str(sched), "--out", str(path.parent / "r"), "--quiet"]) == 3
    line = capsys.readouterr().out
    assert line.startswith("simulation failed: ") and "simulation failed: simulation failed" not in line


def test_stopped_pump_with_growth_built_in_code_is_refused_like_a_file(write):
    # load_schedule refuses growth on a rate of 0 (corpus); a schedule built in code is
    # checked as strictly, and never reaches the integrator to overflow there
    p = optfeed.load_problem(write("p.yaml", problem_text()))
    with pytest.raises(optfeed.InputError, match="growth 1000 1/h on a rate of 0 keeps the pump off"):
        check(p, one_feed(0.0, 1000.0))


def test_rate_growing_past_any_number_in_code_is_refused_like_a_file(write):
    p = optfeed.load_problem(write("p.yaml", problem_text()))
    with pytest.raises(optfeed.InputError, match="glucose: rate 1 L/h growing at 200 1/h passes any finite"):
        check(p, one_feed(1.0, 200.0))  # 200 1/h for 10 h: e^2000 L/h


def test_rate_growing_past_any_number_in_the_integrator_is_a_failed_simulation(write):
    # past the checks (a schedule judged over a longer run than it was checked for),
    # the simulator still names the pump and the time instead of overflowing
    from optfeed.model import build_model
    from optfeed.simulate import simulate

    p = optfeed.load_problem(write("p.yaml", problem_text()))
    with pytest.raises(optfeed.SimulationError, match="'glucose' grows past any finite number") as exc:
        simulate(build_model(p), one_feed(1.0, 200.0), 10.0)
    assert exc.value.time is not None


# ---------------------------------------------------------------- long documents


def test_a_long_yaml_schedule_is_not_an_alias_bomb(write):
    # 20,000 rows are 60,000 YAML values: more than the alias-bomb cap, but written out,
    # not expanded from aliases
    n = 20_000
    rows = "".join(f"    - {{time: {i * 0.0004:.4f}, rate: 0.001}}\n" for i in range(n))
    path = write("long.yaml", "feeds:\n  glucose:\n" + rows)
    s = load_schedule(path, ["glucose"], 10.0)
    assert len(s.feeds["glucose"].times) == n
    assert len(s.segments(["glucose"], 10.0)) == n


# ---------------------------------------------------------------- names and settings


@pytest.mark.parametrize("name", ["None", "if", "lambda", "True", "and"])
def test_keywords_cannot_name_a_value(write, name):
    assert keyword.iskeyword(name)  # Python's own list (reference)
    path = write("p.yaml", problem_text(params=f"{name}: 2"))
    with pytest.raises(InputError, match=rf"parameters.{name}: name '{name}' is a word of the expression language"):
        optfeed.load_problem(path)


@pytest.mark.parametrize("setting,value", [
    ("verify_tolerance", "0.9"), ("verify_tolerance", "1e-9"), ("verify_tolerance", ".nan"),
    ("tolerance", "0.01"), ("tolerance", "1e-20"), ("starts", "yes"), ("smoothing", "on"),
])
def test_settings_that_decide_a_status_are_bounded(write, setting, value):
    path = write("p.yaml", problem_text(solver=f"solver: {{{setting}: {value}}}"))
    with pytest.raises(InputError, match=rf"solver.{setting}: (must be between|a yes/no value)"):
        optfeed.load_problem(path)


def test_settings_inside_their_ranges_are_kept(write):
    p = optfeed.load_problem(write("p.yaml", problem_text(solver="solver: {verify_tolerance: 0.01, tolerance: 1e-6}")))
    assert (p.settings.verify_tolerance, p.settings.tolerance) == (0.01, 1e-6)


def test_units_that_bioprocess_models_use_are_accepted(write):
    # lengths (bubble and impeller sizes), pressures, stirring speeds, cell counts
    params = "d_b: 3 mm, D_i: 0.5 m, p: 1.2 bar, N: 300 rpm, q: 25 pg/cell/day, T: 310 K, dT: 2 delta_degC"
    p = optfeed.load_problem(write("p.yaml", problem_text(params=params)))
    assert math.isclose(p.parameters["d_b"], 0.03)  # 3 mm in dm (internal length)
    assert math.isclose(p.parameters["dT"], 2.0)


# ---------------------------------------------------------------- the command line


def test_empty_file_names_on_the_command_line_are_refused(tmp_path, capsys):
    from conftest import CONFIGS

    problem, sched = str(CONFIGS / "animal_cell.yaml"), str(CONFIGS / "animal_cell_plan.csv")
    assert main(["validate", problem, "--schedule", ""]) == 2
    assert "no file name given" in capsys.readouterr().err
    assert main(["check", problem, "--schedule", sched, "--out", ""]) == 2
    assert "--out: is empty" in capsys.readouterr().err
    assert main(["check", problem, "--schedule", sched, "--results", " "]) == 2
    assert "--results: is empty" in capsys.readouterr().err


def test_thousands_of_faults_are_not_read_out_in_full(write, capsys):
    # a YAML schedule naming 5000 feeds the problem does not have: one issue each, 30 shown
    from conftest import CONFIGS

    feeds = "".join(f"  f{i}: [{{time: 0, rate: 0}}]\n" for i in range(5000))
    sched = write("many.yaml", "feeds:\n" + feeds)
    assert main(["validate", str(CONFIGS / "animal_cell.yaml"), "--schedule", str(sched)]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err[0] == "optfeed: bad input" and len(err) == 32
    assert err[-1] == "  ... and 4972 more issue(s)"
