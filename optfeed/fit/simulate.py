"""Re-simulating past runs: the applied schedule, the run's own constants, and the
sample volumes taken out at each sampling time (state jumps), with CVODES.

Two ways, one rule (a stretch between two sampling times or pump changes is
integrated on its own, and a sample sees the broth before it is taken):

* :func:`simulate_run` samples a run densely, for figures and reports;
* :func:`anchored_run` is the calibration NLP's initial course: the model's shape
  between samples, pinned to the measured values at each sample;
* :class:`Sampler` gives the model's values at the sampling times only and, on
  request, their derivatives with respect to the estimated parameters from the
  forward sensitivity equations dS/dt = f_x S + f_theta, S = dx/dtheta, integrated
  with the states by the same CVODES run (the sensitivities of a sample's value are
  the exact Jacobian of the fit's residuals, up to the integrator's tolerance, which
  for them is :data:`SENSITIVITY_TOLERANCE`: see :func:`sensitivity_model`).
"""

from __future__ import annotations

import dataclasses

import casadi as ca
import numpy as np

from ..simulate import ATOL, Simulator, Trajectory
from .transcription import stretches


def simulate_run(sim: Simulator, run, constants) -> Trajectory:
    """The run re-simulated with ``constants`` (the model's p vector): a Trajectory
    of the fit's model (all its states), sampled densely, with the sample-volume
    jumps applied just after each sampling time (the sample sees the broth before
    it is taken)."""
    return _stretch_by_stretch(sim, run, constants, pinned=False)


def anchored_run(sim: Simulator, run, constants) -> Trajectory:
    """An initial course for the calibration NLP: the run simulated stretch by
    stretch with ``constants``, each measured species pinned to its sample at every
    sampling time. A stretch that ends at a sample is integrated from where the
    one before it ended; for each species measured there, the difference between
    the measured value (a negative reading as zero) and the simulated end is spread
    linearly over the stretch (nothing at its start, all of it at its end), so the
    course is continuous, passes through the data and between two samples has the
    model's shape at these constants (a species stays non-negative). Species not
    measured at a sample, ``V`` and everything between pump changes follow the
    simulation.

    Against straight lines between the samples (what the NLP started from before),
    the collocation equations hold inside each stretch up to the linear correction;
    measured on tests/fitcase.py's design from the problem file's values, IPOPT
    needed 27-32 iterations for 8 runs instead of 47-59, and about as many as
    before from random guesses far from the estimates.

    Raises SimulationError where the integrator cannot follow a stretch."""
    return _stretch_by_stretch(sim, run, constants, pinned=True)


def _stretch_by_stretch(sim: Simulator, run, constants, pinned: bool, ends: dict | None = None,
                        x0=None) -> Trajectory:
    """The run integrated stretch by stretch (the sample volume taken after each
    sampling time) from ``x0`` (default: the run's initial state); with ``pinned``,
    each stretch ending at a sample is bent onto the measured values there, as
    :func:`anchored_run` says. ``ends``, a dict, receives for each sample index
    (time h, state before the sample is taken, pump rates L/h)."""
    m = sim.model
    v = m.index("V")
    pins = {m.index(q): y for q, y in run.values.items() if q in m.state_names and q != "V"} if pinned else {}
    x = np.array(run.x0 if x0 is None else x0, dtype=float)
    ts, xs, us = [], [], []
    for a, b, _, seg, sample in stretches(run, m.feed_names, run.end_time):
        t, xx, uu = sim.between(seg, a, x, b, constants)
        if pins and sample is not None:
            ramp = (t - a) / (b - a)
            for i, y in pins.items():
                if np.isfinite(y[sample]):
                    xx[:, i] = np.maximum(xx[:, i] + ramp * (max(y[sample], 0.0) - xx[-1, i]), 0.0)
        ts.append(t), xs.append(xx), us.append(uu)
        x = xx[-1].copy()
        if sample is not None:
            if ends is not None:
                ends[sample] = (b, x.copy(), uu[-1])
            if run.sample_volume:
                x[v] -= run.sample_volume
    return Trajectory(np.concatenate(ts), np.vstack(xs), np.vstack(us), tuple(m.state_names), tuple(m.feed_names),
                      _p=np.asarray(constants, dtype=float))


