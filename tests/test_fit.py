"""optfeed fit: estimates, intervals, identifiability, residuals and what it hands on.

Outside references, named beside each check:

* the truth the synthetic runs were made from (tests/fitcase.py: scipy's solve_ivp on
  a hand-written right-hand side, numpy's seeded normal noise);
* an independent fit of the same data with scipy (solve_ivp + least_squares, the
  covariance (J^T J)^-1 from least_squares' own Jacobian);
* the binomial distribution (scipy.stats.binom) for the coverage of 95 % intervals
  over noise seeds;
* numpy's sample covariance for the scenarios drawn from the fit's covariance file.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import fitcase
import optfeed
from optfeed.model import build_model
from optfeed.uncertainty import scenario_set

REPO = Path(__file__).resolve().parent.parent
ESTIMATED = ("mu_max", "K_s", "Y_XS")


@pytest.fixture(scope="module")
def case1(tmp_path_factory):
    """Seed 1 of the calibration case: (folder, problem, runs, measured, fit result)."""
    folder = tmp_path_factory.mktemp("fitcase1")
    problem, runs, measured = fitcase.write_case(folder, seed=1)
    return folder, problem, runs, measured, optfeed.fit(problem, runs)


def _values(result, unit_free=True):
    return np.array([e.value for e in result.estimates])


# ---------------------------------------------------------------- estimates and intervals


def test_estimates_lie_within_their_95_percent_intervals(case1):
    """Reference: the parameters the runs were simulated from (fitcase.TRUE)."""
    *_, r = case1
    assert r.status == "fitted", r.message
    assert [e.name for e in r.estimates] == list(ESTIMATED)
    assert [e.unit for e in r.estimates] == ["1/h", "g/L", "g/g"]
    for e in r.estimates:
        truth = fitcase.TRUE[e.name]
        assert e.ci_low < truth < e.ci_high, (e, truth)
        assert e.ci_low < e.value < e.ci_high
    assert r.flags == ()
    assert "consistent with the stated measurement error" in r.verdict


def test_agrees_with_an_independent_scipy_fit(case1):
    """Reference: the same weighted least squares solved by scipy (solve_ivp, LSODA
    rtol 1e-10; least_squares trf; covariance (J^T J)^-1 of its Jacobian)."""
    *_, measured, r = case1
    x, se, chi2 = fitcase.scipy_fit(measured)
    got = _values(r)
    np.testing.assert_allclose(got, x, rtol=1e-4)
    np.testing.assert_allclose([e.se for e in r.estimates], se, rtol=0.02)
    assert r.chi2 == pytest.approx(chi2, rel=1e-4)
    # the 95 % interval is estimate +- t(0.975, n - p) SE (Student's t from scipy.stats)
    from scipy import stats

    n = sum(len(run.times) * len(run.measured) for run in fitcase.DESIGN)
    t = stats.t.ppf(0.975, n - len(ESTIMATED))
    for e, s in zip(r.estimates, se):
        assert e.ci_high - e.value == pytest.approx(t * s, rel=0.02)


def test_an_objective_s_integral_term_plays_no_part_in_a_fit(case1, tmp_path):
    """The problem's objective is for optimize; a fit never reads it. With an
    integral term in the objective, even one with a pole that the runs' substrate
    passes (S = 1 g/L: its integral cannot be followed there), the fit models the
    same states (no J_int, in the NLP, the re-simulations and the courses it
    writes) and gives the same estimates as without. References: the same data
    fitted by scipy (fitcase.scipy_fit), and the fit of the problem without the term
    (case1). (With J_int in its re-simulations this fit failed at every guess.)"""
    from optfeed.fit.runs import fit_model, load_runs
    from optfeed.fit.transcription import FitNLP
    from optfeed.problem.dotted import as_problem
    from optfeed.report.files import write_fit_run

    *_, measured, plain = case1
    text = fitcase.PROBLEM.replace(
        "objective: {maximize: titer, product: P}",
        "objective: {maximize: titer, product: P, integral: -0.001 * X * S_pole / (S - S_pole) / t_ref}")
    text = text.replace("  alpha: 0.3 g/g\n", "  alpha: 0.3 g/g\n  S_pole: 1 g/L\n  t_ref: 1 h\n")
    assert "S_pole: 1 g/L" in text and "integral:" in text
    problem, runs, _ = fitcase.write_case(tmp_path, seed=1, problem=text)
    spec = as_problem(problem, None)
    assert "J_int" in build_model(spec).state_names  # optimize's model has it
    r = optfeed.fit(problem, runs)
    assert r.status == "fitted", r.message
    np.testing.assert_allclose(_values(r), _values(plain), rtol=1e-12)
    x, _, _ = fitcase.scipy_fit(measured)
    np.testing.assert_allclose(_values(r), x, rtol=1e-4)
    assert all("J_int" not in traj.state_names for traj in r.trajectories)
    folder = write_fit_run(r, tmp_path / "out", figures=False)
    assert "objective integral" not in (folder / "trajectory-1.csv").read_text().splitlines()[0]
    done = subprocess.run([sys.executable, "-m", "optfeed.cli", "fit", str(problem), str(runs), "--out",
                           str(tmp_path / "cli"), "--quiet"], capture_output=True, text=True, cwd=tmp_path, timeout=300)
    assert done.returncode == 0, done.stderr  # the command line too, figures and all
    model = fit_model(spec)
    nlp = FitNLP(model, load_runs(runs, spec, model).runs, list(ESTIMATED), elements_per_run=12)
    assert nlp.state_names == ["X", "S", "P"]


def test_the_polish_ends_at_the_optimum_within_the_re_simulation_s_noise(tmp_path):
    """One batch run whose noise draw leaves K_s poorly determined (its standard error
    about three times its value): the re-simulated chi-square moves by its own
    integration noise near the optimum, and the polish must still end at the
    optimum. Reference: chi-square computed by scipy's DOP853 at rtol 1e-13 (its
    value is the same to 1e-11 with Radau), at optfeed's estimates and at an
    independent scipy fit's (solve_ivp + least_squares): optfeed's is no larger
    than scipy's beyond 1e-9, and the two estimates agree within 1e-3 of a
    standard error (their relative difference in K_s can exceed 1e-4 here)."""
    design = (fitcase.Run("batch", (0.2, 10.0, 0.0, 2.0), np.round(np.arange(1.5, 14.0 + 1e-9, 1.5), 6)),)
    problem, runs, measured = fitcase.write_case(tmp_path, seed=17, design=design, starts=1)
    r = optfeed.fit(problem, runs)
    assert r.status == "fitted", r.message
    ours, se = _values(r), np.array([e.se for e in r.estimates])
    theirs, _, _ = fitcase.scipy_fit(measured, design=design, start=[0.4, 0.3, 0.45])
    exact = [fitcase.chi2(th, measured, design=design, method="DOP853", rtol=1e-13, atol=1e-16)
             for th in (ours, theirs)]
    assert exact[0] <= exact[1] + 1e-9, exact
    assert np.all(np.abs(ours - theirs) <= 1e-3 * se)


def _coverage(seeds, tmp_path):
    """Per parameter, how many of the seeds' 95 % intervals hold the truth."""
    hits = np.zeros(len(ESTIMATED), int)
    for seed in seeds:
        problem, runs, _ = fitcase.write_case(tmp_path / f"s{seed}", seed=seed, starts=1)
        r = optfeed.fit(problem, runs)
        assert r.status == "fitted", (seed, r.message)
        hits += [e.ci_low <= fitcase.TRUE[e.name] <= e.ci_high for e in r.estimates]
    return hits


