"""optimize: marginal values, free end time, the schedule round trip, infeasibility.

Outside references: finite differences of re-solved problems (the definition of a
marginal value: the derivative of the optimum with respect to a bound); a brute-force
scan of fixed end times (the definition of the best free end time); the check job's
independent CVODES simulation for the round trip.
"""

import dataclasses

import numpy as np
import pytest

import optfeed
from optfeed.optimize import optimize
from optfeed.problem import load_problem

from conftest import ROOT

PUBLISHED = ROOT / "tests" / "published"


def with_vessel(problem, **changes):
    return dataclasses.replace(problem, vessel=dataclasses.replace(problem.vessel, **changes))


def with_feed(problem, **changes):
    return dataclasses.replace(problem, feeds=(dataclasses.replace(problem.feeds[0], **changes),))


def marginal(result, name):
    return next(v for v in result.limits if v.name == name)


def test_working_volume_marginal_matches_finite_difference():
    p = load_problem(PUBLISHED / "ethanol.yaml")
    base = optimize(p)
    m = marginal(base, "working volume")
    assert m.active
    delta = 2.0  # L, 1 % of the 200 L working volume
    up = optimize(with_vessel(p, working_volume=200.0 + delta)).objective_nlp
    down = optimize(with_vessel(p, working_volume=200.0 - delta)).objective_nlp
    fd = (up - down) / (2 * delta)
    assert m.marginal_max == pytest.approx(fd, rel=0.03)


OXYGEN_LIMITED = """
    # our own scenario: biomass on a glucose feed; depending on the pump size the
    # optimum is held back by the pump or by the OTR ceiling
    name: oxygen_limited
    species:
      X: {{initial: 2 g/L}}
      S: {{initial: 0.5 g/L}}
    parameters: {{mu_max: 0.5 1/h, K_s: 0.1 g/L, Y_XS: 0.5}}
    rates:
      mu: monod(S, mu_max, K_s)
    reactions:
      X: mu * X
      S: -mu / Y_XS * X
    feeds:
      sugar: {{composition: {{S: 200 g/L}}, max_rate: {pump} L/h}}
    vessel:
      initial_volume: 1 L
      working_volume: 3 L
      oxygen: {{uptake: 20 * mu * X + 1 * X, transfer_max: 40 mmol/L/h}}
    horizon: {{end_time: 12 h}}
    objective: {{maximize: product_mass, product: X}}
    solver: {{pump_steps: 24}}
"""


def with_otr(problem, value):
    oxygen = dataclasses.replace(problem.vessel.oxygen, transfer_max=value)
    return with_vessel(problem, oxygen=oxygen)


@pytest.mark.parametrize("pump,name,delta,change", [
    # mmol/L/h on 40; wide enough that the small back-off each solve may apply
    # (re-simulation keeps the answer inside the ceiling) does not blur the difference
    (0.05, "OTR ceiling", 2.0, with_otr),
    (0.012, "pump sugar", 0.0002, lambda p, v: with_feed(p, max_rate=v)),  # L/h on 0.012
])
def test_marginal_matches_finite_difference(write, pump, name, delta, change):
    p = load_problem(write("ox.yaml", OXYGEN_LIMITED.format(pump=pump)))
    base = optimize(p)
    m = marginal(base, name)
    assert m.active and m.marginal_max > 0
    bound = {"OTR ceiling": 40.0, "pump sugar": pump}[name]
    fd = (optimize(change(p, bound + delta)).objective_nlp - optimize(change(p, bound - delta)).objective_nlp) / (2 * delta)
    assert m.marginal_max == pytest.approx(fd, rel=1e-3)
    # the other limit does not hold this optimum back: relaxing it by 1 % gains
    # next to nothing compared with relaxing this one by 1 %
    other_name = "pump sugar" if name == "OTR ceiling" else "OTR ceiling"
    other = marginal(base, other_name)
    other_bound = {"OTR ceiling": 40.0, "pump sugar": pump}[other_name]
    assert abs(other.marginal_max * other_bound) < 1e-4 * m.marginal_max * bound


PRODUCTIVITY = """
    # our own scenario: growth-associated product; the vessel fills, then the
    # titer stalls, so productivity (titer per h of run + turnaround) has a best end time
    name: productivity_demo
    species:
      X: {{initial: 1 g/L}}
      S: {{initial: 2 g/L}}
      P: {{initial: 0 g/L}}
    parameters: {{mu_max: 0.3 1/h, K_s: 0.1 g/L, Y_XS: 0.5, Y_PX: 0.4}}
    rates:
      mu: monod(S, mu_max, K_s)
    reactions:
      X: mu * X
      S: -mu / Y_XS * X
      P: Y_PX * mu * X + 0.01 * X
    feeds:
      sugar: {{composition: {{S: 300 g/L}}, max_rate: 0.05 L/h}}
    vessel: {{initial_volume: 1 L, working_volume: 1.6 L}}
    horizon:
      end_time: {end_time}
    objective: {{maximize: productivity, product: P, turnaround: 6 h}}
    solver: {{pump_steps: 20, starts: 2}}
"""