# The error CVODES' error test allows in a sensitivity, relative to its largest
# magnitude in the run (see sensitivity_model).
SENSITIVITY_TOLERANCE = 1e-8


def sensitivity_model(model, estimated):
    """``model`` with the sensitivities S = dx/dtheta of every state to each
    estimated constant appended to its states (column by column), and their
    equations dS/dt = f_x S + f_theta appended to its right-hand side.

    The appended states are S divided by a scale c (one per entry of S, constants
    appended to the model's, after its own): dS'/dt = (f_x (c * S') + f_theta) / c.
    With c = 1 they are S itself, and CVODES holds them to the states' relative
    tolerance, which nearly doubles its steps on a fermentation run (1064 against
    591 for the states alone on the tests' batch run). With c = |S|max *
    SENSITIVITY_TOLERANCE / ATOL (|S|max: the entry's largest magnitude over
    the run's course in its last call) S' stays below ATOL /
    SENSITIVITY_TOLERANCE, so its error test is the absolute one and allows
    S an error of SENSITIVITY_TOLERANCE |S|max: the steps are then the states'
    (574 on that run; 2.4 against 3.6 ms), and the sensitivities are as accurate
    as those steps make them. Measured on the tests' two runs: 3e-7 of |S|max
    from the run held to the states' tolerance, whatever SENSITIVITY_TOLERANCE
    from 1e-8 to 1e-1 (as CVODES' own option to leave sensitivities out of its
    error test would give); about 1e-6 from central differences of scipy's runs,
    the differences' own accuracy. The estimates move by about 2e-6 standard
    errors, the standard errors by less than 1e-6."""
    idx = [model.constant_index(n) for n in estimated]
    S = ca.SX.sym("S", model.nx, len(idx))
    c = ca.SX.sym("c", model.nx, len(idx))
    f_x = ca.jacobian(model.rhs, model.x)
    f_theta = ca.jacobian(model.rhs, model.p)[:, idx]
    dS = (ca.mtimes(f_x, c * S) + f_theta) / c
    names = [f"d{x}/d{p}" for p in estimated for x in model.state_names]
    return dataclasses.replace(model, x=ca.vertcat(model.x, ca.vec(S)), rhs=ca.vertcat(model.rhs, ca.vec(dS)),
                               p=ca.vertcat(model.p, ca.vec(c)), state_names=list(model.state_names) + names,
                               constant_names=list(model.constant_names) + [f"scale of {n}" for n in names],
                               p0=np.concatenate([model.p0, np.ones(c.numel())]))