def _binomial_band(n, level=0.99):
    """Counts of n independent 95 % intervals that hold the truth, two-sided ``level``
    band (scipy.stats.binom)."""
    from scipy import stats

    return stats.binom.ppf((1 - level) / 2, n, 0.95), stats.binom.isf((1 - level) / 2, n, 0.95)


def test_interval_coverage_30_seeds(tmp_path):
    """Reference: the binomial band around 95 % (scipy.stats.binom), 30 noise seeds
    (each fit from one start: the design's NLP is built once and reused)."""
    seeds = range(101, 131)
    lo, hi = _binomial_band(len(seeds))
    hits = _coverage(seeds, tmp_path)
    assert np.all((lo <= hits) & (hits <= hi)), (hits, lo, hi)


@pytest.mark.slow
def test_interval_coverage_200_seeds(tmp_path):
    """Reference: the binomial band around 95 % (scipy.stats.binom), 200 noise seeds."""
    seeds = range(201, 401)
    lo, hi = _binomial_band(len(seeds))
    hits = _coverage(seeds, tmp_path)
    assert np.all((lo <= hits) & (hits <= hi)), (hits, lo, hi)


# ---------------------------------------------------------------- identifiability


def test_saturated_data_cannot_identify_mu_max_and_K_s(tmp_path):
    """mu = mu_max S / (K_s + S) with S always far above K_s (60 g/L against 0.2 g/L)
    is mu_max (1 - K_s/S) to first order: the data fix one combination of the two
    (common practice: Monod constants need data near S ~ K_s)."""
    design = (fitcase.Run("saturated", (0.2, 60.0, 0.0, 2.0), np.arange(0.5, 6.1, 0.5)),)
    problem_text = fitcase.PROBLEM.replace("Y_XS: 0.45 g/g", "Y_XS: 0.5 g/g")  # the truth, not estimated
    problem, runs, _ = fitcase.write_case(tmp_path, seed=3, estimate=("mu_max", "K_s"), design=design,
                                          problem=problem_text)
    r = optfeed.fit(problem, runs)
    assert r.status == "fitted"  # said in words, not a solver failure
    flags = " | ".join(r.flags)
    assert "K_s is not identifiable from these data" in flags
    assert "mu_max and K_s are correlated" in flags
    assert "near-singular" in flags and "log K_s" in flags
    assert "cannot tell K_s" in r.message, r.message
    assert "IPOPT" not in r.message and "Solve_" not in r.message
    assert abs(r.statistics.correlation[0, 1]) > 0.95


