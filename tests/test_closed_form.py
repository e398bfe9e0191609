"""Closed-form fed-batch cases.

* Pure dilution, no reaction: a mass balance on a tracer gives
  C(t) = C_F + (C0 - C_F) * V0 / V(t) with V = V0 + F*t (standard fed-batch mass
  balance; exact).
* Exponential feed holding a set growth rate (common practice):
  F(t) = (mu_set/Y_XS + m_S) * X0 * V0 * exp(mu_set*t) / S_F, started from the
  matching steady substrate level S* = K_s*mu_set/(mu_max - mu_set), keeps S = S*
  and mu = mu_set, so X*V = X0*V0*exp(mu_set*t). The common-practice formula
  neglects the substrate already in the broth; dividing by (S_F - S*) instead of
  S_F makes it exact for Monod growth with Pirt uptake, which is what is tested.
* A linear ramp F = b*t fills the vessel as V = V0 + b*t^2/2, so the working
  volume is first exceeded at t = sqrt(2*(V_max - V0)/b) (exact).
"""

import math

import numpy as np
import pytest

import optfeed


def test_pure_dilution(write):
    problem = write("dilution.yaml", """
        species:
          C: {initial: 2 g/L}
        reactions: {C: "0"}
        feeds:
          tracer: {composition: {C: 10 g/L}, max_rate: 1 L/h}
        vessel: {initial_volume: 1 L, working_volume: 10 L}
        horizon: {end_time: 10 h}
        """)
    schedule = write("dilution.csv", "time [h],tracer [L/h]\n0,0.3\n")
    tr = optfeed.check(problem, schedule).trajectory
    V = 1.0 + 0.3 * tr.t
    np.testing.assert_allclose(tr.state("V"), V, rtol=1e-10)
    # CVODES runs at rtol 1e-10; restarts at each output piece cost a little
    np.testing.assert_allclose(tr.state("C"), 10.0 + (2.0 - 10.0) * 1.0 / V, rtol=1e-7)


MU_MAX, K_S, Y_XS, M_S, MU_SET, S_F, X0, V0 = 0.6, 0.05, 0.5, 0.03, 0.2, 500.0, 2.0, 5.0


@pytest.mark.parametrize("fmt", ["csv", "yaml"])
def test_exponential_feed_holds_mu_set(write, fmt):
    s_star = K_S * MU_SET / (MU_MAX - MU_SET)
    F0 = (MU_SET / Y_XS + M_S) * X0 * V0 / (S_F - s_star)
    problem = write("expo.yaml", f"""
        species:
          X: {{initial: {X0} g/L}}
          S: {{initial: {s_star!r} g/L}}
        parameters: {{mu_max: {MU_MAX} 1/h, K_s: {K_S} g/L, Y_XS: {Y_XS}, m_S: {M_S} 1/h}}
        rates:
          mu: monod(S, mu_max, K_s)
        reactions:
          X: mu * X
          S: -pirt(mu, Y_XS, m_S) * X
        feeds:
          sugar: {{composition: {{S: {S_F} g/L}}, max_rate: 1 L/h}}
        vessel: {{initial_volume: {V0} L, working_volume: 8 L}}
        horizon: {{end_time: 12 h}}
        """)
    if fmt == "csv":
        schedule = write("expo.csv", f"time [h],sugar [L/h],sugar growth [1/h]\n0,{F0!r},{MU_SET}\n")
    else:
        schedule = write("expo.yaml.sched.yaml", f"""
            feeds:
              sugar:
                - {{time: 0 h, rate: {F0 * 1000!r} mL/h, growth: {MU_SET} 1/h}}
            """)
    tr = optfeed.check(problem, schedule).trajectory
    np.testing.assert_allclose(tr.state("S"), s_star, rtol=1e-7)
    np.testing.assert_allclose(tr.state("X") * tr.state("V"), X0 * V0 * np.exp(MU_SET * tr.t), rtol=1e-7)
    np.testing.assert_allclose(tr.feed("sugar"), F0 * np.exp(MU_SET * tr.t), rtol=1e-12)


def test_first_violation_time_of_a_ramp(write):
    b, v0, vmax = 0.5, 2.0, 6.0
    problem = write("ramp.yaml", f"""
        species:
          C: {{initial: 0 g/L}}
        reactions: {{C: "0"}}
        feeds:
          water: {{max_rate: 10 L/h}}
        vessel: {{initial_volume: {v0} L, working_volume: {vmax} L}}
        horizon: {{end_time: 6 h}}
        """)
    schedule = write("ramp.csv", f"# interpolation: linear\ntime [h],water [L/h]\n0,0\n5,{5 * b}\n")
    r = optfeed.check(problem, schedule)
    assert r.status == "limit broken"
    vol = next(x for x in r.limits if x.kind == "volume")
    t_cross = math.sqrt(2 * (vmax - v0) / b)  # 4 h
    # dense output every ~3 min: the reported time is the first sample past the crossing
    assert t_cross <= vol.first_violation <= t_cross + 0.05
    # after 5 h the rate holds at 2.5 L/h: V(6) = 2 + 0.25*25 + 2.5
    assert vol.worst_violation == pytest.approx(v0 + b * 25 / 2 + 2.5 - vmax, rel=1e-7)
    assert r.exit_code == 1
