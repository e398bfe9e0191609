"""Case processes that keep their solvers: the worker pool, the solver cache, and
sweeps stopped from outside.

* A pool's process runs item after item; an item over its budget, one that raises,
  and an idle process killed from outside each cost only that process: the next item
  gets a fresh one, nothing is lost.
* A solver kept from an earlier problem of the same structure gives the same answer
  for a changed parameter as one built afresh (reference: the same optimize run in a
  process whose cache was cleared first).
* A sweep's case processes build their solvers once, not once per case (counted at
  CasADi's nlpsol, the call that builds an IPOPT solver).
* A solver on the NLP's assembled derivatives meets the optimum that a solver on
  the same NLP expanded and differentiated by CasADi meets (IPOPT's tolerance).
* SIGTERM and Ctrl-C stop a sweep with exit code 130, leave no case process behind,
  and the same command completes it without computing a finished case again.

No timings are asserted. References: POSIX signals (SIGTERM, SIGINT to the
foreground process group as a terminal sends it), Linux PR_SET_PDEATHSIG.
"""

import os
import signal
import sqlite3
import subprocess
import sys
import time

import casadi
import numpy as np
import pytest

import optfeed
from optfeed import solve
from optfeed.processes import WorkerPool, context
from optfeed.sweep import run_sweep
from optfeed.sweep.store import FINAL

FORK = context().get_start_method() == "fork"

# our own scenario: a product made by a substrate-inhibited culture, small enough to
# solve in well under a second (10 pump steps, 2 starts, no grid refinement)
TINY = """
name: tiny
species:
  X: {initial: 1 g/L}
  S: {initial: 2 g/L}
  P: {initial: 0 g/L}
parameters: {mu_max: 0.4 1/h, K_s: 0.1 g/L, K_i: 5 g/L, Y_XS: 0.5, alpha: 0.2}
rates:
  mu: andrews(S, mu_max, K_s, K_i)
reactions:
  X: mu * X
  S: -mu / Y_XS * X
  P: alpha * mu * X / (1 + X / 10)
feeds:
  sugar: {composition: {S: 200 g/L}, max_rate: 0.1 L/h}
vessel: {initial_volume: 1 L, working_volume: 1.6 L}
horizon: {end_time: 10 h}
objective: {maximize: product_mass, product: P}
solver: {pump_steps: 10, starts: 2}
"""


def _item(x):
    """What the pool's processes run: the process id, or trouble on request."""
    if x == "raise":
        raise ValueError("this item fails")
    if x == "hang":
        time.sleep(60)
    return os.getpid()


def _run(pool, items, **kw):
    out = {}
    pool.run(items, lambda key, kind, payload, s: out.update({key: (kind, payload)}), **kw)
    return out


def test_a_pool_process_runs_item_after_item_and_only_trouble_replaces_it():
    pool = WorkerPool(_item, 1, reuse=True)
    try:
        out = _run(pool, [(i, i) for i in range(3)])
        assert [k for k, _ in out.values()] == ["ok"] * 3
        first = out[0][1]
        assert {pid for _, pid in out.values()} == {first} and first != os.getpid()
        assert _run(pool, [(3, 3)])[3] == ("ok", first)  # kept between runs

        # over its budget: that process is killed, the next item gets a fresh one
        out = _run(pool, [("slow", "hang"), (4, 4)],
                   over_budget=lambda key, s: "over budget" if key == "slow" and s > 0.3 else None)
        assert out["slow"] == ("killed", "over budget")
        assert out[4][0] == "ok" and out[4][1] != first
        second = out[4][1]

        # an item that raises is reported, and its process runs nothing more
        out = _run(pool, [("bad", "raise"), (5, 5)])
        assert out["bad"][0] == "error" and "this item fails" in out["bad"][1]
        assert out[5][0] == "ok" and out[5][1] != second
        third = out[5][1]

        # an idle process killed from outside (the system's out-of-memory killer):
        # the next item is not lost, it runs in a fresh process
        (idle,) = pool.processes
        assert idle.pid == third
        os.kill(idle.pid, signal.SIGKILL)
        idle.join()
        out = _run(pool, [(6, 6)])
        assert out[6][0] == "ok" and out[6][1] not in (first, second, third)
        kept = pool.processes
    finally:
        pool.close()
    assert pool.processes == [] and not any(p.is_alive() for p in kept)


def test_without_reuse_every_item_gets_a_process_of_its_own():
    pool = WorkerPool(_item, 2, reuse=False)
    try:
        out = _run(pool, [(i, i) for i in range(4)])
    finally:
        pool.close()
    assert [k for k, _ in out.values()] == ["ok"] * 4
    assert len({pid for _, pid in out.values()}) == 4 and pool.processes == []


