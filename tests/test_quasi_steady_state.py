"""Constant-feed fed-batch against the textbook quasi-steady-state relations.

Reference: textbook fed-batch analysis (e.g. Shuler and Kargi, Bioprocess
Engineering: Basic Concepts, chapter on fed-batch culture): under a constant feed F,
V = V0 + F*t; once the substrate is consumed down to a low level, mu ~ D = F/V, so
S ~ K_s*D/(mu_max - D) and the cell mass grows linearly,
X*V ~ X0*V0 + F*Y_XS*S_F*t. The scenario (numbers) is our own.
"""

import numpy as np
import pytest

import optfeed
from optfeed.model import build_model

MU_MAX, K_S, Y_XS, S_F, F, V0, X0 = 0.5, 0.1, 0.5, 100.0, 0.05, 1.0, 50.0


@pytest.fixture
def constant_feed(write):
    problem = write("qss.yaml", f"""
        name: qss
        species:
          X: {{initial: {X0} g/L}}
          S: {{initial: 0.02 g/L}}
        parameters: {{mu_max: {MU_MAX} 1/h, K_s: {K_S} g/L, Y_XS: {Y_XS}}}
        rates:
          mu: monod(S, mu_max, K_s)
        reactions:
          X: mu * X
          S: -mu / Y_XS * X
        feeds:
          sugar: {{composition: {{S: {S_F} g/L}}, max_rate: 1 L/h}}
        vessel: {{initial_volume: {V0} L, working_volume: 5 L}}
        horizon: {{end_time: 20 h}}
        """)
    schedule = write("qss.csv", f"time [h],sugar [L/h]\n0,{F}\n")
    return optfeed.check(problem, schedule)


def test_volume_grows_linearly(constant_feed):
    # V = V0 + F*t exactly (mass balance on the liquid)
    tr = constant_feed.trajectory
    np.testing.assert_allclose(tr.state("V"), V0 + F * tr.t, rtol=1e-9)


def test_substrate_follows_quasi_steady_state(constant_feed):
    tr = constant_feed.trajectory
    late = tr.t > 2.0  # after the initial transient
    D = F / tr.state("V")[late]
    s_qss = K_S * D / (MU_MAX - D)
    # tolerance: the QSS neglects dS/dt and the slow drift of D; 2 % is ample here
    np.testing.assert_allclose(tr.state("S")[late], s_qss, rtol=0.02)


def test_cell_mass_grows_linearly(constant_feed):
    tr = constant_feed.trajectory
    xv = tr.state("X") * tr.state("V")
    expected = X0 * V0 + F * Y_XS * S_F * tr.t
    # substrate held in the broth (S*V, below 0.03 g here) is the only difference
    np.testing.assert_allclose(xv, expected, rtol=1e-3)
    # with X0 = Y_XS * S_F the concentration stays nearly constant
    np.testing.assert_allclose(tr.state("X"), X0, rtol=1e-3)


def test_within_limits_and_volume_report(constant_feed):
    r = constant_feed
    assert r.status == "within limits"
    vol = next(x for x in r.limits if x.kind == "volume")
    assert vol.min_slack == pytest.approx(5.0 - (V0 + F * 20.0), rel=1e-9)
    assert vol.time_min_slack == pytest.approx(20.0)
    assert r.outcome.get("V").value == pytest.approx(V0 + F * 20.0, rel=1e-9)


def test_model_adds_dilution_term(constant_feed):
    # dX/dt = mu*X - F/V*X: the tool adds the dilution term to the net rate
    m = build_model(constant_feed.problem)
    f = m.function("f", [m.rhs])
    x = np.array([10.0, 1.0, 2.0, 0.0])  # X, S, V, fed_S
    u = np.array([0.1])
    mu = MU_MAX * 1.0 / (K_S + 1.0)
    dx = np.array(f(0.0, x, u)).ravel()
    assert dx[0] == pytest.approx(mu * 10.0 - 0.1 / 2.0 * 10.0)
    assert dx[1] == pytest.approx(-mu / Y_XS * 10.0 + 0.1 / 2.0 * (S_F - 1.0))
    assert dx[2] == pytest.approx(0.1)
    assert dx[3] == pytest.approx(0.1 * S_F)  # substrate fed, g/h
