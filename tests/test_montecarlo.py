"""Monte Carlo verification of a schedule, and ``check --uncertainty``.

Outside references, named beside each check: scipy's ``solve_ivp`` on a
hand-written right-hand side for the same samples; the closed form of the volume
under a constant feed (V(T) = V0 + F T); the closed-form blow-up time of
dX/dt = k X^2 (t* = 1 / (k X0)); the Wilson score interval as scipy's
``binomtest(...).proportion_ci(method='wilson')`` computes it and as published
(Newcombe, Statistics in Medicine 17 (1998) 857-872, table of worked examples).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.stats import binomtest

import optfeed
from optfeed import InputError
from optfeed.limits import REL_TOL
from optfeed.model import build_model
from optfeed.montecarlo import monte_carlo, wilson_interval
from optfeed.outcome import outcome_of
from optfeed.schedule import piecewise_constant
from optfeed.simulate import Simulator

HERE = Path(__file__).resolve().parent
SMALL = HERE / "uncertain" / "monod_small.yaml"
PLAN = HERE / "uncertain" / "monod_small_plan.csv"
REPO = HERE.parent


# ---------------------------------------------------------------- the interval


@pytest.mark.parametrize("k, n, low, high", [
    # Newcombe (1998), worked examples, the score (Wilson) method, to 4 decimals (from memory)
    (81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611), (1, 29, 0.0061, 0.1718),
])
def test_wilson_interval(k, n, low, high):
    got = wilson_interval(k, n)
    assert got == pytest.approx((low, high), abs=5e-5)
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")  # scipy
    assert got == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_wilson_interval_edges():
    assert wilson_interval(0, 0) == (0.0, 1.0)
    lo, hi = wilson_interval(50, 50)
    assert hi == 1.0 and lo == pytest.approx(binomtest(50, 50).proportion_ci(method="wilson").low)


# ---------------------------------------------------------------- against scipy on the same samples


def _reference_run(mu_max, V0, K_s=0.2, Y=0.5, X0=0.5, S0=2.0, F=0.06, SF=20.0, T=8.0):
    """max S over the run and V at the end, from solve_ivp on the balances of
    monod_small.yaml written out by hand."""
    def rhs(t, y):
        X, S, V = y
        mu = mu_max * S / (K_s + S)
        D = F / V
        return [mu * X - D * X, -mu / Y * X + D * (SF - S), F]

    sol = solve_ivp(rhs, (0, T), [X0, S0, V0], method="DOP853", rtol=1e-11, atol=1e-12, dense_output=True)
    assert sol.success
    t = np.linspace(0, T, 40001)
    S = sol.sol(t)[1]
    k = int(np.argmax(S))  # refine the peak between grid points
    fine = np.linspace(t[max(k - 1, 0)], t[min(k + 1, len(t) - 1)], 2001)
    return max(S.max(), sol.sol(fine)[1].max()), sol.y[2, -1]


def test_probability_agrees_with_scipy_on_the_same_samples():
    r = optfeed.check(SMALL, PLAN, uncertainty=True, samples=30, seed=11, workers=2)
    mc = r.uncertainty
    assert r.status == "within limits"  # the nominal run
    assert f"monte_carlo='{r.uncertainty.any_limit.broken} of 30 samples break a limit'" in repr(r)
    assert mc.samples == 30 and mc.judged == 30 and mc.failed == 0
    names = list(mc.names)
    assert names == ["mu_max", "initial.V"] and mc.units == ("1/h", "L")
    ceiling = 3.0
    tol = REL_TOL * ceiling + 1e-9  # the check's tolerance (optfeed.limits)
    by_name = {x.name: x for x in mc.limits}
    ours_s = np.array(["substrate ceiling" in run.broken for run in mc.runs])
    ours_v = np.array(["working volume" in run.broken for run in mc.runs])
    ref_s, ref_v, borderline = [], [], []
    for run in mc.runs:
        mu_max, V0 = run.values
        s_max, v_end = _reference_run(mu_max, V0)
        ref_s.append(s_max > ceiling + tol)
        borderline.append(abs(s_max - ceiling) < 1e-6)
        ref_v.append(v_end > 1.5 + REL_TOL * 1.5 + 1e-9)
        # the volume in closed form: V0 + F T
        assert v_end == pytest.approx(V0 + 0.06 * 8, rel=1e-10)
    ref_s, ref_v = np.array(ref_s), np.array(ref_v)
    assert not any(borderline)
    np.testing.assert_array_equal(ours_s, ref_s)
    np.testing.assert_array_equal(ours_v, ref_v)
    assert 0 < ref_s.sum() < 30 and 0 < ref_v.sum() < 30  # the sample has both outcomes
    assert by_name["substrate ceiling"].broken == ref_s.sum()
    assert by_name["substrate ceiling"].probability == pytest.approx(ref_s.mean())
    assert (by_name["working volume"].low, by_name["working volume"].high) == wilson_interval(int(ref_v.sum()), 30)
    assert mc.any_limit.broken == (ref_s | ref_v).sum()
    # objectives: product mass X*V at the end, spread and ordered
    o = mc.objective
    assert o["p5"] <= o["p50"] <= o["p95"] and o["nominal"] == pytest.approx(r.outcome.objective.value)
    # the same sample simulated in this process gives the same verdicts and objectives
    one = monte_carlo(SMALL, PLAN, samples=30, seed=11, workers=1)
    assert [x.status for x in one.runs] == [x.status for x in mc.runs]
    assert [x.objective for x in one.runs] == pytest.approx([x.objective for x in mc.runs], rel=1e-12)
    assert one.workers == 1 and mc.workers == 2


def test_zero_variance_gives_the_nominal_verdict():
    """With every standard deviation zero each sample is the nominal run: each limit's
    probability is 1 where the nominal check breaks it and 0 where it does not."""
    over = {"uncertainty.parameters.mu_max.relative_sd": 0, "limits.0.max": "2.5 g/L"}
    over_v = dict(over, **{"uncertainty.initial.V.sd": "0 mL"})
    r = optfeed.check(SMALL, PLAN, set=over_v, uncertainty=True, samples=6, workers=1)
    assert r.status == "limit broken"
    nominal = {x.name: x.violated for x in r.limits}
    assert nominal == {"pump glucose": False, "working volume": False, "substrate ceiling": True}
    for risk in r.uncertainty.limits:
        assert risk.probability == (1.0 if nominal[risk.name] else 0.0)
        assert risk.nominal_broken == nominal[risk.name]
    assert r.uncertainty.any_limit.probability == 1.0
    # the samples are integrated with Adams' method here (less work on this run), the
    # nominal with BDF as `check` integrates it: the two agree to their global errors
    # (BDF's is 2.2e-7 relative on this run against a run at tolerance 1e-13,
    # Adams' 2.4e-8), so to 1e-6, not to the last digit
    assert r.uncertainty.integration_method == "adams"
    for band in r.uncertainty.bands:
        np.testing.assert_allclose(band.p5, band.nominal, rtol=1e-6, atol=1e-12)
        np.testing.assert_allclose(band.p95, band.nominal, rtol=1e-6, atol=1e-12)
        np.testing.assert_array_equal(band.p5, band.p95)  # six runs of the same values: one run
    objectives = [run.objective for run in r.uncertainty.runs]
    assert objectives == pytest.approx([r.outcome.objective.value] * 6, rel=1e-8)


# ---------------------------------------------------------------- runs that cannot be simulated


BLOWUP = """\
# dX/dt = k X^2 blows up at t = 1/(k X0): invented, for tests only
name: blowup
species:
  X: {initial: 1 g/L}
