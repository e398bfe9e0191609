"""optimize with phases and additions, against references outside the NLP.

The problems here are small invented scenarios (not data from any real culture).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from optfeed import load_problem, optimize
from optfeed.check import check
from optfeed.report.files import write_optimize_run

BATCH_THEN_FEED = """
name: batch_then_feed
species:
  X: {initial: 0.4 g/L}
  S: {initial: 6 g/L}
  P: {initial: 0 g/L}
parameters:
  mu_max: 0.5 1/h
  K_s: 0.2 g/L
  Y_XS: 0.5 g/g
  alpha: 0.3 g/g
rates:
  mu: monod(S, mu_max, K_s)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
  P: alpha * mu * X
feeds:
  glucose: {composition: {S: 300 g/L}, max_rate: 40 mL/h}
vessel: {initial_volume: 1 L, working_volume: 1.4 L}
limits:
  - {name: glucose ceiling, expression: S, max: 8 g/L}
phases:
  - {name: batch, feeds: off, until: S < 0.5 g/L}
  - {name: fed}
horizon: {end_time: 14 h}
objective: {maximize: product_mass, product: P}
solver: {pump_steps: 14, starts: 2, refine_grid: false}
"""

INDUCTION = """
name: induction_{tag}
species:
  X: {{initial: 0.5 g/L}}
  S: {{initial: 4 g/L}}
  P: {{initial: 0 g/L}}
parameters:
  mu_max: 0.45 1/h
  K_s: 0.1 g/L
  Y_XS: 0.5 g/g
  q_P_max: 0.08 g/g/h
rates:
  mu: monod(S, mu_max, K_s)
  q_P: 0 * mu
reactions:
  X: mu * X
  S: -mu / Y_XS * X
  P: q_P * X
feeds:
  glucose: {{composition: {{S: 300 g/L}}, max_rate: 30 mL/h}}
vessel: {{initial_volume: 1 L, working_volume: 1.5 L}}
limits:
  - {{name: glucose ceiling, expression: S, max: 5 g/L}}
phases:
  - {{name: growth, until: {until}}}
  - name: production
    parameters: {{mu_max: 0.1 1/h}}
    rates: {{q_P: q_P_max * S / (S + K_s)}}