def test_free_end_time_matches_scan_of_fixed_end_times(write):
    free = optimize(write("free.yaml", PRODUCTIVITY.format(end_time="{min: 6 h, max: 60 h, guess: 25 h}")))
    assert free.status == "optimal, verified", free.message
    scan = {}
    for tf in np.arange(10.0, 52.0, 6.0):
        r = optimize(write(f"fixed_{tf:g}.yaml", PRODUCTIVITY.format(end_time=f"{tf} h")))
        assert r.status == "optimal, verified", r.message
        scan[tf] = r.objective_sim
    best_tf = max(scan, key=scan.get)
    # the free optimum is at least as good as every fixed end time (it may fall between them)
    assert free.objective_sim >= max(scan.values()) * (1 - 1e-3)
    assert abs(free.end_time - best_tf) <= 6.0
    # and the objective is flat there: a free end time's marginal value is ~0
    assert abs(free.record["end_time_marginal_per_h"]) < 1e-4 * free.objective_sim


def test_optimized_schedule_passes_check(tmp_path):
    from optfeed.report import write_optimize_run

    r = optimize(PUBLISHED / "penicillin.yaml")
    out = write_optimize_run(r, tmp_path / "run")
    c = optfeed.check(PUBLISHED / "penicillin.yaml", out / "schedule.csv", end_time=r.end_time)
    assert c.status == "within limits", c.message
    # the two independent simulations agree on the objective
    assert c.outcome.objective.value == pytest.approx(r.objective_sim, rel=1e-6)
    # and the schedule read back is the one written
    np.testing.assert_allclose(c.schedule.feeds["u"].rates, r.schedule.feeds["u"].rates, rtol=1e-15)


def test_otr_below_initial_demand_is_infeasible_before_solving(write):
    path = write("otr.yaml", """
        species:
          X: {initial: 10 g/L}
          S: {initial: 5 g/L}
        rates:
          mu: monod(S, 0.5, 0.1)
        reactions: {X: mu * X, S: -2 * mu * X}
        feeds:
          sugar: {composition: {S: 500 g/L}, max_rate: 0.1 L/h}
        vessel:
          initial_volume: 1 L
          working_volume: 2 L
          oxygen: {uptake: 30 * mu * X, transfer_max: 50 mmol/L/h}
        horizon: {end_time: 10 h}
        objective: {maximize: product_mass, product: X}
        """)
    r = optimize(path)
    assert r.status == "infeasible"
    assert "'OTR ceiling' cannot be met at the start" in r.message
    assert "vessel.oxygen.transfer_max" in r.message
    assert r.exit_code == 1


def test_contradictory_bounds_are_named(write):
    path = write("contra.yaml", """
        species:
          X: {initial: 1 g/L}
          S: {initial: 1 g/L}
        rates:
          mu: monod(S, 0.5, 0.1)
        reactions: {X: mu * X, S: -2 * mu * X}
        feeds:
          sugar: {composition: {S: 100 g/L}, max_rate: 0.1 L/h}
        vessel: {initial_volume: 1 L, working_volume: 2 L}
        limits:
          - {name: sugar ceiling, expression: S, max: 2 g/L}
        end:
          - {name: sugar at harvest, expression: S, min: 5 g/L}
        horizon: {end_time: 10 h}
        objective: {maximize: product_mass, product: X}
        solver: {pump_steps: 10, starts: 1}
        """)
    r = optimize(path)
    assert r.status == "infeasible", r.message
    assert "sugar" in r.message
    assert r.exit_code == 1
    assert r.objective_nlp is None


def test_unverified_answer_is_not_called_optimal(write):
    # a coarse grid on a stiff-ish problem: the NLP converges but re-simulation disagrees
    path = write("coarse.yaml", (PUBLISHED / "park_ramirez.yaml").read_text().replace(
        "objective:", "solver: {pump_steps: 3, elements_per_step: 1, degree: 1, starts: 1}\nobjective:"))
    r = optimize(path)
    assert r.status == "converged, not verified", r.message
    assert "optimal" not in r.status
    assert r.exit_code == 1


def test_limit_on_the_dilution_rate_holds_at_every_pump_step_start(write, tmp_path):
    # D = F/V is largest right where a pump step starts; the NLP must check it there
    # too, or the re-simulated schedule would exceed it between collocation points
    from optfeed.report import write_optimize_run

    text = OXYGEN_LIMITED.format(pump=0.05).replace(
        "    horizon:", "    limits:\n      - {name: dilution cap, expression: D, max: 0.02 1/h}\n    horizon:")
    path = write("dcap.yaml", text)
    r = optimize(path)
    assert r.status == "optimal, verified", r.message
    assert "kept clear of 'dilution cap'" not in r.message  # imposed at step starts: no back-off needed
    cap = marginal(r, "dilution cap")
    assert cap.active and cap.marginal_max > 0
    out = write_optimize_run(r, tmp_path / "run")
    c = optfeed.check(path, out / "schedule.csv")
    assert c.status == "within limits", c.message
