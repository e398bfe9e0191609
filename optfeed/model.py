"""Problem -> symbolic fed-batch model (CasADi).

The state vector is ``[species..., V, fed_<s>..., J_int]``:

* one entry per species, in the order of the problem file (internal units);
* ``V``, the broth volume (L);
* ``fed_<s>``, the cumulative amount of species ``s`` fed (g or mmol), one per species
  that any feed carries (for yields and the fed-substrate cap);
* ``J_int``, the integral term of the objective, if there is one.

For a species in standard form the tool adds the feed and dilution terms,

    dC/dt = r(C) + sum_j F_j / V * (C_in,j - C),

and for one written in full (``derivatives`` or ``dilute: false``) it adds nothing.
Time ``t`` is in hours, feed rates ``u`` in L/h.
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np

from .expr import to_casadi
from .problem.spec import Problem


@dataclass
class Model:
    """The symbolic model of one problem.

    Attributes
    ----------
    problem : Problem
    state_names : list of str
    feed_names : list of str
    t, x, u : casadi.SX
        Time (h), states, feed rates (L/h).
    rhs : casadi.SX
        dx/dt.
    values : dict of str -> casadi.SX
        Named quantities of (t, x, u): every rate, ``D``, ``F_total``, ``OUR`` and
        ``heat_load`` (W, internal units) where defined.
    x0 : numpy.ndarray
        Initial state.
    env : dict
        Name -> symbol, for compiling further expressions (:meth:`expression`).
    """

    problem: Problem
    state_names: list
    feed_names: list
    t: ca.SX
    x: ca.SX
    u: ca.SX
    rhs: ca.SX
    values: dict
    x0: np.ndarray
    env: dict

    @property
    def nx(self) -> int:
        return len(self.state_names)

    @property
    def nu(self) -> int:
        return len(self.feed_names)

    def index(self, name: str) -> int:
        return self.state_names.index(name)

    def expression(self, expr) -> ca.SX:
        """CasADi expression of a checked :class:`~optfeed.expr.Expr` in (t, x, u)."""
        return ca.SX(to_casadi(expr, self.env))

    def function(self, name: str, outputs) -> ca.Function:
        """A CasADi Function (t, x, u) -> outputs."""
        return ca.Function(name, [self.t, self.x, self.u], outputs, ["t", "x", "u"], [f"o{i}" for i in range(len(outputs))])

    def end_value(self, xf, tf, uf=None):
        """Objective value at the end (in the objective's own sense, not negated).

        ``xf`` is the final state (numeric or symbolic), ``tf`` the end time (h),
        ``uf`` the pump rates at the end (L/h; default 0), for objectives that use them.
        """
        p = self.problem
        obj = p.objective
        if obj is None:
            return None
        V = xf[self.index("V")]
        if obj.quantity == "titer":
            value = xf[self.index(obj.product)]
        elif obj.quantity == "product_mass":
            value = xf[self.index(obj.product)] * V
        elif obj.quantity == "productivity":
            value = xf[self.index(obj.product)] / (tf + obj.turnaround)
        elif obj.quantity == "yield":
            prod0 = self.x0[self.index(obj.product)] * self.x0[self.index("V")]
            fed = xf[self.index(f"fed_{obj.substrate}")]
            value = (xf[self.index(obj.product)] * V - prod0) / ca.fmax(fed, 1e-12)
        else:
            f = ca.Function("end", [self.t, self.x, self.u], [self.expression(obj.expression)])
            value = f(tf, xf, np.zeros(self.nu) if uf is None else uf)
        if obj.integral is not None:
            value = value + xf[self.index("J_int")]
        return value


def build_model(problem: Problem) -> Model:
    """Build the symbolic model of ``problem``. See the module docstring for the states."""
    p = problem
    species = list(p.species)
    fed_species = [s.name for s in species if any(s.name in f.composition for f in p.feeds)]
    has_integral = p.objective is not None and p.objective.integral is not None
    state_names = [s.name for s in species] + ["V"] + [f"fed_{n}" for n in fed_species]
    if has_integral:
        state_names.append("J_int")
    feed_names = [f.name for f in p.feeds]

    t = ca.SX.sym("t")
    x = ca.SX.sym("x", len(state_names))
    u = ca.SX.sym("u", len(feed_names))
    V = x[len(species)]
    F_total = ca.sum1(u) if feed_names else ca.SX(0)

    env = {"t": t, "V": V, "F_total": F_total, "D": F_total / V}
    env.update({s.name: x[i] for i, s in enumerate(species)})
    env.update(p.parameters)
    env.update({name: u[j] for j, name in enumerate(feed_names)})
    values = {"F_total": F_total, "D": F_total / V}
    for name, e in p.rates:
        env[name] = ca.SX(to_casadi(e, env))
        values[name] = env[name]
    if p.vessel.oxygen is not None:
        env["OUR"] = ca.SX(to_casadi(p.vessel.oxygen.uptake, env))
        values["OUR"] = env["OUR"]
    if p.vessel.heat is not None:
        env["heat_load"] = p.vessel.heat.yield_per_oxygen * env["OUR"] * V
        values["heat_load"] = env["heat_load"]

    for name in fed_species:
        env[f"fed_{name}"] = x[state_names.index(f"fed_{name}")]
    rhs = []
    for i, s in enumerate(species):
        r = ca.SX(to_casadi(s.rate, env))
        if s.dilute and not s.raw:
            for j, f in enumerate(p.feeds):
                r = r + u[j] / V * (f.composition.get(s.name, 0.0) - x[i])
        rhs.append(r)
    rhs.append(F_total)
    for name in fed_species:
        rhs.append(sum(u[j] * f.composition.get(name, 0.0) for j, f in enumerate(p.feeds)))
    if has_integral:
        rhs.append(ca.SX(to_casadi(p.objective.integral, env)))

    x0 = [s.initial for s in species] + [p.vessel.initial_volume] + [0.0] * len(fed_species)
    if has_integral:
        x0.append(0.0)
    return Model(
        problem=p, state_names=state_names, feed_names=feed_names, t=t, x=x, u=u,
        rhs=ca.vertcat(*rhs), values=values, x0=np.array(x0, dtype=float), env=env,
    )