horizon: {{end_time: 16 h}}
objective: {{maximize: product_mass, product: P}}
solver: {{pump_steps: 16, starts: 2, refine_grid: false}}
"""


def _write(tmp_path, name, text):
    path = tmp_path / f"{name}.yaml"
    path.write_text(text)
    return path


def test_batch_ends_where_scipy_finds_the_substrate_depleted(tmp_path):
    # Reference: scipy's solve_ivp with a terminal event on S = 0.5 g/L, pumps off
    # (the batch's end follows from the dynamics alone: Monod batch growth).
    path = _write(tmp_path, "batch_then_feed", BATCH_THEN_FEED)
    r = optimize(load_problem(path))
    assert r.status.startswith("optimal"), r.message
    mu_max, K_s, Y = 0.5, 0.2, 0.5

    def rhs(t, y):
        X, S = y
        mu = mu_max * S / (K_s + S)
        return [mu * X, -mu / Y * X]

    event = lambda t, y: y[1] - 0.5  # noqa: E731
    event.terminal, event.direction = True, -1
    ref = solve_ivp(rhs, (0, 14), [0.4, 6.0], events=event, rtol=1e-10, atol=1e-12)
    t_ref = float(ref.t_events[0][0])
    t_nlp = r.schedule.switch_times["batch"]
    assert abs(t_nlp - t_ref) < 2e-3, (t_nlp, t_ref)
    # the pumps stay off in the batch, and the written schedule passes check as written
    sched = r.schedule
    rates = np.concatenate([seg.rates(np.array([seg.start]))[0] for seg in sched.segments(["glucose"], 14.0)
                            if seg.end <= t_ref - 1e-6])
    assert np.all(rates == 0.0)
    out = tmp_path / "run"
    write_optimize_run(r, out, figures=False)
    c = check(load_problem(path), out / "schedule.csv")
    assert c.exit_code == 0 and not c.violations, (c.message, [v.name for v in c.violations])


def test_free_induction_time_matches_a_scan_of_fixed_times(tmp_path):
    # Reference: a scan of fixed induction times, each optimised on its own (the free
    # time must do at least as well as the best of them, and lie near it).
    free = optimize(load_problem(_write(tmp_path, "free", INDUCTION.format(tag="free", until="{between: [3 h, 13 h]}"))))
    assert free.status.startswith("optimal"), free.message
    t_free = free.schedule.switch_times["growth"]
    scan = {}
    for t in (4.0, 6.0, 8.0, 10.0, 12.0):
        r = optimize(load_problem(_write(tmp_path, f"at{t:g}", INDUCTION.format(tag=f"at{t:g}", until=f"{t:g} h"))))
        assert r.status.startswith("optimal"), r.message
        scan[t] = r.objective_sim
    best_t = max(scan, key=scan.get)
    assert free.objective_sim >= max(scan.values()) * (1 - 1e-3), (free.objective_sim, scan)
    assert abs(t_free - best_t) <= 2.0 + 1e-9, (t_free, scan)


def test_a_sweep_reports_when_each_phase_ended(tmp_path):
    # Reference: the same schedule checked on its own (its phases' ends), and the
    # proposed plan's own induction time (its phase column says 12 h).
    import csv
    import shutil

    from conftest import CONFIGS
    from optfeed.sweep import run_sweep

    for name in ("induced_protein.yaml", "induced_protein_plan.csv"):
        shutil.copy(CONFIGS / name, tmp_path / name)
    (tmp_path / "s.yaml").write_text("problems: induced_protein.yaml\njob: check\nschedule: induced_protein_plan.csv\n"
                                     "grid:\n  parameters.mu_max: [0.5 1/h, 0.6 1/h]\n")
    r = run_sweep(tmp_path / "s.yaml", tmp_path / "out", workers=1)
    assert r.status == "finished", r.message
    # its figures read the cases' schedules, phase column and all
    assert not (tmp_path / "out" / "figures" / "figure-not-drawn.txt").exists()
    rows = list(csv.DictReader(open(tmp_path / "out" / "summary.csv")))
    for row in rows:
        mu = float(row["parameters.mu_max [1/h]"])
        alone = check(load_problem(tmp_path / "induced_protein.yaml", set={"parameters.mu_max": f"{mu} 1/h"}),
                      tmp_path / "induced_protein_plan.csv")
        assert float(row["end of phase batch [h]"]) == pytest.approx(alone.trajectory.switches["batch"], rel=1e-9)
        assert float(row["end of phase growth [h]"]) == pytest.approx(12.0)
    # a faster culture spends its batch glucose sooner
    ends = sorted((float(r_["parameters.mu_max [1/h]"]), float(r_["end of phase batch [h]"])) for r_ in rows)
    assert ends[1][1] < ends[0][1]


def test_a_phased_runs_recipe_is_checked_with_its_phases(tmp_path, optimized):
    # Reference: the check job run on the recipe's own schedule.csv, read back from disk
    # (the rounded recipe must keep the phase ends the run was optimised with).
    from conftest import CONFIGS
    from optfeed.recipe import recipe, write_recipe_run

    r = optimized(CONFIGS / "induced_protein.yaml")
    run = write_optimize_run(r, tmp_path / "run", figures=False)
    rec = recipe(run, unit="mL/h", step="1 min", problem=CONFIGS / "induced_protein.yaml")
    out = write_recipe_run(rec, tmp_path / "recipe", figures=False)
    again = check(load_problem(CONFIGS / "induced_protein.yaml"), out / "schedule.csv")
    # the file judged as the recipe job judged it: same verdict, phase ends and objective
    assert again.status == rec.check.status, (again.message, rec.check.message)
    assert again.trajectory.switches == pytest.approx(rec.check.trajectory.switches, abs=1e-9)
    assert again.outcome.objective.value == pytest.approx(rec.check.outcome.objective.value, rel=1e-9)
    # induction moved onto the controller's 1-minute clock, within half a step of the run's
    assert abs(rec.check.trajectory.switches["growth"] - r.schedule.switch_times["growth"]) <= 0.5 / 60 + 1e-9


def test_a_free_end_stops_before_additions_it_does_not_need(tmp_path):
    # Reference: finite differences of the optimum in the earliest end time (its
    # marginal value), and the simulation's own count of additions applied. Taking
    # product costs time here, so the best run ends as early as allowed, and the
    # samples after that end never happen (they must not hold the run open).
    base = INDUCTION.format(tag="free_end", until="{between: [3 h, 8 h]}")
    base = base.replace("horizon: {end_time: 16 h}", "horizon: {end_time: {min: MIN h, max: 20 h, guess: 15 h}}")
    base = base.replace("objective: {maximize: product_mass, product: P}",
                        "objective: {maximize: expression, expression: P * V - 3 * t}\n"
                        "additions:\n  - {sample: 10 mL, every: 3 h}")
    runs = {}
    for lo in (10.0, 10.2):
        r = optimize(load_problem(_write(tmp_path, f"min{lo:g}", base.replace("MIN", f"{lo:g}"))))
        assert r.status.startswith("optimal"), r.message
        runs[lo] = r
    r = runs[10.0]
    assert r.end_time == pytest.approx(10.0, abs=1e-6)
    assert [a.time for a in r.additions] == [3.0, 6.0, 9.0]
    slope = (runs[10.2].objective_sim - r.objective_sim) / 0.2
    assert r.record["end_time_marginal_per_h"] == pytest.approx(slope, rel=0.1), (r.record["end_time_marginal_per_h"], slope)


BOLUS = """
name: bolus_amount
species:
  X: {initial: 0.5 g/L}
  S: {initial: 2 g/L}
  P: {initial: 0 g/L}
