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

from .calls import call
from .errors import InputError, SimulationError, TimeLimitReached
from .model import Model
from .phases import condition_function, jump, models_like, phase_constants, phases_of
from .schedule import IN_CODE, Schedule, ScheduleOverflow, Segment
from .units import factor_to

RTOL = 1e-10
ATOL = 1e-10
SAMPLES = 2000  # least number of samples over a run: one rule for check and verification
METHODS = ("bdf", "adams")  # CVODES' multistep methods (see Simulator)


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
    phase : ndarray of int, shape (n,), or None
        For a problem with phases or additions: the index (in
        :func:`optfeed.phases.phases_of` order) of the phase each sample lies in.
    switches : dict
        Phase name -> the time (h) it ended, for every phase that ended before the
        end of the run ({} without phases).
    unended : str or None
        The name of a phase ended by a condition ('when') that never held before the
        end of the run: it lasted to the end and the later phases never started.
    additions : tuple of (Addition, float)
        The additions applied, with the broth volume (L) right after each.
    requested : tuple of Segment
        With phases: the schedule's segments as it asks for them, before a phase
        turned a pump off (for judging each phase's pump ranges).
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
    phase: np.ndarray = field(default=None, repr=False, compare=False)
    switches: dict = field(default_factory=dict, compare=False)
    unended: str | None = field(default=None, compare=False)
    additions: tuple = field(default=(), repr=False, compare=False)
    requested: tuple = field(default=(), repr=False, compare=False)
    _piece_phase: tuple = field(default=(), repr=False, compare=False)
    _phase_p: tuple = field(default=(), repr=False, compare=False)

    def state(self, name: str) -> np.ndarray:
        return self.x[:, self.state_names.index(name)]

    def feed(self, name: str) -> np.ndarray:
        return self.u[:, self.feed_names.index(name)]

    @property
    def final(self) -> np.ndarray:
        return self.x[-1]

    @property
    def constants(self):
        """The constants (``Model.p``) this run was simulated with; None if unknown.
        With phases, a phase that changes parameter values ran with
        :meth:`phase_constants` instead."""
        return self._p

    def phase_constants(self, k: int):
        """The constants phase ``k`` ran with (``constants`` with the phase's values in)."""
        return self._phase_p[k] if self._phase_p else self._p

    @property
    def phase_models(self) -> tuple:
        """The model each phase ran with (one entry, the simulator's model, without
        phases); () if this trajectory was not made by a Simulator."""
        if self._simulator is None:
            return ()
        return tuple(self._simulator.models)

    def between(self, i: int, t0: float, x0, t1: float):
        """Integrate again within sample ``i``'s piece from state ``x0`` at ``t0`` to
        ``t1`` (h) with a fine output: returns (t, x, u), ``t[0] = t0``."""
        if self._simulator is None or self.piece is None:
            raise ValueError("this trajectory was not made by a Simulator")
        j = self.piece[i]
        seg = self._pieces[j]
        k = self._piece_phase[j] if self._piece_phase else 0
        return self._simulator.between(seg, float(t0), np.asarray(x0, dtype=float), float(t1),
                                       self.phase_constants(k), k)

    def between_many(self, requests) -> list:
        """:meth:`between` for many ``(i, t0, x0, t1)`` at once, integrated side by side
        as one system per phase (:meth:`Simulator.between_many`); a list of (t, x, u)."""
        if self._simulator is None or self.piece is None:
            raise ValueError("this trajectory was not made by a Simulator")
        out = [None] * len(requests)
        by_phase = {}
        for n, (i, t0, x0, t1) in enumerate(requests):
            j = self.piece[i]
            k = self._piece_phase[j] if self._piece_phase else 0
            by_phase.setdefault(k, []).append(n)
        for k, ns in by_phase.items():
            p = self.phase_constants(k)
            items = [(self._pieces[self.piece[requests[n][0]]], float(requests[n][1]),
                      np.asarray(requests[n][2], dtype=float), float(requests[n][3]), p) for n in ns]
            for n, res in zip(ns, self._simulator.between_many(items, k)):
                out[n] = res
        return out


class Simulator:
    """CVODES integrator for one model, reusable across schedules and constants.

    Parameters
    ----------
    model : Model
    points_per_piece : int
        Dense output points within each integrated piece.
    rtol, atol : float
        CVODES tolerances.
    method : str
        CVODES' multistep method: 'bdf' (the default, as `check` and the
        verification integrate) or 'adams' (often fewer steps at these tight
        tolerances; :func:`cheaper_method` chooses by the work counted on a run).
        The same tolerances hold either way.
    """

    def __init__(self, model: Model, points_per_piece: int = 40, rtol: float = RTOL, atol: float = ATOL,
                 method: str = "bdf"):
        if method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {method!r}")
        self.model = model
        self.points = points_per_piece
        self.rtol, self.atol = rtol, atol
        self.method = method
        self.work = None  # a dict while CVODES' statistics are counted (see cheaper_method)
        self._batch_integrators = {}  # (model id, batch size) -> integrator (see run_batch)
        self._grid = np.linspace(0.0, 1.0, points_per_piece + 1)[1:]
        problem = model.problem
        self.phased = bool(problem.phases or problem.additions)
        # one model per phase (the same object where a phase replaces no rate), each
        # with its own integrator
        self.models = models_like(model) if self.phased else [model]
        self.phases = phases_of(problem) if self.phased else ()
        made = {}
        self._integrators = []
        for m in self.models:
            if id(m) not in made:
                made[id(m)] = _piece_integrator(m, self._grid, rtol, atol, method=method)
            self._integrators.append(made[id(m)])
        self._integrator = self._integrators[0]
        self._conditions = [condition_function(m, ph.end) if ph.end.kind == "when" else None
                            for m, ph in zip(self.models, self.phases)]

    def run(self, schedule: Schedule, end_time: float, min_points: int = SAMPLES, x0=None, p=None,
            deadline: float | None = None, switch_times: dict | None = None) -> Trajectory:
        """Integrate ``schedule`` from 0 to ``end_time`` (h) from ``x0`` (default:
        model.x0) with constants ``p`` (default: model.p0). ``deadline``
        (time.monotonic) stops it with :class:`~optfeed.errors.TimeLimitReached`.

        With phases or additions the run goes phase by phase (see
        :meth:`_run_phased`); ``switch_times`` (phase name -> h) gives the end of a
        phase whose end a schedule chooses ('between'), before the schedule's own
        ``switch_times``; entries for phases that a fixed time or a condition ends
        are not used (those ends come from the problem and the simulation).

        Raises
        ------
        SimulationError
            When CVODES fails or the state stops being finite; it names the time and,
            where it can, the quantity that blew up. Also when a sample would leave
            no broth.
        InputError
            When nothing gives the end of a 'between' phase, or it lies outside its
            window.
        """
        m = self.model
        p = m.p0 if p is None else np.asarray(p, dtype=float)
        if self.phased:
            return self._run_phased(schedule, end_time, min_points, x0, p, deadline, switch_times)
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

    def run_in_batches(self, schedule: Schedule, end_time: float, x0, p, size: int, deadline: float | None = None):
        """:meth:`run_batch` over the columns of ``x0`` and ``p``, ``size`` runs at a
        time, one batch as it is asked for: yields (columns, runs), ``runs`` a
        Trajectory per column, or None for each run the batch did not give (CVODES
        could not finish the batch, or the time limit came first; a batch of one; a
        problem with phases or additions). The caller simulates those one by one
        with :meth:`run`, so that a failure is reported for its own run."""
        n = np.shape(x0)[1]
        size = 1 if self.phased else max(1, int(size))
        for a in range(0, n, size):
            cols = range(a, min(a + size, n))
            runs = [None] * len(cols)
            if len(cols) > 1 and not (deadline is not None and time.monotonic() > deadline):
                try:
                    runs = self.run_batch(schedule, end_time, x0[:, a:cols.stop], p[:, a:cols.stop],
                                          deadline=deadline)
                except (SimulationError, TimeLimitReached):
                    pass
            yield cols, runs

    def run_batch(self, schedule: Schedule, end_time: float, x0, p, min_points: int = SAMPLES,
                  deadline: float | None = None) -> list:
        """Integrate ``schedule`` over [0, end_time] h for B runs at once: ``x0`` and
        ``p`` hold one column per run (shapes (nx, B) and (n_constants, B)). Returns
        one :class:`Trajectory` per run, sampled exactly as :meth:`run` samples it
        and able to integrate again on its own (:meth:`Trajectory.between`).

        The B runs are one CVODES system (the model's right-hand side once per run,
        side by side; its Jacobian block-diagonal and sparse), one integrator call
        per piece for all of them, which costs far less than B calls. CVODES keeps
        the root mean square of the weighted local errors of the whole system
        within 1, so a single run's share could reach sqrt(B) times the tolerance;
        the batch is therefore integrated with both tolerances divided by sqrt(B),
        which makes every run's own error test at least as strict as :meth:`run`'s.

        Problems without phases or additions only (ValueError otherwise).

        Raises
        ------
        SimulationError
            When CVODES fails or a state stops being finite in any run of the
            batch (integrate the runs one by one to find which, and why).
        """
        if self.phased:
            raise ValueError("a batch of runs is integrated only for problems without phases or additions")
        m = self.model
        x = np.array(x0, dtype=float).reshape(m.nx, -1)
        p = np.array(p, dtype=float).reshape(m.n_constants, -1)
        B = x.shape[1]
        if p.shape[1] != B:
            raise ValueError(f"{B} initial states but {p.shape[1]} sets of constants")
        integrator = self._batch_integrator(0, B)
        try:
            segments = schedule.segments(m.feed_names, end_time)
        except ScheduleOverflow as exc:
            raise SimulationError(f"the rate of feed {exc.feed!r} grows past any finite number", exc.time) from None
        max_len = end_time * self.points / max(min_points, 1)
        ts, xs, us, pieces, index = [], [], [], [], []
        x = x.T.copy()  # (B, nx)
        for seg in segments:
            for piece in _pieces(seg, max_len, m.feed_names):
                if deadline is not None and time.monotonic() > deadline:
                    raise TimeLimitReached("the time limit was reached before the end of the run", piece.start)
                q = _law(piece, piece.start, piece.end, m.feed_names)
                Q = np.vstack([np.repeat(q[:, None], B, axis=1), p])
                try:
                    (xf,) = call(integrator, {"x0": x, "p": Q.T}, ["xf"])
                except RuntimeError as exc:
                    raise SimulationError(f"the integrator failed ({_short(exc)}) in a batch of {B} runs",
                                          piece.start) from None
                xf = xf.reshape(-1, B, m.nx).transpose(1, 0, 2)  # (B, points, nx)
                if not np.all(np.isfinite(xf)):
                    raise SimulationError(f"a state became infinite or not a number in a batch of {B} runs",
                                          piece.start)
                t = piece.start + (piece.end - piece.start) * self._grid
                ts.append(np.concatenate([[piece.start], t]))
                xs.append(np.concatenate([x[:, None, :], xf], axis=1))
                us.append(piece.rates(ts[-1]))
                index.append(np.full(len(ts[-1]), len(pieces)))
                pieces.append(piece)
                x = xf[:, -1, :]
        t, u, index, pieces = np.concatenate(ts), np.vstack(us), np.concatenate(index), tuple(pieces)
        x_all = np.concatenate(xs, axis=1)  # (B, n, nx)
        return [Trajectory(t=t, x=x_all[j], u=u, state_names=tuple(m.state_names), feed_names=tuple(m.feed_names),
                           piece=index, _pieces=pieces, _simulator=self, _p=p[:, j].copy())
                for j in range(B)]

    def _run_phased(self, schedule, end_time, min_points, x0, p, deadline, switch_times) -> Trajectory:
        """Phase by phase: each phase with its model, constants and pumps (a pump
        whose range is (0, 0) in a phase is off there, whatever the schedule asks,
        and its rate is recorded as 0); each addition a state jump
        (:func:`optfeed.phases.jump`), its time sampled twice, before and after.

        A phase ends at its fixed time ('at'), at the time the schedule or
        ``switch_times`` gives ('between'), or at the first moment its condition
        holds ('when'): the sign of the condition is watched on the dense output of
        every piece and the crossing narrowed down by integrating again from the
        sample before it (to under 1e-10 h, then a secant step); the next phase
        starts from the state there. A phase whose end time has passed when it
        starts (a condition held late) lasts no time. A 'when' phase whose condition
        never holds lasts to the end of the run and the later phases never start
        (``Trajectory.unended``).
        """
        m = self.model
        ends = self._phase_ends(schedule, switch_times)
        try:
            segments = schedule.segments(m.feed_names, end_time)
        except ScheduleOverflow as exc:
            raise SimulationError(f"the rate of feed {exc.feed!r} grows past any finite number", exc.time) from None
        max_len = end_time * self.points / max(min_points, 1)
        additions = [a for a in m.problem.additions if a.time < end_time]
        phase_p = tuple(phase_constants(m, ph, p) for ph in self.phases)
        x = np.array(m.x0 if x0 is None else x0, dtype=float)
        ts, xs, us, index, in_phase, pieces, piece_phase = [], [], [], [], [], [], []
        switches, applied = {}, []
        unended = None
        t, si, ai = 0.0, 0, 0

        def record(T, X, piece, k):
            ts.append(T)
            xs.append(X)
            us.append(piece.rates(T))
            index.append(np.full(len(T), len(pieces)))
            in_phase.append(np.full(len(T), k))
            pieces.append(piece)
            piece_phase.append(k)

        for k, ph in enumerate(self.phases):
            last = k == len(self.phases) - 1
            watch = self._conditions[k] if not last else None
            stop = end_time if (last or watch is not None) else min(max(ends[k], t), end_time)
            ended = None
            if watch is not None and t < end_time:
                while si + 1 < len(segments) and segments[si].end <= t:
                    si += 1
                seg = self._pumps_of(segments[si], ph)
                if self._condition(k, seg, np.array([t]), x[None, :], phase_p[k])[0] <= 0:
                    ended = t  # it holds already
            while ended is None and t < stop:
                while si + 1 < len(segments) and segments[si].end <= t:
                    si += 1
                t_next = min(segments[si].end, stop, additions[ai].time if ai < len(additions) else math.inf)
                stretch = self._pumps_of(_shifted(segments[si], t, t_next, m.feed_names), ph)
                for piece in _pieces(stretch, max_len, m.feed_names):
                    if deadline is not None and time.monotonic() > deadline:
                        raise TimeLimitReached("the time limit was reached before the end of the run", piece.start)
                    tt, xf = self._integrate(piece, piece.start, x, piece.end, phase_p[k], k)
                    T, X = np.concatenate([[piece.start], tt]), np.vstack([x, xf])
                    if watch is not None:
                        c = self._condition(k, piece, T, X, phase_p[k])
                        hit = np.nonzero(c <= 0)[0]
                        if len(hit):
                            j = max(int(hit[0]), 1)
                            t_star, x_star = self._crossing(piece, T[j - 1], X[j - 1], T[j], phase_p[k], k)
                            record(np.append(T[:j], t_star), np.vstack([X[:j], x_star]), piece, k)
                            t, x, ended = t_star, x_star, t_star
                            break
                    record(T, X, piece, k)
                    x = xf[-1]
                if ended is not None:
                    break
                t = t_next
                while ai < len(additions) and additions[ai].time <= t:
                    a = additions[ai]
                    x = np.asarray(jump(m, a, x), dtype=float)
                    V = x[m.index("V")]
                    if not V > 0:
                        raise SimulationError(f"the {a.kind} of {a.volume * 1e3:g} mL at {a.time:g} h ({a.key}) "
                                              f"takes the broth volume to {V * 1e3:.4g} mL: nothing would be left",
                                              a.time)
                    applied.append((a, float(V)))
                    ai += 1
                    seg = self._pumps_of(segments[si], ph)
                    if watch is not None and self._condition(k, seg, np.array([t]), x[None, :], phase_p[k])[0] <= 0:
                        ended = t
            if last:
                break
            if watch is not None and ended is None:
                unended = ph.name
                break
            if ended is None and t >= end_time:
                break  # its end lies at or after the end of the run
            switches[ph.name] = float(t)
        return Trajectory(
            t=np.concatenate(ts), x=np.vstack(xs), u=np.vstack(us),
            state_names=tuple(m.state_names), feed_names=tuple(m.feed_names),
            piece=np.concatenate(index), _pieces=tuple(pieces), _simulator=self, _p=p,
            phase=np.concatenate(in_phase), switches=switches, unended=unended, additions=tuple(applied),
            requested=tuple(segments),
            _piece_phase=tuple(piece_phase), _phase_p=phase_p,
        )

    def _phase_ends(self, schedule, switch_times) -> list:
        """End time (h) of each 'at' and 'between' phase, None for the others."""
        given = dict(getattr(schedule, "switch_times", None) or {})
        given.update(switch_times or {})
        where = getattr(schedule, "source", "") or IN_CODE
        names = [ph.name for ph in self.phases]
        for name in given:
            if name not in names:
                raise InputError.one(where, None, f"phases.{name}", f"{name!r} is not a phase of this problem "
                                                                    f"(phases: {', '.join(names)})")
        ends = []
        for ph in self.phases:
            e = ph.end
            if e.kind == "at":
                ends.append(e.time)
            elif e.kind == "between":
                if ph.name not in given:
                    raise InputError.one(where, None, f"phases.{ph.name}",
                                         f"the schedule must give the end of phase {ph.name!r} ({e.text}): a "
                                         "'phase' column in a CSV schedule, 'phases: {" + ph.name +
                                         ": 12 h}' in a YAML one")
                value = float(given[ph.name])
                if not (e.lower - 1e-9 <= value <= e.upper + 1e-9):
                    raise InputError.one(where, None, f"phases.{ph.name}",
                                         f"phase {ph.name!r} ends at {value:g} h, outside its window "
                                         f"({e.lower:g} h to {e.upper:g} h)")
                ends.append(value)
            else:  # a condition's end comes from the simulation (a given one is not used)
                ends.append(None)
        return ends

    def _pumps_of(self, seg: Segment, phase) -> Segment:
        """``seg`` with the pumps that ``phase`` turns off (range (0, 0)) off."""
        off = [j for j, f in enumerate(self.model.feed_names) if phase.pumps.get(f) == (0.0, 0.0)]
        if not off:
            return seg
        a = tuple(0.0 if j in off else v for j, v in enumerate(seg.a))
        b = tuple(0.0 if j in off else v for j, v in enumerate(seg.b))
        return Segment(seg.start, seg.end, a, b, seg.k)

    def _condition(self, k: int, seg: Segment, T, X, p) -> np.ndarray:
        """Phase ``k``'s end condition (above zero while it goes on) at times ``T``."""
        f = self._conditions[k]
        n = len(T)
        out = f.map(n)(np.asarray(T)[None, :], np.asarray(X).T, seg.rates(T).T, p)
        return np.array(out).ravel()

    def _crossing(self, seg: Segment, t_lo: float, x_lo, t_hi: float, p, k: int):
        """(time, state) where phase ``k``'s condition reaches zero in (t_lo, t_hi]."""
        c_lo, c_hi = None, None
        for _ in range(8):
            T, X, _ = self.between(seg, t_lo, x_lo, t_hi, p, k)
            c = self._condition(k, seg, T, X, p)
            hit = np.nonzero(c <= 0)[0]
            j = max(int(hit[0]), 1) if len(hit) else len(T) - 1
            t_lo, x_lo, t_hi = float(T[j - 1]), X[j - 1], float(T[j])
            c_lo, c_hi = float(c[j - 1]), float(c[j])
            if t_hi - t_lo < 1e-10:
                break
        if c_hi is not None and c_lo > 0 >= c_hi and t_hi > t_lo:
            t_star = t_lo + (t_hi - t_lo) * c_lo / (c_lo - c_hi)
        else:
            t_star = t_hi
        if t_star <= t_lo:
            return t_lo, np.array(x_lo, dtype=float)
        _, xf = self._integrate(seg, t_lo, np.asarray(x_lo, dtype=float), t_star, p, k)
        return t_star, xf[-1]

    def between(self, seg: Segment, t0: float, x0, t1: float, p, phase: int = 0):
        """Dense output (t, x, u) from state ``x0`` at ``t0`` to ``t1`` within ``seg``
        (in phase number ``phase``, with its model; ``p`` its constants)."""
        t, xf = self._integrate(seg, t0, np.asarray(x0, dtype=float), t1, p, phase)
        t = np.concatenate([[t0], t])
        return t, np.vstack([x0, xf]), seg.rates(t)

    def between_many(self, items, phase: int = 0) -> list:
        """:meth:`between` for many ``(seg, t0, x0, t1, p)`` of phase ``phase``, as one
        system (tolerances divided by sqrt(B), as :meth:`run_batch`; B the next power
        of two, the last request repeated to fill it); one request
        alone, or a batch CVODES cannot finish, goes through :meth:`between` one by
        one. A list of (t, x, u)."""
        if len(items) <= 1:
            return [self.between(*item, phase) for item in items]
        m = self.models[phase]
        B = 1 << (len(items) - 1).bit_length()  # padded to a power of two: few integrators to build
        integrator = self._batch_integrator(phase, B)
        try:
            padded = list(items) + [items[-1]] * (B - len(items))
            X0 = np.array([item[2] for item in padded], dtype=float)
            Q = np.array([np.concatenate([_law(seg, t0, t1, m.feed_names), p]) for seg, t0, _, t1, p in padded])
            (xf,) = call(integrator, {"x0": X0, "p": Q}, ["xf"])
            xf = xf.reshape(-1, B, m.nx).transpose(1, 0, 2)  # (B, points, nx)
        except (RuntimeError, SimulationError):
            xf = None
        if xf is None or not np.all(np.isfinite(xf)):
            return [self.between(*item, phase) for item in items]
        out = []
        for j, (seg, t0, x0, t1, _) in enumerate(items):
            t = np.concatenate([[t0], t0 + (t1 - t0) * self._grid])
            out.append((t, np.vstack([x0, xf[j]]), seg.rates(t)))
        return out

    def _batch_integrator(self, phase: int, size: int):
        """The integrator of :func:`_piece_integrator` for phase ``phase``'s model and
        ``size`` runs (built once)."""
        key = (id(self.models[phase]), size)
        if key not in self._batch_integrators:
            scale = math.sqrt(size)
            self._batch_integrators[key] = _piece_integrator(self.models[phase], self._grid, self.rtol / scale,
                                                             self.atol / scale, size, self.method)
        return self._batch_integrators[key]

    def _integrate(self, seg: Segment, t0: float, x0, t1: float, p, phase: int = 0):
        h = t1 - t0
        q = np.concatenate([_law(seg, t0, t1, self.model.feed_names), p])
        try:
            (xf,) = call(self._integrators[phase], {"x0": x0, "p": q}, ["xf"], self.work)
        except RuntimeError as exc:
            raise SimulationError(f"the integrator failed ({_short(exc)}); {self._largest(x0, seg, t0)}",
                                  t0) from None
        xf = xf.reshape(-1, self.models[phase].nx)  # (points, nx)
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


def _law(seg: Segment, t0: float, t1: float, feed_names=()) -> np.ndarray:
    """The pump law of ``seg`` from ``t0`` to ``t1`` (h) as the integrator takes it:
    (t0, h, a, b, k), rates measured from ``t0``."""
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
        raise SimulationError(f"the rate of feed {feed_names[j]!r} grows past any finite number", t0) from None
    return np.concatenate([[t0, h], a, b, seg.k])


def _piece_integrator(model: Model, grid, rtol: float, atol: float, size: int = 1, method: str = "bdf"):
    """CVODES over one piece in scaled time tau in [0, 1], output at ``grid``, for
    ``size`` runs side by side: states (nx, size) and (pump law t0, h, a, b, k;
    constants) (2 + 3 nu + n_constants, size), each stacked column by column;
    ``method`` 'bdf' or 'adams'."""
    nu, nq = model.nu, 2 + 3 * model.nu
    tau = ca.SX.sym("tau")
    X = ca.SX.sym("x", model.nx, size)
    Q = ca.SX.sym("q", nq + model.n_constants, size)
    f = model.function_p("f", [model.rhs])
    odes = []
    for j in range(size):
        q = Q[:, j]
        t0, h = q[0], q[1]
        a, b, k = q[2:2 + nu], q[2 + nu:2 + 2 * nu], q[2 + 2 * nu:nq]
        u = (a + b * h * tau) * ca.exp(k * h * tau)
        odes.append(h * f(t0 + h * tau, X[:, j], u, q[nq:]))
    opts = {"abstol": atol, "reltol": rtol, "max_num_steps": 200000, "show_eval_warnings": False,
            "disable_internal_warnings": True, "linear_multistep_method": method}
    return ca.integrator("pieces", "cvodes", {"x": ca.vec(X), "p": ca.vec(Q), "t": tau, "ode": ca.vertcat(*odes)},
                         0.0, grid, opts)


def cheaper_method(model: Model, schedule: Schedule, end_time: float, simulators: dict | None = None,
                   deadline: float | None = None) -> tuple[str, dict]:
    """The multistep method ('bdf' or 'adams') that integrates ``schedule`` on
    ``model``'s nominal values with less work, for many runs of the same schedule
    (the Monte Carlo samples); and the nominal run made with each (method ->
    Trajectory, None where it failed or met the ``deadline``). ``simulators``:
    method -> Simulator of ``model`` to use (those missing are built).

    Work is counted, not timed, so that the choice is the same on every machine and
    every time: CVODES' right-hand-side evaluations plus its Jacobian set-ups over
    the nominal run; the choice rests on that count alone, whatever its cause. At
    the tight tolerances used here Adams' higher orders (up to 12, against BDF's
    5) often take about half the steps; CVODES iterates either method's implicit
    steps by Newton's method, so a stiff model does not rule Adams out (a stiff
    pair in the tests needs less work with it), while some cultures need less with
    BDF. BDF is kept on a tie, and where its run fails or meets the deadline (then
    Adams is not tried). Both hold the same tolerances."""
    simulators = dict(simulators or {})
    work, runs = {}, {}
    for method in METHODS:
        sim = simulators.get(method) or Simulator(model, method=method)
        if sim.method != method:
            raise ValueError(f"the simulator given for {method!r} integrates with {sim.method!r}")
        before, sim.work = sim.work, {}
        try:
            runs[method] = sim.run(schedule, end_time, deadline=deadline)
            work[method] = sim.work.get("nfevals", 0) + sim.work.get("nlinsetups", 0)
        except (SimulationError, TimeLimitReached):
            runs[method], work[method] = None, math.inf
        finally:
            sim.work = before
        if runs[method] is None:
            runs.update({m: None for m in METHODS if m not in runs})
            break
    return ("adams" if work.get("adams", math.inf) < work["bdf"] else "bdf"), runs


def simulate(model: Model, schedule: Schedule, end_time: float, **kwargs) -> Trajectory:
    """Integrate ``schedule`` over [0, end_time] h. See :class:`Simulator`."""
    min_points = kwargs.pop("min_points", SAMPLES)
    x0, p, deadline = kwargs.pop("x0", None), kwargs.pop("p", None), kwargs.pop("deadline", None)
    return Simulator(model, **kwargs).run(schedule, end_time, min_points=min_points, x0=x0, p=p, deadline=deadline)


def _shifted(seg: Segment, start: float, end: float, feed_names=()) -> Segment:
    """The part of ``seg`` from ``start`` to ``end`` (h), its law measured from ``start``."""
    if start == seg.start:
        return Segment(seg.start, end, seg.a, seg.b, seg.k)
    d = start - seg.start
    try:
        grow = [math.exp(ki * d) for ki in seg.k]
    except OverflowError:
        j = max(range(len(seg.k)), key=lambda i: seg.k[i])
        raise SimulationError(f"the rate of feed {feed_names[j]!r} grows past any finite number",
                              float(start)) from None
    a = tuple((ai + bi * d) * g if ai or bi else 0.0 for ai, bi, g in zip(seg.a, seg.b, grow))
    b = tuple(bi * g if bi else 0.0 for bi, g in zip(seg.b, grow))
    return Segment(float(start), float(end), a, b, seg.k)


def _pieces(seg: Segment, max_len: float, feed_names=()):
    n = max(1, math.ceil((seg.end - seg.start) / max_len - 1e-9))
    if n == 1:
        yield seg
        return
    edges = np.linspace(seg.start, seg.end, n + 1)
    for s, e in zip(edges[:-1], edges[1:]):
        yield _shifted(seg, float(s), float(e), feed_names)


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
