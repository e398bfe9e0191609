"""Direct collocation: the optimal-control problem as one NLP.

The run [0, T] is mapped to tau in [0, 1] (t = T * tau), so a free end time T is
just one more variable. tau is cut into N equal finite elements; on each, the state
is a polynomial through the element's start and ``degree`` Radau points, and the
model's right-hand side must hold at each Radau point. Pump rates are constant on
each of the ``pump_steps`` intervals (N is a whole multiple of it).

Variables (all scaled by nominal magnitudes, so IPOPT sees numbers near 1):

    xb : nx x (N+1)     states at element boundaries (xb[:, 0] fixed to x0)
    xc : nx x (N*d)     states at the collocation points
    u  : nu x M         pump rates per pump interval (L/h)
    T  : 1              end time (h), only if free

Constraints: collocation residuals and continuity (equalities); every path limit
at t = 0 and at every collocation point (Radau includes each element's end), and
a limit that depends on the pump rates also at the start of every pump step; every
end limit at T. Pump limits are variable bounds.

:class:`Transcription` builds all of this and keeps the map back from flat vectors
to named time series (:meth:`unpack`) and from limits to their rows
(``limit_rows``), so no other module indexes NLP vectors.
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np

from .limits import Limit
from .model import Model
from .problem.spec import Settings


def radau_coefficients(degree: int):
    """(tau, C, D): collocation points [0, radau...], derivative matrix C[r, j] =
    dL_r/dtau at tau_j, and end-point weights D[r] = L_r(1)."""
    tau = np.append(0.0, ca.collocation_points(degree, "radau"))
    n = degree + 1
    C = np.zeros((n, n))
    D = np.zeros(n)
    for r in range(n):
        p = np.poly1d([1.0])
        for k in range(n):
            if k != r:
                p *= np.poly1d([1.0, -tau[k]]) / (tau[r] - tau[k])
        D[r] = p(1.0)
        dp = np.polyder(p)
        for j in range(n):
            C[r, j] = dp(tau[j])
    return tau, C, D


@dataclass
class Unpacked:
    """An NLP point as physical time series.

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