parameters: {mu_max: 0.4 1/h, K_s: 0.1 g/L, Y_XS: 0.5 g/g, alpha: 0.3 g/g}
rates:
  mu: monod(S, mu_max, K_s)
reactions: {X: mu * X, S: -mu / Y_XS * X, P: alpha * mu * X}
feeds:
  glucose: {composition: {S: 300 g/L}, max_rate: 1 mL/h}
vessel: {initial_volume: 1 L, working_volume: 1.5 L}
limits:
  - {name: glucose ceiling, expression: S, max: 8 g/L}
additions:
  - {bolus: 50 mL, amounts: {S: {max: 30 g}}, at: 3 h}
horizon: {end_time: 10 h}
objective: {maximize: product_mass, product: P}
solver: {pump_steps: 10, refine_grid: false}
"""


def test_a_bolus_amount_optimize_chooses_fills_to_the_ceiling(tmp_path):
    # Reference: the dilution balance of a bolus, (C V + m) / (V + v) = S after (hand
    # computation): growth here is limited by glucose, so the best bolus is the most
    # the glucose ceiling allows right after it, m = 8 g/L (V + v) - C V with C and V
    # just before it (within the back-off the verification keeps between points).
    # And planned.yaml, with the chosen amount written in, passes check as written.
    path = _write(tmp_path, "bolus", BOLUS)
    r = optimize(load_problem(path))
    assert r.status == "optimal, verified", r.message
    [c] = r.record["chosen_amounts"]
    traj = r.trajectory
    k = int(np.flatnonzero(traj.t == 3.0)[0])  # the sample just before the jump (the time appears twice)
    C, V = traj.state("S")[k], traj.state("V")[k]
    ceiling = (8.0 * (V + 0.05) - C * V)
    assert c["amount"] <= ceiling + 1e-6
    assert c["amount"] == pytest.approx(ceiling, rel=0.015), (c["amount"], ceiling)
    out = write_optimize_run(r, tmp_path / "run", figures=False)
    with pytest.raises(Exception, match="range for optimize to choose"):
        check(load_problem(path), out / "schedule.csv")
    again = check(load_problem(out / "planned.yaml"), out / "schedule.csv")
    assert again.status == "within limits", again.message
    assert again.outcome.objective.value == pytest.approx(r.objective_sim, rel=1e-9)
