"""optfeed.calls: a Function called through its buffer gives what CasADi's own call
gives (the reference: CasADi's plain call with matrices, and scipy's solve_ivp for an
integrator), to the last bit, in CasADi's column-major layout."""

from __future__ import annotations

import casadi as ca
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from optfeed.calls import call


def test_a_mapped_function_matches_the_plain_call_to_the_last_bit():
    x, u, p = ca.SX.sym("x", 3), ca.SX.sym("u", 2), ca.SX.sym("p", 2)
    f = ca.Function("f", [x, u, p], [ca.vertcat(ca.sin(x[0]) * u[1] + p[0], x[1] / (x[2] + p[1]))],
                    ["x", "u", "p"], ["g"])
    n = 37
    mapped = f.map("f_map", "serial", n, [2], [])  # p shared by the points
    rng = np.random.default_rng(3)
    X, U, P = rng.random((n, 3)) + 0.5, rng.random((n, 2)), rng.random(2)
    (got,) = call(mapped, {"x": X, "u": U, "p": P}, ["g"])
    plain = np.array(mapped(X.T, U.T, P))  # (2, n)
    assert got.reshape(n, 2).T.tobytes() == plain.tobytes()


def test_a_view_with_strides_goes_in_as_its_values():
    x = ca.SX.sym("x", 2)
    f = ca.Function("f", [x], [x[0] - 2 * x[1]], ["x"], ["y"]).map(4)
    X = np.arange(16.0).reshape(4, 4)[:, ::2]  # not contiguous
    (got,) = call(f, {"x": X}, ["y"])
    assert np.array_equal(got, X[:, 0] - 2 * X[:, 1])


def test_an_integrator_matches_scipy_and_a_failure_raises():
    x, k = ca.SX.sym("x"), ca.SX.sym("k")
    grid = np.linspace(0.0, 1.0, 11)[1:]
    opts = {"abstol": 1e-12, "reltol": 1e-12, "max_num_steps": 2000, "show_eval_warnings": False,
            "disable_internal_warnings": True}
    integ = ca.integrator("I", "cvodes", {"x": x, "p": k, "ode": k * x * x}, 0.0, grid, opts)
    (xf,) = call(integ, {"x0": [1.0], "p": [0.5]}, ["xf"])
    ref = solve_ivp(lambda t, y: 0.5 * y * y, (0, 1), [1.0], t_eval=grid, rtol=1e-12, atol=1e-12).y[0]
    assert np.allclose(xf, ref, rtol=1e-9)
    assert np.allclose(xf[-1], 2.0, rtol=1e-9)  # 1 / (1 - t/2) at t = 1
    with pytest.raises(RuntimeError):  # x blows up at t = 0.2 for k = 5, as a plain call raises
        call(integ, {"x0": [1.0], "p": [5.0]}, ["xf"])


def test_wrong_sizes_and_sparse_outputs_are_refused():
    x = ca.SX.sym("x", 3)
    f = ca.Function("f", [x], [x[0] * 2], ["x"], ["y"])
    with pytest.raises(ValueError, match="input 'x'"):
        call(f, {"x": np.ones(2)}, ["y"])
    g = ca.Function("g", [x], [ca.SX(ca.Sparsity.diag(3))], ["x"], ["y"])
    with pytest.raises(ValueError, match="not dense"):
        call(g, {"x": np.ones(3)}, ["y"])
    d = ca.SX.sym("d", ca.Sparsity.diag(3))
    h = ca.Function("h", [d], [ca.sum1(ca.sum2(d))], ["d"], ["y"])
    with pytest.raises(ValueError, match="input 'd' of h is not dense"):
        call(h, {"d": np.ones(3)}, ["y"])
