"""'Verified' means that `optfeed check` passes the written schedule exactly as written.

Outside references: the check job's own CVODES simulation of the schedule file that
optimize wrote (read back from disk, with the end time its header names); closed
forms of a first crossing (a constant feed filling the vessel; a Gaussian spike in
time); scipy's solve_ivp with event location for a crossing that has no closed form.
"""

import math
import re

import numpy as np
import pytest

import optfeed
from optfeed.report import write_optimize_run

from conftest import CONFIGS, ROOT

PROBLEMS = [CONFIGS / "inhibited_product.yaml", CONFIGS / "animal_cell.yaml", CONFIGS / "fast_microbe.yaml",
            CONFIGS / "induced_protein.yaml",
            *sorted((ROOT / "tests" / "published").glob("*.yaml"))]


# fast_microbe without pump-grid refinement: its refinement to 160 steps takes about
# 10 s of its 25 s CPU, and the written schedule is what is judged here
SETTINGS = {"fast_microbe": {"solver.refine_grid": False}}


@pytest.mark.parametrize("path", PROBLEMS, ids=lambda p: p.stem)
def test_every_written_schedule_passes_check_as_written(path, optimized, tmp_path):
    r = optimized(path, SETTINGS.get(path.stem))
    assert r.status == "optimal, verified", r.message
    out = write_optimize_run(r, tmp_path / "run", figures=False)
    text = (out / "schedule.csv").read_text()
    problem = optfeed.load_problem(path, set=SETTINGS.get(path.stem))
    h = problem.horizon
    end_time = None
    if h.free:
        # the end time the schedule's own header tells the user to check it with
        end_time = float(re.search(r"--end-time (\S+)", text).group(1))
        assert h.min_end <= end_time <= h.max_end  # an answer never leaves its own bounds
    c = optfeed.check(problem, out / "schedule.csv", end_time=end_time)
    assert c.status == "within limits", c.message
    # the same schedule judged the same way: the same objective and the same slacks
    assert c.outcome.objective.value == pytest.approx(r.objective_sim, rel=1e-9)
    for mine, theirs in zip(r.limits, c.limits):
        assert mine.report.min_slack == pytest.approx(theirs.min_slack, rel=1e-9, abs=1e-12)


FILL = """
species:
  X: {initial: 1 g/L}
reactions: {X: "0"}
feeds:
  medium: {composition: {X: 1 g/L}, max_rate: 1 L/h}
vessel: {initial_volume: 5 L, working_volume: 8 L}
horizon: {end_time: 10 h}
"""


def test_first_crossing_of_the_working_volume_matches_the_closed_form(write):
    # V = 5 + 0.45 t passes 8 L (plus check's tolerance, 1e-6 of the bound) at
    # (8 * (1 + 1e-6) - 5) / 0.45 h, exactly (volume balance)
    r = optfeed.check(write("fill.yaml", FILL), write("fill.csv", "time [h],medium [L/h]\n0,0.45\n"))
    rep = next(x for x in r.limits if x.name == "working volume")
    exact = (8.0 * (1 + 1e-6) + 1e-9 - 5.0) / 0.45
    assert rep.first_violation == pytest.approx(exact, abs=1e-7)  # 0.4 ms, far under a second
    assert abs(rep.first_violation - (8.0 - 5.0) / 0.45) < 1e-4  # and within 0.4 s of the bound itself


SPIKE = """
species:
  X: {initial: 1 g/L}
reactions: {X: "0"}
feeds:
  medium: {composition: {X: 1 g/L}, max_rate: 1 L/h}
vessel: {initial_volume: 5 L, working_volume: 8 L}
limits:
  - {name: spike, expression: "exp(-((t - 5.0025) / 0.0005)^2)", max: 0.5}
horizon: {end_time: 10 h}
"""


def test_a_spike_between_two_samples_is_found(write):
    # the run is sampled every 0.005 h; the spike peaks (at 1.0) midway between two
    # samples, where both samples see e^-25, so the samples alone miss it
    r = optfeed.check(write("spike.yaml", SPIKE), write("spike.csv", "time [h],medium [L/h]\n0,0\n"))
    assert r.status == "limit broken"
    g = np.exp(-((r.trajectory.t - 5.0025) / 0.0005) ** 2)
    assert g.max() < 1e-9  # what the samples show
    rep = next(x for x in r.limits if x.name == "spike")
    assert rep.peak_use == pytest.approx(200.0, rel=1e-4)  # the peak itself, refined between samples
    assert rep.time_min_slack == pytest.approx(5.0025, abs=1e-5)
    # first crossing of 0.5 (plus tolerance): exp(-z^2) = 0.5 (1 + 1e-6) + 1e-9, closed form
    z = math.sqrt(-math.log(0.5 * (1 + 1e-6) + 1e-9))
    assert rep.first_violation == pytest.approx(5.0025 - 0.0005 * z, abs=1e-7)


BATCH = """
species:
  X: {initial: 1 g/L}
  S: {initial: 20 g/L}
parameters: {mu_max: 0.5 1/h, K_s: 0.2 g/L, Y_XS: 0.5}
rates:
  mu: monod(S, mu_max, K_s)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
feeds:
  sugar: {composition: {S: 400 g/L}, max_rate: 0.1 L/h}
vessel:
  initial_volume: 2 L
  working_volume: 3 L
  oxygen: {uptake: 30 * mu * X, transfer_max: 50 mmol/L/h}
horizon: {end_time: 12 h}
"""


def test_first_otr_crossing_matches_scipy_event_location(write):
    from scipy.integrate import solve_ivp

    r = optfeed.check(write("batch.yaml", BATCH), write("batch.csv", "time [h],sugar [L/h]\n0,0\n"))
    rep = next(x for x in r.limits if x.name == "OTR ceiling")
    assert rep.violated

    def rhs(t, y):
        X, S = y
        mu = 0.5 * S / (0.2 + S)
        return [mu * X, -mu / 0.5 * X]

    def over(t, y):  # OUR minus the ceiling plus check's tolerance
        X, S = y
        return 30 * 0.5 * S / (0.2 + S) * X - (50 * (1 + 1e-6) + 1e-9)

    over.terminal, over.direction = True, 1
    sol = solve_ivp(rhs, (0, 12), [1.0, 20.0], method="Radau", rtol=1e-12, atol=1e-12, events=over)
    assert rep.first_violation == pytest.approx(sol.t_events[0][0], abs=1e-6)
