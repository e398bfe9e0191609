"""The calibration NLP: every past run transcribed by the same collocation blocks,
all sharing the parameters being estimated.

A run is cut at every sampling time and every pump change into stretches; each
stretch is one :class:`optfeed.collocation.Block` whose initial state is the end state
of the stretch before it (less the sample volume taken out, where there is one), so
the measured values sit exactly at block ends. The applied schedule's pump rates are
numbers at the collocation points. The model's constants are the run's own, except
the estimated ones: each run has its own copy of them as decision variables, held
equal to the shared ones by equality rows.

Objective: half the sum over runs, samples and measured quantities of the squared
weighted residual (model - measured) / sigma: weighted least squares, the maximum
likelihood estimate under independent normal errors with the stated sigma.

It offers the interface :func:`optfeed.solve.solve` uses (``nlp``, ``n_w``, ``n_g``,
``P``, ``arguments``, ``objective_value``), so it is solved, watched and cached the
same way as the optimizer's NLP, but with exact derivatives assembled from its
pieces' own (:mod:`optfeed.derivatives`), not from the whole NLP expanded. The measured
values, their weights, the runs'
initial states and constants are parameters of the NLP, not numbers in its graph:
fits of the same design (sampling times, schedules, what was measured) share one
graph and one built solver (:func:`get_fit_nlp`), as optimize's cases do.
"""

from __future__ import annotations

import hashlib
import json
from collections import OrderedDict
from dataclasses import dataclass
from functools import cached_property

import casadi as ca
import numpy as np

from ..collocation import Block, Layout, element_function
from ..model import Model, build_model
from ..derivatives import Assembled, Kind


@dataclass
class FitData:
    """The numbers of one solve (internal units): bounds of the estimated parameters
    and their scale, the states' scale, and per run its constants, its initial state,
    and the measured values with their weights 1/sigma, in the NLP's order; the
    scale and initial states are the NLP's states' (without V where V is data: its
    initial value, L, is then ``volume0``)."""

    lower: np.ndarray
    upper: np.ndarray
    scale: np.ndarray
    x_scale: np.ndarray  # (nx,)
    constants: list = None  # per run: (n_constants,)
    x0: list = None  # per run: (nx,)
    y: np.ndarray = None  # (n_res,)
    weight: np.ndarray = None  # (n_res,)
    volume0: list = None  # per run: initial volume (L), where the NLP takes V as data


def stretches(run, feed_names, max_element: float):
    """Cut a run into stretches at its sampling times and pump changes: a list of
    (start, end, elements, schedule segment, ends at a sample index or None)."""
    segs = run.schedule.segments(feed_names, run.end_time)
    cuts = {0.0, float(run.end_time)} | {float(t) for t in run.times} | {s.start for s in segs}
    cuts = sorted(c for c in cuts if 0.0 <= c <= run.end_time)
    sample_at = {float(t): k for k, t in enumerate(run.times)}
    out = []
    for a, b in zip(cuts[:-1], cuts[1:]):
        seg = next(s for s in segs if s.start <= a + 1e-12 and b <= s.end + 1e-12)
        n = max(1, int(np.ceil((b - a) / max_element - 1e-9)))
        out.append((a, b, n, seg, sample_at.get(b)))
    return out


