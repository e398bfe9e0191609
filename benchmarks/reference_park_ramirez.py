"""Reference: Park-Ramirez secreted protein by a hand-written direct collocation in raw CasADi.

The yardstick `optimize_benchmark.py` holds `optfeed optimize` against. Written the way
an engineer writes a one-off script, with nothing from optfeed: the textbook
formulation (states at element boundaries and at the Radau points, continuity rows
between elements, the model's right-hand side at every Radau point), `expand: True`,
IPOPT from one start, the states scaled by hand-picked magnitudes.

Problem (tests/published/park_ramirez.yaml): Park and Ramirez (1988); states P_tot,
P_sec (per L), X, S (g/L), V (L); one glucose feed of 20 g/L at 0 to 2 L/h; tf = 15 h;
maximize P_sec * V at the end.

Grid as optfeed's default: 40 pump steps x 4 elements per step, Radau degree 3;
IPOPT tolerance 1e-8. The answer is re-simulated with CVODES (tolerances 1e-12) and
that objective is printed, as one JSON line:

    python benchmarks/reference_park_ramirez.py [--feed RATE_L_PER_H] [--pump-steps 40] [--elements-per-step 4]
        [--max-iter 3000]

The start: half the pump's maximum (1 L/h; there is no volume bound). (Measured: from
0.1 and 0.5 L/h it reaches the same optimum in more iterations, from 2 L/h a worse one,
32.34.)
"""

import argparse
import json
import resource
import time

import casadi as ca
import numpy as np

T_END = 15.0  # h
U_MAX = 2.0  # L/h
X0 = [0.0, 0.0, 1.0, 5.0, 1.0]  # P_tot, P_sec, X, S, V
X_SCALE = np.array([5.0, 5.0, 10.0, 20.0, 30.0])  # nominal magnitudes
J_SCALE = 30.0
DEG = 3  # Radau degree


def rhs(x, u):
    P_tot, P_sec, X, S, V = x[0], x[1], x[2], x[3], x[4]
    g3 = 21.87 * S / ((S + 0.4) * (S + 62.5))
    g2 = S * ca.exp(-5 * S) / (0.1 + S)
    g1 = 4.75 * g3 / (0.12 + g3)
    D = u / V
    return ca.vertcat(g2 * X - D * P_tot,
                      g1 * (P_tot - P_sec) - D * P_sec,
                      g3 * X - D * X,
                      -7.3 * g3 * X + D * (20.0 - S),
                      u)


def objective(x):
    return x[1] * x[4]


def main():
    cpu0 = time.process_time()
    ap = argparse.ArgumentParser()
    ap.add_argument("--feed", type=float, default=0.5 * U_MAX, help="the constant feed to start from, L/h")
    ap.add_argument("--pump-steps", type=int, default=40)
    ap.add_argument("--elements-per-step", type=int, default=4)
    ap.add_argument("--max-iter", type=int, default=3000, help="IPOPT's iteration limit (its default: 3000)")
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

    xs = ca.SX.sym("x", 5)
    us = ca.SX.sym("u")
    f = ca.Function("f", [xs, us], [rhs(xs, us)])
    h = T_END / N

    # initial guess: the constant feed, simulated
    sim = ca.integrator("sim", "cvodes", {"x": xs, "p": us, "ode": rhs(xs, us)}, 0.0, list(h * tau[1:]),
                        {"abstol": 1e-10, "reltol": 1e-10})
    guess_b, guess_c = [np.array(X0)], []
    for k in range(N):
        out = np.array(sim(x0=guess_b[-1], p=feed)["xf"])
        guess_c.append(out.T)
        guess_b.append(out[:, -1])

    w, w0, lbw, ubw, g, lbg, ubg = [], [], [], [], [], [], []
    U = []
    for m in range(M):
        U.append(ca.MX.sym(f"U_{m}"))
        w.append(U[-1])
        w0.append(feed)
        lbw.append(0.0)
        ubw.append(U_MAX)
    Xk = ca.DM(np.array(X0) / X_SCALE)  # the first element starts from the known initial state
    for k in range(N):
        Uk = U[k // K]
        Xc = []
        for j in range(DEG):
            Xkj = ca.MX.sym(f"X_{k}_{j}", 5)
            Xc.append(Xkj)
            w.append(Xkj)
            w0 += list(guess_c[k][j] / X_SCALE)
            lbw += [0.0] * 5
            ubw += [np.inf] * 5
        Xk_end = D[0] * Xk
        for j in range(1, DEG + 1):
            xp = C[0, j] * Xk
            for r in range(DEG):
                xp = xp + C[r + 1, j] * Xc[r]
            g.append(h * f(Xc[j - 1] * X_SCALE, Uk) / X_SCALE - xp)
            lbg += [0.0] * 5
            ubg += [0.0] * 5
            Xk_end = Xk_end + D[j] * Xc[j - 1]
        Xk = ca.MX.sym(f"X_{k + 1}", 5)
        w.append(Xk)
        w0 += list(guess_b[k + 1] / X_SCALE)
        lbw += [0.0] * 5
        ubw += [np.inf] * 5
        g.append(Xk_end - Xk)
        lbg += [0.0] * 5
        ubg += [0.0] * 5
    nlp = {"x": ca.vertcat(*w), "f": -objective(Xk * X_SCALE) / J_SCALE, "g": ca.vertcat(*g)}
    solver = ca.nlpsol("solver", "ipopt", nlp, {"expand": True, "ipopt.tol": 1e-8, "ipopt.max_iter": args.max_iter,
                                                "ipopt.print_level": 0, "ipopt.sb": "yes", "print_time": False})
    cpu_built = time.process_time()
    sol = solver(x0=w0, lbx=lbw, ubx=ubw, lbg=lbg, ubg=ubg)
    cpu_solved = time.process_time()
    stats = solver.stats()
    u_opt = np.array(sol["x"][:M]).ravel()
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
        "problem": "park_ramirez", "status": stats["return_status"], "iterations": stats["iter_count"],
        "objective": J_sim, "objective_nlp": J_nlp, "end_time": T_END, "start_feed": feed,
        "cpu_build": cpu_built - cpu0, "cpu_solve": cpu_solved - cpu_built,
        "elements": N, "cpu_process": ru.ru_utime + ru.ru_stime,
    }))


if __name__ == "__main__":
    main()
