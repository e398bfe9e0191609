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

from .collocation import Block, Layout, element_function, radau_coefficients
from .derivatives import Assembled, Kind
from .limits import Limit, bound_scale, build_limits
from .model import Model
from .phases import condition_function, jump, phase_constants, phase_limits, phases_of

COMBINE = ("mean", "worst", "mean_std")
# Up to this many collocation elements (all scenarios together) the assembled
# derivative Functions are expanded to scalar graphs before IPOPT uses them: on a
# small NLP the calls of the mapped pieces cost as much as the linear algebra.
# Measured (one run, 30 iterations): Park-Ramirez 160 elements 9.4 against 11.5 ms
# per iteration for 0.09 s more building; the coarse grids' hundreds of iterations
# gain more (induced_protein, 40 elements: 1.9 against 3.3 ms); at 640 elements the
# same per iteration (36 ms) for 0.4 s more building.
SCALAR_ELEMENTS = 320


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


@dataclass(frozen=True)
class Stretch:
    """One block of a run's time line: part of one phase between two boundaries.

    phase : index into the run's phases (:func:`optfeed.phases.phases_of`);
    steps : its pump steps on the base pump grid (``Settings.pump_steps``);
    end : what ends it: ('phase', k) the end of phase k, ('addition', j) the
        problem's addition j (a state jump follows), or ('run', -1).
    """

    phase: int
    steps: int
    end: tuple


