"""What the data say about the estimates: covariance, intervals, identifiability, fit.

Published methods, as used here:

* the covariance of weighted least-squares estimates from the Gauss-Newton
  approximation of the Fisher information, F = J^T J with J the Jacobian of the
  weighted residuals at the optimum; Cov = F^-1 when the stated measurement error is
  trusted, s^2 F^-1 with s^2 = chi^2 / (n - p) when it is not (the residual variance
  replaces it); 95 % intervals estimate +- t(0.975, n - p) * SE (Bard, Nonlinear
  Parameter Estimation, 1974; Seber and Wild, Nonlinear Regression, 1989);
* profile likelihood intervals: the values of one parameter, the others
  re-estimated, where chi^2 rises by the 95 % quantile of chi^2 with one degree of
  freedom (times s^2 for a scaled error model) above its minimum (Raue et al.,
  Bioinformatics 25:1923, 2009);
* identifiability from the relative-sensitivity information matrix
  (J diag(theta))^T (J diag(theta)): its condition number and the eigenvector of its
  smallest eigenvalue, the combination of parameters the data cannot see;
* goodness of fit: chi^2 against the chi^2 distribution with n - p degrees of freedom.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

CORRELATION_FLAG = 0.95
CONDITION_FLAG = 1e8


@dataclass(frozen=True)
class Statistics:
    """Estimates' uncertainty (internal units).

    covariance : (p, p); se : (p,); ci_low, ci_high : (p,) 95 % (t distribution);
    correlation : (p, p); condition : condition number of the relative-sensitivity
    information matrix (inf if singular); weakest : its eigenvector of the smallest
    eigenvalue (in log-parameter space); scale : s^2 used (1 if the error model is
    trusted); dof : n - p; chi2 : sum of squared weighted residuals; p_value : of chi2;
    flags : list of plain sentences; unidentified : names whose 95 % interval spans
    more than their value; correlated : (name, name, correlation) of the pairs with
    |correlation| above :data:`CORRELATION_FLAG`.
    """

    covariance: np.ndarray
    se: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    correlation: np.ndarray
    condition: float
    weakest: np.ndarray
    scale: float
    dof: int
    chi2: float
    p_value: float
    t_quantile: float
    flags: tuple
    unidentified: tuple = ()
    correlated: tuple = ()


def uncertainty(names, theta, J, residuals, trusted: bool) -> Statistics:
    """Statistics of estimates ``theta`` (p,) from the Jacobian ``J`` (n, p) of the
    weighted residuals and the residuals (n,) themselves."""
    from scipy import special  # scipy.special: a tenth of scipy.stats' import time

    theta = np.asarray(theta, dtype=float)
    J = np.asarray(J, dtype=float)
    r = np.asarray(residuals, dtype=float)
    n, p = J.shape
    dof = max(n - p, 1)
    chi2 = float(r @ r)
    s2 = 1.0 if trusted else chi2 / dof
    F = J.T @ J
    flags = []
    Jrel = J * theta[None, :]
    Frel = Jrel.T @ Jrel
    eig, vec = np.linalg.eigh(Frel)
    condition = float(eig[-1] / eig[0]) if eig[0] > 0 else float("inf")
    weakest = vec[:, 0] * np.sign(vec[np.argmax(np.abs(vec[:, 0])), 0])
    try:
        if not np.isfinite(condition) or condition > 1e14:
            raise np.linalg.LinAlgError
        cov = np.linalg.inv(F) * s2
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(F) * s2
        cov[np.diag_indices(p)] = np.inf
    se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    t = float(special.stdtrit(dof, 0.975))  # the 97.5 % quantile of Student's t
    low, high = theta - t * se, theta + t * se
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)
    corr[~np.isfinite(corr)] = np.nan
    np.fill_diagonal(corr, 1.0)
    unidentified, correlated = [], []
    for i, name in enumerate(names):
        if not np.isfinite(se[i]) or t * se[i] > abs(theta[i]):
            unidentified.append(name)
            flags.append(f"{name} is not identifiable from these data: its 95 % interval spans more than its "
                         f"value (estimate {theta[i]:.4g}, half-width {t * se[i]:.4g}, internal units)")
    for i in range(p):
        for j in range(i + 1, p):
            if np.isfinite(corr[i, j]) and abs(corr[i, j]) > CORRELATION_FLAG:
                correlated.append((names[i], names[j], float(corr[i, j])))
                flags.append(f"{names[i]} and {names[j]} are correlated ({corr[i, j]:+.3f}): the data fix a "
                             "combination of the two better than either alone")
    if condition > CONDITION_FLAG:
        terms = " ".join(f"{c:+.2f} log {nm}" for c, nm in zip(weakest, names) if abs(c) > 0.05)
        flags.append(f"the information matrix is near-singular (condition number {condition:.3g}); the "
                     f"direction the data cannot see: {terms.lstrip('+')}")
    p_value = float(special.chdtrc(dof, chi2))  # upper tail of chi-square
    return Statistics(cov, se, low, high, corr, condition, weakest, s2, dof, chi2, p_value, t, tuple(flags),
                      tuple(unidentified), tuple(correlated))


def identifiability_words(stat: Statistics) -> str:
    """What the data cannot fix, in one phrase ('' when they fix every parameter)."""
    parts = []
    if stat.unidentified:
        parts.append(f"these data cannot tell {' or '.join(stat.unidentified)} (the 95 % interval spans more "
                     "than the value)")
    if stat.correlated:
        parts.append("; ".join(f"{a} and {b} move together (correlation {c:+.3f})" for a, b, c in stat.correlated))
    return "; ".join(parts)


def verdict(stat: Statistics, trusted: bool) -> str:
    """The goodness of fit in words."""
    head = f"chi-square {stat.chi2:.4g} on {stat.dof} degrees of freedom (p = {stat.p_value:.3g})"
    if not trusted:
        return (f"{head}; the error model was scaled by the residuals (s = {np.sqrt(stat.scale):.3g} times the "
                "stated error), so the intervals carry the scatter the data show")
    if stat.p_value < 0.05:
        return (f"{head}: the residuals are larger than the stated measurement error explains; the model, or "
                "the error model, does not fit these data (the intervals may be too narrow)")
    if stat.p_value > 0.995:
        return f"{head}: the residuals are smaller than expected; the stated measurement error is likely too large"
    return f"{head}: consistent with the stated measurement error"
