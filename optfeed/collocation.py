"""Direct collocation: one model over one stretch of time, as a block of an NLP.

This module holds the collocation code and nothing else builds collocation equations.
A :class:`Block` is one copy of a model's states on its own grid: the stretch
[t0, t0 + T] is cut into finite elements; on each, the state is the polynomial
through the element's start and ``degree`` Radau points, and the model's right-hand
side must hold at each Radau point. Radau's last point is the element's end, so the
next element starts from it: no separate boundary states, no continuity rows.

Everything a block needs comes in as CasADi expressions, so blocks compose:

* its initial state (a parameter, another block's end state, a decision variable);
* its constants ``p`` (the problem's numbers, a scenario's, or parameters being fitted);
* its duration ``T`` and start ``t0`` (numbers, parameters, or a free end time);
* the pump rates at each collocation point (shared pump variables, or a run's
  applied schedule).

The optimizer's NLP (:mod:`optfeed.transcription`) holds one block per uncertainty
scenario sharing one pump profile; the calibration NLP holds one block per run
sharing the parameters being fitted. :class:`Layout` names the parts of the NLP's
flat vectors so that no other code indexes them by hand.
"""

from __future__ import annotations

from functools import lru_cache

import casadi as ca
import numpy as np


@lru_cache(maxsize=None)
def radau_coefficients(degree: int):
    """(tau, C, D): collocation points [0, radau...], derivative matrix C[r, j] =
    dL_r/dtau at tau_j, and end-point weights D[r] = L_r(1). Computed once per
    degree (a calibration NLP has a block per sampling interval); read-only."""
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
    for a in (tau, C, D):
        a.setflags(write=False)
    return tau, C, D


@lru_cache(maxsize=32)  # blocks of one NLP share their model's f: built once, not per block
def element_function(f: ca.Function, degree: int, nu: int) -> ca.Function:
    """The collocation equations of one finite element, as a Function
    (x0, X, U, t, h, p, x_scale) -> R:

    x0 (nx) the element's start state, X (nx x degree) the states at its Radau
    points, U (nu x degree) and t (1 x degree) the pump rates and times there, h
    its length (h), p the constants, x_scale (nx) the states' nominal magnitudes;
    R (nx x degree) the residuals (polynomial slope - h f) / x_scale, zero at a
    solution. Every block is a map of this function over its elements.
    """
    nx = f.size1_in(1)
    d = degree
    _, C, _ = radau_coefficients(d)
    xs_e = ca.SX.sym("xs", nx)
    x0_e = ca.SX.sym("x0", nx)
    X_e = ca.SX.sym("X", nx, d)
    U_e = ca.SX.sym("U", nu, d)
    t_e = ca.SX.sym("t", 1, d)
    h_e = ca.SX.sym("h")
    p_e = ca.SX.sym("p", f.size1_in(3))
    nodes = [x0_e] + [X_e[:, j] for j in range(d)]
    res = []
    for j in range(1, d + 1):
        slope = sum(C[r, j] * nodes[r] for r in range(d + 1))
        res.append((slope - h_e * f(t_e[j - 1], nodes[j], U_e[:, j - 1], p_e)) / xs_e)
    return ca.Function("element", [x0_e, X_e, U_e, t_e, h_e, p_e, xs_e], [ca.horzcat(*res)],
                       ["x0", "X", "U", "t", "h", "p", "x_scale"], ["R"])


class Layout:
    """Named parts of a flat vector: the NLP's variables, or its parameters.

    Each part is a matrix (rows x cols), stored column by column.
    """

    def __init__(self, prefix: str):
        self.prefix = prefix
        self._parts: dict[str, tuple[int, int, int]] = {}
        self._symbols: list = []
        self.size = 0

    def add(self, name: str, rows: int = 1, cols: int = 1) -> ca.MX:
        """Register a part and return its symbol."""
        if name in self._parts:
            raise ValueError(f"part {name!r} registered twice")
        sym = ca.MX.sym(f"{self.prefix}.{name}", rows, cols)
        self._parts[name] = (self.size, rows, cols)
        self._symbols.append(sym)
        self.size += rows * cols
        return sym

    def __contains__(self, name) -> bool:
        return name in self._parts

    def symbol(self) -> ca.MX:
        """The whole vector, for the NLP."""
        return ca.vertcat(*[ca.vec(s) for s in self._symbols]) if self._symbols else ca.MX(0, 1)

    def indices(self, name: str) -> np.ndarray:
        """Flat indices of a part, shaped (rows, cols)."""
        start, rows, cols = self._parts[name]
        return np.arange(start, start + rows * cols).reshape(rows, cols, order="F")

    def get(self, vec, name: str) -> np.ndarray:
        """A part of a flat numeric vector, shaped (rows, cols)."""
        return np.asarray(vec, dtype=float).ravel()[self.indices(name)]

    def put(self, vec: np.ndarray, name: str, value) -> None:
        """Write ``value`` (broadcast to the part's shape) into flat vector ``vec``."""
        idx = self.indices(name)
        value = np.asarray(value, dtype=float)
        if value.ndim == 1 and idx.shape[1] == 1 and value.shape[0] == idx.shape[0]:
            value = value[:, None]  # a vector for a one-column part
        vec[idx] = np.broadcast_to(value, idx.shape)

    def zeros(self) -> np.ndarray:
        return np.zeros(self.size)