# ---------------------------------------------------------------- residuals from the re-simulation


def test_residuals_are_the_re_simulation_s_not_the_nlp_s(tmp_path, monkeypatch):
    """With a coarse NLP grid (5 elements per run) the NLP's own answer is off; the
    reported residuals must still be those of the runs simulated at the reported
    estimates. Reference: fitcase.simulate (scipy's solve_ivp, LSODA rtol 1e-10)."""
    from optfeed.fit import job

    monkeypatch.setattr(job, "ELEMENTS_PER_RUN", 5)
    problem, runs, measured = fitcase.write_case(tmp_path, seed=1, starts=1)
    r = optfeed.fit(problem, runs)
    assert r.status == "fitted", r.message
    p = dict(fitcase.TRUE, **r.values)
    chi2 = 0.0
    for run, table_rows in zip(fitcase.DESIGN, _by_run(r.residuals)):
        states = fitcase.simulate(run, p)
        for q in run.measured:
            row = table_rows[q]
            np.testing.assert_allclose(row["fitted"], states[:, "XSP".index(q)], rtol=1e-6, atol=1e-8)
            np.testing.assert_allclose(row["sigma"], fitcase.SIGMA[q])
            chi2 += float(np.sum(((np.array(row["fitted"]) - row["measured"]) / fitcase.SIGMA[q]) ** 2))
    assert r.chi2 == pytest.approx(chi2, rel=1e-6)  # the polish integrates with its sensitivities
    # the courses the figures draw and the checks read: the runs at the estimates,
    # sampled densely, with each sample's volume taken out after its sampling time
    for run, traj in zip(fitcase.DESIGN, r.trajectories):
        states = fitcase.simulate(run, p)
        names = list(traj.state_names)
        for k, t in enumerate(run.times):
            before = np.flatnonzero(np.isclose(traj.t, t, rtol=0, atol=1e-9))[0]  # the end of the stretch before it
            np.testing.assert_allclose(traj.x[before, [names.index(q) for q in ("X", "S", "P", "V")]], states[k],
                                       rtol=1e-6, atol=1e-8)
        assert len(traj.t) > 20 * len(run.times)
    # the coarse NLP's chi-square is not the one reported
    assert abs(r.nlp_chi2 - r.chi2) > 1e-3 * r.chi2
    # and its estimates are those of the fine fit (the model's, not its discretisation's)
    x, _, _ = fitcase.scipy_fit(measured)
    np.testing.assert_allclose(_values(r), x, rtol=1e-4)


def test_polish_step_puts_a_crossing_parameter_on_its_bound_and_moves_the_others(tmp_path):
    """The polish's Gauss-Newton step (Levenberg-Marquardt with a vanishing damping)
    where the unbounded step takes K_s below its lower bound: K_s goes onto the bound
    and mu_max and Y_XS take the best step left with it there. Reference: the same
    bounded linear least squares solved by scipy.optimize.lsq_linear (in this case,
    where one crossing is the whole active set, the step is that optimum; the step
    is a heuristic in general, see _Fitter._bounded_step)."""
    from scipy.optimize import lsq_linear

    from optfeed.fit.job import _Fitter
    from optfeed.fit.runs import load_runs
    from optfeed.problem.dotted import as_problem

    problem, runs_file, _ = fitcase.write_case(tmp_path, seed=1)
    problem = as_problem(problem, None)
    job = _Fitter(problem, load_runs(runs_file, problem, build_model(problem)))
    rng = np.random.default_rng(3)
    theta = np.array([0.5, 0.03, 0.5])
    J = rng.standard_normal((30, 3)) * [2.0, 5.0, 1.0]
    r = -J @ np.array([0.02, -0.08, 0.01]) + 0.05 * rng.standard_normal(30)
    free = np.ones(3, bool)
    unbounded = np.linalg.lstsq(J, -r, rcond=None)[0]
    assert theta[1] + unbounded[1] < job.lower[1]  # the case the step is for
    want = lsq_linear(J, -r, bounds=(job.lower - theta, job.upper - theta), tol=1e-14).x
    got = job._bounded_step(theta, r, J, free, lam=1e-14)
    assert theta[1] + got[1] == pytest.approx(job.lower[1], abs=1e-15)
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-12)
    # a parameter left out stays where it is
    fixed_out = job._bounded_step(theta, r, J, np.array([True, False, True]), lam=1e-14)
    assert fixed_out[1] == 0.0


