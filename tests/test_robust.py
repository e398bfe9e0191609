"""optimize over the scenarios of an uncertainty section: one pump profile for all.

Outside references:
* identical scenarios are the nominal problem: the answer equals the nominal
  optimum (a property of the sample-average approximation; common practice);
* the worst case over two scenarios of a one-step (constant) feed, found by brute
  force with scipy (solve_ivp for the runs, brentq for the largest feed each
  scenario's oxygen ceiling allows), against optimize with ``objective: worst``;
* the written schedules (the answer and the nominal optimum beside it) pass
  ``optfeed check`` exactly as written.
"""

from __future__ import annotations

import json
import textwrap
from dataclasses import replace

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

import optfeed
import optfeed.cli
from optfeed.model import build_model
from optfeed.optimize import merge_identical
from optfeed.problem import load_problem
from optfeed.report import write_optimize_run
from optfeed.uncertainty import scenario_set

from conftest import OXYGEN

# OXYGEN (tests/conftest.py): our own OTR-limited problem, biomass on a sugar feed


UNCERTAIN = """\
uncertainty:
  parameters:
    mu_max: {distribution: normal, relative_sd: 10 %}
    Y_XS: {distribution: uniform, min: 0.45, max: 0.55}
  scenarios: {count: 3, seed: 2}
  monte_carlo: {samples: 12, seed: 3}
"""


def _write(tmp_path, text, name="problem.yaml"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text).lstrip())
    return path


def test_identical_scenarios_are_the_nominal_problem(tmp_path):
    """Zero spread: every scenario is the nominal one, so the answer is the nominal
    optimum (to 1e-6) and no scenario solve is made."""
    path = _write(tmp_path, OXYGEN + UNCERTAIN)
    nominal = optfeed.optimize(_write(tmp_path, OXYGEN, "plain.yaml"))
    zero = optfeed.optimize(path, set={"uncertainty.parameters.mu_max.relative_sd": 0,
                                       "uncertainty.parameters.Y_XS.min": 0.5,
                                       "uncertainty.parameters.Y_XS.max": 0.5})
    assert nominal.status == zero.status == "optimal, verified"
    assert zero.objective_sim == pytest.approx(nominal.objective_sim, rel=1e-6)
    assert zero.nominal is None and "scenarios" not in zero.record
    # the Monte Carlo of a zero-spread section: every sample is the nominal run
    assert zero.uncertainty.any_limit.broken == 0
    assert zero.uncertainty.objective["p5"] == pytest.approx(zero.objective_sim, rel=1e-6)
    assert zero.uncertainty.objective["p95"] == pytest.approx(zero.objective_sim, rel=1e-6)
    # and identical draws are merged into one with their weight
    p = load_problem(path)
    sc = scenario_set(p, build_model(p))
    same = replace(sc, constants=np.repeat(sc.constants[:, :1], 3, axis=1), x0=np.repeat(sc.x0[:, :1], 3, axis=1),
                   values=np.repeat(sc.values[:, :1], 3, axis=1), weights=np.full(3, 1 / 3))
    assert merge_identical(same) is None
    two = replace(sc, constants=sc.constants[:, [0, 1, 0]], x0=sc.x0[:, [0, 1, 0]], values=sc.values[:, [0, 1, 0]],
                  weights=np.full(3, 1 / 3))
    merged = merge_identical(two)
    assert merged.count == 2 and list(merged.weights) == pytest.approx([2 / 3, 1 / 3])


def _run(F, mu_max, T=12.0):
    """(X*V at the end in g, highest OTR in mmol/L/h) of a constant feed F (L/h):
    the same balances written out by hand, integrated by scipy."""
    K_s, Y, S_F = 0.1, 0.5, 200.0

    def rhs(t, y):
        X, S, V = y
        mu = mu_max * S / (K_s + S)
        D = F / V
        return [mu * X - D * X, -mu / Y * X + D * (S_F - S), F]

    sol = solve_ivp(rhs, (0.0, T), [2.0, 0.5, 1.0], method="LSODA", rtol=1e-10, atol=1e-12, dense_output=True)
    tt = np.linspace(0.0, T, 4001)
    X, S, V = sol.sol(tt)
    mu = mu_max * S / (K_s + S)
    otr = 20 * mu * X + X
    return X[-1] * V[-1], float(otr.max())