class Block:
    """One model over [t0, t0 + T], transcribed by Radau collocation.

    Made in two steps: the block takes its variables from the layout when it is
    made, and :meth:`write` writes its equations, given what comes in from outside
    (its initial state, constants, duration, start, pump rates and scale). A
    calibration NLP hands IPOPT derivatives assembled from the element function
    itself (:mod:`optfeed.fit.transcription`) and writes its blocks' equations only
    for the definition its tests compare with.

    Parameters
    ----------
    name : str
        Prefix of its variables in ``variables`` (``<name>.x``).
    f : casadi.Function
        (t, x, u, p) -> dx/dt of the model (internal units, per hour).
    fractions : array, shape (N + 1,)
        Element boundaries as fractions of the stretch, from 0 to 1.
    degree : int
        Radau points per element.
    variables : Layout
        Where the block adds its state variables (scaled by ``x_scale``).

    Attributes
    ----------
    var : str
        Name of its variables in the layout (nx x N*degree, scaled).
    N, d, nx : int
        Elements, Radau points per element, states.

    After :meth:`write`:

    residuals : casadi.MX
        Collocation equations (scaled by ``x_scale``); zero at a solution.
    X, t_points, u_points : casadi.MX
        States (nx x N*d), times (1 x N*d) and pump rates at the collocation points.
    x_start, t_start : casadi.MX
        State and time at each element's start (nx x N, 1 x N).
    x_end : casadi.MX
        State at t0 + T.
    """

    def __init__(self, name, f, fractions, degree, variables: Layout):
        fractions = np.asarray(fractions, dtype=float)
        self.f = f
        self.N, self.d, self.nx = len(fractions) - 1, degree, f.size1_in(1)
        self.fractions = fractions
        self.tau = radau_coefficients(degree)[0]
        self.var = f"{name}.x"
        self._Xs = variables.add(self.var, self.nx, self.N * degree)

    def write(self, x0, p, T, t0, u_points, x_scale) -> "Block":
        """Write the block's equations; returns the block.

        x0, p, T, t0 : casadi.MX
            Initial state, constants, duration (h) and start time (h).
        u_points : casadi.MX, shape (nu, N * degree)
            Pump rates (L/h) at every collocation point.
        x_scale : casadi.MX, shape (nx,)
            Nominal state magnitudes; variables are states divided by them.
        """
        N, d, nx, tau = self.N, self.d, self.nx, self.tau
        X = self._Xs * ca.repmat(x_scale, 1, N * d)
        ends = X[:, [i * d + d - 1 for i in range(N - 1)]] if N > 1 else ca.MX(nx, 0)
        x_start = ca.horzcat(x0, ends)
        h = T * ca.DM(np.diff(self.fractions)).T
        t_start = t0 + T * ca.DM(self.fractions[:-1]).T
        offsets = ca.DM(np.tile(tau[1:], N)).T
        t_points = ca.repmat(t_start, d, 1).reshape((1, N * d)) + offsets * ca.repmat(h, d, 1).reshape((1, N * d))

        element = element_function(self.f, d, u_points.shape[0])
        R = element.map(N)(x_start, X, u_points, t_points, h, p, x_scale)

        self.X = X
        self.t_points = t_points
        self.u_points = u_points
        self.x_start = x_start
        self.t_start = t_start
        self.x_end = X[:, N * d - 1]
        self.residuals = ca.vec(R)
        return self

    def point_times(self, T: float, t0: float = 0.0) -> np.ndarray:
        """Times (h) of the collocation points for a numeric T and t0."""
        f = self.fractions
        h = np.diff(f) * T
        return (t0 + f[:-1, None] * T + self.tau[None, 1:] * h[:, None]).ravel()