def pumped_volume(seg, t) -> np.ndarray:
    """Volume (L) every pump of schedule segment ``seg`` delivers from the segment's
    start to each time ``t`` (h, array), summed over the pumps: the integral of
    (a + b tau) exp(k tau) over [0, t - start], in closed form (tau in h, a in L/h,
    b in L/h^2, k in 1/h). Near k tau = 0 the closed form's terms cancel, so there
    the power series of the same integrals is used (14 terms: below 1e-17 relative
    for |k tau| < 0.05)."""
    tau = np.asarray(t, dtype=float)[:, None] - seg.start
    a, b, k = (np.asarray(v, dtype=float)[None, :] for v in (seg.a, seg.b, seg.k))
    # i0 = int_0^1 e^{z s} ds, i1 = int_0^1 s e^{z s} ds, z = k tau
    z = k * tau
    i0 = np.ones_like(z)
    i1 = np.full_like(z, 0.5)
    large = np.abs(z) >= 0.05
    if large.any():
        zl = z[large]
        with np.errstate(over="ignore", invalid="ignore"):
            em1 = np.expm1(zl)
            i0[large] = em1 / zl
            i1[large] = (em1 * (zl - 1.0) + zl) / zl ** 2
    small = ~large & (z != 0.0)
    if small.any():
        zs = z[small]
        s0, s1 = np.zeros_like(zs), np.zeros_like(zs)
        for n in range(13, -1, -1):  # Horner: sum z^n / (n! (n + 1)) and z^n / (n! (n + 2))
            fact = float(np.prod(np.arange(1.0, n + 1.0)))
            s0 = s0 * zs + 1.0 / (fact * (n + 1))
            s1 = s1 * zs + 1.0 / (fact * (n + 2))
        i0[small], i1[small] = s0, s1
    # a term whose coefficient is zero adds nothing, even where its integral overflows
    with np.errstate(invalid="ignore"):
        terms = np.where(a != 0, a * tau * i0, 0.0) + np.where(b != 0, b * tau ** 2 * i1, 0.0)
    return np.sum(terms, axis=1)


def volume_free(model: Model, runs) -> bool:
    """Whether the calibration NLP takes the broth volume V as data rather than as a
    state: V's rate is the sum of the pump rates (a schedule's numbers, see
    :func:`optfeed.model.build_model`) and its jumps the sample volumes, so its
    course is known before the fit, unless a run measured V (then the NLP keeps it
    as a state, and the residuals compare it with the data)."""
    if "V" not in model.state_names:
        return False
    m = model
    rate = m.rhs[m.index("V")]
    if ca.depends_on(rate, ca.vertcat(m.t, m.x, m.p)):
        return False
    jac = ca.jacobian(rate, m.u)
    if not jac.is_constant() or not np.allclose(np.array(ca.DM(jac)), 1.0, rtol=0, atol=0):
        return False
    if float(ca.Function("r0", [m.u], [rate])(np.zeros(m.nu))) != 0.0:
        return False
    return not any(q == "V" and np.isfinite(y).any() for run in runs for q, y in run.values.items())


def volume_as_input(model: Model):
    """The model with V moved from its states to its inputs: (f, values, names),
    f(t, x, [u; V], p) the right-hand side without V's row, values the named
    quantities of :attr:`Model.values` as Functions of (t, x, [u; V], p), names the
    states left (internal units, t in h, u in L/h, V in L)."""
    m, iv = model, model.index("V")
    names = [n for n in m.state_names if n != "V"]
    x = ca.SX.sym("x", len(names))
    V = ca.SX.sym("V")
    x_full = ca.vertcat(x[:iv], V, x[iv:])
    inputs = ca.vertcat(m.u, V)
    rows = [i for i in range(m.nx) if i != iv]
    rhs = ca.substitute(m.rhs, m.x, x_full)[rows]
    f = ca.Function("f", [m.t, x, inputs, m.p], [rhs], ["t", "x", "u", "p"], ["o0"])
    values = {n: ca.Function(f"v_{n}", [m.t, x, inputs, m.p], [ca.substitute(e, m.x, x_full)],
                             ["t", "x", "u", "p"], ["o0"]) for n, e in m.values.items()}
    return f, values, names


def measurements(runs):
    """Every measured value in the NLP's order: (run index, sample index, quantity)."""
    return [(r, k, q) for r, run in enumerate(runs) for k in range(len(run.times))
            for q, y in run.values.items() if np.isfinite(y[k])]


