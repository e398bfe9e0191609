"""Problem -> symbolic fed-batch model (CasADi).

The state vector is ``[species..., V, fed_<s>..., J_int]``:

* one entry per species, in the order of the problem file (internal units);
* ``V``, the broth volume (L);
* ``fed_<s>``, the cumulative amount of species ``s`` fed (g or mmol), one per species
  that any feed carries (for yields and the fed-substrate cap); a model built for the
  optimizer keeps only those a limit or the objective uses (``fed="used"``);
* ``J_int``, the integral term of the objective, if there is one.

For a species in standard form the tool adds the feed and dilution terms,

    dC/dt = r(C) + sum_j F_j / V * (C_in,j - C),

and for one written in full (``derivatives`` or ``dilute: false``) it adds nothing.
Time ``t`` is in hours, feed rates ``u`` in L/h.

Every number of the problem that enters the equations (each parameter, each feed
concentration, the heat yield, the turnaround time) is an entry of the symbolic
constant vector ``p`` rather than a number baked into the graph. The problem's own
values are ``p0``. So one transcription (and one built solver) serves every variant
that differs only in numbers: sweep cases, uncertainty scenarios, calibration runs.
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np

from .expr import to_casadi
from .problem.spec import Problem


def composition_name(feed: str, species: str) -> str:
    """Name of the constant 'concentration of ``species`` in ``feed``' in ``Model.p``."""
    return f"{feed}.{species}"


HEAT_YIELD = "vessel.heat.yield_per_oxygen"
TURNAROUND = "objective.turnaround"


@dataclass
class Model:
    """The symbolic model of one problem.

    Attributes
    ----------
    problem : Problem
    state_names, feed_names : list of str
    constant_names : list of str
        Names of the entries of ``p``: the problem's parameters, then each feed
        concentration (``feed.species``), the heat yield and the turnaround.
    t, x, u, p : casadi.SX
        Time (h), states, feed rates (L/h), constants (internal units).
    rhs : casadi.SX
        dx/dt in (t, x, u, p).
    values : dict of str -> casadi.SX
        Named quantities in (t, x, u, p): every rate, ``D``, ``F_total``, ``OUR`` and
        ``heat_load`` (internal units) where defined.
    x0 : numpy.ndarray
        Initial state.
    p0 : numpy.ndarray
        The problem's values of the constants.
    env : dict
        Name -> symbol, for compiling further expressions (:meth:`expression`).
    """

    problem: Problem
    state_names: list
    feed_names: list
    constant_names: list
    t: ca.SX
    x: ca.SX
    u: ca.SX
    p: ca.SX
    rhs: ca.SX
    values: dict
    x0: np.ndarray
    p0: np.ndarray
    env: dict

    @property
    def nx(self) -> int:
        return len(self.state_names)

    @property
    def nu(self) -> int:
        return len(self.feed_names)

    @property
    def n_constants(self) -> int:
        return len(self.constant_names)

    def index(self, name: str) -> int:
        return self.state_names.index(name)

    def constant_index(self, name: str) -> int:
        return self.constant_names.index(name)

    def expression(self, expr) -> ca.SX:
        """CasADi expression of a checked :class:`~optfeed.expr.Expr` in (t, x, u, p)."""
        return ca.SX(to_casadi(expr, self.env))

    def function_p(self, name: str, outputs) -> ca.Function:
        """A CasADi Function (t, x, u, p) -> outputs, for the optimizer."""
        return ca.Function(name, [self.t, self.x, self.u, self.p], outputs, ["t", "x", "u", "p"],
                           [f"o{i}" for i in range(len(outputs))])

    def function(self, name: str, outputs, p=None) -> ca.Function:
        """A CasADi Function (t, x, u) -> outputs with the constants fixed at ``p``
        (default: the problem's own values ``p0``), for simulation and reports."""
        values = self.p0 if p is None else np.asarray(p, dtype=float)
        inner = self.function_p(name + "_p", outputs)
        outs = inner.call([self.t, self.x, self.u, ca.SX(ca.DM(values))])
        return ca.Function(name, [self.t, self.x, self.u], outs, ["t", "x", "u"],
                           [f"o{i}" for i in range(len(outputs))])

    def objective_function(self) -> ca.Function | None:
        """(T, xf, uf, p, x0) -> objective at the end of the run, in its own sense
        (not negated); None if the problem has no objective."""
        if not hasattr(self, "_objective_fn"):
            self._objective_fn = _objective_function(self)
        return self._objective_fn

    def end_value(self, xf, tf, uf=None, p=None, x0=None):
        """Objective value at the end (in the objective's own sense, not negated).

        ``xf`` is the final state (numeric or symbolic), ``tf`` the end time (h),
        ``uf`` the pump rates at the end (L/h; default 0), ``p`` the constants
        (default ``p0``), ``x0`` the initial state (default the problem's).
        """
        fn = self.objective_function()
        if fn is None:
            return None
        uf = np.zeros(self.nu) if uf is None else uf
        p = self.p0 if p is None else p
        x0 = self.x0 if x0 is None else x0
        value = fn(tf, xf, uf, p, x0)
        return float(value) if isinstance(value, ca.DM) else value


def _objective_function(model: Model) -> ca.Function | None:
    obj = model.problem.objective
    if obj is None:
        return None
    T = ca.SX.sym("T")
    xf = ca.SX.sym("xf", model.nx)
    x0 = ca.SX.sym("x0", model.nx)
    uf, p = model.u, model.p
    V = xf[model.index("V")]
    if obj.quantity == "titer":
        value = xf[model.index(obj.product)]
    elif obj.quantity == "product_mass":
        value = xf[model.index(obj.product)] * V
    elif obj.quantity == "productivity":
        turnaround = p[model.constant_index(TURNAROUND)]
        value = xf[model.index(obj.product)] / (T + turnaround)
    elif obj.quantity == "yield":
        i = model.index(obj.product)
        prod0 = x0[i] * x0[model.index("V")]
        fed = xf[model.index(f"fed_{obj.substrate}")]
        value = (xf[i] * V - prod0) / ca.fmax(fed, 1e-12)
    else:
        expr = model.expression(obj.expression)
        value = ca.substitute(expr, ca.vertcat(model.t, model.x), ca.vertcat(T, xf))
    if obj.integral is not None:
        value = value + xf[model.index("J_int")]
    return ca.Function("objective", [T, xf, uf, p, x0], [value], ["T", "xf", "uf", "p", "x0"], ["J"])


def used_fed_species(problem: Problem) -> list[str]:
    """Species whose cumulative amount fed (``fed_<s>``) a limit or the objective uses."""
    names = set()
    for b in problem.bounds:
        names |= b.expression.names
    obj = problem.objective
    if obj is not None:
        for e in (obj.expression, obj.integral):
            if e is not None:
                names |= e.names
        if obj.quantity == "yield" and obj.substrate:
            names.add(f"fed_{obj.substrate}")
    return [n[4:] for n in sorted(names) if n.startswith("fed_")]


def build_model(problem: Problem, fed: str = "all", integral: bool = True) -> Model:
    """Build the symbolic model of ``problem``. See the module docstring for the states.

    ``fed='all'`` keeps a ``fed_<s>`` state for every species a feed carries (for
    reports); ``fed='used'`` only those a limit or the objective uses (the optimizer's
    leaner NLP); a list of species names keeps exactly those a feed carries (to build
    a model with the states of another, see :func:`optfeed.phases.models_like`).
    ``integral=False`` leaves out ``J_int`` (a model that never reads the objective,
    such as the calibration NLP's).
    """
    p = problem
    species = list(p.species)
    fed_species = [s.name for s in species if any(s.name in f.composition for f in p.feeds)]
    if fed == "used":
        keep = set(used_fed_species(p))
        fed_species = [n for n in fed_species if n in keep]
    elif not isinstance(fed, str):
        keep = set(fed)
        fed_species = [n for n in fed_species if n in keep]
    has_integral = integral and p.objective is not None and p.objective.integral is not None
    state_names = [s.name for s in species] + ["V"] + [f"fed_{n}" for n in fed_species]
    if has_integral:
        state_names.append("J_int")
    feed_names = [f.name for f in p.feeds]

    constant_names = list(p.parameters)
    constant_values = [p.parameters[n] for n in constant_names]
    for f in p.feeds:
        for sname, conc in f.composition.items():
            constant_names.append(composition_name(f.name, sname))
            constant_values.append(conc)
    if p.vessel.heat is not None:
        constant_names.append(HEAT_YIELD)
        constant_values.append(p.vessel.heat.yield_per_oxygen)
    if p.objective is not None:
        constant_names.append(TURNAROUND)
        constant_values.append(p.objective.turnaround)

    t = ca.SX.sym("t")
    x = ca.SX.sym("x", len(state_names))
    u = ca.SX.sym("u", len(feed_names))
    pc = ca.SX.sym("p", len(constant_names))
    const = {n: pc[i] for i, n in enumerate(constant_names)}
    V = x[len(species)]
    F_total = ca.sum1(u) if feed_names else ca.SX(0)

    env = {"t": t, "V": V, "F_total": F_total, "D": F_total / V}
    env.update({s.name: x[i] for i, s in enumerate(species)})
    env.update({n: const[n] for n in p.parameters})
    env.update({name: u[j] for j, name in enumerate(feed_names)})
    values = {"F_total": F_total, "D": F_total / V}
    for name, e in p.rates:
        env[name] = ca.SX(to_casadi(e, env))
        values[name] = env[name]
    if p.vessel.oxygen is not None:
        env["OUR"] = ca.SX(to_casadi(p.vessel.oxygen.uptake, env))
        values["OUR"] = env["OUR"]
    if p.vessel.heat is not None:
        env["heat_load"] = const[HEAT_YIELD] * env["OUR"] * V
        values["heat_load"] = env["heat_load"]

    for name in fed_species:
        env[f"fed_{name}"] = x[state_names.index(f"fed_{name}")]

    def conc(feed, sname):
        key = composition_name(feed.name, sname)
        return const[key] if key in const else 0.0

    rhs = []
    for i, s in enumerate(species):
        r = ca.SX(to_casadi(s.rate, env))
        if s.dilute and not s.raw:
            for j, f in enumerate(p.feeds):
                r = r + u[j] / V * (conc(f, s.name) - x[i])
        rhs.append(r)
    rhs.append(F_total)
    for name in fed_species:
        rhs.append(sum(u[j] * conc(f, name) for j, f in enumerate(p.feeds)))
    if has_integral:
        rhs.append(ca.SX(to_casadi(p.objective.integral, env)))

    x0 = [s.initial for s in species] + [p.vessel.initial_volume] + [0.0] * len(fed_species)
    if has_integral:
        x0.append(0.0)
    return Model(
        problem=p, state_names=state_names, feed_names=feed_names, constant_names=constant_names,
        t=t, x=x, u=u, p=pc, rhs=ca.vertcat(*rhs), values=values, x0=np.array(x0, dtype=float),
        p0=np.array(constant_values, dtype=float), env=env,
    )
