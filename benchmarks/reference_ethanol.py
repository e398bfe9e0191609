"""Reference: ethanol fed-batch (free end time) by a hand-written direct collocation in raw CasADi.

The yardstick `optimize_benchmark.py` holds `optfeed optimize` against. Written the way
an engineer writes a one-off script, with nothing from optfeed: the textbook
formulation (states at element boundaries and at the Radau points, continuity rows
between elements, the model's right-hand side at every Radau point), `expand: True`,
IPOPT from one start, the states scaled by hand-picked magnitudes, and the free end
time as a decision variable that stretches every element (time scaling).

Problem (tests/published/ethanol.yaml): Hong's model as studied by Chen and Hwang
(1990); states X, S, E (g/L), V (L); one feed of 150 g/L glucose at 0 to 12 L/h;
V <= 200 L; end time free in 20 to 100 h (guess 60 h); maximize E * V at the end.

Grid as optfeed's default: 40 pump steps x 4 elements per step, Radau degree 3;
IPOPT tolerance 1e-8. The answer is re-simulated with CVODES (tolerances 1e-12) and
that objective is printed, as one JSON line:

    python benchmarks/reference_ethanol.py [--feed RATE_L_PER_H] [--pump-steps 40] [--elements-per-step 4]

The start: half the pump's maximum or, if lower, the constant feed that fills the
vessel by the guessed end time ((200 - 10) L / 60 h = 3.17 L/h). (Measured: starts
from 0.05, 0.1, 0.3 and 1 L/h reach the same optimum.)
"""

import argparse
import json
import resource
import time

import casadi as ca
import numpy as np

T_MIN, T_MAX, T_GUESS = 20.0, 100.0, 60.0  # h
U_MAX = 12.0  # L/h
V_MAX = 200.0  # L
X0 = [1.0, 150.0, 0.0, 10.0]  # X, S, E, V
X_SCALE = np.array([10.0, 150.0, 100.0, 200.0])  # nominal magnitudes
J_SCALE = 20000.0
DEG = 3  # Radau degree


def rhs(x, u):
    X, S, E, V = x[0], x[1], x[2], x[3]
    g1 = (0.408 / (1 + E / 16)) * (S / (0.22 + S))
    g2 = (1 / (1 + E / 71.5)) * (S / (0.44 + S))
    D = u / V
    return ca.vertcat(g1 * X - D * X,
                      -10 * g1 * X + D * (150.0 - S),
                      g2 * X - D * E,
                      u)


def objective(x):
    return x[2] * x[3]


def main():
    cpu0 = time.process_time()
    ap = argparse.ArgumentParser()
    ap.add_argument("--feed", type=float, default=min(0.5 * U_MAX, (V_MAX - X0[3]) / T_GUESS), help="the constant feed to start from, L/h")
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

    xs = ca.SX.sym("x", 4)
    us = ca.SX.sym("u")
    f = ca.Function("f", [xs, us], [rhs(xs, us)])

    # initial guess: the constant feed, simulated over the guessed run length
    h0 = T_GUESS / N
    sim = ca.integrator("sim", "cvodes", {"x": xs, "p": us, "ode": rhs(xs, us)}, 0.0, list(h0 * tau[1:]),
                        {"abstol": 1e-10, "reltol": 1e-10})
    guess_b, guess_c = [np.array(X0)], []
    for k in range(N):
        out = np.array(sim(x0=guess_b[-1], p=feed)["xf"])
        guess_c.append(out.T)
        guess_b.append(out[:, -1])

    x_lo = [0.0] * 4
    x_hi = [np.inf, np.inf, np.inf, V_MAX / X_SCALE[3]]
    T = ca.MX.sym("T")  # end time, h
    w, w0, lbw, ubw, g, lbg, ubg = [T], [T_GUESS], [T_MIN], [T_MAX], [], [], []
    U = []
    for m in range(M):
        U.append(ca.MX.sym(f"U_{m}"))
        w.append(U[-1])
        w0.append(feed)
        lbw.append(0.0)
        ubw.append(U_MAX)
    h = T / N
    Xk = ca.DM(np.array(X0) / X_SCALE)  # the first element starts from the known initial state
    for k in range(N):
        Uk = U[k // K]
        Xc = []
        for j in range(DEG):
            Xkj = ca.MX.sym(f"X_{k}_{j}", 4)
            Xc.append(Xkj)
            w.append(Xkj)
            w0 += list(guess_c[k][j] / X_SCALE)
            lbw += x_lo
            ubw += x_hi
        Xk_end = D[0] * Xk
        for j in range(1, DEG + 1):
            xp = C[0, j] * Xk
            for r in range(DEG):
                xp = xp + C[r + 1, j] * Xc[r]
            g.append(h * f(Xc[j - 1] * X_SCALE, Uk) / X_SCALE - xp)
            lbg += [0.0] * 4
            ubg += [0.0] * 4
            Xk_end = Xk_end + D[j] * Xc[j - 1]
        Xk = ca.MX.sym(f"X_{k + 1}", 4)
        w.append(Xk)
        w0 += list(guess_b[k + 1] / X_SCALE)
        lbw += x_lo
        ubw += x_hi
        g.append(Xk_end - Xk)
        lbg += [0.0] * 4
        ubg += [0.0] * 4
    nlp = {"x": ca.vertcat(*w), "f": -objective(Xk * X_SCALE) / J_SCALE, "g": ca.vertcat(*g)}
    solver = ca.nlpsol("solver", "ipopt", nlp, {"expand": True, "ipopt.tol": 1e-8, "ipopt.print_level": 0,
                                                "ipopt.sb": "yes", "print_time": False})
    cpu_built = time.process_time()
    w0 = np.clip(w0, lbw, ubw)
    sol = solver(x0=w0, lbx=lbw, ubx=ubw, lbg=lbg, ubg=ubg)
    cpu_solved = time.process_time()
    stats = solver.stats()
    T_opt = float(np.clip(float(sol["x"][0]), T_MIN, T_MAX))
    u_opt = np.array(sol["x"][1:M + 1]).ravel()
    J_nlp = -float(sol["f"]) * J_SCALE

    # re-simulate the pump schedule with CVODES, tight tolerances
    step = ca.integrator("step", "cvodes", {"x": xs, "p": us, "ode": rhs(xs, us)}, 0.0, T_opt / M,
                         {"abstol": 1e-12, "reltol": 1e-12})
    x = np.array(X0)
    for m in range(M):
        x = np.array(step(x0=x, p=np.clip(u_opt[m], 0.0, U_MAX))["xf"]).ravel()
    J_sim = float(objective(x))
    ru = resource.getrusage(resource.RUSAGE_SELF)
    print(json.dumps({
        "problem": "ethanol", "status": stats["return_status"], "iterations": stats["iter_count"],
        "objective": J_sim, "objective_nlp": J_nlp, "end_time": T_opt, "start_feed": feed,
        "volume_end": float(x[3]),
        "cpu_build": cpu_built - cpu0, "cpu_solve": cpu_solved - cpu_built,
        "elements": N, "cpu_process": ru.ru_utime + ru.ru_stime,
    }))


if __name__ == "__main__":
    main()