parameters:
  k: 0.05
reactions:
  X: k * X * X
feeds:
  water: {max_rate: 1 L/h}
vessel: {initial_volume: 1 L, working_volume: 2 L}
horizon: {end_time: 10 h}
uncertainty:
  parameters:
    k: {distribution: uniform, min: 0.02, max: 0.2}
"""


def test_failed_simulations_are_counted(tmp_path):
    path = tmp_path / "blowup.yaml"
    path.write_text(BLOWUP)
    plan = piecewise_constant(["water"], [0], [[0.0]])
    mc = monte_carlo(path, plan, samples=12, seed=4, workers=2)
    k = np.array([run.values[0] for run in mc.runs])
    blows_up = 1.0 / (k * 1.0) < 10.0  # the closed-form blow-up time against the run length
    clear = np.abs(1.0 / k - 10.0) > 0.2  # leave out samples within 2 % of the edge
    failed = np.array([run.status == "simulation failed" for run in mc.runs])
    assert 0 < blows_up.sum() < 12
    np.testing.assert_array_equal(failed[clear], blows_up[clear])
    assert mc.failed == failed.sum() and mc.judged == 12 - mc.failed
    assert mc.failed_interval == wilson_interval(mc.failed, 12)
    assert all(run.message for run in mc.runs if run.status == "simulation failed")
    assert all(run.margins is None and run.objective is None for run in mc.runs if run.status == "simulation failed")
    assert {x.judged for x in mc.limits} == {mc.judged}


def test_objective_of_a_run_uses_its_own_initial_state():
    """The yield of X on fed S: (X V at the end - X0 V0) / S fed, with the run's own X0
    (computed here by hand from the simulated states)."""
    p = optfeed.load_problem(SMALL, set={"objective.maximize": "yield", "objective.substrate": "S"})
    m = build_model(p)
    plan = piecewise_constant(["glucose"], [0], [[0.06]])
    x0 = m.x0.copy()
    x0[m.index("X")] = 0.8
    traj = Simulator(m).run(plan, 8.0, x0=x0)
    xf = traj.final
    by_hand = (xf[m.index("X")] * xf[m.index("V")] - 0.8 * 1.0) / xf[m.index("fed_S")]
    assert outcome_of(m, traj, 8.0).objective_internal == pytest.approx(by_hand, rel=1e-12)


def test_time_limit_leaves_samples_out():
    """Samples not simulated before the time limit are counted as not run and left out of
    every fraction; the nominal verdict says 'time limit' as check does without uncertainty."""
    r = optfeed.check(SMALL, PLAN, uncertainty=True, samples=5, workers=2, time_limit=1e-9)
    assert r.status == "time limit"
    mc = r.uncertainty
    assert (mc.not_run, mc.judged, mc.failed) == (5, 0, 0)
    assert mc.any_limit.probability is None and all(x.probability is None for x in mc.limits)
    assert {run.status for run in mc.runs} == {"not run"}
    assert mc.nominal_status == "not run" and mc.bands == ()
    from optfeed.report.text import check_text

    assert "5 not run (the time limit came first)" in check_text(r)


# ---------------------------------------------------------------- inputs of the job


def test_bad_requests():
    with pytest.raises(InputError, match="--uncertainty needs an 'uncertainty' section") as ei:
        optfeed.check("configs/inhibited_product.yaml", "configs/inhibited_product_plan.yaml", uncertainty=True)
    assert ei.value.issues[0].key == "uncertainty"
    with pytest.raises(InputError, match="--samples is used only with --uncertainty"):
        optfeed.check(SMALL, PLAN, samples=10)
    for kwargs, option in (({"samples": 0}, "--samples"), ({"seed": -1}, "--seed"), ({"workers": 0}, "--workers"),
                           ({"samples": 2.5}, "--samples")):
        with pytest.raises(InputError, match="must be a whole number") as ei:
            monte_carlo(SMALL, PLAN, **kwargs)
        assert ei.value.issues[0].key == option


# ---------------------------------------------------------------- the command


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO)] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else []))
    env["MPLBACKEND"] = "Agg"
    return env


def _run(args, cwd):
    return subprocess.Popen([sys.executable, "-m", "optfeed.cli", *args], cwd=cwd, env=_env(), text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def test_check_uncertainty_command(tmp_path):
    """The run folder gains the Monte Carlo part; the status and exit code stay the nominal run's."""
    out = tmp_path / "run"
    good = _run(["check", str(SMALL), "--schedule", str(PLAN), "--uncertainty", "--samples", "12", "--seed", "5",
                 "--out", str(out)], tmp_path)
    none = _run(["check", "configs/inhibited_product.yaml", "--schedule", "configs/inhibited_product_plan.yaml",
                 "--uncertainty", "--results", str(tmp_path / "r2")], REPO)
    lone = _run(["check", str(SMALL), "--schedule", str(PLAN), "--seed", "3", "--results", str(tmp_path / "r3")],
                tmp_path)
    stdout, stderr = good.communicate(timeout=300)
    assert good.returncode == 0, stderr  # the nominal run is within limits
    assert "Over the uncertain values (Monte Carlo: 12 independent samples, seed 5" in stdout
    assert "integrated with CVODES' Adams method" in stdout
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "within limits"
    u = summary["uncertainty"]
    assert (u["samples"], u["seed"], u["judged"], u["integration_method"]) == (12, 5, 12, "adams")
    # the Monte Carlo's nominal run is check's own: its verdict on every limit the same
    nominal = {x["name"]: x["nominal_broken"] for x in u["limits"]}
    assert nominal == {x["name"]: x["first_violation_h"] is not None for x in summary["limits"]}
    risk = {x["name"]: x for x in u["limits"]}
    assert risk["substrate ceiling"]["probability"] == risk["substrate ceiling"]["broken"] / 12
    lo, hi = risk["substrate ceiling"]["interval_95"]
    assert lo <= risk["substrate ceiling"]["probability"] <= hi
    rows = (out / "montecarlo.csv").read_text().splitlines()
    assert rows[0].startswith("sample,mu_max [1/h],initial.V [L],status,objective [g]")
    assert len(rows) == 13
    html = (out / "report.html").read_text()
    assert 'id="uncertainty"' in html and "Over the uncertain values" in html and 'id="figure-fan"' in html
    assert (out / "figure-fan.svg").stat().st_size > 1000
    for proc, words in ((none, "--uncertainty needs an 'uncertainty' section"),
                        (lone, "--seed is used only with --uncertainty")):
        stdout, stderr = proc.communicate(timeout=120)
        assert proc.returncode == 2 and words in stderr and "Traceback" not in stderr
    assert not (tmp_path / "r2").exists() and not (tmp_path / "r3").exists()


