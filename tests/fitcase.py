"""A calibration case of our own for the fit tests: a model, runs made from known
parameters with seeded noise, and an independent scipy fit of the same data.

The model (invented, not from any strain): Monod growth, substrate uptake with
Pirt maintenance that stops when the substrate is gone (times S / (S + 0.01 g/L),
so no species is driven below zero), growth-associated product, one feed:

    mu  = mu_max S / (K_s + S)
    q_S = (mu / Y_XS + m_S) S / (S + 0.01)
    dX/dt = mu X - D X,   dS/dt = -q_S X + D (S_F - S),   dP/dt = alpha mu X - D P,
    dV/dt = F,            D = F / V

The data are simulated here with scipy's solve_ivp (a hand-written right-hand side,
not optfeed's model or integrator) and given normal noise of the stated standard
deviation; the reference fit uses solve_ivp and scipy.optimize.least_squares, and
its covariance (J^T J)^-1 from least_squares' own Jacobian.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

PROBLEM = """\
# Invented model for the fit tests (not data from any strain).
name: fit_case
species:
  X: {initial: 0.2 g/L, description: biomass}
  S: {initial: 10 g/L, description: substrate}
  P: {initial: 0 g/L, description: product}
parameters:
  mu_max: 0.4 1/h    # a start value, not the truth
  K_s: 0.3 g/L
  Y_XS: 0.45 g/g
  m_S: 0.03 g/g/h
  alpha: 0.3 g/g
rates:
  mu: monod(S, mu_max, K_s)
  q_S: pirt(mu, Y_XS, m_S) * S / (S + 0.01)
reactions:
  X: mu * X
  S: -q_S * X
  P: alpha * mu * X
feeds:
  conc:
    composition: {S: 300 g/L}
    max_rate: 0.2 L/h
vessel:
  initial_volume: 2 L
  working_volume: 4 L
horizon:
  end_time: 20 h
