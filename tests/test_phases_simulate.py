"""Phases and additions in simulation and in ``optfeed check``.

Outside references, named beside each check: scipy's ``solve_ivp`` (with a terminal
event for a phase ended by a condition) and ``quad``; the closed form of a Monod
batch (X + Y_XS * S is conserved, common practice); hand mass balances of samples
and boluses (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp

import optfeed
from optfeed import load_problem
from optfeed.limits import PHASE_PUMP_ALLOWANCE, build_limits, evaluate, judge
from optfeed.model import build_model
from optfeed.schedule import load_schedule, piecewise_constant, schedule_csv_text
from optfeed.simulate import Simulator

from conftest import CONFIGS

MU, KS, Y = 0.5, 0.2, 0.5
X0, S0, V0 = 0.1, 10.0, 2.0
LEVEL = 1.0
C_IN = 300.0  # g/L in the feed

BATCH_THEN_FEED = f"""
name: batch_then_feed
species:
  X: {{initial: {X0} g/L}}
  S: {{initial: {S0} g/L}}
parameters: {{mu_max: {MU} 1/h, K_s: {KS} g/L, Y_XS: {Y}}}
rates:
  mu: monod(S, mu_max, K_s)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
feeds:
  sugar: {{composition: {{S: {C_IN} g/L}}, max_rate: 100 mL/h}}
vessel: {{initial_volume: {V0} L, working_volume: 4 L}}
phases:
  - {{name: batch, feeds: off, until: S < {LEVEL} g/L}}
  - {{name: fed}}
horizon: {{end_time: 16 h}}
"""


def _problem(tmp_path, text, name="p.yaml"):
    path = tmp_path / name
    path.write_text(text)
    return load_problem(path)


def _monod(t, y, mu_max=MU, F=0.0, c_in=C_IN):
    X, S, V = y
    mu = mu_max * S / (KS + S)
    return [mu * X - F / V * X, -mu / Y * X + F / V * (c_in - S), F]


def test_batch_end_matches_solve_ivp_event_and_closed_form(tmp_path):
    problem = _problem(tmp_path, BATCH_THEN_FEED)
    model = build_model(problem)
    # the schedule asks for feed from 0 h: the batch keeps the pump off until S < 1 g/L
    traj = Simulator(model).run(piecewise_constant(["sugar"], [0.0], [[0.05]]), 16.0)
    t_sw = traj.switches["batch"]

    # reference 1: scipy solve_ivp with a terminal event on S - level
    def event(t, y):
        return y[1] - LEVEL
    event.terminal, event.direction = True, -1
    ref = solve_ivp(_monod, (0, 16), [X0, S0, V0], events=event, rtol=1e-12, atol=1e-12, method="LSODA")
    t_ivp = float(ref.t_events[0][0])
    # reference 2: closed form of a Monod batch with constant yield (common practice):
    # X = X0 + Y (S0 - S), dS/dt = -mu(S) X(S) / Y, so t = integral of Y / (mu(S) X(S)) dS
    t_quad, _ = quad(lambda S: Y / (MU * S / (KS + S) * (X0 + Y * (S0 - S))), LEVEL, S0, epsabs=1e-13, epsrel=1e-13)
    assert t_sw == pytest.approx(t_quad, rel=1e-6)
    assert t_sw == pytest.approx(t_ivp, rel=1e-6)
    # the next phase starts exactly there, from the state at the crossing
    k = int(np.argmax(traj.phase == 1))
    assert traj.t[k] == t_sw and traj.t[k - 1] == t_sw
    assert traj.state("S")[k] == pytest.approx(LEVEL, rel=1e-7)
    assert traj.state("X")[k] == pytest.approx(X0 + Y * (S0 - LEVEL), rel=1e-7)  # conserved X + Y S
    # the pump was off in the batch (recorded 0) and on after it
    assert np.all(traj.feed("sugar")[traj.phase == 0] == 0)
    assert np.all(traj.feed("sugar")[traj.phase == 1] == 0.05)
    # the volume grows only after the switch: V(16) = V0 + F (16 - t_sw) (hand mass balance)
    assert traj.state("V")[-1] == pytest.approx(V0 + 0.05 * (16 - t_sw), rel=1e-9)
    # and the fed stretch agrees with solve_ivp restarted at the event with the feed on (scipy)
    fed = solve_ivp(lambda t, y: _monod(t, y, F=0.05), (t_ivp, 16), ref.y_events[0][0], rtol=1e-12, atol=1e-12,
                    method="LSODA")
    assert traj.final[:3] == pytest.approx(fed.y[:, -1], rel=1e-6)


def test_condition_that_never_holds_leaves_the_phase_unended(tmp_path):
    problem = _problem(tmp_path, BATCH_THEN_FEED.replace(f"S < {LEVEL} g/L", "X > 500 g/L"))
    traj = Simulator(build_model(problem)).run(piecewise_constant(["sugar"], [0.0], [[0.05]]), 16.0)
    assert traj.unended == "batch" and traj.switches == {}
    assert np.all(traj.phase == 0) and np.all(traj.feed("sugar") == 0)


SAMPLED = f"""
name: sampled
species:
  X: {{initial: {X0} g/L}}
  S: {{initial: {S0} g/L}}
  P: {{initial: 0 g/L}}