# ---------------------------------------------------------------- samples integrated together


def test_a_batch_of_runs_matches_runs_one_by_one_and_scipy():
    """Simulator.run_batch (B runs as one CVODES system) against the per-sample CVODES
    run (the same dense samples; states to 1e-6 relative: at tolerances of 1e-10 the
    per-sample run itself ends up to 1.2e-7 from the exact substrate here, measured,
    the batch to 4e-8) and against scipy's solve_ivp (DOP853 at 1e-12, hand-written
    balances of monod_small.yaml) at the end of every run, to 1e-7 relative."""
    p = optfeed.load_problem(SMALL)
    m = build_model(p)
    plan = piecewise_constant(["glucose"], [0, 2.5, 5.0], [[0.06], [0.02], [0.09]])
    rng = np.random.default_rng(3)
    B = 5
    x0 = np.repeat(m.x0[:, None], B, axis=1)
    x0[m.index("V")] = rng.uniform(0.95, 1.05, B)
    consts = np.repeat(m.p0[:, None], B, axis=1)
    consts[m.constant_index("mu_max")] = rng.uniform(0.3, 0.7, B)
    sim = Simulator(m)
    runs = sim.run_batch(plan, 8.0, x0, consts)
    assert len(runs) == B
    for j, traj in enumerate(runs):
        one = sim.run(plan, 8.0, x0=x0[:, j], p=consts[:, j])
        np.testing.assert_array_equal(traj.t, one.t)
        np.testing.assert_array_equal(traj.piece, one.piece)
        np.testing.assert_allclose(traj.x, one.x, rtol=1e-6, atol=1e-9)
        np.testing.assert_array_equal(traj.constants, consts[:, j])

        mu_max, V0, SF, K_s, Y = consts[m.constant_index("mu_max"), j], x0[m.index("V"), j], 20.0, 0.2, 0.5

        def rhs(t, y):  # monod_small.yaml written out by hand, the plan's three rates
            X, S, V = y
            F = 0.06 if t < 2.5 else (0.02 if t < 5.0 else 0.09)
            mu = mu_max * S / (K_s + S)
            return [mu * X - F / V * X, -mu / Y * X + F / V * (SF - S), F]

        y = [0.5, 2.0, V0]
        for a, b in ((0, 2.5), (2.5, 5.0), (5.0, 8.0)):  # restarted at each pump change
            sol = solve_ivp(rhs, (a, b), y, method="DOP853", rtol=1e-12, atol=1e-12)
            assert sol.success
            y = sol.y[:, -1]
        got = traj.final[[m.index("X"), m.index("S"), m.index("V")]]
        np.testing.assert_allclose(got, y, rtol=1e-7)