objective: {maximize: titer, product: P}
"""

TRUE = {"mu_max": 0.5, "K_s": 0.2, "Y_XS": 0.5, "m_S": 0.03, "alpha": 0.3}
SIGMA = {"X": 0.08, "S": 0.05, "P": 0.03}  # g/L, absolute only (the error model the noise is drawn from)
S_FEED = 300.0
BOUNDS = {"mu_max": ("0.1 1/h", "1.5 1/h"), "K_s": ("0.01 g/L", "3 g/L"), "Y_XS": ("0.2 g/g", "0.8 g/g"),
          "alpha": ("0.05 g/g", "1 g/g"), "m_S": ("0.001 g/g/h", "0.2 g/g/h")}  # the runs file's default bounds


@dataclass
class Run:
    """One run of the design: initial state (g/L, g/L, g/L, L), sampling times (h),
    feed rate (L/h) from ``feed_from`` (h), sample volume (L)."""

    name: str
    x0: tuple
    times: np.ndarray
    feed: float = 0.0
    feed_from: float = 0.0
    sample_volume: float = 0.0
    measured: tuple = ("X", "S", "P")
    end_time: float = field(default=None)

    def __post_init__(self):
        if self.end_time is None:
            self.end_time = float(self.times[-1])


DESIGN = (
    Run("batch", (0.2, 10.0, 0.0, 2.0), np.arange(1.0, 14.5, 1.0)),
    Run("fed", (0.3, 8.0, 0.0, 2.0), np.arange(1.5, 21.5, 1.5), feed=0.02, feed_from=6.0, sample_volume=0.02),
)


def rhs(t, y, p, F):
    X, S, P, V = y
    S = max(S, 0.0)  # an integrator step just below zero must not reach the pole at S = -0.01
    mu = p["mu_max"] * S / (p["K_s"] + S)
    q_S = (mu / p["Y_XS"] + p["m_S"]) * S / (S + 0.01)
    D = F / V
    return [mu * X - D * X, -q_S * X + D * (S_FEED - S), p["alpha"] * mu * X - D * P, F]


def simulate(run: Run, p: dict, method: str = "LSODA", rtol: float = 1e-10, atol: float = 1e-12) -> np.ndarray:
    """(len(times), 4) states at the sampling times (before each sample is taken),
    with scipy's solve_ivp (LSODA, rtol 1e-10 unless told), restarting at the feed
    change and at every sample (its volume taken out)."""
    from scipy.integrate import solve_ivp

    cuts = sorted({0.0, run.end_time, *run.times.tolist(), *([run.feed_from] if run.feed else [])})
    y = np.array(run.x0, dtype=float)
    out = {}
    for a, b in zip(cuts[:-1], cuts[1:]):
        F = run.feed if run.feed and a >= run.feed_from - 1e-12 else 0.0
        sol = solve_ivp(rhs, (a, b), y, args=(p, F), method=method, rtol=rtol, atol=atol)
        y = sol.y[:, -1].copy()
        if b in run.times:
            out[b] = y.copy()
            y[3] -= run.sample_volume
    return np.array([out[t] for t in run.times])


def data(seed: int, design=DESIGN, truth=TRUE, sigma=SIGMA) -> list:
    """Per run: {quantity: measured values} with seeded normal noise."""
    rng = np.random.default_rng(seed)
    out = []
    for run in design:
        states = simulate(run, truth)
        values = {}
        for q in run.measured:
            i = "XSP".index(q)
            values[q] = states[:, i] + sigma[q] * rng.standard_normal(len(run.times))
        out.append(values)
    return out


def write_case(folder: Path, seed: int, estimate=("mu_max", "K_s", "Y_XS"), design=DESIGN, truth=TRUE,
               sigma=SIGMA, problem: str = PROBLEM, bounds: dict | None = None,
               starts: int | None = None) -> tuple[Path, Path, list]:
    """Write problem.yaml, runs.yaml and each run's data (and schedule) into
    ``folder``; (problem path, runs path, data). ``starts``: the runs file's number of
    NLP starts (default: the fit's default)."""
    folder.mkdir(parents=True, exist_ok=True)
    measured = data(seed, design, truth, sigma)
    bounds = bounds or BOUNDS
    lines = ["estimate:"] + [f"  {n}: {{min: {bounds[n][0]}, max: {bounds[n][1]}}}" for n in estimate]
    lines += ["errors:"] + [f"  {q}: {{absolute: {s} g/L}}" for q, s in sigma.items()
                            if any(q in r.measured for r in design)]
    if starts is not None:
        lines.append(f"starts: {starts}")
    lines += ["runs:"]
    for run, values in zip(design, measured):
        with (folder / f"{run.name}.csv").open("w") as fh:
            fh.write("time [h]," + ",".join(f"{q} [g/L]" for q in run.measured) + "\n")
            for k, t in enumerate(run.times):
                fh.write(f"{t:g}," + ",".join(f"{values[q][k]:.10g}" for q in run.measured) + "\n")
        X0, S0, P0, V0 = run.x0
        lines += [f"  - name: {run.name}", f"    data: {run.name}.csv",
                  f"    initial: {{X: {X0} g/L, S: {S0} g/L, P: {P0} g/L, V: {V0} L}}",
                  f"    end_time: {run.end_time} h"]
        if run.sample_volume:
            lines.append(f"    sample_volume: {run.sample_volume * 1000:g} mL")
        if run.feed:
            (folder / f"{run.name}_schedule.csv").write_text(
                f"time [h],conc [L/h]\n0,0\n{run.feed_from:g},{run.feed:g}\n")
            lines.append(f"    schedule: {run.name}_schedule.csv")
    (folder / "problem.yaml").write_text(problem)
    (folder / "runs.yaml").write_text("\n".join(lines) + "\n")
    return folder / "problem.yaml", folder / "runs.yaml", measured


def chi2(theta, measured, estimate=("mu_max", "K_s", "Y_XS"), design=DESIGN, sigma=SIGMA, method="LSODA",
         rtol=1e-10, atol=1e-12) -> float:
    """Chi-square of ``measured`` at the parameters ``theta`` (the others the truth's),
    the runs simulated by :func:`simulate` with ``method``, ``rtol`` and ``atol``."""
    p = dict(TRUE, **dict(zip(estimate, theta)))
    out = 0.0
    for run, values in zip(design, measured):
        states = simulate(run, p, method, rtol, atol)
        for q in run.measured:
            out += float(np.sum(((states[:, "XSP".index(q)] - values[q]) / sigma[q]) ** 2))
    return out


def scipy_fit(measured, estimate=("mu_max", "K_s", "Y_XS"), design=DESIGN, start=None, sigma=SIGMA):
    """The same weighted least squares solved independently: solve_ivp (LSODA) +
    scipy.optimize.least_squares (trf, 3-point finite differences, tolerances 1e-12,
    within the runs file's default bounds), covariance (J^T J)^-1 from least_squares'
    own Jacobian at the solution.

    Returns (estimates, standard errors, chi-square)."""
    from scipy.optimize import least_squares

    known = {k: v for k, v in TRUE.items() if k not in estimate}

    def residuals(theta):
        p = dict(known, **dict(zip(estimate, theta)))
        out = []
        for run, values in zip(design, measured):
            states = simulate(run, p)
            for k in range(len(run.times)):
                for q in run.measured:
                    out.append((states[k, "XSP".index(q)] - values[q][k]) / sigma[q])
        return np.array(out)

    x0 = np.array([TRUE[n] for n in estimate] if start is None else start, dtype=float)
    lower = [float(BOUNDS[n][0].split()[0]) for n in estimate]
    upper = [float(BOUNDS[n][1].split()[0]) for n in estimate]
    res = least_squares(residuals, x0, jac="3-point", method="trf", x_scale="jac", ftol=1e-12, xtol=1e-12,
                        gtol=1e-12, bounds=(lower, upper))
    J = res.jac
    cov = np.linalg.inv(J.T @ J)
    return res.x, np.sqrt(np.diag(cov)), float(2 * res.cost)


def dedent(text: str) -> str:
    return textwrap.dedent(text).lstrip()
