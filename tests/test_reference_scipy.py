"""CVODES trajectories against scipy's solve_ivp, an independent integrator.

Reference: scipy.integrate.solve_ivp with method "Radau" (an implicit Runge-Kutta
method, unrelated to CVODES' BDF), run segment by segment on the same right-hand
side and pump laws at tight tolerances. Every shipped example is compared.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from optfeed.model import build_model
from optfeed.problem import load_problem
from optfeed.schedule import load_schedule
from optfeed.simulate import simulate

from conftest import CONFIGS, EXAMPLES


def scipy_states(model, schedule, end_time, times):
    """States at ``times`` by solve_ivp, restarted at every pump change.

    A time on a pump change is taken from the segment that ends there (the state
    is continuous, so either side is the same)."""
    f = model.function("f", [model.rhs])
    x = model.x0.copy()
    out = np.full((len(times), model.nx), np.nan)
    for seg in schedule.segments(model.feed_names, end_time):

        def rhs(t, y, seg=seg):
            return np.array(f(t, y, seg.rates(np.array([t]))[0])).ravel()

        sol = solve_ivp(rhs, (seg.start, seg.end), x, method="Radau", rtol=1e-11, atol=1e-11,
                        dense_output=True)
        assert sol.success, sol.message
        inside = (times >= seg.start) & (times <= seg.end)
        if inside.any():
            out[inside] = sol.sol(times[inside]).T
        x = sol.y[:, -1]
    return out


def compare(problem_file, schedule_file):
    problem = load_problem(CONFIGS / problem_file)
    model = build_model(problem)
    tf = problem.horizon.end_time
    schedule = load_schedule(CONFIGS / schedule_file, model.feed_names, tf)
    traj = simulate(model, schedule, tf)
    # ~90 of the dense samples, exactly where CVODES output them, and the last one
    pick = np.append(np.arange(0, len(traj.t) - 1, 25), len(traj.t) - 1)
    ref = scipy_states(model, schedule, tf, traj.t[pick])
    scale = np.max(np.abs(ref), axis=0) + 1e-30  # per state: its largest magnitude over the run
    return np.max(np.abs(traj.x[pick] - ref) / scale), np.max(np.abs(traj.final - ref[-1]) / scale)


@pytest.mark.parametrize("problem_file,schedule_file,_", EXAMPLES)
def test_cvodes_matches_solve_ivp(problem_file, schedule_file, _):
    err_path, err_end = compare(problem_file, schedule_file)
    # both integrators run at ~1e-10..1e-11 relative tolerance; 1e-6 of each
    # state's range leaves room for error growth over the run
    assert err_path < 1e-6, f"largest scaled difference along the run: {err_path:.3g}"
    assert err_end < 1e-6, f"largest scaled difference at the end: {err_end:.3g}"