def structure_key(problem, runs, estimated, elements_per_run: int, degree: int) -> str:
    """Identity of the calibration NLP's graph: fits with equal keys share one FitNLP
    (and its built solver). It holds what shapes the equations - the model's
    expressions, which constants are estimated, each run's sampling times, which
    values were measured, its schedule, sample volume and length, the grid - and
    none of the numbers a solve passes as data (measured values, weights, initial
    states, constants)."""
    p = problem
    parts = {
        "species": [(s.name, s.raw, s.dilute, s.rate.text) for s in p.species],
        "constants": list(p.parameters), "rates": [(n, e.text) for n, e in p.rates],
        "feeds": [(f.name, sorted(f.composition)) for f in p.feeds],
        "oxygen": None if p.vessel.oxygen is None else p.vessel.oxygen.uptake.text,
        "heat": p.vessel.heat is not None,
        "estimated": list(estimated), "grid": [elements_per_run, degree],
        "runs": [{"times": [repr(float(t)) for t in run.times], "end": repr(float(run.end_time)),
                  "measured": [[q, np.isfinite(y).tolist()] for q, y in run.values.items()],
                  "sample_volume": repr(float(run.sample_volume)),
                  "schedule": [[repr(v) for v in (sg.start, sg.end, *sg.a, *sg.b, *sg.k)]
                               for sg in run.schedule.segments([f.name for f in p.feeds], run.end_time)]}
                 for run in runs],
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:24]


_CACHE: OrderedDict = OrderedDict()
CACHE_SIZE = 4


def get_fit_nlp(model: Model, runs, estimated, elements_per_run: int, degree: int = 3) -> "FitNLP":
    """The FitNLP of this structure (built on first use in this process, then reused:
    fits of the same design with other data share one graph and one built solver)."""
    key = structure_key(model.problem, runs, estimated, elements_per_run, degree)
    if key in _CACHE:
        _CACHE.move_to_end(key)
        return _CACHE[key]
    nlp = FitNLP(model, runs, estimated, elements_per_run, degree)
    nlp.key = key
    _CACHE[key] = nlp
    while len(_CACHE) > CACHE_SIZE:
        _CACHE.popitem(last=False)
    return nlp


def clear_cache() -> None:
    """Forget the built calibration NLPs (a benchmark times building them too)."""
    _CACHE.clear()


