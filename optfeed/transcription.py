"""The optimizer's NLP: one pump profile shared by one or more collocation blocks.

Each block (:class:`optfeed.collocation.Block`) is the model under one scenario: the
nominal problem, or one sample of uncertain constants and initial values. All blocks
share the decisions a plant can make: the pump rate on each pump step and, where it is
free, the end time. With one scenario this is the plain optimal-control problem.

Every number that may change between solves is a parameter of the NLP or a bound,
never part of its graph: the problem's constants and initial values, a fixed end
time, the scaling, the limits' bounds (with engineering margins and back-offs), the
pump ranges. So one :class:`FeedNLP` (and one built IPOPT solver, see
:mod:`optfeed.solve`) serves every start, back-off round and sweep case of the same
structure; :func:`structure_key` says which problems share it.

Variables (scaled by nominal magnitudes, so IPOPT sees numbers near 1):

    u       nu x M        pump rate per pump step (L/h, divided by the pump maximum)
    T       1             end time (h, divided by its nominal), only if free
    z       1             epigraph variable for the 'worst' scenario objective
    s<k>.x  nx x N*d      states of scenario k at the collocation points

Constraints: each block's collocation equations; every path limit at every
collocation point (a limit on one state is a bound on that state's variables
instead); a limit that depends on the pump rates also at the start of every pump
step, where the new rate meets the old state; every end limit at T; for 'worst', the
epigraph rows.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field

import casadi as ca
import numpy as np

from .collocation import Block, Layout
from .limits import Limit
from .model import Model

COMBINE = ("mean", "worst", "mean_std")


@dataclass(frozen=True)
class Grid:
    """Pump steps and finite elements of one run (uniform over [0, T]).

    pump_steps : M; elements : N, a whole multiple of M; degree : Radau points.
    """

    pump_steps: int
    elements: int
    degree: int

    def __post_init__(self):
        if self.elements % self.pump_steps:
            raise ValueError("elements must be a whole multiple of pump_steps")

    @property
    def elements_per_step(self) -> int:
        return self.elements // self.pump_steps

    @property
    def fractions(self) -> np.ndarray:
        return np.linspace(0.0, 1.0, self.elements + 1)


@dataclass
class NLPData:
    """The numbers of one solve: everything that is not part of the NLP's graph.

    Internal units throughout. ``lower``/``upper`` hold each limit's bounds as the
    NLP must meet them (margins and back-offs already applied); ``scale`` the
    magnitude each limit's rows are divided by.
    """

    constants: np.ndarray  # (n_constants, S)
    x0: np.ndarray  # (nx, S)
    end_time: float | None  # fixed end time, h (None if free)
    end_bounds: tuple  # (min, max) h
    pump_min: np.ndarray  # (nu,) L/h, or (nu, M) step by step
    pump_max: np.ndarray  # (nu,) L/h, or (nu, M)
    lower: dict  # limit name -> float or None
    upper: dict
    scale: dict  # limit name -> float
    x_scale: np.ndarray  # (nx,)
    t_scale: float
    j_scale: float
    weights: np.ndarray  # (S,), sum 1
    smoothing: float = 0.0
    risk: float = 0.0  # k of mean - k*std
    pump_scale: np.ndarray | None = None  # (nu,) magnitude of the pump variables (default: pump_max)


@dataclass
class Unpacked:
    """An NLP point as physical time series of one scenario.

    t_points : (N*d + 1,) times of t=0 and every collocation point, h
    x_points : (N*d + 1, nx) states there
    u_points : (N*d + 1, nu) pump rates there
    t_steps : (M + 1,) pump-step boundaries, h
    u_steps : (M, nu) pump rate per step, L/h
    x_end : (nx,) state at T
    T : float, h
    """

    t_points: np.ndarray
    x_points: np.ndarray
    u_points: np.ndarray
    t_steps: np.ndarray
    u_steps: np.ndarray
    x_end: np.ndarray
    T: float


@dataclass
class _RowGroup:
    kind: str  # 'model', 'limit', 'epigraph'
    name: str
    rows: np.ndarray
    scenario: int = 0


class FeedNLP:
    """The collocation NLP of a feed problem over ``scenarios`` blocks.

    Parameters
    ----------
    model : Model
    limits : list of Limit
        Built from ``model``; pump limits become variable bounds.
    grid : Grid
    free_time : bool
    scenarios : int
    combine : 'mean', 'worst' or 'mean_std'
        How the scenarios' objectives become one (weights from the data).
    smoothing : bool
        Include the penalty on pump-rate changes (its weight is data).
    """

    def __init__(self, model: Model, limits: list[Limit], grid: Grid, free_time: bool, scenarios: int = 1,
                 combine: str = "mean", smoothing: bool = False):
        if combine not in COMBINE:
            raise ValueError(f"combine must be one of {COMBINE}")
        self.model, self.limits, self.grid = model, [l for l in limits if l.kind != "setting"], grid
        self.free_time, self.S, self.combine = free_time, int(scenarios), combine
        self.copies = self.S  # copies of the model sharing decisions (solve.ipopt_options)
        self.has_smoothing = smoothing
        self.sense = -1.0 if (model.problem.objective is None or model.problem.objective.sense == "maximize") else 1.0
        self._build()
        self._solvers = {}
        self._derivatives = None

    # ------------------------------------------------------------------ build
    def _build(self):
        m, g_ = self.model, self.grid
        nx, nu, S = m.nx, m.nu, self.S
        M, N, d, k = g_.pump_steps, g_.elements, g_.degree, g_.elements_per_step
        W, P = Layout("w"), Layout("p")
        self.W, self.P = W, P
        const = P.add("constants", m.n_constants, S)
        x0 = P.add("x0", nx, S)
        xs = P.add("x_scale", nx)
        us = P.add("u_scale", nu)
        js = P.add("j_scale")
        ws = P.add("weights", S)
        path = [l for l in self.limits if not l.at_end and l.kind not in ("pump", "setting")]
        rows_lim = [l for l in path if l.state is None]
        self.bound_limits = [l for l in path if l.state is not None]
        ends = [l for l in self.limits if l.at_end]
        self.row_limits = rows_lim + ends
        gs = P.add("g_scale", max(len(self.row_limits), 1))
        scale_of = {l.name: gs[i] for i, l in enumerate(self.row_limits)}
        u_s = W.add("u", nu, M)
        u = u_s * ca.repmat(us, 1, M)
        if self.free_time:
            ts = P.add("t_scale")
            T = W.add("T") * ts
        else:
            T = P.add("T")
        z = W.add("z") if self.combine == "worst" else None
        smooth = P.add("smoothing") if self.has_smoothing else None
        risk = P.add("risk") if self.combine == "mean_std" else None

        f = m.function_p("f", [m.rhs])
        step_of = np.arange(N) // k
        u_pts = u[:, np.repeat(step_of, d)]
        gfun_pts = m.function_p("g_points", [ca.vertcat(*[l.expr for l in rows_lim])]) if rows_lim else None
        u_dep = [l for l in rows_lim if l.on_pump]
        gfun_steps = m.function_p("g_steps", [ca.vertcat(*[l.expr for l in u_dep])]) if u_dep else None
        gfun_end = m.function_p("g_end", [ca.vertcat(*[l.expr for l in ends])]) if ends else None
        J_fn = m.objective_function()

        g, groups = [], []
        row = 0

        def add_rows(expr, kind, name, scenario, stride=1, first=0):
            nonlocal row
            n = expr.shape[0]
            g.append(expr)
            idx = np.arange(row, row + n)
            groups.append(_RowGroup(kind, name, idx[first::stride], scenario))
            return idx

        self.blocks, J_s = [], []
        fracs = g_.fractions
        for s in range(S):
            blk = Block(f"s{s}", f, fracs, d, W, x0[:, s], const[:, s], T, 0.0, u_pts, xs)
            self.blocks.append(blk)
            r = blk.residuals
            g.append(r)
            groups.append(_RowGroup("model", "model equations", np.arange(row, row + r.shape[0]), s))
            row += r.shape[0]
            if rows_lim:
                vals = gfun_pts.map(N * d)(blk.t_points, blk.X, u_pts, const[:, s])  # (L, N*d)
                vals = vals / ca.repmat(ca.vertcat(*[scale_of[l.name] for l in rows_lim]), 1, N * d)
                L = len(rows_lim)
                flat = ca.vec(vals)
                g.append(flat)
                for i, lim in enumerate(rows_lim):
                    groups.append(_RowGroup("limit", lim.name, row + i + L * np.arange(N * d), s))
                row += flat.shape[0]
            if u_dep:
                cols = [q * k for q in range(M)]  # element that starts each pump step
                vals = gfun_steps.map(M)(blk.t_start[:, cols], blk.x_start[:, cols], u, const[:, s])
                vals = vals / ca.repmat(ca.vertcat(*[scale_of[l.name] for l in u_dep]), 1, M)
                L = len(u_dep)
                flat = ca.vec(vals)
                g.append(flat)
                for i, lim in enumerate(u_dep):
                    groups.append(_RowGroup("limit", lim.name, row + i + L * np.arange(M), s))
                row += flat.shape[0]
            if ends:
                vals = gfun_end(T, blk.x_end, u[:, M - 1], const[:, s]) / ca.vertcat(*[scale_of[l.name] for l in ends])
                g.append(vals)
                for i, lim in enumerate(ends):
                    groups.append(_RowGroup("limit", lim.name, np.array([row + i]), s))
                row += len(ends)
            if J_fn is not None:
                J_s.append(J_fn(T, blk.x_end, u[:, M - 1], const[:, s], x0[:, s]))

        if J_fn is None:
            obj = ca.MX(0)
            J_comb = ca.MX(0)
        elif self.combine == "worst":
            # epigraph: the worst scenario's objective is z (scaled by j_scale)
            # maximize: z <= J_s/j_scale for every s; minimize: z >= J_s/j_scale
            for s, J in enumerate(J_s):
                g.append(-self.sense * (z - J / js))  # <= 0
                groups.append(_RowGroup("epigraph", f"scenario {s}", np.array([row]), s))
                row += 1
            obj = self.sense * z
            J_comb = z * js
        else:
            Js = ca.vertcat(*J_s)
            mean = ca.dot(ws, Js)
            if self.combine == "mean_std":
                var = ca.dot(ws, (Js - mean) ** 2)
                # risk-averse in either sense: less k std when maximising, plus when minimising
                J_comb = mean + self.sense * risk * ca.sqrt(var + (1e-9 * js) ** 2)
            else:
                J_comb = mean
            obj = self.sense * J_comb / js
        if self.has_smoothing and M > 1:
            du = u_s[:, 1:] - u_s[:, :-1]
            obj = obj + smooth * ca.sumsqr(du)
        self.groups = groups
        self.n_g = row
        self.J_scenarios = ca.vertcat(*J_s) if J_s else ca.MX(0, 1)
        self.J_combined = J_comb
        self.nlp = {"x": W.symbol(), "p": P.symbol(), "f": obj, "g": ca.vertcat(*g)}
        self.n_w = W.size
        self._J_fun = ca.Function("J", [self.nlp["x"], self.nlp["p"]], [self.J_combined, self.J_scenarios])
        self._g_fun = None

    # ------------------------------------------------------------------ numbers of a solve
    def parameters(self, data: NLPData) -> np.ndarray:
        P = self.P
        v = P.zeros()
        P.put(v, "constants", data.constants)
        P.put(v, "x0", data.x0)
        P.put(v, "x_scale", data.x_scale)
        P.put(v, "u_scale", _pump_scale(data))
        P.put(v, "j_scale", data.j_scale)
        P.put(v, "weights", data.weights)
        P.put(v, "g_scale", [data.scale[l.name] for l in self.row_limits] or [1.0])
        if self.free_time:
            P.put(v, "t_scale", data.t_scale)
        else:
            P.put(v, "T", data.end_time)
        if self.has_smoothing:
            P.put(v, "smoothing", data.smoothing)
        if self.combine == "mean_std":
            P.put(v, "risk", data.risk)
        return v

    def bounds(self, data: NLPData):
        """(lbx, ubx, lbg, ubg) for ``data``."""
        m, W = self.model, self.W
        lbx = np.full(self.n_w, -np.inf)
        ubx = np.full(self.n_w, np.inf)
        us = _pump_scale(data)
        W.put(lbx, "u", _per_step(data.pump_min) / us[:, None])
        W.put(ubx, "u", _per_step(data.pump_max) / us[:, None])
        if self.free_time:
            W.put(lbx, "T", data.end_bounds[0] / data.t_scale)
            W.put(ubx, "T", data.end_bounds[1] / data.t_scale)
        nspecies = len(m.problem.species)
        xl = np.full(m.nx, -np.inf)
        xu = np.full(m.nx, np.inf)
        xl[:nspecies] = 0.0  # species are kept non-negative
        xl[m.index("V")] = 1e-9
        for lim in self.bound_limits:
            lo, hi = data.lower[lim.name], data.upper[lim.name]
            if lo is not None:
                xl[lim.state] = max(xl[lim.state], lo)
            if hi is not None:
                xu[lim.state] = min(xu[lim.state], hi)
        for blk in self.blocks:
            W.put(lbx, blk.var, (xl / data.x_scale)[:, None])
            W.put(ubx, blk.var, (xu / data.x_scale)[:, None])
        lbg = np.zeros(self.n_g)
        ubg = np.zeros(self.n_g)
        for grp in self.groups:
            if grp.kind == "limit":
                sc = data.scale[grp.name]
                lo, hi = data.lower[grp.name], data.upper[grp.name]
                lbg[grp.rows] = -np.inf if lo is None else lo / sc
                ubg[grp.rows] = np.inf if hi is None else hi / sc
            elif grp.kind == "epigraph":
                lbg[grp.rows], ubg[grp.rows] = -np.inf, 0.0
        return lbx, ubx, lbg, ubg

    def arguments(self, data: NLPData) -> dict:
        """Keyword arguments of a solver call (everything but x0 and multipliers)."""
        lbx, ubx, lbg, ubg = self.bounds(data)
        return {"p": self.parameters(data), "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}

    # ------------------------------------------------------------------ maps
    def pack(self, data: NLPData, steps_u, T, times, states) -> np.ndarray:
        """Scaled NLP vector from a physical guess: pump rates per step (M, nu), end
        time T (h), and per scenario the states sampled at ``times`` (a list of
        (n, nx) arrays, or one array used for every scenario)."""
        W, m = self.W, self.model
        w = W.zeros()
        us = _pump_scale(data)
        W.put(w, "u", (np.asarray(steps_u, dtype=float) / us[None, :]).T)
        if self.free_time:
            W.put(w, "T", T / data.t_scale)
        if not isinstance(states, list):
            states = [states] * self.S
            times = [times] * self.S
        elif not isinstance(times, list):
            times = [times] * self.S
        for s, blk in enumerate(self.blocks):
            tp = blk.point_times(T)
            X = np.array([np.interp(tp, times[s], states[s][:, i]) for i in range(m.nx)])
            W.put(w, blk.var, X / data.x_scale[:, None])
        if self.combine == "worst":
            J = self.scenario_objectives(w, data)
            W.put(w, "z", (J.min() if self.sense < 0 else J.max()) / data.j_scale)
        lbx, ubx, _, _ = self.bounds(data)
        return np.clip(w, lbx, ubx)

    def unpack(self, w, data: NLPData, scenario: int = 0) -> Unpacked:
        """Physical time series of scenario ``scenario`` at NLP vector ``w``. Pump
        rates are clipped into their ranges and a free end time into its bounds
        exactly (IPOPT may relax bounds by ~1e-8): an answer never leaves them."""
        W, m, g_ = self.W, self.model, self.grid
        us = _pump_scale(data)
        u = W.get(w, "u") * us[:, None]
        u = np.clip(u, _per_step(data.pump_min), _per_step(data.pump_max))
        if self.free_time:
            T = float(np.clip(W.get(w, "T")[0, 0] * data.t_scale, *data.end_bounds))
        else:
            T = float(data.end_time)
        blk = self.blocks[scenario]
        X = W.get(w, blk.var) * data.x_scale[:, None]
        x0 = data.x0[:, scenario]
        step_of = np.repeat(np.arange(g_.elements) // g_.elements_per_step, g_.degree)
        u_pts = u[:, step_of]
        return Unpacked(
            t_points=np.concatenate([[0.0], blk.point_times(T)]),
            x_points=np.vstack([x0, X.T]),
            u_points=np.vstack([u[:, 0], u_pts.T]),
            t_steps=np.linspace(0.0, T, g_.pump_steps + 1),
            u_steps=u.T.copy(),
            x_end=X[:, -1].copy(),
            T=T,
        )

    def split_steps(self, finer: "FeedNLP", w, lam_g, lam_x):
        """Move a solution of this NLP, with its multipliers, onto ``finer``: the same
        elements and scenarios, each pump step split into equal parts. The point is
        the same schedule, so a warm start from it begins at the old optimum.

        Returns (w, lam_g, lam_x) for ``finer``, or None when the two NLPs do not
        share their elements (then there is no exact transfer).
        """
        g0, g1 = self.grid, finer.grid
        if (g0.elements, g0.degree) != (g1.elements, g1.degree) or g1.pump_steps % g0.pump_steps \
                or self.S != finer.S or self.free_time != finer.free_time or self.combine != finer.combine:
            return None
        r = g1.pump_steps // g0.pump_steps
        w, lam_g, lam_x = (np.asarray(v, dtype=float).ravel() for v in (w, lam_g, lam_x))
        W0, W1 = self.W, finer.W
        w1, lx1 = W1.zeros(), W1.zeros()
        for name in W0._parts:
            if name == "u":
                W1.put(w1, "u", np.repeat(W0.get(w, "u"), r, axis=1))
                W1.put(lx1, "u", np.repeat(W0.get(lam_x, "u") / r, r, axis=1))
            else:
                W1.put(w1, name, W0.get(w, name))
                W1.put(lx1, name, W0.get(lam_x, name))
        lg1 = np.zeros(finer.n_g)
        old = {(grp.kind, grp.name, grp.scenario, len(grp.rows)): grp.rows for grp in self.groups}
        for grp in finer.groups:
            rows = old.get((grp.kind, grp.name, grp.scenario, len(grp.rows)))
            if rows is not None:
                lg1[grp.rows] = lam_g[rows]
                continue
            # a limit's rows at pump-step starts: the old steps start at every r-th new one
            coarse = old.get((grp.kind, grp.name, grp.scenario, len(grp.rows) // r))
            if coarse is not None and len(grp.rows) == r * len(coarse):
                lg1[grp.rows[::r]] = lam_g[coarse]
        return w1, lg1, lx1

    def objective_value(self, w, data: NLPData) -> float:
        """The combined objective J (internal units, its own sense) at ``w``."""
        return float(self._J_fun(w, self.parameters(data))[0])

    def scenario_objectives(self, w, data: NLPData) -> np.ndarray:
        return np.array(self._J_fun(w, self.parameters(data))[1]).ravel()

    def violations(self, w, data: NLPData) -> dict:
        """Worst violation of each limit at ``w`` (internal units), plus
        'model equations' for the collocation rows (scaled)."""
        if self._g_fun is None:
            self._g_fun = ca.Function("g", [self.nlp["x"], self.nlp["p"]], [self.nlp["g"]])
        lbx, ubx, lbg, ubg = self.bounds(data)
        g = np.array(self._g_fun(w, self.parameters(data))).ravel()
        excess = np.maximum(np.maximum(lbg - g, g - ubg), 0.0)
        out = {"model equations": 0.0}
        for grp in self.groups:
            if grp.kind == "model":
                out["model equations"] = max(out["model equations"], float(excess[grp.rows].max(initial=0.0)))
            elif grp.kind == "limit":
                v = float(excess[grp.rows].max(initial=0.0)) * data.scale[grp.name]
                out[grp.name] = max(out.get(grp.name, 0.0), v)
        w = np.asarray(w, dtype=float).ravel()
        for lim in self.bound_limits:
            for blk in self.blocks:
                idx = self.W.indices(blk.var)[lim.state]
                sc = data.x_scale[lim.state]
                v = float(np.maximum(np.maximum(lbx[idx] - w[idx], w[idx] - ubx[idx]), 0.0).max()) * sc
                out[lim.name] = max(out.get(lim.name, 0.0), v)
        return out

    def marginals(self, lam_g, lam_x, data: NLPData) -> dict:
        """Gain in objective per unit relaxation of each limit (internal units).

        A limit relaxed by delta everywhere over the run and in every scenario (its
        upper bound raised, or its lower bound lowered) improves the optimum by about
        ``gain * delta`` (>= 0 at a KKT point). From IPOPT's multipliers:
        d f*/d bound = -lambda. Returns name -> (gain of the upper bound, gain of the
        lower bound); each pump as 'pump <feed>', a free end time as 'end time'.
        """
        lam_g = np.asarray(lam_g, dtype=float).ravel()
        lam_x = np.asarray(lam_x, dtype=float).ravel()
        c = data.j_scale / self.sense  # dJ = c * df
        sums: dict = {}

        def add(name, lam, s):
            up = -c * lam[lam > 0].sum() / s
            low = c * lam[lam < 0].sum() / s
            a, b = sums.get(name, (0.0, 0.0))
            sums[name] = (a + up, b + low)

        for grp in self.groups:
            if grp.kind == "limit":
                add(grp.name, lam_g[grp.rows], data.scale[grp.name])
        lbx, ubx, _, _ = self.bounds(data)
        for lim in self.bound_limits:
            # a species' non-negativity is not the limit: count a multiplier only where
            # the limit's own bound is the one in force
            for blk in self.blocks:
                idx = self.W.indices(blk.var)[lim.state]
                lam = lam_x[idx].copy()
                own_lo = data.lower[lim.name] is not None and np.isclose(
                    lbx[idx], data.lower[lim.name] / data.x_scale[lim.state])
                own_hi = data.upper[lim.name] is not None and np.isclose(
                    ubx[idx], data.upper[lim.name] / data.x_scale[lim.state])
                lam = np.where(lam < 0, np.where(own_lo, lam, 0.0), np.where(own_hi, lam, 0.0))
                add(lim.name, lam, data.x_scale[lim.state])
        us = _pump_scale(data)
        idx_u = self.W.indices("u")
        for j, fd in enumerate(self.model.problem.feeds):
            add(f"pump {fd.name}", lam_x[idx_u[j]], us[j])
        if self.free_time:
            add("end time", lam_x[self.W.indices("T").ravel()], data.t_scale)
        return {n: (_gain(self.sense, a), _gain(self.sense, b)) for n, (a, b) in sums.items()}


def _pump_scale(data: NLPData) -> np.ndarray:
    """(nu,) magnitude of each pump's variables: its largest allowed rate."""
    if data.pump_scale is not None:
        return np.maximum(np.asarray(data.pump_scale, dtype=float), 1e-12)
    top = np.asarray(data.pump_max, dtype=float)
    return np.maximum(top.max(axis=1) if top.ndim == 2 else top, 1e-12)