@pytest.mark.parametrize("method", ["bdf", "adams"])
def test_batched_monte_carlo_gives_the_verdicts_of_runs_one_by_one(method):
    """The shipped uncertain example on its robust optimum (80 pump steps, stored from
    ``optfeed optimize``; it rides the OTR ceiling for hours): the samples integrated 6 at a
    time as one system, with either multistep method, give the statuses, broken limits,
    margins and objectives of the same samples integrated one by one with BDF (per-sample
    CVODES as `check` integrates, the reference). Margins to
    1e-6 of each limit's scale: a run whose substrate piles up to ~65 g/L is itself
    only within ~1e-6 g/L of a run at 1e-13 tolerances (measured), against a 2 g/L
    bound; the rest agree far closer."""
    from optfeed.limits import build_limits
    from optfeed.montecarlo import _chunk
    from optfeed.uncertainty import scenario_set

    p = optfeed.load_problem(REPO / "configs" / "inhibited_product_uncertain.yaml")
    m = build_model(p)
    plan = optfeed.load_schedule(HERE / "uncertain" / "inhibited_product_robust_schedule.csv", m.feed_names, 40.0)
    drawn = scenario_set(p, m, count=6, seed=1, method="random", nominal=False)
    one = _chunk((p, plan, 40.0, drawn.constants, drawn.x0, None, 1, "bdf"), lambda k: None)
    together = _chunk((p, plan, 40.0, drawn.constants, drawn.x0, None, 6, method), lambda k: None)
    scales = np.array([lim.scale() * lim.factor for lim in build_limits(m, phases=True)])
    assert [d["status"] for d in together] == [d["status"] for d in one]
    assert [d["broken"] for d in together] == [d["broken"] for d in one]
    assert {d["status"] for d in one} == {"within limits", "limit broken"}  # both verdicts in the sample
    for a, b in zip(together, one):
        np.testing.assert_allclose(np.array(a["margins"]) / scales, np.array(b["margins"]) / scales, rtol=0, atol=1e-6)
        assert a["objective"] == pytest.approx(b["objective"], rel=1e-8)


