"""Published rate laws, callable by name in problem-file expressions.

Each function works on numbers and on CasADi symbols alike. Units follow from the
arguments: a specific growth rate comes out in the unit of ``mu_max`` (1/h in the
examples), a specific uptake rate in the unit of ``mu / Y_XS`` (g/g/h).

To add a rate law: write a function here with a docstring giving the formula and its
source, and add it to :data:`RATE_LAWS`. Its argument names are shown to users when
they call it with the wrong number of arguments.
"""

from __future__ import annotations

import casadi as ca


def monod(S, mu_max, K_s):
    """Monod growth: mu = mu_max * S / (K_s + S)."""
    return mu_max * S / (K_s + S)


def andrews(S, mu_max, K_s, K_i):
    """Substrate inhibition (Andrews, also called Haldane):
    mu = mu_max * S / (K_s + S + S^2 / K_i)."""
    return mu_max * S / (K_s + S + S**2 / K_i)


def contois(S, X, mu_max, K_sx):
    """Contois growth: mu = mu_max * S / (K_sx * X + S)."""
    return mu_max * S / (K_sx * X + S)


def pirt(mu, Y_XS, m_S):
    """Substrate uptake with maintenance (Pirt): q_S = mu / Y_XS + m_S."""
    return mu / Y_XS + m_S


def luedeking_piret(mu, alpha, beta):
    """Product formation (Luedeking-Piret): q_P = alpha * mu + beta."""
    return alpha * mu + beta


def levenspiel(P, P_max, n):
    """Product inhibition factor (Levenspiel form): (1 - P / P_max)^n, held at 0
    once P reaches P_max."""
    return ca.fmax(1 - P / P_max, 0) ** n


def excess(q, q_crit):
    """Part of a specific rate above a critical rate, about max(q - q_crit, 0).
    Used for overflow metabolism (the uptake above q_S,crit goes to by-product).

    Smoothed so that optimisers see a differentiable model:
    0.5 * (d + sqrt(d^2 + w^2)) with d = q - q_crit and w = 1e-3 * |q_crit| (plus
    1e-12); it differs from max(d, 0) by at most w / 2, at d = 0."""
    d = q - q_crit
    w = 1e-3 * ca.fabs(q_crit) + 1e-12
    return 0.5 * (d + ca.sqrt(d**2 + w**2))


# name -> (function, argument names)
RATE_LAWS = {
    "monod": (monod, ("S", "mu_max", "K_s")),
    "andrews": (andrews, ("S", "mu_max", "K_s", "K_i")),
    "haldane": (andrews, ("S", "mu_max", "K_s", "K_i")),
    "contois": (contois, ("S", "X", "mu_max", "K_sx")),
    "pirt": (pirt, ("mu", "Y_XS", "m_S")),
    "luedeking_piret": (luedeking_piret, ("mu", "alpha", "beta")),
    "levenspiel": (levenspiel, ("P", "P_max", "n")),
    "excess": (excess, ("q", "q_crit")),
}