def test_worst_case_of_two_scenarios_against_brute_force(tmp_path):
    """One constant feed for a strain that may be 20 % faster: the worst case of the
    two is best at the largest feed the faster strain's oxygen ceiling allows (the
    product mass grows with the feed); scipy finds that feed by root finding on the
    highest OTR of hand-written balances."""
    text = OXYGEN.replace("solver: {pump_steps: 12, starts: 1}",
                          "solver: {pump_steps: 1, elements_per_step: 40, starts: 1, refine_grid: false}")
    path = _write(tmp_path, text + textwrap.dedent("""\
        uncertainty:
          parameters:
            mu_max: {distribution: uniform, min: 0.5 1/h, max: 0.6 1/h}
          scenarios: {count: 2, objective: worst}
        """))
    p = load_problem(path)
    model = build_model(p)
    sc = scenario_set(p, model)
    fast = sc.constants[model.constant_index("mu_max"), 1]
    sc = replace(sc, constants=sc.constants.copy())
    sc.constants[model.constant_index("mu_max"), 1] = 0.6  # the upper end, exactly
    assert 0.5 <= fast <= 0.6

    # brute force: the largest feed each strain's ceiling allows; the worst case is the smaller
    F_max = {mu: brentq(lambda F: _run(F, mu)[1] - 40.0, 1e-4, 0.05, xtol=1e-12) for mu in (0.5, 0.6)}
    F_star = min(F_max.values())
    worst = min(_run(F_star, mu)[0] for mu in (0.5, 0.6))
    # the worst case on a grid of feeds inside both ceilings is never better (40 elements:
    # the OTR ceiling holds between collocation points without a back-off)
    for F in np.linspace(0.0, F_star, 9):
        assert min(_run(F, mu)[0] for mu in (0.5, 0.6)) <= worst * (1 + 1e-9)

    r = optfeed.optimize(p, scenarios=sc, samples=8)
    assert r.status == "optimal, verified", r.message
    rate = r.schedule.segments(["sugar"], r.end_time)[0].rates(np.array([0.0]))[0, 0]
    assert rate == pytest.approx(F_star, rel=2e-4)
    assert r.objective_sim == pytest.approx(worst, rel=2e-4)
    assert r.record["scenarios"]["objective_over_scenarios"] == "worst"
    assert r.objective_sim == pytest.approx(min(r.record["scenarios"]["objective_resimulated"]), rel=1e-9)


def test_answer_and_nominal_optimum_side_by_side(tmp_path):
    """The run folder holds the answer, the nominal optimum beside it, both judged over
    the same Monte Carlo sample; both schedules pass check as written."""
    path = _write(tmp_path, OXYGEN + UNCERTAIN)
    out = tmp_path / "run"
    code = optfeed.cli.main(["optimize", str(path), "--out", str(out), "--quiet", "--no-figures"])
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "optimal, verified"
    sc = summary["record"]["scenarios"]
    assert sc["count"] == 3 and all(sc["verified"]) and sc["labels"][0] == "nominal"
    assert summary["objective"]["value"] == pytest.approx(np.mean(sc["objective_resimulated"]), rel=1e-9)
    nominal = summary["nominal_optimum"]
    assert nominal["status"] == "optimal, verified" and nominal["schedule"] == "nominal-schedule.csv"
    # the nominal optimum is at least as good on the nominal model as the answer is
    assert nominal["objective"] >= sc["objective_resimulated"][0] * (1 - 1e-6)
    a, b = summary["uncertainty"], nominal["uncertainty"]
    assert a["samples"] == b["samples"] == 12 and a["seed"] == b["seed"] == 3
    assert len((out / "montecarlo.csv").read_text().splitlines()) > 12
    assert len((out / "montecarlo-nominal.csv").read_text().splitlines()) > 12
    text = (out / "report.txt").read_text()
    assert "What robustness costs and buys" in text and "One pump profile for 3 scenarios" in text
    assert "Over the scenarios" in (out / "report.html").read_text()
    for name in ("schedule.csv", "nominal-schedule.csv"):
        checked = optfeed.check(path, out / name)
        assert checked.status == "within limits", (name, checked.message)


def _max_otr(schedule, T, mu_max, Y, points=100):
    """Highest OTR (mmol/L/h) of ``schedule`` in the OXYGEN balances written out by hand,
    integrated piece by piece with scipy's solve_ivp (an independent simulation), read
    from its dense output at ``points`` times per piece."""
    K_s, S_F = 0.1, 200.0
    y, peak = [2.0, 0.5, 1.0], 0.0
    for seg in schedule.segments(["sugar"], T):
        def rhs(t, z, seg=seg):
            X, S, V = z
            F = seg.rates(np.array([t]))[0, 0]
            mu = mu_max * S / (K_s + S)
            return [mu * X - F / V * X, -mu / Y * X + F / V * (S_F - S), F]

        sol = solve_ivp(rhs, (seg.start, seg.end), y, method="DOP853", rtol=1e-10, atol=1e-12, dense_output=True)
        tt = np.linspace(seg.start, seg.end, points)
        X, S, _ = sol.sol(tt)
        peak = max(peak, float(np.max(20 * mu_max * S / (K_s + S) * X + X)))
        y = list(sol.y[:, -1])
    return peak


