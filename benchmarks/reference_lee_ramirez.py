"""Reference: Lee-Ramirez induced foreign protein (two feeds) by a hand-written direct collocation in raw CasADi.

The yardstick `optimize_benchmark.py` holds `optfeed optimize` against. Written the way
an engineer writes a one-off script, with nothing from optfeed: the textbook
formulation (states at element boundaries and at the Radau points, continuity rows
between elements, the model's right-hand side at every Radau point), `expand: True`,
IPOPT from one start, the states scaled by hand-picked magnitudes.

Problem (tests/published/lee_ramirez.yaml): Lee and Ramirez (1994) with the modified
parameters of Tholudur and Ramirez (1997), as case study II of Balsa-Canto, Banga,
Alonso and Vassiliadis (2001), Q = 0; states V (L), X, S, P, I (g/L), the inducer's
shock and recovery factors (per cell, not diluted); a glucose feed (100 g/L) and an
inducer feed (4 g/L), each 0 to 1 L/h; tf = 10 h; maximize P * V at the end.

Grid as optfeed's default: 40 pump steps x 4 elements per step, Radau degree 3;
IPOPT tolerance 1e-8. The answer is re-simulated with CVODES (tolerances 1e-12) and
that objective is printed, as one JSON line:

    python benchmarks/reference_lee_ramirez.py [--feed RATE_L_PER_H] [--pump-steps 40] [--elements-per-step 4]

The start: both pumps at 0.1 L/h, a tenth of their maximum (there is no volume bound).
(Measured: from both at half their maximum, 0.5 L/h, IPOPT ends in restoration
failure at 0.937; from 0.25 L/h it reaches the same optimum as from 0.1 L/h in 366
iterations instead of 50.)
"""

import argparse
import json
import resource
import time

import casadi as ca
import numpy as np

T_END = 10.0  # h
U_MAX = 1.0  # L/h, both pumps
X0 = [1.0, 0.1, 40.0, 0.0, 0.0, 1.0, 0.0]  # V, X, S, P, I, shock, recovery
X_SCALE = np.array([20.0, 5.0, 50.0, 1.0, 4.0, 1.0, 1.0])  # nominal magnitudes
J_SCALE = 1.0
DEG = 3  # Radau degree


def rhs(x, u):
    V, X, S, P, I, ish, irf = x[0], x[1], x[2], x[3], x[4], x[5], x[6]
    u1, u2 = u[0], u[1]
    k = 0.09 * I / (0.034 + I)
    g = S / (0.108 + S + S ** 2 / 14814.8)
    mu = 0.407 * g * (ish + 0.22 * irf / (0.22 + I))
    Rfp = 0.095 * g * (0.0005 + I) / (0.022 + I)
    D = (u1 + u2) / V
    return ca.vertcat(u1 + u2,
                      mu * X - D * X,
                      u1 / V * 100.0 - D * S - mu * X / 0.51,
                      Rfp * X - D * P,
                      u2 / V * 4.0 - D * I,
                      -k * ish,
                      k * (1 - irf))


def objective(x):
    return x[3] * x[0]