def test_a_kept_solver_answers_a_changed_parameter_as_a_fresh_one(tmp_path, monkeypatch):
    builds = []
    real = casadi.nlpsol
    monkeypatch.setattr(casadi, "nlpsol", lambda *a, **k: builds.append(1) or real(*a, **k))
    path = tmp_path / "tiny.yaml"
    path.write_text(TINY)
    change = {"parameters.mu_max": "0.45 1/h", "parameters.K_i": "4 g/L"}
    solve.clear_cache()
    optfeed.optimize(path, workers=1)  # builds the solvers of this structure
    n = len(builds)
    kept = optfeed.optimize(path, workers=1, set=change)
    assert len(builds) == n, "the second problem of the same structure built a solver"
    solve.clear_cache()
    fresh = optfeed.optimize(path, workers=1, set=change)
    assert len(builds) > n  # built again after the cache was cleared
    assert kept.status == fresh.status == "optimal, verified"
    assert kept.objective_nlp == pytest.approx(fresh.objective_nlp, rel=1e-8)
    assert kept.objective_sim == pytest.approx(fresh.objective_sim, rel=1e-8)
    u_kept, u_fresh = kept.points["u"], fresh.points["u"]
    assert np.max(np.abs(u_kept - u_fresh)) <= 1e-8 * 0.1  # L/h, of a 0.1 L/h pump
    # and the changed parameter did change the answer (the kept solver did not reuse old numbers)
    assert abs(kept.objective_nlp - optfeed.optimize(path, workers=1).objective_nlp) > 1e-3 * kept.objective_nlp


def test_a_solver_on_the_assembled_derivatives_answers_as_casadi_s_expanded_nlp(tmp_path):
    # the same NLP, its derivatives assembled from its pieces (what optfeed hands to
    # IPOPT) or taken by CasADi on the NLP expanded to one scalar graph (reference):
    # IPOPT meets the same optimum (tolerance 1e-8), with the same options
    from optfeed.optimize import _Job
    from optfeed.transcription import Grid

    path = tmp_path / "tiny.yaml"
    path.write_text(TINY)
    problem = optfeed.load_problem(path)
    solve.clear_cache()
    job = _Job(problem, None, None)
    guess = solve.make_guesses(problem, job.full, 1)[0]
    data = job.data(solve.scaling_for(problem, job.lean, [guess], job.full))
    nlp = job.nlp(Grid(10, 20, 3))
    w0 = nlp.pack(data, guess.steps_u, guess.T, guess.times, solve.states_for(job.lean, job.full, guess.states))
    ours = solve.solve(nlp, data, w0, "assembled")
    F = casadi.Function("nlp", [nlp.nlp["x"], nlp.nlp["p"]], [nlp.nlp["f"], nlp.nlp["g"]]).expand()
    x, p = casadi.SX.sym("x", nlp.n_w), casadi.SX.sym("p", nlp.P.size)
    f, g = F(x, p)
    reference = casadi.nlpsol("reference", "ipopt", {"x": x, "p": p, "f": f, "g": g},
                              solve.ipopt_options(problem.settings.tolerance, "cold"))
    ref = reference(x0=w0, **nlp.arguments(data))
    assert ours.status == "converged" and reference.stats()["success"]
    assert ours.objective == pytest.approx(nlp.objective_value(np.array(ref["x"]).ravel(), data), rel=1e-8)
    assert np.max(np.abs(ours.w - np.array(ref["x"]).ravel())) <= 1e-6  # scaled variables, near 1


_NLPSOL = casadi.nlpsol


def _counting_builds(monkeypatch, log):
    """Count IPOPT solver builds in this process and in the case processes it forks:
    each build appends the building process's id to ``log``."""
    real = _NLPSOL

    def nlpsol(*a, **k):
        with open(log, "a") as fh:
            fh.write(f"{os.getpid()}\n")
        return real(*a, **k)

    monkeypatch.setattr(casadi, "nlpsol", nlpsol)


