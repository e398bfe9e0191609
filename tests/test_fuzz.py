"""Property-based fuzzing of the shipped files (hypothesis, seeded and bounded).

The shipped problem, schedule and sweep files are mutated (a value replaced by a
hostile one, a line deleted, doubled or swapped, the file cut short, stray bytes
put in) and, for each mutation:

* ``validate`` and ``check`` end with exit code 0, 1 or 2 (or 3 with the status
  'simulation failed', a schedule that is valid but cannot be followed), never with
  a traceback or an internal error;
* on exit 2 (bad input) nothing is written;
* nothing is ever written outside the results folder;
* a mutated sweep file either loads (within the case cap) or is bad input, and
  writes nothing.

The examples are drawn deterministically (``derandomize``), so CI runs the same
ones every time. ``OPTFEED_FUZZ_EXAMPLES`` raises the count for a longer hunt.
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from optfeed.cli import main
from optfeed.errors import InputError
from optfeed.sweep import load_sweep
from optfeed.sweep.spec import MAX_CASES

from conftest import CONFIGS, ROOT

EXAMPLES = int(os.environ.get("OPTFEED_FUZZ_EXAMPLES", "300"))

OK_PROBLEM = ROOT / "tests" / "bad_input" / "ok_problem.yaml"
# the shipped problems have no solver section: one variant spells out every setting
SOLVER = ("solver:\n  pump_interval: 30 min\n  elements_per_step: 4\n  degree: 3\n  starts: 4\n  smoothing: 0\n"
          "  max_iter: 3000\n  tolerance: 1.0e-8\n  verify_tolerance: 2.0e-3\n")
PAIRS = [  # (problem file name, its text, schedule, files beside it, more arguments of check)
    ("fast_microbe.yaml", (CONFIGS / "fast_microbe.yaml").read_bytes(), CONFIGS / "fast_microbe_plan.csv", (), ()),
    ("inhibited_product.yaml", (CONFIGS / "inhibited_product.yaml").read_bytes(),
     CONFIGS / "inhibited_product_plan.yaml", (), ()),
    ("animal_cell.yaml", (CONFIGS / "animal_cell.yaml").read_bytes(), CONFIGS / "animal_cell_plan.csv", (), ()),
    ("ok_problem.yaml", OK_PROBLEM.read_bytes(), ROOT / "tests" / "bad_input" / "ok_schedule.csv", (), ()),
    ("solver_problem.yaml", OK_PROBLEM.read_bytes() + SOLVER.encode(), ROOT / "tests" / "bad_input" / "ok_schedule.csv",
     (), ()),
    # the uncertainty section and its covariance file, judged over a small Monte Carlo sample
    ("inhibited_product_uncertain.yaml", (CONFIGS / "inhibited_product_uncertain.yaml").read_bytes(),
     CONFIGS / "inhibited_product_push_plan.yaml", (CONFIGS / "inhibited_product_covariance.csv",),
     ("--uncertainty", "--samples", "3", "--workers", "1")),
]
SWEEPS = [CONFIGS / "sweep_otr.yaml", CONFIGS / "sweep_check.yaml"]

# values a careless edit, a spreadsheet or a hostile file could put where a value belongs
TOKENS = [
    "yes", "no", "on", "off", "true", "null", "~", ".nan", ".inf", "-.inf", "0", "-1", "1e308", "-1e-308",
    "1e400", "1e308 day", "1e308 kg", "5 degC", "5 degC/L", "0.1 parsec", "1 kg", "1 L/h", "0 h", "-5 h",
    "1e6 h", "200 mL/h", "2 L/h/h", "1e6 cells/mL", "[]", "{}", "[1, 2]", "{a: 1}", '"', "'", "&a [*a]", "*a",
    "!!python/object/apply:os.system [echo hi]", "!!binary aGk=", "../../../etc/passwd", "/etc/passwd",
    "/dev/zero", "x" * 3000, "ｍｕ", "mu_max ** 1000", "exp(1000)", "1/0", "__import__('os')", "lambda: 1",
    "None", "if", "[" * 300 + "]" * 300, "0x10", "1_000", "-0", "a.b", "S[0]", "max(S)", "monod(S)",
    "sqrt(-1)", "log(0)", "1e-300", "*", "- 1", "１", "nan", "inf", "", " ", "\t", "1e-308 h", "{min: 1 h, max: 0 h}",
    "1e9", "2.5", "64", "5000", "1e-12", "0.01 s",
]
CELLS = ["", "nan", "inf", "-inf", "-1", "1e308", "1e-308", "０", "yes", "1,2", '"', "0x1", "1e400", "-0",
         "100000", "abc", "1e5"]


def _lines_mutation(draw, text: str, kind: str) -> str:
    lines = text.split("\n")
    i = draw(st.integers(0, max(len(lines) - 1, 0)))
    if kind == "value":
        line = lines[i]
        if ":" in line and not line.lstrip().startswith("#"):
            head = line[: line.index(":") + 1]
            lines[i] = f"{head} {draw(st.sampled_from(TOKENS))}"
        elif "," in line:
            cells = line.split(",")
            cells[draw(st.integers(0, len(cells) - 1))] = draw(st.sampled_from(CELLS))
            lines[i] = ",".join(cells)
        else:
            lines[i] = draw(st.sampled_from(TOKENS))
    elif kind == "delete":
        del lines[i]
    elif kind == "double":
        lines.insert(i, lines[i])
    elif kind == "swap":
        j = draw(st.integers(0, max(len(lines) - 1, 0)))
        lines[i], lines[j] = lines[j], lines[i]
    elif kind == "key":
        line = lines[i]
        if ":" in line:
            lines[i] = draw(st.sampled_from(["x", "<<", "? [a]", "name", "1", "limits", "__class__"])) + \
                line[line.index(":"):]
    return "\n".join(lines)


@st.composite
def mutated(draw, text: bytes) -> bytes:
    """``text`` with one to three mutations."""
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["value", "value", "value", "delete", "double", "swap", "key", "cut", "bytes"]))
        if kind == "cut":
            text = text[: draw(st.integers(0, len(text)))]
        elif kind == "bytes":
            at = draw(st.integers(0, len(text)))
            text = text[:at] + draw(st.binary(min_size=1, max_size=12)) + text[at:]
        else:
            try:
                decoded = text.decode("utf-8")
            except UnicodeDecodeError:
                continue
            text = _lines_mutation(draw, decoded, kind).encode("utf-8")
    return text


def _files(folder: Path) -> set:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def _run(argv) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:  # argparse
            code = exc.code
    return code, out.getvalue(), err.getvalue()


def _judge(label, code, out, err):
    report = f"{label}: exit {code}\nstdout:\n{out[-2000:]}\nstderr:\n{err[-3000:]}"
    assert "Traceback" not in err and "internal error" not in err, report
    assert code in (0, 1, 2) or (code == 3 and "simulation failed" in (out + err).lower()), report
    if code == 2:
        assert err.startswith("optfeed: bad input"), report


@settings(max_examples=EXAMPLES, derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(data=st.data())
def test_validate_and_check_on_mutated_files(data):
    name, problem, schedule, beside, more = data.draw(st.sampled_from(PAIRS), label="files")
    which = data.draw(st.sampled_from(["problem", "schedule"] + ["beside"] * bool(beside)), label="mutated")
    original = {"problem": problem, "schedule": schedule.read_bytes()}.get(which) or beside[0].read_bytes()
    text = data.draw(mutated(original), label="text")
    with tempfile.TemporaryDirectory(prefix="optfeed-fuzz-") as tmp:
        work = Path(tmp)
        inputs = work / "inputs"
        inputs.mkdir()
        p, s = inputs / name, inputs / schedule.name
        p.write_bytes(problem)
        shutil.copy(schedule, s)
        for f in beside:
            shutil.copy(f, inputs / f.name)
        {"problem": p, "schedule": s}.get(which, inputs / beside[0].name if beside else p).write_bytes(text)
        results = work / "results"
        before = _files(work)
        old = os.getcwd()
        os.chdir(work)  # anything written to the working folder would show up below
        try:
            v = _run(["validate", str(p), "--schedule", str(s)])
            c = _run(["check", str(p), "--schedule", str(s), "--results", str(results), "--no-figures", *more])
        finally:
            os.chdir(old)
        event(f"check exit {c[0]}")
        _judge("validate", *v)
        _judge("check", *c)
        assert v[0] in (0, 2), v
        outside = _files(work) - before - {f for f in _files(work) if f.startswith("results")}
        assert not outside, f"written outside the results folder: {sorted(outside)}"
        if c[0] == 2:
            assert not results.exists() or not any(results.iterdir()), "files written on bad input"
        else:
            runs = list(results.iterdir())
            assert len(runs) == 1 and (runs[0] / "summary.json").exists(), c
            assert not [f for f in results.iterdir() if f.name.startswith(".")], "a half-written folder is left"


@settings(max_examples=max(EXAMPLES // 3, 10), derandomize=True, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(data=st.data())
def test_mutated_sweep_files_load_or_are_bad_input(data):
    sweep = data.draw(st.sampled_from(SWEEPS), label="sweep")
    text = data.draw(mutated(sweep.read_bytes()), label="text")
    with tempfile.TemporaryDirectory(prefix="optfeed-fuzz-") as tmp:
        work = Path(tmp)
        for f in CONFIGS.iterdir():
            if f.is_file():
                shutil.copy(f, work / f.name)
        path = work / sweep.name
        path.write_bytes(text)
        before = {f: f.stat().st_mtime_ns for f in work.iterdir()}
        try:
            loaded = load_sweep(path)
        except InputError as exc:
            assert exc.issues and all(i.message for i in exc.issues)
        else:
            assert 1 <= len(loaded.cases) <= MAX_CASES
            for case in loaded.cases:
                assert Path(case.source).resolve().is_relative_to(work.resolve())
            if loaded.schedule_path:
                assert Path(loaded.schedule_path).resolve().is_relative_to(work.resolve())
        assert {f: f.stat().st_mtime_ns for f in work.iterdir()} == before, "a sweep file's check wrote something"