def test_a_failing_batch_is_simulated_again_run_by_run(tmp_path):
    """One sample that blows up fails the whole batch's integration: the batch is then
    integrated sample by sample, so each sample gets the verdict and message it gets
    on its own (the closed-form blow-up time 1/(k X0) against the run length; the
    slow feed's dilution only delays it a little, and no sample lies near the edge)."""
    path = tmp_path / "blowup.yaml"
    path.write_text(BLOWUP)
    plan = piecewise_constant(["water"], [0], [[0.02]])  # a rising volume: one peak of its use per piece
    from optfeed.montecarlo import _chunk
    from optfeed.uncertainty import scenario_set

    p = optfeed.load_problem(path)
    m = build_model(p)
    drawn = scenario_set(p, m, count=4, seed=6, method="random", nominal=False)
    k = drawn.constants[m.constant_index("k")]
    assert np.all(np.abs(1.0 / k - 10.0) > 0.2)  # none near the edge
    batched = _chunk((p, plan, 10.0, drawn.constants, drawn.x0, None, 4, "bdf"), lambda k: None)  # one batch of 4
    one = _chunk((p, plan, 10.0, drawn.constants, drawn.x0, None, 1, "bdf"), lambda k: None)
    failed = np.array([d["status"] == "simulation failed" for d in batched])
    assert 0 < failed.sum() < 4
    np.testing.assert_array_equal(failed, 1.0 / k < 10.0)
    assert [d["status"] for d in batched] == [d["status"] for d in one]
    assert [d["message"] for d in batched] == [d["message"] for d in one]