@pytest.mark.skipif(not FORK, reason="counts builds in forked case processes")
def test_sweep_case_processes_build_their_solvers_once(tmp_path, monkeypatch):
    (tmp_path / "tiny.yaml").write_text(TINY)
    path = tmp_path / "s.yaml"
    path.write_text("problems: tiny.yaml\njob: optimize\ngrid:\n  parameters.mu_max: [0.35 1/h, 0.4 1/h, 0.5 1/h]\n")
    kept_log, fresh_log = tmp_path / "kept.log", tmp_path / "fresh.log"
    solve.clear_cache()  # case processes are forked from this one: they start with no solvers

    _counting_builds(monkeypatch, kept_log)
    kept = run_sweep(path, tmp_path / "kept", workers=1)
    _counting_builds(monkeypatch, fresh_log)
    fresh = run_sweep(path, tmp_path / "fresh", workers=1, fresh_process_per_case=True)

    for r in (kept, fresh):
        assert r.status == "finished" and {row["status"] for row in r.rows} == {"optimal, verified"}
    kept_pids = kept_log.read_text().split()
    fresh_pids = fresh_log.read_text().split()
    assert len(set(kept_pids)) == 1 and str(os.getpid()) not in kept_pids  # one case process built them all
    assert len(set(fresh_pids)) == 3  # each case in its own process, building its own
    per_case = len(fresh_pids) / 3
    assert len(kept_pids) <= per_case + 1 < len(fresh_pids)  # the first case builds; the others reuse
    # the same answers either way
    by_key = {row["key"]: row["objective"] for row in fresh.rows}
    for row in kept.rows:
        assert row["objective"] == pytest.approx(by_key[row["key"]], rel=1e-8)


def _finished(out):
    try:
        return sqlite3.connect(out / "sweep.sqlite").execute(
            f"SELECT key, finished_at FROM cases WHERE status IN ({','.join('?' * len(FINAL))})", FINAL).fetchall()
    except sqlite3.Error:
        return []


def test_a_stopped_sweep_leaves_no_case_process_and_resumes(tmp_path):
    psutil = pytest.importorskip("psutil")
    # enough cases that the second stop still finds some left: with 4, a loaded machine
    # let the second run finish its last three between one poll and the signal
    n = 6
    (tmp_path / "tiny.yaml").write_text(TINY)
    path = tmp_path / "s.yaml"
    path.write_text(f"problems: tiny.yaml\njob: optimize\ngrid:\n  parameters.mu_max: {{linspace: [0.3, 0.5, {n}]}}\n")
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "optfeed.cli", "sweep", str(path), "--out", str(out), "--workers", "1", "--quiet"]
    finished = []
    # stopped twice while its case process, kept from an earlier case, is in the middle of the next:
    # by SIGTERM to the sweep (as `kill PID` sends), and by Ctrl-C (SIGINT to the whole
    # foreground process group, as a terminal sends it)
    for stop in ("SIGTERM", "Ctrl-C"):
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                start_new_session=True)
        try:
            deadline = time.time() + 120
            while time.time() < deadline and len(_finished(out)) < len(finished) + 1:
                time.sleep(0.05)
            finished = _finished(out)
            cases = psutil.Process(proc.pid).children()
            assert cases, "no case process"
            if stop == "SIGTERM":
                proc.send_signal(signal.SIGTERM)
            else:
                os.killpg(proc.pid, signal.SIGINT)
            stdout, stderr = proc.communicate(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
        assert proc.returncode == 130, (stop, stdout, stderr)
        assert "Traceback" not in stderr and "stopped" in stdout, (stop, stdout, stderr)
        _, alive = psutil.wait_procs(cases, timeout=5)
        assert alive == [], f"a case process outlived the sweep stopped by {stop}"
        rows = sqlite3.connect(out / "sweep.sqlite").execute("SELECT status FROM cases").fetchall()
        assert {s for (s,) in rows} <= set(FINAL) | {"queued"}, rows  # none left 'running', no error from the stop
    before = _finished(out)
    assert len(before) < n, "the sweep finished before it could be stopped"

    done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    after = dict(_finished(out))
    assert len(after) == n
    for key, t in before:  # finished cases were not run again
        assert after[key] == t


@pytest.mark.skipif(not FORK, reason="counts builds in forked case processes")
def test_a_dask_worker_thread_keeps_its_case_process_and_it_ends_with_the_worker(tmp_path, monkeypatch):
    distributed = pytest.importorskip("distributed")
    psutil = pytest.importorskip("psutil")
    (tmp_path / "tiny.yaml").write_text(TINY)
    path = tmp_path / "s.yaml"
    path.write_text("problems: tiny.yaml\njob: optimize\ngrid:\n  parameters.mu_max: [0.35 1/h, 0.4 1/h, 0.5 1/h]\n")
    log = tmp_path / "builds.log"
    solve.clear_cache()
    _counting_builds(monkeypatch, log)
    me = psutil.Process()
    before = {p.pid for p in me.children()}
    # a worker in this process (threads): its case process is a child of this process
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        r = run_sweep(path, tmp_path / "out", scheduler=cluster.scheduler_address)
        kept = [p for p in me.children() if p.pid not in before]
    assert r.status == "finished" and {row["status"] for row in r.rows} == {"optimal, verified"}
    pids = log.read_text().split()
    assert len(set(pids)) == 1 and [p.pid for p in kept] == [int(pids[0])]  # one case process ran all three
    _, alive = psutil.wait_procs(kept, timeout=10)
    assert alive == [], "the case process outlived its Dask worker"
