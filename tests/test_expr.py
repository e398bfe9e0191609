"""Expressions: the whitelist parser and the published rate laws.

Rate-law checks use the laws' defining properties (textbook relations, common
practice): Monod gives mu_max/2 at S = K_s; Andrews peaks at S = sqrt(K_s*K_i) with
mu_max / (1 + 2*sqrt(K_s/K_i)); Contois gives mu_max/2 at S = K_sx*X; Pirt uptake is
linear in mu with intercept m_S; Levenspiel is 0 at P_max and 1 at P = 0.
"""

import math

import casadi as ca
import pytest

from optfeed import kinetics
from optfeed.expr import ExprError, parse, to_casadi, unknown_names


def value(text, **env):
    return float(ca.DM(to_casadi(parse(text), env)))


def test_monod_half_saturation():
    assert value("monod(S, 0.6, 0.2)", S=0.2) == pytest.approx(0.3)


def test_andrews_peak():
    ks, ki, mu_max = 0.3, 12.0, 0.35
    s_peak = math.sqrt(ks * ki)
    peak = value("andrews(S, mu_max, K_s, K_i)", S=s_peak, mu_max=mu_max, K_s=ks, K_i=ki)
    assert peak == pytest.approx(mu_max / (1 + 2 * math.sqrt(ks / ki)))
    for s in (0.9 * s_peak, 1.1 * s_peak):
        assert value("haldane(S, mu_max, K_s, K_i)", S=s, mu_max=mu_max, K_s=ks, K_i=ki) < peak


def test_contois_pirt_luedeking_levenspiel():
    assert value("contois(S, X, 0.5, 0.1)", S=2.0, X=20.0) == pytest.approx(0.25)
    assert value("pirt(mu, 0.5, 0.03)", mu=0.2) == pytest.approx(0.43)
    assert value("luedeking_piret(mu, 2, 0.1)", mu=0.2) == pytest.approx(0.5)
    assert value("levenspiel(P, 80, 1.5)", P=0.0) == pytest.approx(1.0)
    assert value("levenspiel(P, 80, 1.5)", P=80.0) == pytest.approx(0.0)
    assert value("levenspiel(P, 80, 1.5)", P=90.0) == pytest.approx(0.0)  # held at 0 past P_max
    # excess is max(q - q_crit, 0) smoothed over 1e-3 * q_crit
    assert value("excess(q, 0.9)", q=1.2) == pytest.approx(0.3, abs=1e-6)
    assert value("excess(q, 0.9)", q=0.5) == pytest.approx(0.0, abs=1e-6)
    assert value("excess(q, 0.9)", q=0.9) == pytest.approx(0.45e-3)


def test_caret_is_power_with_power_precedence():
    assert value("1 - S^2/4", S=2.0) == pytest.approx(0.0)
    assert value("-2^2") == pytest.approx(-4.0)


@pytest.mark.parametrize("text,match", [
    ("X.__class__", "attribute access"),
    ("__import__('os')", "names starting with '_'"),
    ("import os", "not a valid expression"),
    ("lambda: 1", "lambda"),
    ("S if S else 1", "if ... else"),
    ("S < 1", "comparisons"),
    ("x[0]", "subscripts"),
    ("'text'", "only numbers"),
    ("monod(S)", r"monod\(\) takes 3 argument"),
    ("mondo(S, 1, 2)", "did you mean 'monod'"),
    ("exp(x=1)", "keyword"),
    ("f(x)(y)", "only named functions"),
    ("exp(" * 70 + "1" + ")" * 70, "nested"),
    ("(" * 5000 + "1" + ")" * 5000, "longer than|nested"),
    ("", "empty"),
])
def test_rejected(text, match):
    with pytest.raises(ExprError, match=match):
        parse(text)


def test_overflowing_constant_is_rejected():
    with pytest.raises(ExprError, match="overflows"):
        to_casadi(parse("9**9**9**9"), {})


def test_unknown_names_suggest():
    msgs = unknown_names(parse("mu_mx * S"), ["mu_max", "S"])
    assert msgs == ["unknown name 'mu_mx'; did you mean 'mu_max'?"]


def test_every_rate_law_is_documented():
    for name, (fn, args) in kinetics.RATE_LAWS.items():
        assert fn.__doc__, name
        assert len(args) == fn.__code__.co_argcount, name