def test_a_guess_whose_free_run_blows_up_still_gets_an_answer_in_words(tmp_path):
    """A start (mu_max 60 1/h, bounds 30-80 1/h, growth mu_max * X) whose run without
    the data overflows (X about 1e51 g/L at 2 h) while its course pinned to the data
    stays finite: the fit scales the NLP by the pinned course and ends with a status
    and a message, never an internal error (a growth that fast cannot be followed by
    any integrator; common practice)."""
    prob = fitcase.PROBLEM.replace("  X: mu * X\n", "  X: mu_max * X\n")
    problem, runs_file, _ = fitcase.write_case(tmp_path, seed=1, problem=prob, estimate=("mu_max",), starts=1,
                                               bounds=dict(fitcase.BOUNDS, mu_max=("30 1/h", "80 1/h")))
    problem.write_text(problem.read_text().replace("mu_max: 0.4 1/h", "mu_max: 60 1/h"))
    r = optfeed.fit(str(problem), str(runs_file))
    assert r.status in ("not converged", "failed") and r.exit_code != 0
    assert "integrator" in r.message or "simulated" in r.message


def _by_run(residuals):
    out = {}
    for row in residuals:
        out.setdefault(row["run"], {})[row["quantity"]] = row
    return list(out.values())


# ---------------------------------------------------------------- covariance.csv -> uncertainty section


def test_covariance_file_feeds_a_problem_s_uncertainty_section(case1, tmp_path):
    """fit -> covariance.csv -> a problem naming it -> scenario draw. Reference: the
    fit's own covariance against numpy's sample covariance of 4000 drawn scenarios
    (relative error of a sample variance ~ sqrt(2/n) = 2.2 %)."""
    from optfeed.fit.fitted import covariance_csv_text, fitted_yaml_text

    *_, r = case1
    text, _ = fitted_yaml_text(r)
    (tmp_path / "fitted.yaml").write_text(text + "uncertainty:\n  covariance: covariance.csv\n")
    (tmp_path / "covariance.csv").write_text(covariance_csv_text(r))
    p = optfeed.load_problem(tmp_path / "fitted.yaml")
    assert [v.name for v in p.uncertainty.values] == list(ESTIMATED)
    model = build_model(p)
    s = scenario_set(p, model, count=4000, seed=5, method="random", nominal=False)
    factor = np.array([1.0, 1.0, 1.0])  # 1/h, g/L and g/g are optfeed's internal units
    mean = np.array([e.value for e in r.estimates]) * factor
    cov = np.asarray(r.statistics.covariance)
    # the mean of the draws is the fitted value (written into fitted.yaml)
    se = np.sqrt(np.diag(cov))
    assert np.all(np.abs(s.values.mean(axis=1) - mean) < 4 * se / math.sqrt(4000))
    drawn = np.cov(s.values)
    np.testing.assert_allclose(np.diag(drawn), np.diag(cov), rtol=0.1)
    corr = drawn / np.outer(np.sqrt(np.diag(drawn)), np.sqrt(np.diag(drawn)))
    np.testing.assert_allclose(corr, r.statistics.correlation, atol=0.05)


# ---------------------------------------------------------------- the command line and its files