def test_a_flat_limit_is_not_refined_inside_its_flat_stretches(tmp_path, monkeypatch):
    """With the pump off the volume stays at its initial 1 L (volume balance dV/dt = F,
    common practice), so the working volume's slack is flat over the whole run: its
    margin is the closed form 2 L - 1 L, and the judgement re-integrates at most the
    two ends of each piece, not every sample (it used to refine every tied sample:
    thousands of re-integrations per run)."""
    from optfeed.limits import build_limits, judge
    from optfeed.simulate import Trajectory

    path = tmp_path / "flat.yaml"
    path.write_text(BLOWUP.split("uncertainty:")[0].replace("k: 0.05", "k: 0.001"))
    m = build_model(optfeed.load_problem(path))
    traj = Simulator(m).run(piecewise_constant(["water"], [0], [[0.0]]), 10.0)
    asked = []
    original = Trajectory.between_many

    def counting(self, intervals):
        asked.append(len(intervals))
        return original(self, intervals)

    monkeypatch.setattr(Trajectory, "between_many", counting)
    reports, _ = judge(m, build_limits(m), traj)
    volume = next(r for r in reports if r.name == "working volume")
    assert volume.min_slack == pytest.approx(1.0, rel=1e-12)
    assert not volume.violated
    pieces = len(set(traj.piece.tolist()))
    assert sum(asked) <= 2 * pieces * 3  # two ends per piece, three rounds at most


def _work(model, schedule, end_time, method):
    """CVODES' right-hand-side evaluations plus Jacobian set-ups over one run."""
    sim = Simulator(model, method=method)
    sim.work = {}
    sim.run(schedule, end_time)
    return sim.work["nfevals"] + sim.work["nlinsetups"]


@pytest.mark.parametrize("problem, plan, end, chosen", [
    (REPO / "configs" / "fast_microbe.yaml", REPO / "configs" / "fast_microbe_plan.csv", None, "bdf"),
    (SMALL, PLAN, 8.0, "adams"),
])
def test_the_samples_are_integrated_with_the_method_that_needs_less_work(problem, plan, end, chosen):
    """The method chosen for the samples is the one that needed fewer right-hand-side
    evaluations and Jacobian set-ups on the nominal run, counted here run by run; it is
    the same every time (counted, not timed); and the two methods' runs agree with
    each other (two independent integration methods at the same tolerances). On the
    shipped fast-growing example BDF needs less, on the small Monod example Adams'
    method does."""
    from optfeed.check import run_length
    from optfeed.simulate import cheaper_method

    p = optfeed.load_problem(problem)
    m = build_model(p)
    tf = run_length(p) if end is None else end
    schedule = optfeed.load_schedule(plan, m.feed_names, tf)
    method, runs = cheaper_method(m, schedule, tf)
    work = {name: _work(m, schedule, tf, name) for name in ("bdf", "adams")}
    assert method == chosen == min(work, key=work.get) and work["bdf"] != work["adams"]
    assert cheaper_method(m, schedule, tf)[0] == method
    scale = np.abs(runs["bdf"].x).max(axis=0)
    np.testing.assert_allclose(runs["adams"].x / scale, runs["bdf"].x / scale, rtol=0, atol=1e-6)


STIFF = """\
# A and B trade places fast (k = 1000 1/h) while B is slowly used up (d = 0.1 1/h):
# a stiff pair, eigenvalues about -2000 and -0.05 1/h; invented, for tests only
name: stiff_pair
species:
  A: {initial: 1 g/L}
  B: {initial: 0 g/L}
parameters:
  k: 1000
  d: 0.1
reactions:
  A: -k * (A - B)
  B: k * (A - B) - d * B
feeds:
  water: {max_rate: 1 L/h}
vessel: {initial_volume: 1 L, working_volume: 2 L}
horizon: {end_time: 10 h}
"""


