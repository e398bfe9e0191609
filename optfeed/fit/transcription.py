"""The calibration NLP: every past run transcribed by the same collocation blocks,
all sharing the parameters being estimated.

A run is cut at every sampling time and every pump change into stretches; each
stretch is one :class:`optfeed.collocation.Block` whose initial state is the end state
of the stretch before it (less the sample volume taken out, where there is one), so
the measured values sit exactly at block ends. The applied schedule's pump rates are
numbers at the collocation points. The model's constants are the run's own, except
the estimated ones, which are the shared decision variables.

Objective: half the sum over runs, samples and measured quantities of the squared
weighted residual (model - measured) / sigma: weighted least squares, the maximum
likelihood estimate under independent normal errors with the stated sigma.

It offers the interface :func:`optfeed.solve.solve` uses (``nlp``, ``n_w``, ``n_g``,
``P``, ``arguments``, ``objective_value``), so it is solved, watched and cached the
same way as the optimizer's NLP.
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np

from ..collocation import Block, Layout
from ..model import Model


@dataclass
class FitData:
    """The numbers of one solve: bounds of the estimated parameters (internal units),
    their scale, and whether some are held fixed (profile likelihood)."""

    lower: np.ndarray
    upper: np.ndarray
    scale: np.ndarray
    x_scale: np.ndarray  # (nx,)


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


class FitNLP:
    """Weighted least squares over every run, one NLP.

    Parameters
    ----------
    model : Model
        The full model (its state layout is the runs' initial states').
    runs : sequence of optfeed.fit.runs.Run
    estimated : list of str
        Names of the constants (parameters) being estimated.
    sigma : callable
        sigma(quantity, measured values) -> standard deviations (internal units).
    elements_per_run : int
        Finite elements across a run (at least one per stretch).
    degree : int
    """

    def __init__(self, model: Model, runs, estimated, sigma, elements_per_run: int = 40, degree: int = 3):
        self.model, self.runs, self.estimated = model, list(runs), list(estimated)
        self.degree = degree
        m = model
        W, P = Layout("w"), Layout("p")
        self.W, self.P = W, P
        theta_s = W.add("theta", len(self.estimated))
        theta_scale = P.add("theta_scale", len(self.estimated))
        theta = theta_s * theta_scale
        xs = P.add("x_scale", m.nx)
        idx = [m.constant_index(n) for n in self.estimated]
        select = np.zeros((m.n_constants, len(idx)))
        for j, i in enumerate(idx):
            select[i, j] = 1.0
        keep = np.ones(m.n_constants)
        keep[idx] = 0.0
        f = m.function_p("f", [m.rhs])
        v_index = m.index("V")
        residuals, self.blocks, self.measured = [], [], []
        values = {n: m.function_p(f"v_{n}", [e]) for n, e in m.values.items()}
        for r, run in enumerate(self.runs):
            const = P.add(f"r{r}.constants", m.n_constants)
            x0 = P.add(f"r{r}.x0", m.nx)
            p_run = const * ca.DM(keep) + ca.mtimes(ca.DM(select), theta)
            x_start = x0
            blocks = []
            for k, (a, b, n, seg, sample) in enumerate(stretches(run, m.feed_names, run.end_time / elements_per_run)):
                fr = np.linspace(0.0, 1.0, n + 1)
                tau = np.append(0.0, ca.collocation_points(degree, "radau"))
                times = (a + (b - a) * (fr[:-1, None] + np.diff(fr)[:, None] * tau[None, 1:])).ravel()
                u_pts = ca.DM(seg.rates(times).T)
                blk = Block(f"r{r}.s{k}", f, fr, degree, W, x_start, p_run, b - a, a, u_pts, xs)
                blk.span = (a, b)
                blocks.append(blk)
                residuals.append(("model", blk.residuals))
                if sample is not None:
                    u_end = ca.DM(seg.rates(np.array([b]))[0])
                    for q, y in run.values.items():
                        if not np.isfinite(y[sample]):
                            continue
                        model_value = (blk.x_end[m.index(q)] if q in m.state_names
                                       else values[q](b, blk.x_end, u_end, p_run))
                        s = float(sigma(q, np.array([y[sample]]))[0])
                        residuals.append(("data", (model_value - y[sample]) / s))
                        self.measured.append((r, sample, q, float(y[sample]), s, b))
                x_start = blk.x_end
                if sample is not None and run.sample_volume:
                    jump = np.zeros(m.nx)
                    jump[v_index] = run.sample_volume
                    x_start = x_start - ca.DM(jump)
            self.blocks.append(blocks)
        g = ca.vertcat(*[e for kind, e in residuals if kind == "model"])
        res = ca.vertcat(*[e for kind, e in residuals if kind == "data"])
        self.n_res = res.shape[0]
        self.nlp = {"x": W.symbol(), "p": P.symbol(), "f": 0.5 * ca.sumsqr(res), "g": g}
        self.n_w, self.n_g = W.size, g.shape[0]
        self._res_fun = ca.Function("res", [self.nlp["x"], self.nlp["p"]], [res])
        self._solvers, self._derivatives = {}, None

    # -- the interface optfeed.solve.solve uses
    def parameters(self, data: FitData) -> np.ndarray:
        P = self.P
        v = P.zeros()
        P.put(v, "theta_scale", data.scale)
        P.put(v, "x_scale", data.x_scale)
        for r, run in enumerate(self.runs):
            P.put(v, f"r{r}.constants", run.constants)
            P.put(v, f"r{r}.x0", run.x0)
        return v

    def bounds(self, data: FitData):
        lbx = np.full(self.n_w, -np.inf)
        ubx = np.full(self.n_w, np.inf)
        self.W.put(lbx, "theta", data.lower / data.scale)
        self.W.put(ubx, "theta", data.upper / data.scale)
        # no non-negativity here: the NLP must follow the model exactly as the
        # re-simulation does (a model that drives a species below zero is named in
        # the fit's warnings instead)
        xl = np.full(self.model.nx, -np.inf)
        xl[self.model.index("V")] = 1e-9
        for blocks in self.blocks:
            for blk in blocks:
                self.W.put(lbx, blk.var, (xl / data.x_scale)[:, None])
        return lbx, ubx, np.zeros(self.n_g), np.zeros(self.n_g)

    def arguments(self, data: FitData) -> dict:
        lbx, ubx, lbg, ubg = self.bounds(data)
        return {"p": self.parameters(data), "lbx": lbx, "ubx": ubx, "lbg": lbg, "ubg": ubg}

    def objective_value(self, w, data: FitData) -> float:
        r = self.residuals(w, data)
        return float(0.5 * r @ r)

    def residuals(self, w, data: FitData) -> np.ndarray:
        """Weighted residuals (model - measured) / sigma at NLP point ``w``."""
        return np.array(self._res_fun(w, self.parameters(data))).ravel()

    def theta(self, w, data: FitData) -> np.ndarray:
        return self.W.get(w, "theta").ravel() * data.scale

    def pack(self, data: FitData, theta, trajectories) -> np.ndarray:
        """NLP vector from parameter values and one simulated trajectory per run
        (at those values; states of ``self.model``)."""
        w = self.W.zeros()
        self.W.put(w, "theta", np.asarray(theta) / data.scale)
        for blocks, traj in zip(self.blocks, trajectories):
            for blk in blocks:
                a, b = blk.span
                times = blk.point_times(b - a, a)
                X = np.array([np.interp(times, traj.t, traj.x[:, i]) for i in range(self.model.nx)])
                self.W.put(w, blk.var, X / data.x_scale[:, None])
        lbx, ubx, _, _ = self.bounds(data)
        return np.clip(w, lbx, ubx)