class FitNLP:
    """Weighted least squares over every run, one NLP.

    Parameters
    ----------
    model : Model
        The fit's model (:func:`optfeed.fit.runs.fit_model`; its state layout is the
        runs' initial states'). The NLP itself leaves out its cumulative-feed
        states (``fed_<s>``): no data column can name one and no other state
        depends on them (8 runs: a fifth fewer variables and rows, IPOPT's
        iterations about as much cheaper); the fit's model has no objective
        integral (``J_int``) to leave out. Unless a
        run measured it, the broth volume V is no variable either: its rate is the
        sum of the pump rates and its jumps the sample volumes, all given, so its
        value at every collocation point and sample is computed beforehand (the
        run's initial volume, a parameter of the NLP, plus the volume pumped in
        less the samples taken) and enters the collocation equations as an input
        next to the pump rates (:func:`volume_as_input`).
    runs : sequence of optfeed.fit.runs.Run
        The runs whose structure (sampling times, measured values, schedules) the
        NLP takes; their numbers come with each solve's :class:`FitData`.
    estimated : list of str
        Names of the constants (parameters) being estimated.
    elements_per_run : int
        Finite elements across a run (at least one per stretch).
    degree : int
    """

    def __init__(self, model: Model, runs, estimated, elements_per_run: int = 100, degree: int = 3):
        self.full = model
        self.model = m = build_model(model.problem, fed=[], integral=False)
        self.volume_data = volume_free(m, runs)
        if self.volume_data:
            f, values, names = volume_as_input(m)
        else:
            f = m.function_p("f", [m.rhs])
            values = {n: m.function_p(f"v_{n}", [e]) for n, e in m.values.items()}
            names = list(m.state_names)
        self.state_names = names  # the NLP's states
        nx, nu = len(names), f.size1_in(2)  # nu: the pump rates, then V if it is data
        self.states = np.array([model.index(n) for n in names])  # their places in the fit model's layout
        self.estimated = list(estimated)
        self.n_runs = len(runs)
        # for MUMPS' settings (solve.ipopt_options) the runs are not copies sharing
        # decision columns, as optimize's scenarios share the pump profile: each run
        # has its own copy of the parameters, tied by three rows, and the KKT matrix
        # is a chain of nearly separate blocks, which the one-block ordering (AMF)
        # factors faster than nested dissection with scaling: 8 runs, 4 seeds, the
        # same IPOPT iterations, 15 % less CPU per solve (2 runs: 13 %)
        self.copies = 1
        self.degree = degree
        W, P = Layout("w"), Layout("p")
        self.W, self.P = W, P
        theta_s = W.add("theta", len(self.estimated))
        theta_index = W.indices("theta").ravel()
        theta_scale = P.add("theta_scale", len(self.estimated))
        xs = P.add("x_scale", nx)
        idx = [m.constant_index(n) for n in self.estimated]
        select = np.zeros((m.n_constants, len(idx)))
        for j, i in enumerate(idx):
            select[i, j] = 1.0
        keep = np.ones(m.n_constants)
        keep[idx] = 0.0
        v_index = names.index("V") if "V" in names else None
        self.blocks = []
        self._links, self._run_p = [], []  # for the definition (see `nlp`)
        # what the exact derivatives need (see _assemble): per element and per measured value
        elements = {"index": [], "first": [], "jump": [], "U": [], "t": [], "h": [], "run": []}
        # each measured value: (quantity, the variables its piece sees (the state at
        # the sample, the run's parameters), time, pump rates there, run, the block
        # ending at the sample)
        points, copies = [], []
        self._run_x0, self._run_constants, self._run_volume = [], [], []
        for r, run in enumerate(runs):
            const = P.add(f"r{r}.constants", m.n_constants)
            x0 = P.add(f"r{r}.x0", nx)
            self._run_x0.append(x0)
            self._run_constants.append(const)
            if self.volume_data:
                # V = the run's initial volume + `pumped` (L): pumped in less the samples taken
                volume0 = P.add(f"r{r}.V0")
                self._run_volume.append(volume0)
                pumped = 0.0
            # the run's own copy of the estimated parameters, equal to the shared ones
            # by equality rows: the runs' blocks then meet only through these rows,
            # not through three dense columns of the Jacobian and the Hessian
            # (IPOPT's step, 8 runs: about 15 % less CPU per iteration)
            copy = W.add(f"r{r}.theta", len(self.estimated))
            self._links.append(copy - theta_s)
            copies.append(W.indices(f"r{r}.theta").ravel())
            p_run = const * ca.DM(keep) + ca.mtimes(ca.DM(select), copy * theta_scale)
            self._run_p.append(p_run)
            run_theta = copies[-1]
            prev_end, jump = None, np.zeros(nx)
            blocks = []
            for k, (a, b, n, seg, sample) in enumerate(stretches(run, m.feed_names, run.end_time / elements_per_run)):
                fr = np.linspace(0.0, 1.0, n + 1)
                tau = np.append(0.0, ca.collocation_points(degree, "radau"))
                times = (a + (b - a) * (fr[:-1, None] + np.diff(fr)[:, None] * tau[None, 1:])).ravel()
                u = seg.rates(times).T
                if self.volume_data:
                    v = pumped_volume(seg, np.concatenate([[a], times, [b]]))
                    u = np.vstack([u, pumped - v[0] + v[1:-1]])  # V less the initial volume
                    pumped += v[-1] - v[0]
                blk = Block(f"r{r}.s{k}", f, fr, degree, W)
                # what the definition (`nlp`) writes its equations from: the pump
                # rates (and V less the initial volume) at its points, and the state
                # jump (a sample's volume) between the block before it and this one
                blk.span, blk.u, blk.jump = (a, b), u, jump
                blocks.append(blk)
                cols = W.indices(blk.var)  # (nx, n * degree)
                h = (b - a) * np.diff(fr)
                t_points = (a + (b - a) * fr[:-1])[:, None] + tau[None, 1:] * h[:, None]
                for e in range(n):
                    own = cols[:, e * degree:(e + 1) * degree]
                    before = prev_end if e == 0 else cols[:, e * degree - 1]
                    elements["index"].append(np.concatenate([
                        np.full(nx, -1) if before is None else before, own.ravel(order="F"), run_theta]))
                    elements["first"].append(float(before is None))
                    elements["jump"].append(jump if e == 0 else np.zeros(nx))
                    elements["U"].append(u[:, e * degree:(e + 1) * degree].ravel(order="F"))
                    elements["t"].append(t_points[e])
                    elements["h"].append(h[e])
                    elements["run"].append(r)
                prev_end, jump = cols[:, -1], np.zeros(nx)
                if sample is not None:
                    u_end = seg.rates(np.array([b]))[0]
                    if self.volume_data:  # the sample is measured before its volume is taken
                        u_end = np.append(u_end, pumped)
                    for q, y in run.values.items():
                        if np.isfinite(y[sample]):
                            points.append((q, np.concatenate([prev_end, run_theta]), b, u_end, r, blk))
                if sample is not None and run.sample_volume:
                    if self.volume_data:
                        pumped -= run.sample_volume
                    else:
                        jump = np.zeros(nx)
                        jump[v_index] = run.sample_volume
            self.blocks.append(blocks)
        self.measured = measurements(runs)
        assert len(self.measured) == len(points)
        self.n_res = len(points)
        self._points = points
        self._y, self._weight = P.add("y", self.n_res), P.add("weight", self.n_res)
        self._copies = copies
        self._values, self._xs = values, xs
        self.n_w = W.size
        self.n_g = (sum(nx * blk.N * degree for blocks in self.blocks for blk in blocks)
                    + len(copies) * len(self.estimated))
        self._w, self._p = W.symbol(), P.symbol()
        # what optfeed.solve hands to IPOPT: the NLP with exact derivatives assembled
        # from the pieces' own (see optfeed.derivatives)
        assembled = self._assemble(f, values, elements, points, keep, select, theta_scale, xs, self._y, self._weight,
                                   theta_index)
        self._sx = {"x": self._w, "p": self._p, "f": assembled.f, "g": assembled.g}
        self._f_fun = ca.Function("f", [self._w, self._p], [assembled.f])
        self._solvers, self._derivatives = {}, assembled.functions

    @property
    def nlp(self) -> dict:
        """The NLP as the blocks write it (x, p, f, g, as nlpsol takes it): the
        definition, which CasADi differentiates in the tests as the reference for
        the assembled derivatives. Written on first use; a fit never needs it (on
        benchmarks/fit_benchmark.py's design it costs 3 ms at 1 run and 30 ms at 8,
        against 12 and 50 ms for the rest of the build)."""
        return self._definition[0]

    @cached_property
    def _definition(self) -> tuple:
        """(the NLP as the blocks write it, its weighted residuals)."""
        for r, blocks in enumerate(self.blocks):
            x_start = self._run_x0[r]
            for blk in blocks:
                if blk.jump.any():
                    x_start = x_start - ca.DM(blk.jump)
                u_pts = ca.DM(blk.u)
                if self.volume_data:
                    u_pts = ca.vertcat(u_pts[:-1, :], self._run_volume[r] + u_pts[-1, :])
                a, b = blk.span
                blk.write(x_start, self._run_p[r], b - a, a, u_pts, self._xs)
                x_start = blk.x_end
        names = self.state_names
        model_values = []
        for q, _, b, u_end, r, blk in self._points:
            if q in names:
                model_values.append(blk.x_end[names.index(q)])
            else:
                u_sym = ca.vertcat(ca.DM(u_end[:-1]), self._run_volume[r] + u_end[-1]) if self.volume_data \
                    else ca.DM(u_end)
                model_values.append(self._values[q](b, blk.x_end, u_sym, self._run_p[r]))
        res = (ca.vertcat(*model_values) - self._y) * self._weight
        g = ca.vertcat(*[blk.residuals for blocks in self.blocks for blk in blocks], *self._links)
        assert g.shape[0] == self.n_g
        return {"x": self._w, "p": self._p, "f": 0.5 * ca.sumsqr(res), "g": g}, res

    def _assemble(self, f, values, elements, points, keep, select, theta_scale, xs, y, weight, theta_index) -> Assembled:
        """The NLP as a sum of pieces (each element's collocation equations, each
        measured value's squared weighted residual), for optfeed.derivatives."""
        m, d, n_theta = self.model, self.degree, len(self.estimated)
        nx, nu, nc = len(self.state_names), f.size1_in(2), m.n_constants
        runs_x0, runs_c = self._run_x0, self._run_constants
        element = element_function(f, d, nu)

        def inputs(U, run_of):
            """The pumps' (and V's) inputs of pieces: the numbers U (rows x count),
            with each run's initial volume added where V is (every nu-th row)."""
            if not self.volume_data:
                return ca.DM(U)
            at_v = ca.DM((np.arange(U.shape[0]) % nu == nu - 1).astype(float))
            return ca.DM(U) + ca.mtimes(at_v, ca.horzcat(*[self._run_volume[r] for r in run_of]))

        def constants(c, th, ts):
            return c * ca.DM(keep) + ca.mtimes(ca.DM(select), th * ts)

        z = ca.SX.sym("z", nx + nx * d + n_theta)
        x0r, first, jump = ca.SX.sym("x0", nx), ca.SX.sym("first"), ca.SX.sym("jump", nx)
        U, t, h = ca.SX.sym("U", nu * d), ca.SX.sym("t", d), ca.SX.sym("h")
        c, xs_e, ts = ca.SX.sym("c", nc), ca.SX.sym("xs", nx), ca.SX.sym("ts", n_theta)
        before, own, th = z[:nx], ca.reshape(z[nx:nx + nx * d], nx, d), z[nx + nx * d:]
        x_start = first * x0r + (1 - first) * (before * xs_e - jump)
        R = element(x_start, own * ca.repmat(xs_e, 1, d), ca.reshape(U, nu, d), t.T, h, constants(c, th, ts), xs_e)
        piece = ca.Function("collocation", [z, x0r, first, jump, U, t, h, c, xs_e, ts], [ca.vec(R)])
        E = len(elements["run"])
        run_of = elements["run"]
        kinds = [Kind(piece, np.array(elements["index"]).T, [
            ca.horzcat(*[runs_x0[r] for r in run_of]), ca.DM(elements["first"]).T, ca.DM(np.array(elements["jump"]).T),
            inputs(np.array(elements["U"]).T, run_of), ca.DM(np.array(elements["t"]).T), ca.DM(elements["h"]).T,
            ca.horzcat(*[runs_c[r] for r in run_of]), ca.repmat(xs, 1, E), ca.repmat(theta_scale, 1, E)],
            rows=np.arange(E * nx * d).reshape(E, nx * d).T)]
        terms = []
        # a measured state: the term sees that state's variable alone, so every
        # measured state of every run is one kind of piece
        which = [k for k, p in enumerate(points) if p[0] in self.state_names]
        if which:
            zq, sq, yq, wq = ca.SX.sym("z"), ca.SX.sym("xs"), ca.SX.sym("y"), ca.SX.sym("w")
            term = ca.Function("state_term", [zq, sq, yq, wq], [0.5 * ((zq * sq - yq) * wq) ** 2])
            state = [self.state_names.index(points[k][0]) for k in which]
            terms.append(Kind(term, np.array([[points[k][1][i] for k, i in zip(which, state)]]),
                              [xs[state].T, y[which].T, weight[which].T]))
        # any other measured quantity: a function of the state, the pumps and the constants
        for q in dict.fromkeys(p[0] for p in points if p[0] not in self.state_names):
            which = [k for k, p in enumerate(points) if p[0] == q]
            zq = ca.SX.sym("z", nx + n_theta)
            tq, uq, yq, wq = ca.SX.sym("t"), ca.SX.sym("u", nu), ca.SX.sym("y"), ca.SX.sym("w")
            x_end, th = zq[:nx] * xs_e, zq[nx:]
            model_value = values[q](tq, x_end, uq, constants(c, th, ts))
            term = ca.Function("term", [zq, tq, uq, c, xs_e, ts, yq, wq], [0.5 * ((model_value - yq) * wq) ** 2])
            n = len(which)
            terms.append(Kind(term, np.array([points[k][1] for k in which]).T, [
                ca.DM([points[k][2] for k in which]).T,
                inputs(np.array([points[k][3] for k in which]).reshape(n, nu).T, [points[k][4] for k in which]),
                ca.horzcat(*[runs_c[points[k][4]] for k in which]), ca.repmat(xs, 1, n), ca.repmat(theta_scale, 1, n),
                y[which].T, weight[which].T]))
        if self._copies:  # copy - shared = 0
            zc = ca.SX.sym("z", 2 * n_theta)
            link = ca.Function("link", [zc], [zc[:n_theta] - zc[n_theta:]])
            n_c = len(self._copies)
            start = E * nx * d
            kinds.append(Kind(link, np.array([np.concatenate([c, theta_index]) for c in self._copies]).T, [],
                              rows=start + np.arange(n_c * n_theta).reshape(n_c, n_theta).T))
        return Assembled(self._w, self._p, self.n_g, terms, kinds)

    def derivatives(self, few_iterations: bool = False) -> dict:
        """IPOPT's derivative Functions (grad_f, jac_g, hess_lag) for nlpsol, as
        assembled (expanding them to scalar graphs made the 8-run fits slower)."""
        return self._derivatives

    def data(self, runs, sigma, lower, upper, scale, x_scale) -> FitData:
        """The numbers of a solve for ``runs`` (of this NLP's structure);
        ``sigma(quantity, measured values)`` gives the standard deviations;
        ``x_scale`` in the fit model's state layout."""
        y = np.array([runs[r].values[q][k] for r, k, q in self.measured])
        s = np.array([float(sigma(q, [runs[r].values[q][k]])[0]) for r, k, q in self.measured])
        iv = self.full.index("V")
        return FitData(np.asarray(lower, float), np.asarray(upper, float), np.asarray(scale, float),
                       np.asarray(x_scale, float)[self.states], [np.asarray(r.constants, float) for r in runs],
                       [np.asarray(r.x0, float)[self.states] for r in runs], y, 1.0 / s,
                       [float(r.x0[iv]) for r in runs])

    # -- the interface optfeed.solve.solve uses
    def parameters(self, data: FitData) -> np.ndarray:
        P = self.P
        v = P.zeros()
        P.put(v, "theta_scale", data.scale)
        P.put(v, "x_scale", data.x_scale)
        for r in range(self.n_runs):
            P.put(v, f"r{r}.constants", data.constants[r])
            P.put(v, f"r{r}.x0", data.x0[r])
            if self.volume_data:
                P.put(v, f"r{r}.V0", data.volume0[r])
        P.put(v, "y", data.y)
        P.put(v, "weight", data.weight)
        return v

    def bounds(self, data: FitData):
        lbx = np.full(self.n_w, -np.inf)
        ubx = np.full(self.n_w, np.inf)
        self.W.put(lbx, "theta", data.lower / data.scale)
        self.W.put(ubx, "theta", data.upper / data.scale)
        for c in self._copies:
            lbx[c], ubx[c] = data.lower / data.scale, data.upper / data.scale
        # species are kept non-negative, as the optimizer keeps them: without it a
        # collocation polynomial that dips below zero where a substrate runs out
        # reaches a pole such as S / (S + 0.01) from the other side and the NLP
        # fits the data with a trajectory no simulation follows (measured on a
        # Monod-Pirt model: chi-square a million times the true one). A model
        # that itself drives a species below zero is named in the fit's warnings.
        xl = np.full(len(self.state_names), -np.inf)
        xl[:len(self.model.problem.species)] = 0.0
        if "V" in self.state_names:
            xl[self.state_names.index("V")] = 1e-9
        for blocks in self.blocks:
            for blk in blocks:
                self.W.put(lbx, blk.var, (xl / data.x_scale)[:, None])
        return lbx, ubx, np.zeros(self.n_g), np.zeros(self.n_g)

    def arguments(self, data: FitData) -> dict:
        lbx, ubx, lbg, ubg = self.bounds(data)
        return {"p": self.parameters(data), "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}

    def objective_value(self, w, data: FitData) -> float:
        return float(self._f_fun(w, self.parameters(data)))

    def residuals(self, w, data: FitData) -> np.ndarray:
        """Weighted residuals (model - measured) / sigma at NLP point ``w`` (from the
        definition, see `nlp`)."""
        if not hasattr(self, "_res_fun"):
            self._res_fun = ca.Function("res", [self._w, self._p], [self._definition[1]])
        return np.array(self._res_fun(w, self.parameters(data))).ravel()

    def theta(self, w, data: FitData) -> np.ndarray:
        return self.W.get(w, "theta").ravel() * data.scale

    def pack(self, data: FitData, runs, theta, trajectories, at_data: bool = False) -> np.ndarray:
        """NLP vector from parameter values and one trajectory per run (states of the
        fit's model), read at the collocation points.

        The trajectories are those of :func:`optfeed.fit.simulate.anchored_run`: the
        model's course at ``theta`` between samples, pinned to the measured values.
        With ``at_data`` (trajectories made at other values, e.g. another guess's
        anchored courses where this guess's cannot be simulated) every measured species is
        taken from the run's data instead (straight lines between the samples, from
        the run's initial value, negative readings as zero).

        Starting the measured states at the data is what the simultaneous approach
        allows and a simulation cannot: the solver then only has to find parameters
        that make the measured course consistent, and it does so in far fewer
        iterations and from far fewer basins than from the simulated course of a
        poor guess (measured on a Monod-Pirt model: 15-40 IPOPT iterations instead
        of 30-390, and the best fit from every guess tried)."""
        names = self.state_names
        w = self.W.zeros()
        self.W.put(w, "theta", np.asarray(theta) / data.scale)
        for c in self._copies:
            w[c] = np.asarray(theta) / data.scale
        for run, blocks, traj in zip(runs, self.blocks, trajectories):
            measured = {}
            for q, y in run.values.items():
                ok = np.isfinite(y)
                if at_data and q in names and q != "V" and ok.any():
                    i = names.index(q)
                    measured[i] = (np.concatenate([[0.0], run.times[ok]]),
                                   np.concatenate([[run.x0[self.states[i]]], np.maximum(y[ok], 0.0)]))
            for blk in blocks:
                a, b = blk.span
                times = blk.point_times(b - a, a)
                X = np.array([np.interp(times, *measured[i]) if i in measured else np.interp(times, traj.t, traj.x[:, self.states[i]])
                              for i in range(len(names))])
                self.W.put(w, blk.var, X / data.x_scale[:, None])
        lbx, ubx, _, _ = self.bounds(data)
        return np.clip(w, lbx, ubx)