class Transcription:
    """The collocation NLP of one model.

    Parameters
    ----------
    model : Model
    limits : list of Limit
    settings : Settings
    end_time : float or None
        Fixed end time (h), or None for free between ``t_bounds``.
    t_bounds : (float, float)
        Bounds on a free end time, h.
    x_scale : array (nx,)
        Nominal state magnitudes.
    t_nominal : float
        Nominal end time (h) for scaling.
    objective_scale : float
        Nominal objective magnitude (internal units).
    backoff : dict, optional
        Limit name -> amount (internal units) by which the NLP keeps away from that
        limit's bounds (upper lowered, lower raised), so that the re-simulated
        schedule stays inside them between collocation points.
    """

    def __init__(self, model: Model, limits: list[Limit], settings: Settings, end_time, t_bounds,
                 x_scale, t_nominal: float, objective_scale: float, backoff: dict | None = None):
        self.backoff = dict(backoff or {})
        self.model, self.limits, self.settings = model, limits, settings
        self.free_time = end_time is None
        self.end_time = end_time
        self.t_bounds = t_bounds
        self.N = settings.elements
        self.M = settings.pump_steps
        self.d = settings.degree
        self.k = settings.elements_per_step
        self.x_scale = np.asarray(x_scale, dtype=float)
        self.u_scale = np.array([max(f.max_rate, 1e-12) for f in model.problem.feeds])
        self.t_scale = float(t_nominal)
        self.j_scale = float(objective_scale)
        self.sense = -1.0 if (model.problem.objective is None or model.problem.objective.sense == "maximize") else 1.0
        self._build()

    # ------------------------------------------------------------------ build
    def _build(self):
        m, N, M, d, k = self.model, self.N, self.M, self.d, self.k
        nx, nu = m.nx, m.nu
        tau, C, D = radau_coefficients(d)
        self.tau = tau

        xb_s = ca.MX.sym("xb", nx, N + 1)
        xc_s = ca.MX.sym("xc", nx, N * d)
        u_s = ca.MX.sym("u", nu, M)
        parts = [ca.vec(xb_s), ca.vec(xc_s), ca.vec(u_s)]
        if self.free_time:
            T_s = ca.MX.sym("T")
            parts.append(T_s)
            T = T_s * self.t_scale
        else:
            T = ca.MX(self.end_time)
        w = ca.vertcat(*parts)
        self.n_w = w.shape[0]
        self._offsets = np.cumsum([0] + [p.shape[0] for p in parts])

        xs = ca.DM(self.x_scale)
        us = ca.DM(self.u_scale)
        xb = xb_s * ca.repmat(xs, 1, N + 1)
        xc = xc_s * ca.repmat(xs, 1, N * d)
        u = u_s * ca.repmat(us, 1, M)

        # one element: residuals of the collocation equations and the end state
        f = m.function("f", [m.rhs])
        x0e = ca.MX.sym("x0e", nx)
        xce = ca.MX.sym("xce", nx, d)
        ue = ca.MX.sym("ue", nu)
        t0e = ca.MX.sym("t0e")
        he = ca.MX.sym("he")
        nodes = [x0e] + [xce[:, j] for j in range(d)]
        res = []
        for j in range(1, d + 1):
            slope = sum(C[r, j] * nodes[r] for r in range(d + 1))
            res.append((slope - he * f(t0e + tau[j] * he, nodes[j], ue)) / xs)
        xend = sum(D[r] * nodes[r] for r in range(d + 1))
        element = ca.Function("element", [x0e, xce, ue, t0e, he], [ca.horzcat(*res), xend])

        h = T / N
        u_el = ca.repmat(u, k, 1).reshape((nu, N)) if k > 1 else u
        t0 = ca.DM(np.arange(N) / N).T * T
        mapped = element.map(N)
        res_all, xend_all = mapped(xb[:, :N], xc, u_el, t0, ca.repmat(h, 1, N))
        g = [ca.vec(res_all), ca.vec((xb[:, 1:] - xend_all) / ca.repmat(xs, 1, N))]
        lbg = [np.zeros(nx * d * N), np.zeros(nx * N)]
        ubg = [np.zeros(nx * d * N), np.zeros(nx * N)]
        row = nx * d * N + nx * N

        # path limits at t=0 and every collocation point
        self.limit_rows = {}
        path = [l for l in self.limits if not l.at_end and l.kind != "pump"]
        ends = [l for l in self.limits if l.at_end]
        u_pts = ca.repmat(u_el, d, 1).reshape((nu, N * d)) if d > 1 else u_el
        frac = np.array([(i + tau[j]) / N for i in range(N) for j in range(1, d + 1)])
        self.frac_points = np.concatenate([[0.0], frac])
        t_all = ca.horzcat(ca.MX(0.0), ca.DM(frac).T * T)
        x_all = ca.horzcat(xb[:, 0], xc)
        u_all = ca.horzcat(u[:, 0], u_pts)
        if path:
            scales = np.array([_limit_scale(l) for l in path])
            gfun = ca.Function("gpath", [m.t, m.x, m.u], [ca.vertcat(*[ca.SX(l.expr) for l in path])])
            gvals = gfun.map(N * d + 1)(t_all, x_all, u_all)  # (len(path), N*d+1)
            gvals = gvals / ca.repmat(ca.DM(scales), 1, N * d + 1)
            g.append(ca.vec(gvals))
            npts = N * d + 1
            for i, lim in enumerate(path):
                idx = row + i + len(path) * np.arange(npts)
                self.limit_rows[lim.name] = idx
            lo = np.array([(-np.inf if l.lower is None else self._lower(l) / s) for l, s in zip(path, scales)])
            hi = np.array([(np.inf if l.upper is None else self._upper(l) / s) for l, s in zip(path, scales)])
            lbg.append(np.tile(lo, npts))
            ubg.append(np.tile(hi, npts))
            row += len(path) * npts
        # a limit that depends on the pump rates (D, F_total, a feed) is also checked
        # at the start of every pump step, where the new rate meets the old state
        u_dep = [l for l in path if ca.depends_on(ca.SX(l.expr), m.u)]
        if u_dep and M > 1:
            cols = [s_ * k for s_ in range(1, M)]
            scales = np.array([_limit_scale(l) for l in u_dep])
            sfun = ca.Function("gstep", [m.t, m.x, m.u], [ca.vertcat(*[ca.SX(l.expr) for l in u_dep])])
            t_steps = ca.DM(np.array(cols) / N).T * T
            gvals = sfun.map(M - 1)(t_steps, xb[:, cols], u[:, 1:]) / ca.repmat(ca.DM(scales), 1, M - 1)
            g.append(ca.vec(gvals))
            for i, lim in enumerate(u_dep):
                idx = row + i + len(u_dep) * np.arange(M - 1)
                self.limit_rows[lim.name] = np.concatenate([self.limit_rows[lim.name], idx])
            lo = np.array([(-np.inf if l.lower is None else self._lower(l) / s) for l, s in zip(u_dep, scales)])
            hi = np.array([(np.inf if l.upper is None else self._upper(l) / s) for l, s in zip(u_dep, scales)])
            lbg.append(np.tile(lo, M - 1))
            ubg.append(np.tile(hi, M - 1))
            row += len(u_dep) * (M - 1)
        if ends:
            scales = np.array([_limit_scale(l) for l in ends])
            efun = ca.Function("gend", [m.t, m.x, m.u], [ca.vertcat(*[ca.SX(l.expr) for l in ends])])
            g.append(efun(T, xb[:, N], u[:, M - 1]) / ca.DM(scales))
            for i, lim in enumerate(ends):
                self.limit_rows[lim.name] = np.array([row + i])
            lbg.append(np.array([(-np.inf if l.lower is None else self._lower(l) / s) for l, s in zip(ends, scales)]))
            ubg.append(np.array([(np.inf if l.upper is None else self._upper(l) / s) for l, s in zip(ends, scales)]))
            row += len(ends)
        self.limit_scale = {l.name: _limit_scale(l) for l in path + ends}

        # objective (minimised): sense * J / J_scale + smoothing penalty
        J = m.end_value(xb[:, N], T, u[:, M - 1])
        self.J_expr_fun = ca.Function("J", [w], [J])
        obj = self.sense * J / self.j_scale
        if self.settings.smoothing > 0 and M > 1:
            du = u_s[:, 1:] - u_s[:, :-1]
            obj = obj + self.settings.smoothing * ca.sumsqr(du)
        self.nlp = {"x": w, "f": obj, "g": ca.vertcat(*g)}
        self.lbg = np.concatenate(lbg)
        self.ubg = np.concatenate(ubg)
        self.n_g = len(self.lbg)

        # variable bounds
        lbx = np.full(self.n_w, -np.inf)
        ubx = np.full(self.n_w, np.inf)
        nspecies = len(m.problem.species)
        xl = np.full(nx, -np.inf)
        xl[:nspecies] = 0.0  # species are kept non-negative
        xl[m.index("V")] = 1e-9
        lbx[self._offsets[0]:self._offsets[1]] = np.tile(xl / self.x_scale, N + 1)
        lbx[self._offsets[1]:self._offsets[2]] = np.tile(xl / self.x_scale, N * d)
        x0s = m.x0 / self.x_scale
        lbx[self._offsets[0]:self._offsets[0] + nx] = x0s
        ubx[self._offsets[0]:self._offsets[0] + nx] = x0s
        feeds = m.problem.feeds
        self.u_rows = {}
        for j, fd in enumerate(feeds):
            idx = self._offsets[2] + j + nu * np.arange(M)
            lbx[idx] = fd.min_rate / self.u_scale[j]
            ubx[idx] = fd.max_rate / self.u_scale[j]
            self.u_rows[f"pump {fd.name}"] = idx
        if self.free_time:
            lbx[-1] = self.t_bounds[0] / self.t_scale
            ubx[-1] = self.t_bounds[1] / self.t_scale
        self.lbx, self.ubx = lbx, ubx

    def _upper(self, lim: Limit) -> float:
        return lim.upper - self.backoff.get(lim.name, 0.0)

    def _lower(self, lim: Limit) -> float:
        return lim.lower + self.backoff.get(lim.name, 0.0)

    # ------------------------------------------------------------------ maps
    def unpack(self, w) -> Unpacked:
        """Physical time series of the flat NLP vector ``w``."""
        w = np.asarray(w, dtype=float).ravel()
        m, N, M, d = self.model, self.N, self.M, self.d
        nx, nu = m.nx, m.nu
        o = self._offsets
        xb = w[o[0]:o[1]].reshape(N + 1, nx).T * self.x_scale[:, None]
        xc = w[o[1]:o[2]].reshape(N * d, nx).T * self.x_scale[:, None]
        u = w[o[2]:o[3]].reshape(M, nu).T * self.u_scale[:, None]
        # IPOPT may relax bounds by ~1e-8; a pump schedule must stay inside them
        fmin = np.array([f.min_rate for f in m.problem.feeds])[:, None]
        fmax = np.array([f.max_rate for f in m.problem.feeds])[:, None]
        u = np.clip(u, fmin, fmax)
        T = w[-1] * self.t_scale if self.free_time else self.end_time
        u_pts = np.repeat(u, self.k * d, axis=1)
        return Unpacked(
            t_points=self.frac_points * T,
            x_points=np.vstack([xb[:, 0], xc.T]),
            u_points=np.vstack([u[:, 0], u_pts.T]),
            t_steps=np.linspace(0.0, T, M + 1),
            u_steps=u.T.copy(),
            x_end=xb[:, N].copy(),
            T=float(T),
        )

    def pack(self, times, states, steps_u, T) -> np.ndarray:
        """Scaled NLP vector from a physical guess: ``states(t)`` -> (nx,) callable or
        arrays sampled at ``times``; ``steps_u`` (M, nu) pump rates; ``T`` end time (h)."""
        m, N, d = self.model, self.N, self.d
        frac_b = np.arange(N + 1) / N
        t_b = frac_b * T
        t_c = self.frac_points[1:] * T
        xb = np.array([np.interp(t_b, times, states[:, i]) for i in range(m.nx)])
        xc = np.array([np.interp(t_c, times, states[:, i]) for i in range(m.nx)])
        xb[:, 0] = m.x0
        parts = [(xb / self.x_scale[:, None]).T.ravel(), (xc / self.x_scale[:, None]).T.ravel(),
                 (np.asarray(steps_u) / self.u_scale[None, :]).ravel()]
        if self.free_time:
            parts.append([T / self.t_scale])
        w = np.concatenate(parts)
        return np.clip(w, self.lbx, self.ubx)

    def violations(self, w) -> dict:
        """Worst violation of each limit at NLP point ``w`` (internal units), plus
        'model equations' for the collocation and continuity rows (scaled)."""
        if not hasattr(self, "_gfun"):
            self._gfun = ca.Function("g", [self.nlp["x"]], [self.nlp["g"]])
        g = np.array(self._gfun(w)).ravel()
        excess = np.maximum(np.maximum(self.lbg - g, g - self.ubg), 0.0)
        out = {}
        n_dyn = self.model.nx * (self.d + 1) * self.N
        out["model equations"] = float(excess[:n_dyn].max()) if n_dyn else 0.0
        for name, rows in self.limit_rows.items():
            out[name] = float(excess[rows].max()) * self.limit_scale[name]
        return out

    def objective_value(self, w) -> float:
        """J (internal units, in its own sense) at NLP point ``w``."""
        return float(self.J_expr_fun(w))

    def marginals(self, lam_g, lam_x) -> dict:
        """Gain in objective per unit relaxation of each limit (internal units).

        A limit relaxed by delta everywhere over the run (its upper bound raised,
        or its lower bound lowered) improves the optimum by about ``gain * delta``
        (>= 0 at a KKT point). From IPOPT's multipliers: d f*/d bound = -lambda.
        Returns name -> (gain of the upper bound, gain of the lower bound); the
        free end time appears as 'end time'.
        """
        lam_g = np.asarray(lam_g, dtype=float).ravel()
        lam_x = np.asarray(lam_x, dtype=float).ravel()
        c = self.j_scale / self.sense  # dJ = c * df

        def gains(lam, s):
            up = -c * lam[lam > 0].sum() / s  # dJ per unit raise of the upper bound
            low = c * lam[lam < 0].sum() / s  # dJ per unit lowering of the lower bound
            return _gain(self.sense, up), _gain(self.sense, low)

        out = {name: gains(lam_g[rows], self.limit_scale[name]) for name, rows in self.limit_rows.items()}
        for j, (name, idx) in enumerate(self.u_rows.items()):
            out[name] = gains(lam_x[idx], self.u_scale[j])
        if self.free_time:
            out["end time"] = gains(lam_x[-1:], self.t_scale)
        return out


def _gain(sense: float, dJ: float) -> float:
    """Improvement of the objective in its own sense for a change dJ."""
    return dJ if sense < 0 else -dJ


def _limit_scale(lim: Limit) -> float:
    return lim.scale()
