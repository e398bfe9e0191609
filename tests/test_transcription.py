"""The optimizer's NLP hands IPOPT exact derivatives assembled from its pieces.

Reference: CasADi's automatic differentiation of the whole NLP as the collocation
blocks write it (`FeedNLP.nlp`, the definition). The assembled gradient, Jacobian
and Hessian of the Lagrangian must be the same numbers, on problems of our own that
use every kind of piece (collocation equations; a limit on an expression at the
collocation points; a limit that depends on the pump, at every pump step's start)
and every kind of remainder (an end limit, the objective, the epigraph rows of a
worst-case objective, the mean - k*std objective, the smoothing penalty).
"""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest

from optfeed.optimize import _Job
from optfeed.problem import load_problem
from optfeed.solve import make_guesses, models
from optfeed.transcription import FeedNLP, Grid
from test_phases_optimize import BATCH_THEN_FEED, BOLUS, INDUCTION

# our own scenario: OTR rows at the collocation points, a dilution cap at every pump
# step's start (it depends on the pump), a substrate cap on a state (a variable
# bound, no rows), a substrate floor at the end (an end row), a free or fixed end;
# the growth rate and one limit depend on time itself (so the pieces' times count)
PROBLEM = """
name: assembled
species:
  X: {{initial: 2 g/L}}
  S: {{initial: 0.5 g/L}}
  P: {{initial: 0 g/L}}
parameters: {{mu_max: 0.5 1/h, K_s: 0.1 g/L, Y_XS: 0.5, alpha: 0.3}}
rates:
  mu: monod(S, mu_max, K_s) * (1 + 0.01 * t)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
  P: alpha * mu * X
feeds:
  sugar: {{composition: {{S: 200 g/L}}, max_rate: 0.05 L/h}}
  water: {{composition: {{}}, max_rate: 0.02 L/h}}
vessel:
  initial_volume: 1 L
  working_volume: 3 L
  oxygen: {{uptake: 20 * mu * X + 1 * X, transfer_max: 40 mmol/L/h}}
limits:
  - {{name: dilution cap, expression: D, max: 0.05 1/h}}
  - {{name: substrate cap, expression: S, max: 5 g/L}}
  - {{name: later less sugar, expression: "S * (1 + 0.05 * t)", max: 6 g/L}}
end:
  - {{name: substrate left, expression: S, max: 1 g/L}}
horizon: {horizon}
objective: {{maximize: product_mass, product: P}}
solver: {{pump_steps: 6}}
"""


def assert_same_derivatives(nlp: FeedNLP, seed: int = 1) -> None:
    """The assembled derivatives against CasADi's of the whole NLP, at a random
    point with positive entries (every expression of these models is defined
    there) and random multipliers."""
    rng = np.random.default_rng(seed)
    w = rng.uniform(0.5, 1.5, nlp.n_w)
    p = rng.uniform(0.5, 1.5, nlp.P.size)
    lam_g = rng.standard_normal(nlp.n_g)
    x, pp, f, g = nlp.nlp["x"], nlp.nlp["p"], nlp.nlp["f"], nlp.nlp["g"]
    reference = ca.Function("reference", [x, pp], [
        f, ca.gradient(f, x), g, ca.jacobian(g, x), ca.triu(ca.hessian(0.7 * f + ca.dot(ca.DM(lam_g), g), x)[0])])
    f0, grad0, g0, jac0, hess0 = (np.array(ca.densify(v)) for v in reference(w, p))
    # as assembled, and expanded to scalar graphs as a small NLP hands them to IPOPT
    assert nlp.derivatives() is not nlp._derivatives
    for d in (nlp._derivatives, nlp.derivatives()):
        f1, grad1 = (np.array(ca.densify(v)) for v in d["grad_f"](w, p))
        g1, jac1 = (np.array(ca.densify(v)) for v in d["jac_g"](w, p))
        hess1 = np.array(ca.densify(d["hess_lag"](w, p, 0.7, lam_g)))
        assert d["hess_lag"].sparsity_out(0).is_triu()  # IPOPT reads the upper triangle
        for got, want in ((f1, f0), (grad1, grad0), (g1, g0), (jac1, jac0), (hess1, hess0)):
            assert got.shape == want.shape
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * max(1.0, np.abs(want).max()))


def nlp_of(tmp_path, free: bool, **kw) -> FeedNLP:
    horizon = "{end_time: {min: 8 h, max: 16 h, guess: 12 h}}" if free else "{end_time: 12 h}"
    path = tmp_path / "assembled.yaml"
    path.write_text(PROBLEM.format(horizon=horizon))
    problem = load_problem(path)
    _, lean, limits = models(problem)
    return FeedNLP(lean, limits, Grid(6, 12, 3), free, **kw)


@pytest.mark.parametrize("free,scenarios,combine,smoothing", [
    (False, 1, "mean", False),
    (True, 1, "mean", True),
    (True, 3, "worst", False),
    (False, 3, "mean_std", True),
])
def test_assembled_derivatives_are_casadi_s_of_the_whole_nlp(tmp_path, free, scenarios, combine, smoothing):
    assert_same_derivatives(nlp_of(tmp_path, free, scenarios=scenarios, combine=combine, smoothing=smoothing))


TIMED = ("mu: monod(S, mu_max, K_s)", "mu: monod(S, mu_max, K_s) * (1 + 0.01 * t)")  # growth that depends on t


@pytest.mark.parametrize("name,text", [
    # a batch phase that ends when the substrate runs low (a condition's rows at every point)
    ("batch_then_feed", BATCH_THEN_FEED.replace(*TIMED)),
    # other constants and rates after induction, samples every 3 h (state jumps), a free end
    ("induction", INDUCTION.format(tag="a", until="{between: [3 h, 8 h]}").replace(
        "horizon: {end_time: 16 h}", "horizon: {end_time: {min: 10 h, max: 20 h, guess: 15 h}}").replace(
        "solver: {", "additions:\n  - {sample: 10 mL, every: 3 h}\nsolver: {")),
    # a bolus whose amount optimize chooses (a jump with a decision in it)
    ("bolus", BOLUS.replace(*TIMED)),
])
def test_assembled_derivatives_of_a_run_with_phases_and_additions(tmp_path, name, text):
    path = tmp_path / f"{name}.yaml"
    path.write_text(text)
    problem = load_problem(path)
    job = _Job(problem, None, None)
    job.plan(make_guesses(problem, job.full, 1))
    s = job.settings
    nlp = job.nlp(Grid(s.pump_steps, 2 * s.pump_steps, s.degree))
    assert nlp.phased
    assert_same_derivatives(nlp)


def test_only_the_end_of_the_run_is_left_to_casadi_s_graph(tmp_path):
    """The pieces cover the collocation equations and every path limit's rows; the
    remainder that CasADi differentiates on its graph is only the rows at the end of
    the run (here each scenario's end limit and epigraph row): a path row in it would
    cost its derivatives on the whole graph."""
    nlp = nlp_of(tmp_path, True, scenarios=2, combine="worst")
    end_rows = [g.rows for g in nlp.groups if g.kind == "epigraph" or g.name == "substrate left"]
    assert len(end_rows) == 4
    np.testing.assert_array_equal(np.sort(nlp.remainder_rows), np.sort(np.concatenate(end_rows)))