def plan_stretches(problem, pump_steps: int, ends: dict, end_time: float) -> tuple:
    """The run cut at every phase end and addition, in time order, as stretches.

    ``ends`` gives each phase's end time (h) to order the cuts by (the nominal or a
    start's); ``end_time`` the run's (nominal) length. The base pump steps are
    shared out by each stretch's share of the run (at least one each).
    """
    phases = phases_of(problem)
    # an addition at or after the run's end never happens (a free end time's plan
    # holds the end before the first one left out, see FeedNLP.end_window)
    cuts = [(a.time, 0, ("addition", j)) for j, a in enumerate(problem.additions) if a.time < end_time]
    for k, ph in enumerate(phases[:-1]):
        cuts.append((float(ends[ph.name]), 1, ("phase", k)))
    cuts.sort()
    if len(cuts) + 1 > pump_steps:
        raise ValueError(f"the run is cut into {len(cuts) + 1} stretches by its phases and additions, more than "
                         f"its {pump_steps} pump steps: raise solver.pump_steps")
    times = [c[0] for c in cuts] + [end_time]
    lengths = np.diff([0.0] + times)
    lengths = np.maximum(lengths, 1e-3 * end_time)
    share = lengths / lengths.sum() * (pump_steps - len(times))
    steps = np.floor(share).astype(int)
    rest = pump_steps - len(times) - steps.sum()
    for i in np.argsort(-(share - steps))[:rest]:
        steps[i] += 1
    out, phase = [], 0
    for i, end in enumerate([c[2] for c in cuts] + [("run", -1)]):
        out.append(Stretch(phase, int(steps[i]) + 1, end))
        if end[0] == "phase":
            phase += 1
    return tuple(out)


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
    switches : dict, phase name -> end time (h), for every phase but the last
    amounts : dict, addition index -> {species: amount} for the amounts optimize chooses
    """

    t_points: np.ndarray
    x_points: np.ndarray
    u_points: np.ndarray
    t_steps: np.ndarray
    u_steps: np.ndarray
    x_end: np.ndarray
    T: float
    switches: dict = field(default_factory=dict)
    amounts: dict = field(default_factory=dict)  # addition index -> {species: amount optimize chose}


@dataclass
class _RowGroup:
    kind: str  # 'model', 'limit', 'epigraph', 'timing'
    name: str
    rows: np.ndarray
    scenario: int = 0
    lower: float = 0.0  # 'timing' rows: bounds, h for times (divided by t_scale)
    upper: float = 0.0
    in_time: bool = False  # 'timing' rows that are times


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
    stretches : tuple of Stretch, optional
        The run's time line when it has phases or additions
        (:func:`plan_stretches`); then ``phase_models`` holds one model per phase
        with ``model``'s states, and every stretch is one block per scenario.
    phase_models : list of Model, optional
    """

    def __init__(self, model: Model, limits: list[Limit], grid: Grid, free_time: bool, scenarios: int = 1,
                 combine: str = "mean", smoothing: bool = False, stretches: tuple | None = None,
                 phase_models: list | None = None):
        if combine not in COMBINE:
            raise ValueError(f"combine must be one of {COMBINE}")
        self.model, self.limits, self.grid = model, [l for l in limits if l.kind != "setting"], grid
        self.free_time, self.S, self.combine = free_time, int(scenarios), combine
        self.copies = self.S  # copies of the model sharing decisions (solve.ipopt_options)
        self.has_smoothing = smoothing
        self.sense = -1.0 if (model.problem.objective is None or model.problem.objective.sense == "maximize") else 1.0
        self.phases = phases_of(model.problem)
        self.stretches = tuple(stretches) if stretches else (Stretch(0, grid.pump_steps, ("run", -1)),)
        self.phased = len(self.stretches) > 1
        self.phase_models = list(phase_models) if phase_models else [model] * len(self.phases)
        self.end_window = self._end_window()
        self._build()
        self._solvers = {}

    # ------------------------------------------------------------------ build
    def _end_window(self) -> tuple:
        """(earliest, latest) end of the run (h) that this time line allows: after
        the last addition it holds and before the first it leaves out."""
        adds = self.model.problem.additions
        held = {st.end[1] for st in self.stretches if st.end[0] == "addition"}
        after = [a.time for j, a in enumerate(adds) if j in held]
        left = [a.time for j, a in enumerate(adds) if j not in held]
        return (max(after) + 1e-6 if after else 0.0), (min(left) if left else np.inf)

    def fixed_cut(self, st: Stretch, end_time: float | None = None) -> float | None:
        """The time (h) a stretch ends at when it is fixed: an addition's time, a
        fixed phase end, or the run's end when ``end_time`` (a fixed one) is given;
        None for an end the NLP chooses."""
        kind, j = st.end
        if kind == "addition":
            return self.model.problem.additions[j].time
        if kind == "phase" and self.phases[j].end.kind == "at":
            return self.phases[j].end.time
        if kind == "run":
            return end_time
        return None

    def fixed_durations(self, data: "NLPData") -> dict:
        """Stretch index -> its duration (h) where both its ends are fixed times (an
        addition, a fixed phase end, a fixed end of the run)."""
        out, prev = {}, 0.0
        for i, st in enumerate(self.stretches):
            t = self.fixed_cut(st, data.end_time)
            if t is not None and prev is not None:
                out[i] = t - prev
            prev = t
        return out

    def _steps(self) -> list[int]:
        """Pump steps of each stretch on this NLP's grid."""
        if not self.phased:
            return [self.grid.pump_steps]
        base = sum(st.steps for st in self.stretches)
        if self.grid.pump_steps % base:
            raise ValueError(f"a phased run's pump grid must be a multiple of {base} steps")
        r = self.grid.pump_steps // base
        return [st.steps * r for st in self.stretches]

    def _phase_limits(self, k: int) -> list[Limit]:
        """The limits in force in phase k, in phase k's model (by name, as given)."""
        if not self.phased:
            return self.limits
        m, ph = self.phase_models[k], self.phases[k]
        names = {l.name for l in self.limits}
        own = [l for l in build_limits(m) if l.name in names and l.kind != "setting"]
        own += [l for l in phase_limits(m, ph) if l.name in names]
        return own

    def _build(self):
        m, g_ = self.model, self.grid
        nx, nu, S = m.nx, m.nu, self.S
        N, d, k = g_.elements, g_.degree, g_.elements_per_step
        steps = self._steps()
        M = sum(steps)
        self.steps = steps
        W, P = Layout("w"), Layout("p")
        self.W, self.P = W, P
        const = P.add("constants", m.n_constants, S)
        x0 = P.add("x0", nx, S)
        xs = P.add("x_scale", nx)
        us = P.add("u_scale", nu)
        js = P.add("j_scale")
        ws = P.add("weights", S)
        phase_limits = [self._phase_limits(q) for q in range(len(self.phases))]
        # every limit with constraint rows, once by name (a phase's limits among them)
        seen, self.row_limits = set(), []
        for lims in phase_limits:
            for l in lims:
                if l.kind not in ("pump", "setting") and (l.at_end or l.state is None) and l.name not in seen:
                    seen.add(l.name)
                    self.row_limits.append(l)
        gs = P.add("g_scale", max(len(self.row_limits), 1))
        scale_of = {l.name: gs[i] for i, l in enumerate(self.row_limits)}
        u_s = W.add("u", nu, M)
        u = u_s * ca.repmat(us, 1, M)
        if self.phased:
            ts = P.add("t_scale")
            Ds = W.add("D", len(self.stretches))
            D = Ds * ts
            T = ca.sum1(D)
            if not self.free_time:
                P.add("T")  # the fixed end time is a timing row's bound; kept for parameters()
        elif self.free_time:
            ts = P.add("t_scale")
            T = W.add("T") * ts
            D = T
        else:
            T = P.add("T")
            D = T
        # amounts of the additions that optimize chooses (held by this time line), scaled by their maxima
        adds = self.model.problem.additions
        held = [st.end[1] for st in self.stretches if st.end[0] == "addition"]
        self.chosen = [(j, sp, lo, hi) for j in held for sp, (lo, hi) in sorted(adds[j].chosen.items())]
        chosen_of = {}
        if self.chosen:
            a_s = W.add("amounts", len(self.chosen))
            for k, (j, sp, lo, hi) in enumerate(self.chosen):
                chosen_of.setdefault(j, {})[sp] = a_s[k] * max(hi, 1e-12)
        z = W.add("z") if self.combine == "worst" else None
        smooth = P.add("smoothing") if self.has_smoothing else None
        risk = P.add("risk") if self.combine == "mean_std" else None

        # per phase: the model's functions
        funs = []
        for q, (pm, lims) in enumerate(zip(self.phase_models, phase_limits)):
            path = [l for l in lims if not l.at_end and l.kind not in ("pump", "setting")]
            rows_lim = [l for l in path if l.state is None]
            u_dep = [l for l in rows_lim if l.on_pump]
            ends = [l for l in lims if l.at_end]
            end = self.phases[q].end
            funs.append(dict(
                f=pm.function_p("f", [pm.rhs]), rows_lim=rows_lim, u_dep=u_dep, ends=ends,
                bounds=[l for l in path if l.state is not None],
                g_pts=pm.function_p("g_points", [ca.vertcat(*[l.expr for l in rows_lim])]) if rows_lim else None,
                g_steps=pm.function_p("g_steps", [ca.vertcat(*[l.expr for l in u_dep])]) if u_dep else None,
                g_end=pm.function_p("g_end", [ca.vertcat(*[l.expr for l in ends])]) if ends else None,
                until=condition_function(pm, end) if end.kind == "when" else None,
                until_scale=bound_scale(end.level, None) if end.kind == "when" else 1.0,
            ))
        J_fn = m.objective_function()

        g, groups = [], []
        row = 0
        # rows that the assembled derivatives give piece by piece (see _assemble); the
        # others are their remainder, differentiated by CasADi on their own graph
        pieces, rest = [], []

        def keep(expr, idx, piece):
            """Rows ``idx`` as pieces (``piece``: what _assemble needs to restate them;
            its 'first' expression, the rows of a block's first element or pump step
            when the block starts from an addition's jump, is left to the remainder)
            or, without a piece, as part of the remainder."""
            if piece is None:
                rest.append((expr, idx))
                return
            first = piece.pop("first", None)
            if first is not None:
                rest.append((first, idx[:first.shape[0]]))
            pieces.append(dict(piece, rows=idx))

        def add(expr, grp_kind, name, scenario, piece=None, **extra):
            nonlocal row
            n = expr.shape[0]
            g.append(expr)
            idx = np.arange(row, row + n)
            groups.append(_RowGroup(grp_kind, name, idx, scenario, **extra))
            keep(expr, idx, piece)
            row += n
            return idx

        def add_limit_rows(vals, lims, n_cols, scenario, piece=None):
            """Rows of limits ``lims`` evaluated at ``n_cols`` points (vals: L x n_cols)."""
            nonlocal row
            L = len(lims)
            flat = ca.vec(vals / ca.repmat(row_scales(scale_of, lims), 1, n_cols))
            g.append(flat)
            for i, lim in enumerate(lims):
                groups.append(_RowGroup("limit", lim.name, row + i + L * np.arange(n_cols), scenario))
            idx = np.arange(row, row + flat.shape[0])
            keep(flat, idx, piece)
            row += flat.shape[0]

        self.blocks, self.block_bounds, J_s = [], [], []
        self.stretch_blocks = []  # [scenario][stretch]
        offsets = np.concatenate([[0], np.cumsum(steps)])
        t_starts = [ca.MX(0.0)] if self.phased else [0.0]
        for i in range(1, len(self.stretches)):
            t_starts.append(t_starts[-1] + D[i - 1])
        for s in range(S):
            xa = x0[:, s]
            start = ("x0", None)  # where the block's start state comes from (see _assemble)
            row_blocks = []
            for i, st in enumerate(self.stretches):
                q = st.phase
                fn = funs[q]
                Mi = steps[i]
                Ni = Mi * N // g_.pump_steps if self.phased else N
                ki = max(Ni // Mi, 1)
                Ni = Mi * ki
                ui = u[:, offsets[i]:offsets[i + 1]]
                u_pts = ui[:, np.repeat(np.arange(Ni) // ki, d)]
                p_q = phase_constants(self.phase_models[q], self.phases[q], const[:, s])
                name = f"s{s}" if not self.phased else f"s{s}.{i}"
                Di = D[i] if self.phased else D
                blk = Block(name, fn["f"], np.linspace(0.0, 1.0, Ni + 1), d, W)
                blk.write(xa, p_q, Di, t_starts[i], u_pts, xs)
                blk.stretch, blk.steps_cols = i, (offsets[i], offsets[i + 1])
                self.blocks.append(blk)
                row_blocks.append(blk)
                self.block_bounds.append((blk, fn["bounds"]))
                # what _assemble needs to restate this block's rows piece by piece
                piece = dict(q=q, s=s, i=i, start=start, X=W.indices(blk.var), fractions=blk.fractions,
                             u_cols=offsets[i] + np.arange(Ni) // ki, ki=ki)
                jumped = start[0] == "jump"
                first = None
                if jumped:  # the first element starts from the jump: its rows go to the remainder
                    h0 = Di * (blk.fractions[1] - blk.fractions[0])
                    first = ca.vec(element_function(fn["f"], d, nu)(xa, blk.X[:, :d], u_pts[:, :d],
                                                                    blk.t_points[:, :d], h0, p_q, xs))
                add(blk.residuals, "model", "model equations", s, piece=dict(piece, what="model", first=first))
                if fn["rows_lim"]:
                    vals = fn["g_pts"].map(Ni * d)(blk.t_points, blk.X, u_pts, p_q)
                    add_limit_rows(vals, fn["rows_lim"], Ni * d, s, piece=dict(piece, what="points"))
                if fn["u_dep"]:
                    cols = [j * ki for j in range(Mi)]  # element that starts each pump step
                    vals = fn["g_steps"].map(Mi)(blk.t_start[:, cols], blk.x_start[:, cols], ui, p_q)
                    first = (fn["g_steps"](blk.t_start[:, 0], xa, ui[:, 0], p_q) / row_scales(scale_of, fn["u_dep"])
                             if jumped else None)
                    add_limit_rows(vals, fn["u_dep"], Mi, s, piece=dict(piece, what="steps", first=first))
                if fn["until"] is not None:
                    # the phase goes on (distance >= 0) at its points, and ends where it reaches 0
                    vals = fn["until"].map(Ni * d)(blk.t_points, blk.X, u_pts, p_q) / fn["until_scale"]
                    add(ca.vec(vals), "timing", f"phase {self.phases[q].name} goes on", s, lower=0.0,
                        upper=np.inf, piece=dict(piece, what="until"))
                st_end = st.end
                if st_end[0] == "phase" and fn["until"] is not None:
                    last = fn["until"](t_starts[i] + Di, blk.x_end, ui[:, Mi - 1], p_q) / fn["until_scale"]
                    add(last, "timing", f"phase {self.phases[q].name} ends", s)
                if st_end[0] == "addition":
                    xa = jump(self.phase_models[q], self.model.problem.additions[st_end[1]], blk.x_end,
                              chosen_of.get(st_end[1]))
                    start = ("jump", piece["X"][:, -1])
                else:
                    xa = blk.x_end
                    start = ("var", piece["X"][:, -1])
            self.stretch_blocks.append(row_blocks)
            last_blk = row_blocks[-1]
            q_last = self.stretches[-1].phase
            fn = funs[q_last]
            p_last = phase_constants(self.phase_models[q_last], self.phases[q_last], const[:, s])
            if fn["ends"]:
                vals = fn["g_end"](T, last_blk.x_end, u[:, M - 1], p_last)
                add_limit_rows(vals, fn["ends"], 1, s)
            if J_fn is not None:
                J_s.append(J_fn(T, last_blk.x_end, u[:, M - 1], p_last, x0[:, s]))

        # the time line: each cut where it belongs (shared by every scenario)
        if self.phased:
            cum = ca.cumsum(Ds)
            for i, st in enumerate(self.stretches):
                kind, j = st.end
                if kind == "addition":
                    t_a = self.model.problem.additions[j].time
                    add(cum[i], "timing", f"addition at {t_a:g} h", 0, lower=t_a, upper=t_a, in_time=True)
                elif kind == "phase":
                    e = self.phases[j].end
                    if e.kind == "at":
                        add(cum[i], "timing", f"phase {self.phases[j].name} ends", 0, lower=e.time, upper=e.time,
                            in_time=True)
                    elif e.kind == "between":
                        add(cum[i], "timing", f"phase {self.phases[j].name} ends", 0, lower=e.lower,
                            upper=e.upper, in_time=True)
                else:
                    add(cum[i], "timing", "end of the run", 0, lower=np.nan, upper=np.nan, in_time=True)

        if J_fn is None:
            obj = ca.MX(0)
            J_comb = ca.MX(0)
        elif self.combine == "worst":
            # epigraph: the worst scenario's objective is z (scaled by j_scale)
            # maximize: z <= J_s/j_scale for every s; minimize: z >= J_s/j_scale
            for s, J in enumerate(J_s):
                add(-self.sense * (z - J / js), "epigraph", f"scenario {s}", s)  # <= 0
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
        syms = dict(const=const, x0=x0, xs=xs, us=us, time=ts if (self.phased or self.free_time) else T,
                    scale_of=scale_of)
        assembled = self._assemble(funs, syms, obj, pieces, rest)
        # what optfeed.solve hands to IPOPT: the NLP's own values, the assembled derivatives
        self._sx = self.nlp
        self._derivatives = assembled.functions
        self._expanded = None

    def derivatives(self, few_iterations: bool = False) -> dict:
        """IPOPT's derivative Functions (grad_f, jac_g, hess_lag) for nlpsol: the
        assembled ones, on a small NLP (:data:`SCALAR_ELEMENTS`) expanded to scalar
        graphs once (cheap: they are already derivatives, CasADi only inlines them).

        ``few_iterations``: the solver is for a warm start with multipliers (a pump
        grid refined on the same elements, a back-off round), which takes too few
        iterations for the expansion to pay for itself (Park-Ramirez, 160 elements:
        0.08-0.09 s to expand, about 2 ms less per iteration, and its refinements
        take 11-31 iterations): the assembled ones, unless the NLP was expanded
        already (its fine grid's back-off rounds after the 'near' solve). Within one
        optimize run the order of solves fixes which; a sweep's kept process may
        have expanded an NLP that a fresh process has not, and its warm solvers then
        differ from a fresh one's in rounding only (both derivatives are exact)."""
        if self.S * self.grid.elements > SCALAR_ELEMENTS:
            return self._derivatives
        if self._expanded is None:
            if few_iterations:
                return self._derivatives
            self._expanded = {k: f.expand() for k, f in self._derivatives.items()}
        return self._expanded

    def _assemble(self, funs: list, syms: dict, obj, pieces: list, rest: list) -> Assembled:
        """Exact derivatives of the NLP assembled from its pieces' own
        (:mod:`optfeed.derivatives`): every element's collocation equations and
        every row of a limit or a phase's condition at a collocation point or a pump
        step's start, each kind differentiated once as a small function of its own
        variables and mapped over all of its kind (every block, every scenario).
        What is left (the end of the run, the objective, the time line's rows, the
        first element after an addition's jump) is small and differentiated by
        CasADi on its own graph.

        The pieces restate what :class:`~optfeed.collocation.Block` and ``_build``
        write as one graph (the definition); tests/test_transcription.py compares
        the two.
        """
        m, d = self.model, self.grid.degree
        nx, nu, nc = m.nx, m.nu, m.n_constants
        W = self.W
        u_idx = W.indices("u")
        if self.phased:
            t_idx = W.indices("D").ravel()
        else:
            t_idx = W.indices("T").ravel() if self.free_time else np.zeros(0, dtype=np.int64)
        n_t = len(t_idx)
        tau = radau_coefficients(d)[0][1:]

        # one piece's symbols: its variables and its inputs
        prev, own, u, zt = ca.SX.sym("prev", nx), ca.SX.sym("X", nx * d), ca.SX.sym("u", nu), ca.SX.sym("T", n_t)
        x_pt = ca.SX.sym("x", nx)
        x0, first, c = ca.SX.sym("x0", nx), ca.SX.sym("first"), ca.SX.sym("c", nc)
        xs, us, tq = ca.SX.sym("xs", nx), ca.SX.sym("us", nu), ca.SX.sym("tq")
        frac, dfr, a0, a1 = ca.SX.sym("fr"), ca.SX.sym("dfr"), ca.SX.sym("a0", n_t), ca.SX.sym("a1", n_t)
        # the block's start and duration (h): tq is t_scale where time is a variable,
        # else the fixed end time; a0 and a1 pick the durations before the block and its own
        t0 = tq * ca.dot(a0, zt) if n_t else ca.SX(0)
        dur = tq * ca.dot(a1, zt) if n_t else tq
        x_start = first * x0 + (1 - first) * prev * xs
        uu = u * us
        common_sym = [xs, us, tq]

        def time_masks(i):
            if self.phased:
                return [float(j < i) for j in range(n_t)], [float(j == i) for j in range(n_t)]
            return [0.0] * n_t, [1.0] * n_t

        def prev_of(pc, e):  # the variables of element e's start state (-1: the initial state)
            if e > 0:
                return pc["X"][:, e * d - 1]
            return np.full(nx, -1) if pc["start"][0] == "x0" else pc["start"][1]

        groups = {}
        for pc in pieces:
            groups.setdefault((pc["what"], pc["q"]), []).append(pc)
        kinds = []
        for (what, q), pcs in groups.items():
            fn, pm, ph = funs[q], self.phase_models[q], self.phases[q]
            p = phase_constants(pm, ph, c)
            index, num, mx_cols, rows = [], [], [], []  # per column: variables, numeric inputs, (x0, c), rows
            for pc in pcs:
                s, fr = pc["s"], pc["fractions"]
                m0, m1 = time_masks(pc["i"])
                skip = pc["start"][0] == "jump"  # its first element or step is in the remainder
                if what == "model":
                    n_e = len(fr) - 1
                    es = range(1 if skip else 0, n_e)
                    for e in es:
                        index.append(np.concatenate([prev_of(pc, e), pc["X"][:, e * d:(e + 1) * d].ravel(order="F"),
                                                     u_idx[:, pc["u_cols"][e]], t_idx]))
                        num.append([float(e == 0 and pc["start"][0] == "x0"), fr[e], fr[e + 1] - fr[e], *m0, *m1])
                    rows.append(pc["rows"][len(pc["rows"]) - len(es) * nx * d:].reshape(len(es), nx * d).T)
                    count = len(es)
                elif what in ("points", "until"):
                    n_p = pc["X"].shape[1]
                    t_frac = (fr[:-1, None] + tau[None, :] * np.diff(fr)[:, None]).ravel()
                    for k in range(n_p):
                        index.append(np.concatenate([pc["X"][:, k], u_idx[:, pc["u_cols"][k // d]], t_idx]))
                        num.append([t_frac[k], *m0, *m1])
                    rows.append(pc["rows"].reshape(n_p, -1).T)
                    count = n_p
                else:  # "steps": at each pump step's start (the start of every ki-th element)
                    ki = pc["ki"]
                    js = range(1 if skip else 0, len(pc["u_cols"]) // ki)
                    for j in js:
                        e = j * ki
                        index.append(np.concatenate([prev_of(pc, e), u_idx[:, pc["u_cols"][e]], t_idx]))
                        num.append([float(e == 0 and pc["start"][0] == "x0"), fr[e], *m0, *m1])
                    L = len(fn["u_dep"])
                    rows.append(pc["rows"][len(pc["rows"]) - len(js) * L:].reshape(len(js), L).T)
                    count = len(js)
                if count:
                    mx_cols.append((ca.repmat(syms["x0"][:, s], 1, count), ca.repmat(syms["const"][:, s], 1, count)))
            if not index:
                continue
            total = len(index)
            index, num = np.array(index).T, np.array(num).T
            x0_in = ca.horzcat(*[a for a, _ in mx_cols])
            c_in = ca.horzcat(*[b for _, b in mx_cols])
            common = [ca.repmat(syms[k], 1, total) for k in ("xs", "us", "time")]
            if what == "model":
                R = element_function(fn["f"], d, nu)(
                    x_start, ca.reshape(own, nx, d) * ca.repmat(xs, 1, d), ca.repmat(uu, 1, d),
                    (t0 + dur * (frac + ca.DM(tau) * dfr)).T, dur * dfr, p, xs)
                fun = ca.Function("collocation", [ca.vertcat(prev, own, u, zt), x0, first, frac, dfr, a0, a1, c,
                                                  *common_sym], [ca.vec(R)])
                inputs = [x0_in, *numeric(num, 3, n_t, total), c_in, *common]
            elif what in ("points", "until"):
                if what == "points":
                    sc = ca.SX.sym("scale", len(fn["rows_lim"]))
                    vals = fn["g_pts"](t0 + dur * frac, x_pt * xs, uu, p) / sc
                    extra_sym, extra_in = [sc], [ca.repmat(row_scales(syms["scale_of"], fn["rows_lim"]), 1, total)]
                else:
                    vals = fn["until"](t0 + dur * frac, x_pt * xs, uu, p) / fn["until_scale"]
                    extra_sym, extra_in = [], []
                fun = ca.Function(what, [ca.vertcat(x_pt, u, zt), frac, a0, a1, c, *common_sym, *extra_sym], [vals])
                inputs = [*numeric(num, 1, n_t, total), c_in, *common, *extra_in]
            else:
                sc = ca.SX.sym("scale", len(fn["u_dep"]))
                vals = fn["g_steps"](t0 + dur * frac, x_start, uu, p) / sc
                fun = ca.Function("steps", [ca.vertcat(prev, u, zt), x0, first, frac, a0, a1, c, *common_sym, sc],
                                  [vals])
                inputs = [x0_in, *numeric(num, 2, n_t, total), c_in, *common,
                          ca.repmat(row_scales(syms["scale_of"], fn["u_dep"]), 1, total)]
            kinds.append(Kind(fun, index, inputs, rows=np.hstack(rows)))
        rest_g = ca.vertcat(*[e for e, _ in rest]) if rest else None
        rest_rows = np.concatenate([r for _, r in rest]) if rest else np.zeros(0, dtype=np.int64)
        self.remainder_rows = rest_rows
        return Assembled(self.nlp["x"], self.nlp["p"], self.n_g, [], kinds, rest_f=obj, rest_g=rest_g,
                         rest_rows=rest_rows)

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
        if "t_scale" in P:
            P.put(v, "t_scale", data.t_scale)
        if "T" in P:
            P.put(v, "T", data.end_time)
        if self.has_smoothing:
            P.put(v, "smoothing", data.smoothing)
        if self.combine == "mean_std":
            P.put(v, "risk", data.risk)
        return v

    def pump_bounds(self, data: NLPData):
        """(lower, upper), each (nu, M) L/h: the data's pump ranges, narrowed step by
        step to each phase's own range."""
        M = sum(self.steps)
        lo = np.broadcast_to(_per_step(data.pump_min), (self.model.nu, M)).copy()
        hi = np.broadcast_to(_per_step(data.pump_max), (self.model.nu, M)).copy()
        if self.phased:
            offsets = np.concatenate([[0], np.cumsum(self.steps)])
            for i, st in enumerate(self.stretches):
                for name, (a, b) in self.phases[st.phase].pumps.items():
                    j = self.model.feed_names.index(name)
                    lo[j, offsets[i]:offsets[i + 1]] = np.maximum(lo[j, offsets[i]:offsets[i + 1]], a)
                    hi[j, offsets[i]:offsets[i + 1]] = np.minimum(hi[j, offsets[i]:offsets[i + 1]], b)
            lo = np.minimum(lo, hi)
        return lo, hi

    def bounds(self, data: NLPData):
        """(lbx, ubx, lbg, ubg) for ``data``."""
        m, W = self.model, self.W
        lbx = np.full(self.n_w, -np.inf)
        ubx = np.full(self.n_w, np.inf)
        us = _pump_scale(data)
        lo_u, hi_u = self.pump_bounds(data)
        W.put(lbx, "u", lo_u / us[:, None])
        W.put(ubx, "u", hi_u / us[:, None])
        if "T" in W:
            W.put(lbx, "T", data.end_bounds[0] / data.t_scale)
            W.put(ubx, "T", data.end_bounds[1] / data.t_scale)
        if "D" in W:
            W.put(lbx, "D", 0.0)
            W.put(ubx, "D", data.end_bounds[1] / data.t_scale)
            # a stretch between two fixed times has a fixed length: a fixed variable,
            # not a free one held by equality rows (IPOPT then leaves it out)
            idx = W.indices("D").ravel()
            for i, length in self.fixed_durations(data).items():
                lbx[idx[i]] = ubx[idx[i]] = max(length, 0.0) / data.t_scale
        if self.chosen:
            W.put(lbx, "amounts", [lo / max(hi, 1e-12) for _, _, lo, hi in self.chosen])
            W.put(ubx, "amounts", [hi / max(hi, 1e-12) for _, _, lo, hi in self.chosen])
        nspecies = len(m.problem.species)
        xl0 = np.full(m.nx, -np.inf)
        xu0 = np.full(m.nx, np.inf)
        xl0[:nspecies] = 0.0  # species are kept non-negative
        xl0[m.index("V")] = 1e-9
        for blk, lims in self.block_bounds:
            xl, xu = xl0.copy(), xu0.copy()
            for lim in lims:
                lo, hi = data.lower[lim.name], data.upper[lim.name]
                if lo is not None:
                    xl[lim.state] = max(xl[lim.state], lo)
                if hi is not None:
                    xu[lim.state] = min(xu[lim.state], hi)
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
            elif grp.kind == "timing":
                lo, hi = grp.lower, grp.upper
                if np.isnan(lo):  # the end of the run, within what this time line allows
                    lo, hi = max(data.end_bounds[0], self.end_window[0]), min(data.end_bounds[1], self.end_window[1])
                if grp.in_time:
                    lo, hi = lo / data.t_scale, hi / data.t_scale
                lbg[grp.rows], ubg[grp.rows] = lo, hi
        return lbx, ubx, lbg, ubg

    def arguments(self, data: NLPData) -> dict:
        """Keyword arguments of a solver call (everything but x0 and multipliers)."""
        lbx, ubx, lbg, ubg = self.bounds(data)
        return {"p": self.parameters(data), "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}

    # ------------------------------------------------------------------ maps
    def cut_times(self, T: float, switches: dict | None = None) -> np.ndarray:
        """End time (h) of every stretch for a run of length T whose phases end at
        ``switches`` (phase name -> h; default: a fixed end's time, a window's guess)."""
        switches = switches or {}
        out = []
        for st in self.stretches:
            t = self.fixed_cut(st, T)
            if t is None:  # a phase end the NLP chooses
                ph = self.phases[st.end[1]]
                t = float(switches.get(ph.name, ph.end.guess if ph.end.guess is not None else T / 2))
            out.append(t)
        return np.minimum(np.maximum.accumulate(np.asarray(out, dtype=float)), T)

    def step_times(self, cuts) -> np.ndarray:
        """(M + 1,) pump-step boundaries (h) for stretch end times ``cuts``."""
        starts = np.concatenate([[0.0], cuts[:-1]])
        edges = [a + (b - a) * np.arange(Mi) / Mi for a, b, Mi in zip(starts, cuts, self.steps)]
        return np.concatenate(edges + [[cuts[-1]]])

    def pack(self, data: NLPData, steps_u, T, times, states, switches: dict | None = None,
             t_steps=None) -> np.ndarray:
        """Scaled NLP vector from a physical guess: pump rates per step (M, nu), end
        time T (h), and per scenario the states sampled at ``times`` (a list of
        (n, nx) arrays, or one array used for every scenario). For a run with phases
        or additions, ``steps_u`` may be on any grid over [0, T] (uniform, or with
        boundaries ``t_steps``; it is resampled onto the stretches' steps) and
        ``switches`` gives the phases' end times (phase name -> h)."""
        W, m = self.W, self.model
        w = W.zeros()
        us = _pump_scale(data)
        steps_u = np.asarray(steps_u, dtype=float)
        if self.phased:
            cuts = self.cut_times(T, switches)
            edges = self.step_times(cuts)
            mid = 0.5 * (edges[:-1] + edges[1:])
            Mg = steps_u.shape[0]
            if t_steps is None:
                k = (mid / T * Mg).astype(int)
            else:
                k = np.searchsorted(np.asarray(t_steps, dtype=float), mid, side="right") - 1
            steps_u = steps_u[np.clip(k, 0, Mg - 1)]
            W.put(w, "D", np.diff(np.concatenate([[0.0], cuts])) / data.t_scale)
            starts = np.concatenate([[0.0], cuts[:-1]])
            durations = np.diff(np.concatenate([[0.0], cuts]))
        else:
            starts, durations = [0.0], [T]
        W.put(w, "u", (steps_u / us[None, :]).T)
        if "T" in W:
            W.put(w, "T", T / data.t_scale)
        if self.chosen:  # the low end of each range (the guesses were simulated with it, phases.decide)
            W.put(w, "amounts", [lo / max(hi, 1e-12) for _, _, lo, hi in self.chosen])
        if not isinstance(states, list):
            states = [states] * self.S
            times = [times] * self.S
        elif not isinstance(times, list):
            times = [times] * self.S
        for s, row in enumerate(self.stretch_blocks):
            for blk, t0, Di in zip(row, starts, durations):
                tp = blk.point_times(Di, t0)
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
        u = np.clip(u, *self.pump_bounds(data))
        if self.phased:
            D = np.maximum(W.get(w, "D").ravel() * data.t_scale, 0.0)
            cuts = np.cumsum(D)
            lo, hi = data.end_bounds
            T = float(np.clip(cuts[-1], max(lo, self.end_window[0]), min(hi, self.end_window[1])))
            for i, st in enumerate(self.stretches):  # IPOPT meets timing rows to ~1e-7 h: put each cut in place
                fixed = self.fixed_cut(st)
                if fixed is not None:
                    cuts[i] = fixed
                elif st.end[0] == "phase" and self.phases[st.end[1]].end.kind == "between":
                    e = self.phases[st.end[1]].end
                    cuts[i] = np.clip(cuts[i], e.lower, e.upper)
            cuts = np.minimum(np.maximum.accumulate(cuts), T)
            cuts[-1] = T
        elif self.free_time:
            T = float(np.clip(W.get(w, "T")[0, 0] * data.t_scale, *data.end_bounds))
            cuts = np.array([T])
        else:
            T = float(data.end_time)
            cuts = np.array([T])
        starts = np.concatenate([[0.0], cuts[:-1]])
        offsets = np.concatenate([[0], np.cumsum(self.steps)])
        t_pts, x_pts, u_pts = [np.array([0.0])], [data.x0[:, scenario][None, :]], [u[:, 0][None, :]]
        for i, blk in enumerate(self.stretch_blocks[scenario]):
            X = W.get(w, blk.var) * data.x_scale[:, None]
            Ni = blk.N
            ui = u[:, offsets[i]:offsets[i + 1]]
            step_of = np.repeat(np.arange(Ni) // (Ni // ui.shape[1]), g_.degree)
            t_pts.append(blk.point_times(cuts[i] - starts[i], starts[i]))
            x_pts.append(X.T)
            u_pts.append(ui[:, step_of].T)
        switches = {self.phases[st.end[1]].name: float(cuts[i]) for i, st in enumerate(self.stretches)
                    if st.end[0] == "phase"}
        amounts = {}
        if self.chosen:
            values = W.get(w, "amounts").ravel()
            for v, (j, sp, lo, hi) in zip(values, self.chosen):
                amounts.setdefault(j, {})[sp] = float(np.clip(v * max(hi, 1e-12), lo, hi))
        return Unpacked(
            t_points=np.concatenate(t_pts),
            x_points=np.vstack(x_pts),
            u_points=np.vstack(u_pts),
            t_steps=self.step_times(cuts) if self.phased else np.linspace(0.0, T, g_.pump_steps + 1),
            u_steps=u.T.copy(),
            x_end=x_pts[-1][-1].copy(),
            T=T,
            switches=switches,
            amounts=amounts,
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
                or self.S != finer.S or self.free_time != finer.free_time or self.combine != finer.combine \
                or [b.N for b in self.blocks] != [b.N for b in finer.blocks]:
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
        # the same row groups in the same order: a group that kept its rows, or a
        # limit's rows at pump-step starts (the old steps start at every r-th new one)
        for g0_, g1_ in zip(self.groups, finer.groups):
            if (g0_.kind, g0_.name, g0_.scenario) != (g1_.kind, g1_.name, g1_.scenario):
                return None
            if len(g1_.rows) == len(g0_.rows):
                lg1[g1_.rows] = lam_g[g0_.rows]
            elif len(g1_.rows) == r * len(g0_.rows):
                lg1[g1_.rows[::r]] = lam_g[g0_.rows]
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
            elif grp.kind == "timing":
                out["phase timing"] = max(out.get("phase timing", 0.0), float(excess[grp.rows].max(initial=0.0)))
        w = np.asarray(w, dtype=float).ravel()
        for blk, lims in self.block_bounds:
            for lim in lims:
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
        for blk, lims in self.block_bounds:
            # a species' non-negativity is not the limit: count a multiplier only where
            # the limit's own bound is the one in force
            for lim in lims:
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
        # a pump's own range: only the steps where its own bound is the one in force
        # (not where a phase narrows it, e.g. turns it off in a batch)
        M = idx_u.shape[1]
        own_lo = np.broadcast_to(_per_step(data.pump_min), (self.model.nu, M))
        own_hi = np.broadcast_to(_per_step(data.pump_max), (self.model.nu, M))
        lo_u, hi_u = self.pump_bounds(data)
        for j, fd in enumerate(self.model.problem.feeds):
            lam = lam_x[idx_u[j]]
            lam = np.where(lam < 0, np.where(lo_u[j] == own_lo[j], lam, 0.0), np.where(hi_u[j] == own_hi[j], lam, 0.0))
            add(f"pump {fd.name}", lam, us[j])
        if "T" in self.W:
            add("end time", lam_x[self.W.indices("T").ravel()], data.t_scale)
        elif self.phased and self.free_time:
            rows = next(g.rows for g in self.groups if g.kind == "timing" and g.name == "end of the run")
            lam = lam_g[rows]
            if len(self.stretches) > 1 and self.stretches[-2].end[0] == "addition":
                # the last stretch's length >= 0 is the end's lower bound at that addition's time
                last = lam_x[self.W.indices("D").ravel()[-1]]
                lam = np.append(lam, min(last, 0.0))
            add("end time", lam, data.t_scale)
        return {n: (_gain(self.sense, a), _gain(self.sense, b)) for n, (a, b) in sums.items()}


def numeric(num: np.ndarray, scalars: int, n_t: int, count: int) -> list:
    """Numeric inputs of ``count`` pieces from ``num`` (rows: ``scalars`` scalar
    inputs, then the two time masks of ``n_t`` rows each): one matrix per input."""
    out = [ca.DM(num[k][None, :]) for k in range(scalars)]
    for k in range(2):
        out.append(ca.DM(num[scalars + k * n_t: scalars + (k + 1) * n_t, :]) if n_t else ca.DM(0, count))
    return out


def row_scales(scale_of: dict, lims) -> ca.MX:
    """The row scales (NLP parameters, by limit name in ``scale_of``) of limits
    ``lims``, as a column."""
    return ca.vertcat(*[scale_of[l.name] for l in lims])


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
                  smoothing: bool = False, stretches: tuple | None = None) -> str:
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
        # phases and additions: their numbers are baked into the graph, so all of them
        "phases": [repr(ph) for ph in p.phases],
        "additions": [repr(a) for a in p.additions],
        "stretches": [repr(st) for st in (stretches or ())],
        "free_time": free_time, "scenarios": scenarios, "combine": combine, "smoothing": bool(smoothing),
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:24]