class Sampler:
    """The model's values at a run's sampling times, with their derivatives.

    Parameters
    ----------
    model : Model
        The fit's model (:func:`optfeed.fit.runs.fit_model`).
    estimated : list of str
        Names of the estimated constants (the columns of the derivatives).

    Built once per fit; each call integrates a run once (one CVODES call per
    stretch). A run's sensitivities are scaled by their largest magnitudes in the
    run's last call with them (see :func:`sensitivity_model`); its first call
    guesses them (:meth:`_first_scale`). With them the run is sampled as densely as
    :func:`simulate_run` samples it (CVODES interpolates between its own steps:
    2.24 against 2.20 ms for the tests' batch run with output at the stretch ends
    only), so the fit's figures and checks need no further simulation.
    """

    def __init__(self, model, estimated):
        self.model, self.estimated = model, list(estimated)
        self.idx = [model.constant_index(n) for n in self.estimated]
        self._plain_sim = None  # built on first use: a fit without profiles needs only the sensitivities
        self._sens = Simulator(sensitivity_model(model, self.estimated))
        self._scale = {}  # id(run) -> (the run, (nx * p,) scale of its sensitivity states)
        m = model
        names = [q for q in m.values if q != "F_total"]
        self._value_names = names
        if names:
            v = ca.vertcat(*[m.values[q] for q in names])
            v_x = ca.jacobian(v, m.x)
            v_p = ca.jacobian(v, m.p)[:, self.idx]
            self._v = ca.Function("v", [m.t, m.x, m.u, m.p], [v, v_x, v_p])

    def _first_scale(self, run, constants) -> np.ndarray:
        """The scale of a run's sensitivity states before any call has measured them:
        |S|max guessed as (the state's largest value in the run's initial state and
        data) / |theta|, the size of a sensitivity where the state is proportional
        to the parameter. A guess too large only loosens an error test that the
        sensitivities' accuracy does not rest on (see :func:`sensitivity_model`); one
        too small by a factor k tightens it k times, up to the states' own
        tolerance at k = SENSITIVITY_TOLERANCE / RTOL (100): more steps, never a
        wrong value."""
        m, p = self.model, len(self.idx)
        size = np.abs(np.asarray(run.x0, dtype=float))
        for q, y in run.values.items():
            if q in m.state_names and np.isfinite(y).any():
                i = m.index(q)
                size[i] = max(size[i], float(np.nanmax(np.abs(y))))
        theta = np.abs(np.asarray(constants, dtype=float)[self.idx])
        guess = size[:, None] / np.where(theta > 0, theta, 1.0)[None, :]  # (nx, p)
        guess = guess.T.ravel()  # column by column, as the states are appended
        return np.where(guess > 0, guess * SENSITIVITY_TOLERANCE / ATOL, 1.0)

    @property
    def _plain(self) -> Simulator:
        if self._plain_sim is None:
            self._plain_sim = Simulator(self.model, points_per_piece=1)
        return self._plain_sim

    def values(self, run, constants, jacobian: bool = False):
        """(values, derivatives, course) at the run's sampling times.

        values : dict quantity -> (n,) model values (internal units) at each sampling
        time, before the sample is taken; derivatives : dict quantity -> (n, p)
        d value / d theta, or None unless ``jacobian``; course : with ``jacobian``,
        the run's Trajectory (the model's states, sampled as :func:`simulate_run`
        samples them), else None.
        """
        m = self.model
        nx, p = m.nx, len(self.idx)
        n = len(run.times)
        ends, course = {}, None
        if jacobian:
            kept = self._scale.get(id(run))
            scale = kept[1] if kept is not None and kept[0] is run else self._first_scale(run, constants)
            full = _stretch_by_stretch(self._sens, run, np.concatenate([constants, scale]), pinned=False, ends=ends,
                                       x0=np.concatenate([run.x0, np.zeros(nx * p)]))
            biggest = (np.abs(full.x[:, nx:]).max(axis=0) * scale).reshape(p, nx)
            # no scale below 1e-12 of the largest sensitivity to the same parameter
            biggest = np.maximum(biggest, 1e-12 * biggest.max(axis=1, keepdims=True)).ravel()
            self._scale[id(run)] = (run, np.where(biggest > 0, biggest * SENSITIVITY_TOLERANCE / ATOL, 1.0))
            course = Trajectory(full.t, full.x[:, :nx], full.u, tuple(m.state_names), tuple(m.feed_names),
                                _p=np.asarray(constants, dtype=float))
        else:
            _stretch_by_stretch(self._plain, run, constants, pinned=False, ends=ends)
        states = np.array([ends[k][1] for k in range(n)]).reshape(n, -1)
        if jacobian:
            states[:, nx:] *= scale
        out, der = {}, ({} if jacobian else None)
        rows = {}
        for q in run.values:
            if q in m.state_names:
                i = m.index(q)
                out[q] = states[:, i]
                if jacobian:
                    der[q] = states[:, nx + i::nx][:, :p]
            else:
                rows[q] = self._value_names.index(q)
        if rows:
            vals = np.zeros((n, len(self._value_names)))
            dvals = np.zeros((n, len(self._value_names), p))
            for k in range(n):
                t, xk, u = ends[k]
                vv, vx, vp = self._v(t, xk[:nx], u, constants)
                vals[k] = np.array(vv).ravel()
                if jacobian:
                    Sk = states[k, nx:].reshape(p, nx).T  # (nx, p)
                    dvals[k] = np.array(vx) @ Sk + np.array(vp)
            for q, j in rows.items():
                out[q] = vals[:, j]
                if jacobian:
                    der[q] = dvals[:, j, :]
        return out, der, course