@pytest.mark.parametrize("method", ["bdf", "adams"])
def test_either_method_follows_a_stiff_system(tmp_path, method):
    """A stiff pair against its closed form (the matrix exponential, scipy's expm):
    CVODES' Adams method iterates its implicit steps by Newton's method here, as BDF
    does, and keeps the tolerance on a stiff system too (at lower orders, where its
    stability allows, common practice)."""
    from scipy.linalg import expm

    path = tmp_path / "stiff.yaml"
    path.write_text(STIFF)
    m = build_model(optfeed.load_problem(path))
    traj = Simulator(m, method=method).run(piecewise_constant(["water"], [0], [[0.0]]), 10.0)
    A = np.array([[-1000.0, 1000.0], [1000.0, -1000.1]])
    sel = traj.t > 0.05  # past the fast transient, where a relative comparison means something
    exact = np.array([expm(A * t) @ [1.0, 0.0] for t in traj.t[sel]])
    np.testing.assert_allclose(traj.x[sel][:, [m.index("A"), m.index("B")]], exact, rtol=1e-7)


def test_the_samples_are_judged_without_locating_crossing_times():
    """The Monte Carlo reports no crossing times, so its judgement does not narrow
    them down: on samples of the shipped uncertain example's robust optimum (several
    break limits) every verdict, margin, extremum and peak is that of the full
    judgement, and the first violation is the first judged time past the bound, at
    or after the located crossing and within one sample spacing of it."""
    from optfeed.limits import build_limits, evaluate, judge
    from optfeed.uncertainty import scenario_set

    p = optfeed.load_problem(REPO / "configs" / "inhibited_product_uncertain.yaml")
    m = build_model(p)
    plan = optfeed.load_schedule(HERE / "uncertain" / "inhibited_product_robust_schedule.csv", m.feed_names, 40.0)
    drawn = scenario_set(p, m, count=8, seed=3, method="random", nominal=False)
    limits = build_limits(m, phases=True)
    sim = Simulator(m)
    broken = 0
    for k in range(drawn.count):
        traj = sim.run(plan, 40.0, x0=drawn.x0[:, k], p=drawn.constants[:, k])
        g = evaluate(m, limits, traj)
        full, _ = judge(m, limits, traj, values=g)
        quick, _ = judge(m, limits, traj, values=g, locate=False)
        spacing = np.max(np.diff(traj.t))
        for a, b in zip(full, quick):
            assert (a.violated, a.min_slack, a.time_min_slack, a.worst_violation, a.peak_use) == \
                   (b.violated, b.min_slack, b.time_min_slack, b.worst_violation, b.peak_use)
            if a.violated:
                broken += 1
                assert a.first_violation <= b.first_violation <= a.first_violation + spacing
    assert broken >= 3


def test_a_sample_adams_cannot_finish_is_integrated_again_with_bdf(monkeypatch):
    """A sample whose run fails with Adams' method (made to fail here for one
    sample) is integrated again with BDF, as `check` would, and judged as the run
    with BDF alone judges it; only a run that fails with BDF too counts as failed."""
    from optfeed.errors import SimulationError
    from optfeed.montecarlo import _chunk
    from optfeed.simulate import Simulator as Sim
    from optfeed.uncertainty import scenario_set

    p = optfeed.load_problem(SMALL)
    m = build_model(p)
    plan = optfeed.load_schedule(PLAN, m.feed_names, 8.0)
    drawn = scenario_set(p, m, count=4, seed=2, method="random", nominal=False)
    reference = _chunk((p, plan, 8.0, drawn.constants, drawn.x0, None, 1, "bdf"), lambda k: None)
    bad = drawn.constants[:, 1].copy()
    run, run_batch = Sim.run, Sim.run_batch

    def failing_run(self, schedule, end_time, *args, **kw):
        if self.method == "adams" and np.array_equal(kw.get("p"), bad):
            raise SimulationError("made to fail for the test", 0.0)
        return run(self, schedule, end_time, *args, **kw)

    def failing_batch(self, *args, **kw):
        if self.method == "adams":
            raise SimulationError("made to fail for the test", 0.0)
        return run_batch(self, *args, **kw)

    monkeypatch.setattr(Sim, "run", failing_run)
    monkeypatch.setattr(Sim, "run_batch", failing_batch)
    got = _chunk((p, plan, 8.0, drawn.constants, drawn.x0, None, 4, "adams"), lambda k: None)
    assert [d["status"] for d in got] == [d["status"] for d in reference]
    assert got[1]["margins"] == reference[1]["margins"] and got[1]["objective"] == reference[1]["objective"]