def test_fit_figures_show_each_run_s_samples_and_fitted_course(case1):
    """The fit's figures: one panel per run and measured quantity with the measured
    samples' error bars (one standard deviation of the error model) and the fitted
    re-simulation; the residual panels; the correlation matrix (symmetric, ones on
    its diagonal). Read back through the matplotlib replay."""
    import xml.etree.ElementTree as ET

    from optfeed.report import figures as F

    _, _, _, _, r = case1
    drawings = {d.name: d for d in F.fit_drawings(r)}
    assert set(drawings) == {"figure-fit", "figure-residuals", "figure-correlation"}
    for d in drawings.values():
        ET.fromstring(F.svg_text(d))  # well-formed
    fig = drawings["figure-fit"].figure.matplotlib()
    quantities = list(r.runs.quantities)
    assert len(fig.axes) == len(r.runs.runs) * len(quantities)
    first = r.runs.runs[0].name
    d = next(x for x in r.residuals if x["run"] == first and x["quantity"] == quantities[0] and x["count"])
    ax = next(ax for ax in fig.axes if ax.get_title(loc="left") == f"{first}: {quantities[0]}")
    bars = ax.containers[0]  # matplotlib's ErrorbarContainer: (points, caps, bars)
    segments = bars.lines[2][0].get_segments()
    spans = np.array([abs(s[1][1] - s[0][1]) for s in segments])
    unit = {x["quantity"]: x["unit"] for x in r.residuals}[quantities[0]]
    from optfeed.units import factor_to

    assert spans == pytest.approx(2 * np.asarray(d["sigma"]) * factor_to(unit), rel=1e-9)
    corr = drawings["figure-correlation"].figure.matplotlib().axes[0].get_images()[0].get_array()
    assert np.allclose(np.diag(corr), 1.0) and np.allclose(corr, corr.T)


def test_command_line_writes_a_run_folder_that_optimize_reads(case1, tmp_path):
    """fitted.yaml reads back with the estimates (to the digits written) and is the
    problem that was fitted otherwise; summary.json holds what the result holds."""
    folder, problem, runs, _, r = case1
    out = tmp_path / "run"
    done = subprocess.run([sys.executable, "-m", "optfeed.cli", "fit", str(problem), str(runs), "--out", str(out),
                           "--quiet", "--no-figures"], capture_output=True, text=True, cwd=tmp_path, timeout=300)
    assert done.returncode == 0, done.stderr
    names = {p.name for p in out.iterdir()}
    assert {"summary.json", "fitted.yaml", "covariance.csv", "residuals.csv", "report.txt", "report.html",
            "trajectory-1.csv", "trajectory-2.csv"} <= names
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "fitted"
    back = optfeed.load_problem(out / "fitted.yaml")
    for e in r.estimates:
        assert back.parameters[e.name] == pytest.approx(e.value, abs=1e-3 * e.se)
    assert back.parameters["m_S"] == pytest.approx(0.03)
    v = optfeed.validate(out / "fitted.yaml")
    assert v.exit_code == 0


# ---------------------------------------------------------------- the shipped example: fit, optimize, check