def test_robust_profile_breaks_the_ceiling_less_often(tmp_path):
    """Over 24 fresh samples of a strain whose biomass yield is uncertain (0.45-0.55), the
    nominal optimum sits on the OTR ceiling and breaks it in a large fraction of them
    (under a sugar-limited feed the oxygen demand follows the biomass made from the
    sugar fed, so a higher yield takes more oxygen; common practice); the profile
    chosen over 6 scenarios holds it in each scenario and for every sample whose yield
    lies inside the scenarios' range, so it breaks it only above that range. The verdict on every sample agrees with scipy's solve_ivp on the same
    values (samples within 1e-3 mmol/L/h of the ceiling are left out as borderline)."""
    text = OXYGEN + textwrap.dedent("""\
        uncertainty:
          parameters:
            Y_XS: {distribution: uniform, min: 0.45, max: 0.55}
          scenarios: {count: 6, seed: 4}
          monte_carlo: {samples: 24, seed: 5}
        """)
    r = optfeed.optimize(_write(tmp_path, text), workers=2)
    assert r.status == "optimal, verified", r.message
    assert all(r.record["scenarios"]["verified"])
    robust = next(x for x in r.uncertainty.limits if x.name == "OTR ceiling")
    nominal = next(x for x in r.nominal.uncertainty.limits if x.name == "OTR ceiling")
    assert nominal.probability >= 0.3  # the nominal optimum rides the ceiling
    assert robust.probability < nominal.probability
    # the answer holds the ceiling for every sample inside the scenarios' range of
    # yields, the nominal optimum breaks it for every sample above the nominal yield
    top = max(r.record["scenarios"]["values"]["Y_XS [internal units]"])
    for run in r.uncertainty.runs:
        if run.values[0] < top - 1e-3:
            assert "OTR ceiling" not in run.broken, run.values
    for run in r.nominal.uncertainty.runs:
        if run.values[0] > 0.5 + 1e-3:
            assert "OTR ceiling" in run.broken, run.values
    tol = 1e-6 * 40 + 1e-9  # the check's tolerance (optfeed.limits.REL_TOL of the bound)
    for result in (r, r.nominal):
        for run in result.uncertainty.runs:
            (Y,) = run.values
            peak = _max_otr(result.schedule, result.end_time, 0.5, Y)
            if abs(peak - 40.0) < 1e-3:
                continue
            assert ("OTR ceiling" in run.broken) == (peak > 40.0 + tol), (Y, peak)
    # the report draws the answer against the nominal optimum
    out = write_optimize_run(r, tmp_path / "run")
    assert (out / "figure-fan.svg").stat().st_size > 0 and (out / "figure-robust-feeds.svg").stat().st_size > 0


def test_scenarios_verified_in_a_batch_agree_with_scipy(tmp_path):
    """A verification re-simulates every scenario but the nominal in one batch
    (optfeed.optimize._scenario_runs); each scenario's run, judged as verify judges it,
    gives the peak OTR that scipy's solve_ivp gives for the same mu_max and yield (the
    balances written out by hand, _max_otr, read at 20001 times per piece: the peak
    lies between pump changes) to 1e-6 relative, and the same verdict and margin as
    the scenario simulated on its own. The nominal scenario is left to its own run."""
    from optfeed.limits import build_limits
    from optfeed.optimize import _scenario_runs
    from optfeed.schedule import piecewise_constant
    from optfeed.simulate import Simulator
    from optfeed.verify import verify

    text = OXYGEN + UNCERTAIN.replace("count: 3", "count: 5")
    p = load_problem(_write(tmp_path, text))
    model = build_model(p)
    limits = build_limits(model, phases=True)
    sc = scenario_set(p, model)
    sim = Simulator(model)
    # 30 mL/h from 2 h, 50 mL/h from 7 h: near the ceiling late in the run (L/h)
    schedule = piecewise_constant(["sugar"], [0.0, 2.0, 7.0], [[0.0], [0.03], [0.05]])
    inputs = [(sc.x0[:, s], sc.constants[:, s]) for s in range(sc.count)]
    runs = _scenario_runs(sim, schedule, 12.0, inputs)
    assert runs[0] is None and all(r is not None for r in runs[1:])
    for s, ((x0, c), traj) in enumerate(zip(inputs, runs)):
        if s == 0:
            continue
        batched = verify(model, limits, schedule, 12.0, None, 1e-6, sim, x0=x0, p=c, trajectory=traj)
        alone = verify(model, limits, schedule, 12.0, None, 1e-6, sim, x0=x0, p=c)
        assert batched.verified == alone.verified
        otr_b = next(r for r in batched.limits if r.name == "OTR ceiling")
        otr_a = next(r for r in alone.limits if r.name == "OTR ceiling")
        mu_max = float(c[model.constant_names.index("mu_max")])
        Y = float(c[model.constant_names.index("Y_XS")])
        peak = _max_otr(schedule, 12.0, mu_max, Y, points=20001)
        assert 40.0 - otr_b.min_slack == pytest.approx(peak, rel=1e-6)
        assert otr_b.min_slack == pytest.approx(otr_a.min_slack, rel=1e-6, abs=1e-6)
