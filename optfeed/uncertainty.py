"""Scenarios of the uncertain values: the constants and initial states of each.

A problem's ``uncertainty`` section (:class:`optfeed.problem.spec.Uncertainty`)
gives each uncertain value a distribution around the value in the file.
:func:`scenario_set` draws points in the unit cube and maps each coordinate through
its distribution's inverse cumulative distribution function:

* ``latin_hypercube``: one point in each of n equal strata of every coordinate
  (McKay, Beckman and Conover, Technometrics 21 (1979) 239-245), scrambled;
* ``sobol``: the first n points of a scrambled Sobol' sequence (Sobol', USSR
  Comput. Math. Math. Phys. 7 (1967) 86-112; Owen's scrambling);
* ``random``: independent uniform draws, for Monte Carlo estimates whose
  confidence intervals assume independent samples.

Both point sets come from ``scipy.stats.qmc``. A normal value is ``m + sd * z``; a
lognormal one has mean ``m`` and standard deviation ``sd`` (its logarithm is normal
with ``s^2 = ln(1 + (sd/m)^2)`` and mean ``ln m - s^2/2``); a uniform one is
``min + (max - min) * u``; the values of a covariance file are ``m + L z`` with
``L`` the Cholesky factor of the covariance matrix (so they are jointly normal with
that covariance). Here ``z = Phi^-1(u)``, the standard normal quantile of each
coordinate.

The nominal scenario (every value as the file gives it) comes first when asked for.
Each method draws from its own random stream of the seed, so the Monte Carlo sample
never repeats the optimizer's scenario points, whatever the two seeds are.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .model import Model
from .problem.spec import Problem

METHODS = ("latin_hypercube", "sobol", "random")
_STREAM = {"latin_hypercube": 0, "sobol": 1, "random": 2}
_TINY = 2.0 ** -53  # keeps every coordinate strictly inside (0, 1)


@dataclass(frozen=True)
class ScenarioSet:
    """Scenarios of a problem: the constants and initial state of each.

    Attributes
    ----------
    constants : numpy.ndarray, shape (n_constants, S)
        ``Model.p`` of each scenario, internal units, in ``Model.constant_names`` order.
    x0 : numpy.ndarray, shape (nx, S)
        Initial state of each scenario, internal units, in ``Model.state_names`` order.
    labels : tuple of str
        'nominal', then 'scenario 1', ... (or 'sample 1', ... for random draws).
    names : tuple of str
        The uncertain values (``mu_max``, ``initial.X``, ``feeds.concentrate.S``).
    values : numpy.ndarray, shape (len(names), S)
        Their value in each scenario, internal units.
    weights : numpy.ndarray, shape (S,)
        Each scenario's weight in a mean over scenarios (equal, summing to 1).
    method : str
    seed : int
    combine : str
        The objective over the scenarios when one pump profile is optimised for
        all of them: 'mean', 'worst' or 'mean_std' (the mean less ``risk``
        standard deviations for a maximised objective, plus for a minimised one).
    risk : float
        k of 'mean_std'.
    """

    constants: np.ndarray
    x0: np.ndarray
    labels: tuple
    names: tuple
    values: np.ndarray
    weights: np.ndarray
    method: str
    seed: int
    combine: str = "mean"
    risk: float = 0.0

    @property
    def count(self) -> int:
        """S, the number of scenarios."""
        return self.constants.shape[1]


def scenario_set(problem: Problem, model: Model, count: int | None = None, seed: int | None = None,
                 method: str | None = None, nominal: bool = True) -> ScenarioSet:
    """Draw the scenarios of ``problem``'s uncertainty section.

    Parameters
    ----------
    problem : Problem
        Its ``uncertainty`` gives the distributions and the defaults below; without
        one the set holds the nominal scenario alone.
    model : Model
        Built from ``problem`` (either ``fed`` choice): gives the order of the
        constants and states.
    count : int, optional
        Scenarios S in all, the nominal one among them when ``nominal`` (default:
        ``uncertainty.scenarios``).
    seed : int, optional
        Default: ``uncertainty.scenario_seed``.
    method : {'latin_hypercube', 'sobol', 'random'}, optional
        Default: ``uncertainty.method``.
    nominal : bool
        Put the nominal scenario first (the optimizer's set); False draws all S
        (a Monte Carlo sample).

    Returns
    -------
    ScenarioSet
        The same arguments always give the same set.

    Examples
    --------
    >>> p = load_problem("configs/inhibited_product_uncertain.yaml")   # doctest: +SKIP
    >>> s = scenario_set(p, build_model(p))                            # doctest: +SKIP
    >>> s.constants.shape, s.labels[0]                                 # doctest: +SKIP
    ((15, 8), 'nominal')
    """
    u = problem.uncertainty
    if u is None:
        return _assemble(model, [], np.zeros((0, 1)), ("nominal",), "none", 0, "mean", 0.0)
    count = u.scenarios if count is None else int(count)
    seed = u.scenario_seed if seed is None else int(seed)
    method = u.method if method is None else method
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if count < (1 if nominal else 0):
        raise ValueError(f"count must be at least {1 if nominal else 0}, got {count}")
    drawn = count - 1 if nominal else count
    points = unit_points(len(u.values), drawn, seed, method)
    values = _values(u, points)  # (d, drawn)
    word = "sample" if method == "random" else "scenario"
    labels = tuple(f"{word} {i + 1}" for i in range(drawn))
    if nominal:
        values = np.column_stack([[v.nominal for v in u.values], values]) if len(u.values) else values
        labels = ("nominal",) + labels
    return _assemble(model, list(u.values), values.reshape(len(u.values), -1), labels, method, seed,
                     u.combine, u.k)


def unit_points(d: int, n: int, seed: int, method: str) -> np.ndarray:
    """n points in the open unit cube (0, 1)^d, shape (n, d), of ``method``."""
    from scipy.stats import qmc

    rng = np.random.default_rng([int(seed), _STREAM[method]])
    if n == 0 or d == 0:
        return np.zeros((n, d))
    if method == "latin_hypercube":
        pts = qmc.LatinHypercube(d, rng=rng).random(n)
    elif method == "sobol":  # a power of two keeps the sequence balanced; take its first n
        pts = qmc.Sobol(d, rng=rng).random_base2(max(0, math.ceil(math.log2(n))))[:n]
    else:
        pts = rng.random((n, d))
    return np.clip(pts, _TINY, 1.0 - _TINY)


def _values(u, points) -> np.ndarray:
    """Each uncertain value at each point (shape (d, n)), internal units."""
    from scipy.special import ndtri

    d, n = len(u.values), points.shape[0]
    out = np.zeros((d, n))
    joint = [i for i, v in enumerate(u.values) if v.distribution == "multivariate normal"]
    for i, v in enumerate(u.values):
        p = points[:, i]
        if v.distribution == "normal":
            out[i] = v.nominal + v.sd * ndtri(p)
        elif v.distribution == "lognormal":
            s2 = math.log1p((v.sd / v.nominal) ** 2)
            out[i] = np.exp(math.log(v.nominal) - 0.5 * s2 + math.sqrt(s2) * ndtri(p))
        elif v.distribution == "uniform":
            out[i] = v.lower + (v.upper - v.lower) * p
    if joint:
        chol = np.linalg.cholesky(np.asarray(u.covariance, dtype=float))
        z = ndtri(points[:, joint]).T  # (k, n)
        out[joint] = np.array([u.values[i].nominal for i in joint])[:, None] + chol @ z
    return out


def _assemble(model: Model, values, drawn, labels, method, seed, combine, risk) -> ScenarioSet:
    S = len(labels)
    constants = np.repeat(model.p0[:, None], S, axis=1)
    x0 = np.repeat(model.x0[:, None], S, axis=1)
    for v, row in zip(values, drawn):
        if v.target == "constant":
            constants[model.constant_index(v.ref)] = row
        else:
            x0[model.index(v.ref)] = row
    return ScenarioSet(constants, x0, tuple(labels), tuple(v.name for v in values), np.asarray(drawn, dtype=float),
                       np.full(S, 1.0 / S), method, int(seed), combine, float(risk))