def _cli(*args, cwd):
    return subprocess.run([sys.executable, "-m", "optfeed.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=600)


def test_shipped_example_fit_optimize_check(tmp_path):
    """The three-step loop of the README on configs/inhibited_product_runs.yaml.
    Reference: the invented values the shipped data were simulated from
    (configs/runs/make_inhibited_product_runs.py, TRUTH) lie in the 95 % intervals."""
    sys.path.insert(0, str(REPO / "configs" / "runs"))
    try:
        import make_inhibited_product_runs as made
    finally:
        sys.path.pop(0)
    fit_dir, opt_dir, check_dir = tmp_path / "fit", tmp_path / "optimize", tmp_path / "check"
    done = _cli("fit", REPO / "configs/inhibited_product.yaml", REPO / "configs/inhibited_product_runs.yaml",
                "--out", fit_dir, "--quiet", "--no-figures", cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr
    summary = json.loads((fit_dir / "summary.json").read_text())
    assert summary["status"] == "fitted"
    est = {e["name"]: e for e in summary["estimates"]}
    assert set(est) == set(made.TRUTH)
    for name, truth in made.TRUTH.items():
        lo, hi = est[name]["ci_low"], est[name]["ci_high"]
        assert lo < truth < hi, (name, est[name])
    done = _cli("optimize", fit_dir / "fitted.yaml", "--starts", "1", "--out", opt_dir, "--quiet", "--no-figures",
                cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr
    done = _cli("check", fit_dir / "fitted.yaml", "--schedule", opt_dir / "schedule.csv", "--out", check_dir,
                "--quiet", "--no-figures", cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr


# ---------------------------------------------------------------- the NLP's initial course


def test_anchored_course_is_the_model_between_samples_pinned_to_the_data(tmp_path):
    """The course the calibration NLP starts from: at each sampling time it equals
    the measured value (a negative reading as zero); between two samples it is the
    model integrated from the earlier sample's data, plus the later sample's miss
    spread linearly over the interval. Reference: fitcase.simulate's right-hand side
    integrated by scipy's solve_ivp (LSODA, rtol 1e-10), on the batch run and on the
    fed-batch run after its pump starts (sample volumes taken out)."""
    from scipy.integrate import solve_ivp

    from optfeed.fit.job import _Fitter
    from optfeed.fit.runs import load_runs
    from optfeed.fit.simulate import anchored_run
    from optfeed.problem.dotted import as_problem

    problem, runs_file, measured = fitcase.write_case(tmp_path, seed=4)
    problem = as_problem(problem, None)
    runs = load_runs(runs_file, problem, build_model(problem))
    job = _Fitter(problem, runs)
    theta = job.start
    p = dict(fitcase.TRUE, mu_max=theta[0], K_s=theta[1], Y_XS=theta[2])  # m_S, alpha: the problem file's
    # the fit makes its courses with a looser integrator (job.rough); here the
    # course itself is checked, with the project's tolerances
    courses = [anchored_run(job.sim, run, job.constants(run, theta)) for run in runs.runs]
    names = list(job.model.state_names)
    cols = [names.index(q) for q in "XSP"] + [names.index("V")]
    checked = 0
    for run, values, course in zip(fitcase.DESIGN, measured, courses):
        t, x = course.t, course.x[:, cols]
        data = np.column_stack([np.maximum(values[q], 0.0) for q in "XSP"])
        for k, b in enumerate(run.times):
            end = np.flatnonzero(t == b)[0]  # before the sample is taken
            np.testing.assert_allclose(x[end, :3], data[k], rtol=1e-9, atol=1e-12)  # the CSV holds 10 digits
            if k == 0 or (run.feed and run.times[k - 1] < run.feed_from):
                continue
            a = run.times[k - 1]
            start = np.flatnonzero(t == a)[-1]  # after it
            inside = slice(start, end + 1)
            np.testing.assert_allclose(x[start, :3], data[k - 1], rtol=1e-9, atol=1e-12)
            F = run.feed if run.feed else 0.0
            y0 = np.concatenate([data[k - 1], [x[start, 3]]])
            sol = solve_ivp(fitcase.rhs, (a, b), y0, args=(p, F), method="LSODA", rtol=1e-10, atol=1e-12,
                            dense_output=True)
            model = sol.sol(t[inside]).T
            ramp = ((t[inside] - a) / (b - a))[:, None]
            want = np.maximum(model[:, :3] + ramp * (data[k] - model[-1, :3]), 0.0)
            np.testing.assert_allclose(x[inside, :3], want, rtol=1e-5, atol=1e-6)
            np.testing.assert_allclose(x[inside, 3], model[:, 3], rtol=1e-9)
            checked += 1
    assert checked >= 20


# ---------------------------------------------------------------- the polish's Jacobian


def test_sensitivities_are_central_differences_of_scipy_runs(tmp_path):
    """The Jacobian the polish steps on and the covariance comes from: the model's
    values at every sample differentiated with respect to the estimated parameters
    by the sensitivity equations, scaled so that CVODES' error test rests on the
    states: in a run's first call by a guess from its data, in later calls by its
    last sensitivities (a scale changes only CVODES' tolerance on them, never their
    equations: this checks that the values come out right with each, not the
    scales themselves). Reference: central differences (step 1e-4 relative) of
    fitcase.simulate, scipy's solve_ivp (LSODA, rtol 1e-10) on a hand-written
    right-hand side, on the batch run and on the fed-batch run with its sample
    volumes; the differences are good to about 1e-6 of the largest value. Both
    calls must also stay within 2e-6 of the same run with the sensitivities held
    to the states' tolerance (3e-7 measured)."""
    from optfeed.fit.job import _Fitter
    from optfeed.fit.runs import load_runs
    from optfeed.problem.dotted import as_problem

    problem, runs_file, _ = fitcase.write_case(tmp_path, seed=2)
    problem = as_problem(problem, None)
    runs = load_runs(runs_file, problem, build_model(problem))
    job = _Fitter(problem, runs)
    theta = np.array([0.47, 0.2, 0.52])
    known = {k: v for k, v in fitcase.TRUE.items() if k not in ESTIMATED}  # m_S, alpha: the problem file's
    for run, run_case in zip(runs.runs, fitcase.DESIGN):
        columns = []
        for j in range(len(ESTIMATED)):
            h = 1e-4 * theta[j]
            up, down = theta.copy(), theta.copy()
            up[j] += h
            down[j] -= h
            states = [fitcase.simulate(run_case, dict(known, **dict(zip(ESTIMATED, th)))) for th in (up, down)]
            columns.append((states[0] - states[1])[:, :3] / (2 * h))
        want = np.stack(columns, axis=-1)  # (samples, X S P, parameters)
        calls = []
        for scale in ("guessed", "measured", "none"):
            if scale == "none":  # the sensitivities held to the states' tolerance too
                job.sampler._scale[id(run)] = (run, np.ones(job.model.nx * len(ESTIMATED)))
            _, der, _ = job.sampler.values(run, job.constants(run, theta), jacobian=True)
            calls.append(np.stack([der[q] for q in "XSP"], axis=1))
        *scaled, tight = calls
        largest = np.abs(want).max(axis=0)  # per quantity and parameter
        for got in calls:
            assert np.all(np.abs(got - want) <= 2e-5 * largest), run.name
        for got in scaled:
            assert np.all(np.abs(got - tight) <= 2e-6 * largest), run.name


# ---------------------------------------------------------------- the NLP's derivatives


@pytest.mark.parametrize("volume_measured", [False, True])
def test_assembled_derivatives_are_casadi_s_of_the_whole_nlp(tmp_path, volume_measured):
    """The exact derivatives handed to IPOPT are assembled from each element's and
    each measured value's own; reference: CasADi's automatic differentiation of the
    whole NLP as the collocation blocks write it. Two runs (a batch; a fed-batch with
    a pump change and sample volumes), a named rate (q_S) measured at some samples
    only, at a point off the solution with random multipliers; the volume V is data
    of the NLP, or (measured at some samples) one of its states."""
    import dataclasses

    import casadi as ca

    from optfeed.fit.job import _Fitter
    from optfeed.fit.runs import load_runs
    from optfeed.fit.transcription import FitNLP

    problem, runs_file, _ = fitcase.write_case(tmp_path, seed=3, estimate=("mu_max", "K_s", "Y_XS", "m_S"))
    from optfeed.problem.dotted import as_problem

    problem = as_problem(problem, None)
    runs = load_runs(runs_file, problem, build_model(problem))
    fed = runs.runs[1]
    q_S = np.where(np.arange(len(fed.times)) % 3 == 0, 0.4, np.nan)
    extra = {"q_S": q_S}
    if volume_measured:
        extra["V"] = np.where(np.arange(len(fed.times)) % 4 == 1, 2.0, np.nan)
    runs = dataclasses.replace(runs, runs=(runs.runs[0], dataclasses.replace(fed, values={**fed.values, **extra})))
    job = _Fitter(problem, runs)
    theta = job.start
    first = job.simulate(theta)
    nlp = FitNLP(job.model, runs.runs, job.names, elements_per_run=12)
    assert ("V" in nlp.state_names) == volume_measured
    errors = dict(runs.errors, q_S=runs.errors["S"], V=runs.errors["S"])
    data = nlp.data(runs.runs, lambda q, y: np.sqrt(errors[q].absolute ** 2 + (errors[q].relative * np.asarray(y)) ** 2),
                    job.lower, job.upper, job.scale,
                    np.max([np.abs(t.x).max(axis=0) for t in first], axis=0) + 1.0)
    rng = np.random.default_rng(0)
    w = nlp.pack(data, runs.runs, theta, first, at_data=True) * (1 + 0.1 * rng.standard_normal(nlp.n_w))
    p = nlp.parameters(data)
    lam = rng.standard_normal(nlp.n_g)
    x, pp, f, g = nlp.nlp["x"], nlp.nlp["p"], nlp.nlp["f"], nlp.nlp["g"]
    reference = ca.Function("ref", [x, pp], [f, ca.gradient(f, x), g, ca.jacobian(g, x),
                                             ca.triu(ca.hessian(0.7 * f + ca.dot(ca.DM(lam), g), x)[0])])
    f0, grad0, g0, jac0, hess0 = (np.array(ca.densify(v)) for v in reference(w, p))
    d = nlp._derivatives
    f1, grad1 = d["grad_f"](w, p)
    g1, jac1 = d["jac_g"](w, p)
    hess1 = d["hess_lag"](w, p, 0.7, lam)
    for got, want in ((f1, f0), (grad1, grad0), (g1, g0), (jac1, jac0), (hess1, hess0)):
        got = np.array(ca.densify(got))
        assert got.shape == want.shape
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * np.abs(want).max())
    assert nlp.objective_value(w, data) == pytest.approx(f0.item(), rel=1e-12)  # what each start reports


@pytest.mark.parametrize("a, b, k", [((0.02,), (0.0,), (0.0,)), ((0.02,), (0.004,), (0.0,)),
                                     ((0.02,), (0.0,), (0.25,)), ((0.02,), (0.0,), (-1e-5,)),
                                     ((0.02,), (0.003,), (-0.4,))])
def test_volume_pumped_by_a_segment_is_scipy_s_integral_of_its_rates(a, b, k):
    """The volume a schedule segment pumps in (closed form, or its power series near
    k tau = 0); reference: scipy.integrate.quad of the segment's rates."""
    from scipy.integrate import quad

    from optfeed.fit.transcription import pumped_volume
    from optfeed.schedule import Segment

    seg = Segment(2.0, 12.0, a, b, k)
    times = np.array([2.0, 2.001, 3.7, 8.0, 12.0])
    want = [quad(lambda t: float(seg.rates(np.array([t]))[0, 0]), 2.0, t, epsabs=1e-17, epsrel=1e-13)[0] for t in times]
    np.testing.assert_allclose(pumped_volume(seg, times), want, rtol=1e-13, atol=1e-16)


def test_volume_pumped_stays_finite_where_an_unused_term_would_overflow():
    """A pump whose law is off (a = b = 0) adds nothing even where exp(k tau) overflows
    a float; one that runs exponentially that fast gives an infinite volume, never
    NaN (the closed form of the integral; common practice)."""
    from optfeed.fit.transcription import pumped_volume
    from optfeed.schedule import Segment

    seg = Segment(0.0, 10.0, (0.0, 0.01, 0.02), (0.0, 0.0, 0.0), (900.0, 0.0, 0.0))
    np.testing.assert_allclose(pumped_volume(seg, np.array([0.0, 2.0, 10.0])), [0.0, 0.06, 0.3], rtol=1e-14)
    fast = Segment(0.0, 10.0, (0.01,), (0.0,), (900.0,))
    assert np.isinf(pumped_volume(fast, np.array([10.0]))[0])


def test_volume_the_nlp_takes_as_data_is_scipy_s_at_every_sample(tmp_path):
    """The broth volume the calibration NLP is given at each sampling time (before
    the sample's volume is taken): read through the dilution rate D = F / V measured
    at every sample of the fed-batch run (2 L, 0.02 L/h from 6 h, 0.02 L taken at
    every sample); reference: V from scipy's solve_ivp in tests/fitcase.py."""
    import dataclasses

    from optfeed.fit.job import _Fitter
    from optfeed.fit.runs import load_runs
    from optfeed.fit.transcription import FitNLP
    from optfeed.problem.dotted import as_problem

    problem, runs_file, _ = fitcase.write_case(tmp_path, seed=3)
    problem = as_problem(problem, None)
    runs = load_runs(runs_file, problem, build_model(problem))
    fed = runs.runs[1]
    runs = dataclasses.replace(runs, runs=(runs.runs[0], dataclasses.replace(
        fed, values={**fed.values, "D": np.zeros(len(fed.times))})))
    job = _Fitter(problem, runs)
    nlp = FitNLP(job.model, runs.runs, job.names, elements_per_run=12)
    assert "V" not in nlp.state_names
    data = nlp.data(runs.runs, lambda q, y: np.ones(len(y)), job.lower, job.upper, job.scale, np.ones(job.model.nx))
    w = nlp.pack(data, runs.runs, job.start, job.simulate(job.start))
    model = nlp.residuals(w, data)  # y = 0, weight = 1: the model's values
    D = np.array([model[i] for i, (r, k, q) in enumerate(nlp.measured) if q == "D"])
    run = fitcase.DESIGN[1]
    V = fitcase.simulate(run, fitcase.TRUE)[:, 3]
    fed_on = run.times > run.feed_from
    assert fed_on.sum() >= 8
    np.testing.assert_allclose(D[fed_on], run.feed / V[fed_on], rtol=1e-9)


def test_among_starts_that_stopped_short_the_better_re_simulated_fit_is_polished(tmp_path, monkeypatch):
    """Two starts that both stop short of convergence: the one whose NLP objective
    is smaller but whose estimate fits the runs worse when re-simulated (an iterate
    that is not feasible) is not the one polished. The first start's answer is
    moved to parameters far from the data's (mu_max at 3x) with half the objective;
    the second keeps its own answer with twice it."""
    import dataclasses
    import importlib

    J = importlib.import_module("optfeed.fit.job")  # optfeed.fit is also the function's name
    problem, runs, _ = fitcase.write_case(tmp_path, seed=1, starts=2)
    real = J.solve
    calls = []

    def stopped_short(nlp, data, w0, label, **kw):
        s = real(nlp, data, w0, label, **kw)
        calls.append(label)
        w = np.array(s.w, dtype=float)
        if len(calls) == 1:
            theta = nlp.W.get(w, "theta").ravel()
            nlp.W.put(w, "theta", theta * np.where(np.arange(len(theta)) == 0, 3.0, 1.0))
            return dataclasses.replace(s, status="failed", w=w, objective=0.5 * s.objective)
        return dataclasses.replace(s, status="failed", objective=2.0 * s.objective)

    monkeypatch.setattr(J, "solve", stopped_short)
    r = optfeed.fit(problem, runs)
    assert len(calls) == 2
    second = r.starts[1]
    assert r.record["polish"]["nlp_chi2"] == pytest.approx(second["chi2"], rel=1e-12)