def main():
    cpu0 = time.process_time()
    ap = argparse.ArgumentParser()
    ap.add_argument("--feed", type=float, default=0.1 * U_MAX, help="the constant rate of both pumps to start from, L/h")
    ap.add_argument("--pump-steps", type=int, default=40)
    ap.add_argument("--elements-per-step", type=int, default=4)
    args = ap.parse_args()
    feed, M, K = args.feed, args.pump_steps, args.elements_per_step
    N = M * K  # finite elements

    # Radau collocation coefficients (the textbook construction)
    tau = np.append(0, ca.collocation_points(DEG, "radau"))
    C = np.zeros((DEG + 1, DEG + 1))
    D = np.zeros(DEG + 1)
    for j in range(DEG + 1):
        p = np.poly1d([1])
        for r in range(DEG + 1):
            if r != j:
                p *= np.poly1d([1, -tau[r]]) / (tau[j] - tau[r])
        D[j] = p(1.0)
        dp = np.polyder(p)
        for r in range(DEG + 1):
            C[j, r] = dp(tau[r])

    xs = ca.SX.sym("x", 7)
    us = ca.SX.sym("u", 2)
    f = ca.Function("f", [xs, us], [rhs(xs, us)])
    h = T_END / N

    # initial guess: the constant feeds, simulated
    sim = ca.integrator("sim", "cvodes", {"x": xs, "p": us, "ode": rhs(xs, us)}, 0.0, list(h * tau[1:]),
                        {"abstol": 1e-10, "reltol": 1e-10})
    guess_b, guess_c = [np.array(X0)], []
    for k in range(N):
        out = np.array(sim(x0=guess_b[-1], p=[feed, feed])["xf"])
        guess_c.append(out.T)
        guess_b.append(out[:, -1])

    w, w0, lbw, ubw, g, lbg, ubg = [], [], [], [], [], [], []
    U = []
    for m in range(M):
        U.append(ca.MX.sym(f"U_{m}", 2))
        w.append(U[-1])
        w0 += [feed, feed]
        lbw += [0.0, 0.0]
        ubw += [U_MAX, U_MAX]
    Xk = ca.DM(np.array(X0) / X_SCALE)  # the first element starts from the known initial state
    for k in range(N):
        Uk = U[k // K]
        Xc = []
        for j in range(DEG):
            Xkj = ca.MX.sym(f"X_{k}_{j}", 7)
            Xc.append(Xkj)
            w.append(Xkj)
            w0 += list(guess_c[k][j] / X_SCALE)
            lbw += [0.0] * 7
            ubw += [np.inf] * 7
        Xk_end = D[0] * Xk
        for j in range(1, DEG + 1):
            xp = C[0, j] * Xk
            for r in range(DEG):
                xp = xp + C[r + 1, j] * Xc[r]
            g.append(h * f(Xc[j - 1] * X_SCALE, Uk) / X_SCALE - xp)
            lbg += [0.0] * 7
            ubg += [0.0] * 7
            Xk_end = Xk_end + D[j] * Xc[j - 1]
        Xk = ca.MX.sym(f"X_{k + 1}", 7)
        w.append(Xk)
        w0 += list(guess_b[k + 1] / X_SCALE)
        lbw += [0.0] * 7
        ubw += [np.inf] * 7
        g.append(Xk_end - Xk)
        lbg += [0.0] * 7
        ubg += [0.0] * 7
    nlp = {"x": ca.vertcat(*w), "f": -objective(Xk * X_SCALE) / J_SCALE, "g": ca.vertcat(*g)}
    solver = ca.nlpsol("solver", "ipopt", nlp, {"expand": True, "ipopt.tol": 1e-8, "ipopt.print_level": 0,
                                                "ipopt.sb": "yes", "print_time": False})
    cpu_built = time.process_time()
    sol = solver(x0=np.clip(w0, lbw, ubw), lbx=lbw, ubx=ubw, lbg=lbg, ubg=ubg)
    cpu_solved = time.process_time()
    stats = solver.stats()
    u_opt = np.array(sol["x"][:2 * M]).reshape(M, 2)
    J_nlp = -float(sol["f"]) * J_SCALE

    # re-simulate the pump schedule with CVODES, tight tolerances
    step = ca.integrator("step", "cvodes", {"x": xs, "p": us, "ode": rhs(xs, us)}, 0.0, T_END / M,
                         {"abstol": 1e-12, "reltol": 1e-12})
    x = np.array(X0)
    for m in range(M):
        x = np.array(step(x0=x, p=np.clip(u_opt[m], 0.0, U_MAX))["xf"]).ravel()
    J_sim = float(objective(x))
    ru = resource.getrusage(resource.RUSAGE_SELF)
    print(json.dumps({
        "problem": "lee_ramirez", "status": stats["return_status"], "iterations": stats["iter_count"],
        "objective": J_sim, "objective_nlp": J_nlp, "end_time": T_END, "start_feed": feed,
        "cpu_build": cpu_built - cpu0, "cpu_solve": cpu_solved - cpu_built,
        "elements": N, "cpu_process": ru.ru_utime + ru.ru_stime,
    }))


if __name__ == "__main__":
    main()