parameters: {{mu_max: {MU} 1/h, K_s: {KS} g/L, Y_XS: {Y}, q_P: 0.05}}
rates:
  mu: monod(S, mu_max, K_s)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
  P: q_P * X
feeds:
  sugar: {{composition: {{S: {C_IN} g/L}}, max_rate: 100 mL/h}}
vessel: {{initial_volume: {V0} L, working_volume: 4 L}}
additions:
  - {{sample: 25 mL, every: 2 h}}
horizon: {{end_time: 10 h}}
"""


def test_samples_take_volume_and_leave_concentrations(tmp_path):
    problem = _problem(tmp_path, SAMPLED)
    model = build_model(problem)
    F = 0.02
    traj = Simulator(model).run(piecewise_constant(["sugar"], [0.0], [[F]]), 10.0)
    times = [2.0, 4.0, 6.0, 8.0]
    assert [a.time for a, _ in traj.additions] == times
    v = 0.025
    # hand mass balance (common practice): V(T) = V0 + F T - n v
    assert traj.state("V")[-1] == pytest.approx(V0 + F * 10 - len(times) * v, rel=1e-12)
    removed = 0.0
    for t in times:
        before, after = np.nonzero(traj.t == t)[0]  # each sample time appears twice
        for s in ("X", "S", "P"):
            assert traj.state(s)[after] == traj.state(s)[before]  # concentrations unchanged
        assert traj.state("V")[before] - traj.state("V")[after] == pytest.approx(v, rel=1e-12)
        removed += traj.state("P")[before] * v
    # product balance (hand): product in the vessel at the end + product taken out in samples
    # = product formed, where the product formed is integral of q_P X V dt
    formed = np.sum([np.trapezoid(0.05 * traj.state("X")[m] * traj.state("V")[m], traj.t[m])
                     for m in [traj.piece == k for k in np.unique(traj.piece)]])
    assert traj.state("P")[-1] * traj.state("V")[-1] + removed == pytest.approx(formed, rel=1e-5)


def test_samples_without_feed_leave_the_batch_curve_as_solve_ivp_has_it(tmp_path):
    problem = _problem(tmp_path, SAMPLED.replace("every: 2 h", "every: 3 h"))
    traj = Simulator(build_model(problem)).run(piecewise_constant(["sugar"], [0.0], [[0.0]]), 10.0)
    # reference: scipy solve_ivp of the batch without any sample (concentrations do not see them)
    grid = np.unique(traj.t)
    ref = solve_ivp(_monod, (0, 10), [X0, S0, V0], rtol=1e-12, atol=1e-12, method="LSODA", t_eval=grid)
    want = ref.y[:, np.searchsorted(grid, traj.t)]
    assert traj.state("X") == pytest.approx(want[0], rel=1e-6)  # CVODES at rtol 1e-10 keeps ~2e-7
    assert traj.state("S") == pytest.approx(want[1], rel=1e-6, abs=1e-6 * S0)
    assert traj.state("V")[-1] == pytest.approx(V0 - 3 * 0.025, rel=1e-12)  # samples at 3, 6, 9 h


def test_bolus_mixes_as_a_hand_mass_balance(tmp_path):
    text = SAMPLED.replace("  - {sample: 25 mL, every: 2 h}", "  - {bolus: 100 mL, amounts: {S: 20 g}, at: 3 h}")
    problem = _problem(tmp_path, text)
    model = build_model(problem)
    traj = Simulator(model).run(piecewise_constant(["sugar"], [0.0], [[0.01]]), 10.0)
    before, after = np.nonzero(traj.t == 3.0)[0]
    V = traj.state("V")[before]
    # hand mass balance (common practice): C+ = (C V + m) / (V + v)
    assert traj.state("S")[after] == pytest.approx((traj.state("S")[before] * V + 20.0) / (V + 0.1), rel=1e-13)
    assert traj.state("X")[after] == pytest.approx(traj.state("X")[before] * V / (V + 0.1), rel=1e-13)
    assert traj.state("V")[after] == pytest.approx(V + 0.1, rel=1e-13)
    assert traj.state("fed_S")[after] - traj.state("fed_S")[before] == pytest.approx(20.0, rel=1e-12)


def test_a_sample_that_empties_the_vessel_names_its_time(tmp_path):
    problem = _problem(tmp_path, SAMPLED.replace("sample: 25 mL, every: 2 h", "sample: 3 L, at: 5 h"))
    with pytest.raises(optfeed.SimulationError, match=r"sample of 3000 mL at 5 h .* takes the broth volume"):
        Simulator(build_model(problem)).run(piecewise_constant(["sugar"], [0.0], [[0.0]]), 10.0)


SHIFT = SAMPLED.replace("additions:\n  - {sample: 25 mL, every: 2 h}\n", """phases:
  - {name: grow, until: 4 h}
  - name: make
    parameters: {mu_max: 0.2 1/h}
    rates: {P: 0.3 * X}
