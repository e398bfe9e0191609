"""Integrating a feed schedule with CVODES (through CasADi).

Each schedule segment is integrated on its own, restarting the integrator at every
pump change, so no step crosses a discontinuity in the feed. Long segments are cut
into pieces so that the dense output (used for the slack checks and the figures) has
at least ``min_points`` samples over the run. The samples depend only on the schedule,
the run length and ``min_points``: the same schedule is always sampled the same way.

A :class:`Trajectory` can also integrate again between two of its samples with a
finer output (:meth:`Trajectory.between`), which the limit judgement uses to find a
limit's extremum, or the moment it is first crossed, between samples.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import casadi as ca
import numpy as np

from .errors import SimulationError, TimeLimitReached
from .model import Model
from .schedule import Schedule, ScheduleOverflow, Segment
from .units import factor_to

RTOL = 1e-10
ATOL = 1e-10
SAMPLES = 2000  # least number of samples over a run: one rule for check and verification


@dataclass(frozen=True)
class Trajectory:
    """A simulated run, sampled densely.

    Attributes
    ----------
    t : ndarray, shape (n,)
        Times, h. A pump change appears twice: end of one segment, start of the next.
    x : ndarray, shape (n, nx)
        States, internal units, in ``state_names`` order.
    u : ndarray, shape (n, nu)
        Pump rates, L/h, in ``feed_names`` order.
    state_names, feed_names : tuple of str
    piece : ndarray of int, shape (n,)
        Index of the integrated piece each sample belongs to (samples of one piece
        lie on one smooth stretch of the run, without a pump change inside).
    """

    t: np.ndarray
    x: np.ndarray
    u: np.ndarray
    state_names: tuple
    feed_names: tuple
    piece: np.ndarray = field(default=None, repr=False, compare=False)
    _pieces: tuple = field(default=(), repr=False, compare=False)
    _simulator: object = field(default=None, repr=False, compare=False)
    _p: object = field(default=None, repr=False, compare=False)

    def state(self, name: str) -> np.ndarray:
        return self.x[:, self.state_names.index(name)]

    def feed(self, name: str) -> np.ndarray:
        return self.u[:, self.feed_names.index(name)]

    @property
    def final(self) -> np.ndarray:
        return self.x[-1]

    @property
    def constants(self):
        """The constants (``Model.p``) this run was simulated with; None if unknown."""
        return self._p

    def between(self, i: int, t0: float, x0, t1: float):
        """Integrate again within sample ``i``'s piece from state ``x0`` at ``t0`` to
        ``t1`` (h) with a fine output: returns (t, x, u), ``t[0] = t0``."""
        if self._simulator is None or self.piece is None:
            raise ValueError("this trajectory was not made by a Simulator")
        seg = self._pieces[self.piece[i]]
        return self._simulator.between(seg, float(t0), np.asarray(x0, dtype=float), float(t1), self._p)


class Simulator:
    """CVODES integrator for one model, reusable across schedules and constants.

    Parameters
    ----------
    model : Model
    points_per_piece : int
        Dense output points within each integrated piece.
    rtol, atol : float
        CVODES tolerances.
    """

    def __init__(self, model: Model, points_per_piece: int = 40, rtol: float = RTOL, atol: float = ATOL):
        self.model = model
        self.points = points_per_piece
        nu = model.nu
        tau = ca.SX.sym("tau")
        q = ca.SX.sym("q", 2 + 3 * nu)  # t0, h, a, b, k of the pump law
        t0, h = q[0], q[1]
        a, b, k = q[2:2 + nu], q[2 + nu:2 + 2 * nu], q[2 + 2 * nu:2 + 3 * nu]
        u = (a + b * h * tau) * ca.exp(k * h * tau)
        f = model.function_p("f", [model.rhs])
        ode = h * f(t0 + h * tau, model.x, u, model.p)
        grid = np.linspace(0.0, 1.0, points_per_piece + 1)[1:]
        opts = {"abstol": atol, "reltol": rtol, "max_num_steps": 200000, "show_eval_warnings": False,
                "disable_internal_warnings": True}
        self._integrator = ca.integrator("piece", "cvodes",
                                         {"x": model.x, "p": ca.vertcat(q, model.p), "t": tau, "ode": ode},
                                         0.0, grid, opts)
        self._grid = grid

    def run(self, schedule: Schedule, end_time: float, min_points: int = SAMPLES, x0=None, p=None,
            deadline: float | None = None) -> Trajectory:
        """Integrate ``schedule`` from 0 to ``end_time`` (h) from ``x0`` (default:
        model.x0) with constants ``p`` (default: model.p0). ``deadline``
        (time.monotonic) stops it with :class:`~optfeed.errors.TimeLimitReached`.

        Raises
        ------
        SimulationError
            When CVODES fails or the state stops being finite; it names the time and,
            where it can, the quantity that blew up.
        """
        m = self.model
        p = m.p0 if p is None else np.asarray(p, dtype=float)
        try:
            segments = schedule.segments(m.feed_names, end_time)
        except ScheduleOverflow as exc:
            raise SimulationError(f"the rate of feed {exc.feed!r} grows past any finite number", exc.time) from None
        max_len = end_time * self.points / max(min_points, 1)
        x = np.array(m.x0 if x0 is None else x0, dtype=float)
        ts, xs, us, pieces, index = [], [], [], [], []
        for seg in segments:
            for piece in _pieces(seg, max_len, m.feed_names):
                if deadline is not None and time.monotonic() > deadline:
                    raise TimeLimitReached("the time limit was reached before the end of the run", piece.start)
                t, xf = self._integrate(piece, piece.start, x, piece.end, p)
                ts.append(np.concatenate([[piece.start], t]))
                xs.append(np.vstack([x, xf]))
                us.append(piece.rates(ts[-1]))
                index.append(np.full(len(ts[-1]), len(pieces)))
                pieces.append(piece)
                x = xf[-1]
        return Trajectory(
            t=np.concatenate(ts), x=np.vstack(xs), u=np.vstack(us),
            state_names=tuple(m.state_names), feed_names=tuple(m.feed_names),
            piece=np.concatenate(index), _pieces=tuple(pieces), _simulator=self, _p=p,
        )

    def between(self, seg: Segment, t0: float, x0, t1: float, p):
        """Dense output (t, x, u) from state ``x0`` at ``t0`` to ``t1`` within ``seg``."""
        t, xf = self._integrate(seg, t0, np.asarray(x0, dtype=float), t1, p)
        t = np.concatenate([[t0], t])
        return t, np.vstack([x0, xf]), seg.rates(t)

    def _integrate(self, seg: Segment, t0: float, x0, t1: float, p):
        h = t1 - t0
        d = t0 - seg.start
        try:  # a pump that is off stays off, whatever its growth rate
            a = [(ai + bi * d) * math.exp(ki * d) if ai or bi else 0.0 for ai, bi, ki in zip(seg.a, seg.b, seg.k)]
            b = [bi * math.exp(ki * d) if bi else 0.0 for bi, ki in zip(seg.b, seg.k)]
            ends = [float(ai) * math.exp(ki * h) if ai else 0.0 for ai, ki in zip(a, seg.k)]
            if not all(map(math.isfinite, a + b + ends)):
                raise OverflowError
        except OverflowError:
            j = max(range(len(seg.k)), key=lambda i: seg.k[i])
            raise SimulationError(f"the rate of feed {self.model.feed_names[j]!r} grows past any finite number",
                                  t0) from None
        q = np.concatenate([[t0, h], a, b, seg.k, p])
        try:
            out = self._integrator(x0=x0, p=q)
        except RuntimeError as exc:
            raise SimulationError(f"the integrator failed ({_short(exc)}); {self._largest(x0, seg, t0)}",
                                  t0) from None
        xf = np.array(out["xf"]).T  # (points, nx)
        t = t0 + h * self._grid
        if not np.all(np.isfinite(xf)):
            row = int(np.argmax(~np.all(np.isfinite(xf), axis=1)))
            names = [n for n, ok in zip(self.model.state_names, np.isfinite(xf[row])) if not ok]
            before = t0 if row == 0 else float(t[row - 1])
            raise SimulationError(f"{', '.join(names)} became infinite or not a number between "
                                  f"{before:.6g} h and {t[row]:.6g} h; {self._largest(x0, seg, t0)}", before)
        return t, xf

    def _largest(self, x, piece, t0=None) -> str:
        """Text naming the largest state (in its unit) and pump rate at ``t0`` (default:
        the start of ``piece``)."""
        t0 = piece.start if t0 is None else t0
        m = self.model
        j = int(np.argmax(np.abs(x))) if len(x) else 0
        name = m.state_names[j]
        unit = next((s.unit for s in m.problem.species if s.name == name), None)
        if name == "V":
            unit = m.problem.vessel.unit
        value = f"{x[j] * factor_to(unit):.4g} {unit}" if unit else f"{x[j]:.4g} (internal units)"
        text = f"at {t0:.6g} h the largest state was {name} = {value}"
        rates = piece.rates(np.array([t0]))[0] if len(piece.a) else []
        if len(rates):
            f = int(np.argmax(np.abs(rates)))
            text += f" and the largest pump rate {m.feed_names[f]} = {rates[f]:.4g} L/h"
        return text


def simulate(model: Model, schedule: Schedule, end_time: float, **kwargs) -> Trajectory:
    """Integrate ``schedule`` over [0, end_time] h. See :class:`Simulator`."""
    min_points = kwargs.pop("min_points", SAMPLES)
    x0, p, deadline = kwargs.pop("x0", None), kwargs.pop("p", None), kwargs.pop("deadline", None)
    return Simulator(model, **kwargs).run(schedule, end_time, min_points=min_points, x0=x0, p=p, deadline=deadline)


def _pieces(seg: Segment, max_len: float, feed_names=()):
    n = max(1, math.ceil((seg.end - seg.start) / max_len - 1e-9))
    if n == 1:
        yield seg
        return
    edges = np.linspace(seg.start, seg.end, n + 1)
    for s, e in zip(edges[:-1], edges[1:]):
        d = s - seg.start
        try:
            grow = [math.exp(ki * d) for ki in seg.k]
        except OverflowError:
            j = max(range(len(seg.k)), key=lambda i: seg.k[i])
            raise SimulationError(f"the rate of feed {feed_names[j]!r} grows past any finite number",
                                  float(s)) from None
        a = tuple((ai + bi * d) * g if ai or bi else 0.0 for ai, bi, g in zip(seg.a, seg.b, grow))
        b = tuple(bi * g if bi else 0.0 for bi, g in zip(seg.b, grow))
        yield Segment(float(s), float(e), a, b, seg.k)


# CVODES return flags in words
_CVODES_WORDS = {
    "CV_TOO_MUCH_WORK": "too many integrator steps: a state changes too fast",
    "CV_TOO_MUCH_ACC": "the accuracy asked for cannot be reached",
    "CV_ERR_FAILURE": "the integrator could not keep its error small: a state grows too fast or the model is stiff",
    "CV_CONV_FAILURE": "the integrator's corrector did not converge: a state grows too fast or the model is stiff",
    "CV_RHSFUNC_FAIL": "the model's rates could not be evaluated",
    "CV_REPTD_RHSFUNC_ERR": "the model's rates could not be evaluated (a state became too large or not a number)",
    "CV_UNREC_RHSFUNC_ERR": "the model's rates could not be evaluated",
}


def _short(exc) -> str:
    text = str(exc)
    for flag, words in _CVODES_WORDS.items():
        if f'"{flag}"' in text or f"'{flag}'" in text or text.rstrip().endswith(flag):
            return words
    lines = text.strip().splitlines()
    msg = next((line for line in reversed(lines) if line.strip()), "unknown error")
    return msg[:200]