def _per_step(bound) -> np.ndarray:
    """A pump bound as (nu, 1) for every step alike, or (nu, M) step by step."""
    bound = np.asarray(bound, dtype=float)
    return bound[:, None] if bound.ndim == 1 else bound


def _gain(sense: float, dJ: float) -> float:
    """Improvement of the objective in its own sense for a change dJ."""
    return dJ if sense < 0 else -dJ


def structure_key(problem, grid: Grid, free_time: bool, scenarios: int = 1, combine: str = "mean",
                  smoothing: bool = False) -> str:
    """Identity of the NLP's graph: problems with equal keys share one FeedNLP.

    It holds everything that shapes the equations (names, expressions, which
    bounds exist, the grid) and none of the numbers a solve passes as data.
    """
    p = problem
    obj = p.objective
    parts = {
        "species": [(s.name, s.raw, s.dilute, s.rate.text) for s in p.species],
        "parameters": list(p.parameters),
        "rates": [(n, e.text) for n, e in p.rates],
        "feeds": [(f.name, sorted(f.composition)) for f in p.feeds],
        "oxygen": None if p.vessel.oxygen is None else p.vessel.oxygen.uptake.text,
        "heat": p.vessel.heat is not None,
        "bounds": [(b.name, b.expression.text, b.lower is None, b.upper is None, b.at_end) for b in p.bounds],
        "objective": None if obj is None else [obj.sense, obj.quantity, obj.product, obj.substrate,
                                               None if obj.expression is None else obj.expression.text,
                                               None if obj.integral is None else obj.integral.text],
        "grid": [grid.pump_steps, grid.elements, grid.degree],
        "free_time": free_time, "scenarios": scenarios, "combine": combine, "smoothing": bool(smoothing),
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:24]