""")


def test_a_phase_changes_its_parameter_and_rate_only_after_its_switch(tmp_path):
    problem = _problem(tmp_path, SHIFT)
    model = build_model(problem, fed="used")  # the optimizer's leaner states: the phases keep them
    F = 0.02
    traj = Simulator(model).run(piecewise_constant(["sugar"], [0.0, 2.0], [[0.0], [F]]), 10.0)
    assert traj.switches == {"grow": 4.0}
    assert traj.state_names == tuple(model.state_names)

    # reference: scipy solve_ivp of the piecewise model, restarted at each change
    def rhs(t, y, mu_max, qp, F):
        X, S, P, V = y
        d = _monod(t, [X, S, V], mu_max, F)
        return [d[0], d[1], qp * X - F / V * P, d[2]]
    y = [X0, S0, 0.0, V0]
    for (a, b, mu_max, qp, f) in [(0, 2, MU, 0.05, 0.0), (2, 4, MU, 0.05, F), (4, 10, 0.2, 0.3, F)]:
        sol = solve_ivp(rhs, (a, b), y, args=(mu_max, qp, f), rtol=1e-12, atol=1e-12, method="LSODA")
        y = sol.y[:, -1]
        k = int(np.nonzero(traj.t == b)[0][0])  # last sample of the stretch (before any restart)
        assert traj.x[k, :4] == pytest.approx(y, rel=1e-6)


# ------------------------------------------------------------------ check on the invented three-phase scenario

PROBLEM = CONFIGS / "induced_protein.yaml"
PLAN = CONFIGS / "induced_protein_plan.csv"


def test_check_passes_the_plan_and_lists_phases_and_samples():
    r = optfeed.check(PROBLEM, PLAN)
    assert r.status == "within limits", r.message
    assert [p.name for p in r.phases] == ["batch", "growth", "production"]
    assert r.phases[0].how == "condition S < 0.5 g/L"
    assert r.phases[1].end == 12.0 and r.phases[1].how == "schedule"
    assert [a.time for a in r.additions] == [4.0, 8.0, 12.0, 16.0, 20.0]
    # the production phase's own limit (S <= 2 g/L) is judged over production only: S is 8 g/L
    # at the start of the batch, which does not count
    own = next(x for x in r.limits if x.name == "glucose while producing")
    assert r.trajectory.state("S")[0] > 2.0 and not own.violated
    assert own.time_min_slack >= 12.0


def test_check_breaks_the_batch_pump_range_when_the_plan_feeds_in_the_batch(tmp_path):
    text = PLAN.read_text().replace("0,0,batch", "0,2,batch")
    path = tmp_path / "plan.csv"
    path.write_text(text)
    r = optfeed.check(PROBLEM, path)
    assert r.status == "limit broken"
    assert [x.name for x in r.violations] == ["pump glucose in batch"]
    rep = r.violations[0]
    # 2 mL/h asked over the batch: breaks the allowance (1e-4 of 2 L = 0.2 mL) after 0.1 h
    assert rep.first_violation == pytest.approx(PHASE_PUMP_ALLOWANCE * 2.0 / 2e-3, rel=1e-3)
    assert rep.worst_violation == pytest.approx(2e-3 * r.phases[0].end - 2e-4, rel=1e-6)


def test_a_phase_limit_broken_in_its_phase_is_reported_there(tmp_path):
    text = PLAN.read_text().replace(",production", ",production").splitlines()
    text = [line if not line.endswith(",production") else line.split(",")[0] + ",40,production" for line in text]
    path = tmp_path / "plan.csv"
    path.write_text("\n".join(text) + "\n")
    r = optfeed.check(PROBLEM, path)
    own = next(x for x in r.limits if x.name == "glucose while producing")
    assert own.violated and own.first_violation >= 12.0


def test_a_batch_that_never_ends_fails_check_in_one_sentence():
    r = optfeed.check(PROBLEM, PLAN, set={"parameters.mu_max": "0.02 1/h"})
    assert r.status == "limit broken"
    assert r.message.startswith("phase 'batch' never ended: S stayed above 0.5 g/L until 24 h")
    assert [p.how for p in r.phases] == ["never ended"]


def test_phase_column_round_trips_through_the_writer(tmp_path):
    problem = load_problem(PROBLEM)
    sched = load_schedule(PLAN, problem.feed_names, 24.0, problem.phases)
    assert sched.switch_times == {"growth": 12.0}
    text = schedule_csv_text(sched, {"glucose": "mL/h"}, "", [p.name for p in problem.phases], {"batch": 4.8})
    path = tmp_path / "again.csv"
    path.write_text(text)
    again = load_schedule(path, problem.feed_names, 24.0, problem.phases)
    assert again.switch_times == sched.switch_times and again.feeds == sched.feeds
    assert [line.split(",")[-1] for line in text.splitlines()[2:]] == ["batch", "growth", "production"]
    yaml = tmp_path / "plan.yaml"
    yaml.write_text("feeds:\n  glucose:\n    - {time: 0 h, rate: 0 L/h}\n    - {time: 5 h, rate: 5 mL/h}\n"
                    "phases: {growth: 12.5 h}\n")
    assert load_schedule(yaml, problem.feed_names, 24.0, problem.phases).switch_times == {"growth": 12.5}


def test_limits_see_each_phase_with_its_own_values():
    # OUR in production uses that phase's mu_max (0.25 1/h, 0.55 before): by hand,
    # OUR = pirt(mu, Y_XO, m_O) * X = (mu / 0.035 + 0.5) * X
    problem = load_problem(PROBLEM)
    model = build_model(problem)
    sched = load_schedule(PLAN, problem.feed_names, 24.0, problem.phases)
    traj = Simulator(model).run(sched, 24.0)
    limits = build_limits(model, phases=True)
    g = evaluate(model, limits, traj)[:, [x.name for x in limits].index("OTR ceiling")]
    X, S = traj.state("X"), traj.state("S")
    mu_max = np.where(traj.phase == 2, 0.25, 0.55)
    mu = mu_max * S / (0.08 + S)
    assert g == pytest.approx((mu / 0.035 + 0.5) * X, rel=1e-12)
    reports, use = judge(model, limits, traj)
    otr = next(r for r in reports if r.name == "OTR ceiling")
    assert otr.peak_use == pytest.approx(100 * np.max((mu / 0.035 + 0.5) * X) / 90.0, rel=1e-4)
    # a phase's own limit has no use outside its phase
    assert np.all(np.isnan(use["glucose while producing"][traj.phase != 2]))
