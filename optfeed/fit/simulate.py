"""Re-simulating past runs: the applied schedule, the run's own constants, and the
sample volumes taken out at each sampling time (state jumps), with CVODES."""

from __future__ import annotations

import numpy as np

from ..simulate import Simulator, Trajectory
from .transcription import stretches


def simulate_run(sim: Simulator, run, constants, points_per_hour: float | None = None) -> Trajectory:
    """The run re-simulated with ``constants`` (the model's p vector): a Trajectory
    of the full model, sampled densely, with the sample-volume jumps applied just
    after each sampling time (the sample sees the broth before it is taken)."""
    m = sim.model
    v = m.index("V")
    x = np.array(run.x0, dtype=float)
    ts, xs, us = [], [], []
    for a, b, _, seg, sample in stretches(run, m.feed_names, run.end_time):
        t, xx, uu = sim.between(seg, a, x, b, constants)
        ts.append(t), xs.append(xx), us.append(uu)
        x = xx[-1].copy()
        if sample is not None and run.sample_volume:
            x[v] -= run.sample_volume
    return Trajectory(np.concatenate(ts), np.vstack(xs), np.vstack(us), tuple(m.state_names), tuple(m.feed_names))


def measured_model_values(model, run, traj, constants) -> dict:
    """quantity -> model values at the run's sampling times (before each sample is taken)."""
    out = {}
    f = model.function("v", [model.values[q] for q in run.values if q in model.values] or [0], p=constants)
    value_names = [q for q in run.values if q in model.values]
    # the last occurrence of each sampling time is the end of the stretch before the jump
    idx = [int(np.nonzero(np.isclose(traj.t, t, rtol=0, atol=1e-12 * max(1.0, t)))[0][0]) for t in run.times]
    # the first point at a time equal to t ends the stretch that closes at t
    for q in run.values:
        if q in model.state_names:
            out[q] = traj.x[idx, model.index(q)]
    if value_names:
        vals = [np.array(f(traj.t[i], traj.x[i], traj.u[i])).ravel() for i in idx]
        for k, q in enumerate(value_names):
            out[q] = np.array([v[k] for v in vals])
    return out
