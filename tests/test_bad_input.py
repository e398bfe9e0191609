"""The bad-input corpus: every file in tests/bad_input/ must be refused cleanly.

Each ``problem_*`` file is a copy of ``ok_problem.yaml`` and each ``schedule_*`` file a
copy of ``ok_schedule.csv`` (or a small YAML schedule) with exactly one defect; the
header comment of each file says which. Two binary files, two very large ones, two
FIFOs and a link to /dev/zero are made at run time.

For every case both ``optfeed validate`` and ``optfeed check`` run, through the
command line's own entry point, in one separate Python process for the whole corpus
(tests/cli_batch.py; the FIFO and device cases each in their own processes), and
must:

* exit with code 2 (bad input);
* print ``optfeed: bad input`` as the first line of stderr, and no traceback;
* name the bad file, the line (``file:LINE:``) where the case has one, and the key;
* say what is wrong (the regex pinned in the table);
* write nothing: no results folder content and no new file in the working folder.
"""

from __future__ import annotations

import os
import random
import re
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

import optfeed
from optfeed import InputError, load_problem, load_schedule

CORPUS = Path(__file__).resolve().parent / "bad_input"
OK_PROBLEM = CORPUS / "ok_problem.yaml"
OK_SCHEDULE = CORPUS / "ok_schedule.csv"
REPO = Path(__file__).resolve().parent.parent
TIMEOUT = 120  # s per subprocess; a hang (an alias bomb expanding, say) must not stall the suite


@dataclass(frozen=True)
class Case:
    """One corpus file and what the error report must say about it.

    file : name in tests/bad_input/ (or of a file generated at run time, see GENERATED)
    line : 1-based line the report must name, or None if the whole file is at fault
    key : key path (or CSV column) the report must name, or None if there is none
    message : regex searched for in the text after ``file:line: key: ``
    xfail : reason, for a case the code does not yet report clearly
    reported : the file the report must name instead (a file the case names, relative to the corpus)
    problem : for a schedule case, the corpus problem it is paired with (default ok_problem.yaml)
    """

    file: str
    line: int | None
    key: str | None
    message: str
    xfail: str | None = None
    reported: str | None = None
    problem: str | None = None

    @property
    def is_schedule(self) -> bool:
        return self.file.startswith("schedule_")


CASES = [
    # ---- YAML reading
    Case("problem_yaml_syntax.yaml", 9, None, r"^YAML syntax error: mapping values are not allowed here"),
    Case("problem_yaml_unclosed.yaml", 6, None, r"^YAML syntax error: the '\{' opened here is not closed"),
    Case("problem_python_tag.yaml", 3, "name",
         r"^YAML tag 'tag:yaml\.org,2002:python/object/apply:os\.system' is not allowed"),
    Case("problem_alias_bomb.yaml", 15, "parameters.e", r"expands to more than \d+ values \(alias bomb\?\)"),
    Case("problem_duplicate_key.yaml", 11, "parameters.K_s", r"^duplicate key"),
    Case("problem_empty.yaml", None, None, r"^file is empty"),
    Case("problem_comments_only.yaml", None, None, r"^file holds no YAML document"),
    Case("problem_binary.yaml", None, None, r"^is a binary file, expected UTF-8 text"),
    Case("problem_not_utf8.yaml", 5, None, r"^is not UTF-8 text"),
    Case("problem_top_level_list.yaml", 3, None, r"^expected a mapping of keys at the top level"),
    # ---- shape of the file
    Case("problem_unknown_key.yaml", 22, "vessel",
         r"^unknown key 'working_volum'; did you mean 'working_volume'"),
    Case("problem_missing_initial.yaml", 5, "species.X.initial", r"^required key is missing"),
    # ---- expressions
    Case("problem_unknown_name.yaml", 12, "rates.mu", r"^unknown name 'mu_mx'; did you mean 'mu_max'"),
    Case("problem_function_typo.yaml", 12, "rates.mu", r"^unknown function 'monodd'; did you mean 'monod'"),
    Case("problem_attribute.yaml", 14, "reactions.X", r"^attribute access \('\.'\) not allowed in expressions"),
    Case("problem_dunder.yaml", 14, "reactions.X", r"^names starting with '_' are not allowed: '__import__'"),
    Case("problem_import.yaml", 14, "reactions.X", r"^not a valid expression \(invalid syntax\): 'import os'"),
    Case("problem_lambda.yaml", 14, "reactions.X", r"^lambda not allowed in expressions"),
    Case("problem_deep_nesting.yaml", 14, "reactions.X", r"^expression is nested more than \d+ levels deep"),
    Case("problem_unknown_species.yaml", 18, "feeds.glucose.composition.Sx",
         r"^'Sx' is not a species; did you mean 'S'"),
    # ---- units and values
    Case("problem_volume_dimension.yaml", 22, "vessel.working_volume",
         r"^'10 kg' has dimension \[mass\], expected a volume"),
    Case("problem_unit_text.yaml", 21, "vessel.initial_volume", r"^unknown unit 'Lx'"),
    Case("problem_unit_exponent.yaml", 22, "vessel.working_volume",
         r"^exponent 999 in unit 'm\*\*999' is out of range"),
    Case("problem_zero_volume.yaml", 21, "vessel.initial_volume", r"^initial volume must be above zero, got '0 L'"),
    Case("problem_negative_volume.yaml", 22, "vessel.working_volume",
         r"^working volume must be above zero, got '-10 L'"),
    Case("problem_volume_order.yaml", 21, "vessel.initial_volume",
         r"^initial volume '12 L' is above the working volume '10 L'"),
    Case("problem_feed_dimension.yaml", 18, "feeds.glucose.composition.S",
         r"^'400 g' has dimension \[mass\], but species 'S' is in \[mass\] / \[length\] \*\* 3"),
    Case("problem_min_above_max.yaml", 20, "feeds.glucose.min_rate",
         r"^minimum pump rate '2 L/h' is above the maximum '1 L/h'"),
    Case("problem_end_time.yaml", 24, "horizon.end_time", r"^end time must be above zero, got '0 h'"),
    # ---- schedules (paired with ok_problem.yaml)
    Case("schedule_overlap.csv", 6, "glucose",
         r"^time 4 h does not come after 4 h \(rows overlap or are out of order\)"),
    Case("schedule_negative_time.csv", 5, "glucose", r"^time -2 h is negative"),
    Case("schedule_non_numeric.csv", 5, "glucose [L/h]", r"^expected a number, got 'fast'"),
    Case("schedule_unknown_column.csv", 3, "sucrose", r"^'sucrose' is not a feed of this problem"),
    Case("schedule_past_end.csv", 6, "glucose", r"^a row at 12 h lies at or after the end of the run \(10 h\)"),
    Case("schedule_flow_unit.csv", 3, "glucose [kg/h]", r"has dimension \[mass\] / \[time\], expected a flow"),
    Case("schedule_negative_rate.csv", 5, "glucose", r"^rate -0\.05 L/h is negative"),
    Case("schedule_cell_count.csv", 5, None, r"^row has 3 cells, the header has 2"),
    Case("schedule_interpolation.csv", 2, "interpolation", r"^expected 'constant' or 'linear', got 'cubic'"),
    Case("schedule_binary.csv", None, None, r"^is a binary file, expected UTF-8 text"),
    Case("schedule_row_key.yaml", 6, "feeds.glucose[1].rte", r"^unknown key; rows take time, rate, growth"),
    Case("schedule_python_tag.yaml", 2, "interpolation",
         r"^YAML tag 'tag:yaml\.org,2002:python/object/apply:os\.system' is not allowed"),
    # ---- yes/no values where a quantity or an expression belongs (YAML reads yes/on/true as booleans)
    Case("problem_bool_rate.yaml", 19, "feeds.glucose.max_rate",
         r"^a yes/no value \(read as true\) is not a number, quantity or expression"),
    Case("problem_bool_initial.yaml", 5, "species.X.initial", r"^a yes/no value \(read as true\)"),
    Case("problem_bool_expression.yaml", 14, "reactions.X", r"^a yes/no value \(read as true\)"),
    Case("schedule_bool_rate.yaml", 6, "feeds.glucose[1].rate",
         r"^a yes/no value \(read as true\) is not a flow like '0.2 L/h'"),
    # ---- units and numbers that cannot mean anything here
    Case("problem_offset_unit.yaml", 6, "species.S.initial",
         r"^unit 'degC/L': 'degC' is a temperature with an offset, which cannot be converted by a factor"),
    Case("problem_parsec.yaml", 9, "parameters.K_s", r"^unit 'parsec': 'parsec' has no use in a bioprocess model"),
    Case("problem_end_time_overflow.yaml", 24, "horizon.end_time",
         r"is too large: in optfeed's internal units it is not a finite number"),
    Case("problem_fullwidth.yaml", 14, "reactions.X",
         r"^character 'ｍ' \(FULLWIDTH LATIN SMALL LETTER M\) at position 1: expressions use plain ASCII"),
    Case("schedule_fullwidth_number.csv", 5, "glucose [L/h]", r"^expected a number, got '０\.０５'"),
    Case("problem_keyword_name.yaml", 11, "parameters.lambda",
         r"^name 'lambda' is a word of the expression language and cannot name a value"),
    # ---- settings that decide a status word
    Case("problem_verify_tolerance.yaml", 26, "solver.verify_tolerance",
         r"^must be between 1e-06 and 0\.01 \(largest relative difference .*\), got 0\.9"),
    Case("problem_pump_interval.yaml", 26, "solver.pump_interval",
         r"^a pump interval of 1e-308 h gives more than 5000 pump steps over the run \(10 h\)"),
    Case("problem_tolerance.yaml", 26, "solver.tolerance",
         r"^must be between 1e-12 and 0\.0001 \(IPOPT's convergence tolerance; default 1e-08\), got 0\.5"),
    # ---- structure and size: bounded before anything grows
    Case("problem_self_anchor.yaml", 11, "parameters.loop",
         r"^YAML nested more than 64 levels deep \(an anchor that contains itself\?\)"),
    Case("problem_deep_brackets.yaml", 11, None, r"^YAML nested more than 64 levels deep"),
    Case("problem_fifo.yaml", None, None, r"^is a FIFO \(named pipe\), expected a regular file"),
    Case("problem_dev_zero.yaml", None, None, r"^is a device, expected a regular file"),
    Case("schedule_fifo.csv", None, None, r"^is a FIFO \(named pipe\), expected a regular file"),
    Case("schedule_wide_header.csv", 3, None,
         r"^the header has 150002 columns; a schedule for 1 feed\(s\) has at most 3"),
    # ---- schedules whose pump law runs away
    Case("schedule_growth_stopped_pump.csv", 4, "glucose",
         r"^growth 1000 1/h on a rate of 0 keeps the pump off \(an exponential of zero stays zero\)"),
    Case("schedule_growth_overflow.csv", 5, "glucose",
         r"^rate 0\.05 L/h growing at 150 1/h passes any finite number before 10 h"),
    # ---- phases and additions in problem files (each the ok phased problem with one defect)
    Case("problem_phase_last_until.yaml", 30, "phases[2].until", r"^the last phase ends with the run"),
    Case("problem_phase_unknown_parameter.yaml", 29, "phases[2].parameters.mu_mx",
         r"^'mu_mx' is not a parameter of this problem .*did you mean 'mu_max'"),
    Case("problem_phase_condition_unit.yaml", 25, "phases[0].until", r"^the level '0.5 h' has dimension \[time\]"),
    Case("problem_phase_window_order.yaml", 27, "phases[1].until.between",
         r"^the earliest time '8 h' must be below the latest '5 h'"),
    Case("problem_phase_uncertain_parameter.yaml", 29, "phases[2].parameters.mu_max",
         r"^'mu_max' is uncertain .* this phase sets it to one value"),
    Case("problem_addition_outside.yaml", 31, "additions[0]", r"^an addition at 12 h lies outside the run"),
    Case("problem_addition_both.yaml", 31, "additions[0]", r"^give 'sample' .* or 'bolus'"),
    Case("problem_bolus_amount_unit.yaml", 31, "additions[0].amounts.S",
         r"an amount of 'S' is its concentration times a volume"),
    # ---- phase ends in schedules (paired with ok_phased_problem.yaml: batch until S < 0.5 g/L, fed ending
    #      between 5 h and 8 h, late)
    Case("schedule_phase_unknown.csv", 5, "phase", r"^'feed' is not a phase of this problem; did you mean 'fed'",
         problem="ok_phased_problem.yaml"),
    Case("schedule_phase_backwards.csv", 7, "phase",
         r"^phase 'fed' comes before 'late' in the problem: the phase column must follow the phases' order",
         problem="ok_phased_problem.yaml"),
    Case("schedule_phase_window.csv", 6, "phase",
         r"^phase 'fed' would end at 9 h, outside its window \(between 5 h and 8 h\)",
         problem="ok_phased_problem.yaml"),
    Case("schedule_phase_missing.csv", 3, "phase", r"^the schedule must give the end of phase 'fed'",
         problem="ok_phased_problem.yaml"),
    Case("schedule_phase_when.yaml", 8, "phases.batch",
         r"^phase 'batch' ends when S < 0\.5 g/L, found by simulation: leave it out",
         problem="ok_phased_problem.yaml"),
    Case("schedule_phase_no_phases.csv", 3, "phase", r"^this problem has no phases: leave the phase column out"),
    # ---- the uncertainty section (covariance files in bad_input/covariance/)
    Case("problem_uncertain_unknown_parameter.yaml", 27, "uncertainty.parameters.mu_mx",
         r"^'mu_mx' is not a parameter of this problem; did you mean 'mu_max'"),
    Case("problem_uncertain_negative_sd.yaml", 27, "uncertainty.parameters.mu_max.sd",
         r"^standard deviation '-0\.04 1/h' is negative"),
    Case("problem_uncertain_lognormal_zero.yaml", 28, "uncertainty.parameters.k_d",
         r"^a lognormal distribution holds positive values only, but the value in the file is 0 1/h"),
    Case("problem_uncertain_bounds.yaml", 27, "uncertainty.parameters.mu_max",
         r"^min '0\.5 1/h' is above max '0\.3 1/h'"),
    Case("problem_uncertain_unit.yaml", 27, "uncertainty.parameters.mu_max.sd",
         r"^'0\.04 g/L' has dimension \[mass\] / \[length\] \*\* 3 .*, but the value is written in '1/h'"),
    Case("problem_uncertain_distribution.yaml", 27, "uncertainty.parameters.mu_max.distribution",
         r"^Input should be 'normal', 'lognormal' or 'uniform', got 'gauss'"),
    Case("problem_uncertain_k.yaml", 28, "uncertainty.scenarios.k",
         r"^k is used only with objective: mean_std"),
    Case("problem_uncertain_path.yaml", 26, "uncertainty.covariance",
         r"^'\.\./\.\./outside\.csv' leads outside .*; a covariance file named in problem_uncertain_path\.yaml "
         r"must lie in its folder or below it"),
    Case("problem_uncertain_cov_missing.yaml", 26, "uncertainty.covariance",
         r"^covariance/no_such_file\.csv: file not found"),
    Case("problem_uncertain_cov_not_pd.yaml", 26, "uncertainty.covariance",
         r"^the covariance matrix in not_positive_definite\.csv is not positive definite \(smallest eigenvalue "
         r"of its correlation matrix -0\.8\)"),
    Case("problem_uncertain_cov_asymmetric.yaml", 4, "mu_max [1/h]",
         r"^the entry for \(K_s, mu_max\) is 0\.0003 but the entry for \(mu_max, K_s\) is 0\.0001; a covariance "
         r"matrix is symmetric", reported="covariance/asymmetric.csv"),
    Case("problem_uncertain_cov_name.yaml", 2, "mu_mx [1/h]",
         r"^'mu_mx' is not a parameter, initial value .* of the problem; did you mean 'mu_max'",
         reported="covariance/unknown_name.csv"),
    Case("problem_uncertain_cov_unit.yaml", 2, "mu_max [g/L]",
         r"^unit 'g/L' has dimension \[mass\] / \[length\] \*\* 3 .*, but mu_max is written in '1/h'",
         reported="covariance/wrong_unit.csv"),
]


def _binary_bytes(seed: int) -> bytes:
    """A few hundred fixed pseudo-random bytes, with NULs among them."""
    data = bytearray(random.Random(seed).randbytes(300))
    data[7] = data[150] = 0
    return bytes(data)


# files made at run time (not committed): name -> content
GENERATED = {
    "problem_binary.yaml": _binary_bytes(20240611),
    "schedule_binary.csv": _binary_bytes(11062024),
}


def _deep_brackets() -> bytes:
    """ok_problem.yaml with a parameter nested 5000 brackets deep at line 11."""
    lines = OK_PROBLEM.read_text().splitlines()
    lines.insert(10, "  deep: " + "[" * 5000 + "]" * 5000)
    return ("\n".join(lines) + "\n").encode()


def _wide_header() -> bytes:
    """ok_schedule.csv with 150,000 made-up feed columns in its header (line 3)."""
    lines = OK_SCHEDULE.read_text().splitlines()
    lines[2] += "".join(f",f{i} [L/h]" for i in range(150_000))
    return ("\n".join(lines) + "\n").encode()


# files made at run time that are not plain bytes: name -> maker(path)
MADE = {
    "problem_deep_brackets.yaml": lambda p: p.write_bytes(_deep_brackets()),
    "schedule_wide_header.csv": lambda p: p.write_bytes(_wide_header()),
    "problem_fifo.yaml": os.mkfifo,  # reading it would block forever
    "schedule_fifo.csv": os.mkfifo,
    "problem_dev_zero.yaml": lambda p: p.symlink_to("/dev/zero"),  # endless zeros
}


def _input_path(case: Case, tmp_path: Path) -> Path:
    if case.file in GENERATED:
        path = tmp_path / case.file
        path.write_bytes(GENERATED[case.file])
        return path
    if case.file in MADE:
        path = tmp_path / "made" / case.file
        path.parent.mkdir(exist_ok=True)
        MADE[case.file](path)
        return path
    return CORPUS / case.file


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO)] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else []))
    env["MPLBACKEND"] = "Agg"
    return env


def _run_all(commands, cwd: Path):
    """Run several ``optfeed`` command lines side by side; [(code, stdout, stderr)]."""
    procs = [
        subprocess.Popen([sys.executable, "-m", "optfeed.cli", *args], cwd=cwd, env=_env(),
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True, encoding="utf-8", errors="replace")
        for args in commands
    ]
    out = []
    try:
        for p in procs:
            stdout, stderr = p.communicate(timeout=TIMEOUT)
            out.append((p.returncode, stdout, stderr))
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
    return out


def _files_under(folder: Path) -> set:
    return {p.relative_to(folder) for p in folder.rglob("*")}


def _issue_prefix(path: Path, case: Case) -> str:
    """Start of the issue line: '  FILE:LINE: KEY: ', without LINE or KEY where the case has none."""
    where = f"{path}:{case.line}" if case.line is not None else f"{path}"
    return f"  {where}: " + (f"{case.key}: " if case.key is not None else "")


def _assert_clean_refusal(label, code, stdout, stderr, path: Path, case: Case):
    report = f"\n--- {label}: exit {code}\n--- stdout:\n{stdout}\n--- stderr:\n{stderr}"
    assert code == 2, f"expected exit code 2{report}"
    assert "Traceback" not in stderr, f"traceback on stderr{report}"
    lines = stderr.splitlines()
    assert lines and lines[0] == "optfeed: bad input", f"first line of stderr{report}"
    assert len(lines) >= 2, f"no issue listed{report}"
    for line in lines[1:]:
        assert line.startswith(f"  {path}"), f"issue line does not name {path}: {line!r}{report}"
    prefix = _issue_prefix(path, case)
    rests = [line[len(prefix):] for line in lines[1:] if line.startswith(prefix)]
    assert rests, f"no issue line starts with {prefix!r}{report}"
    assert any(re.search(case.message, rest) for rest in rests), \
        f"no issue after {prefix!r} matches {case.message!r}{report}"
    assert stdout.strip() == "", f"something printed on stdout{report}"


def _params():
    out = []
    for case in CASES:
        marks = [pytest.mark.xfail(strict=True, reason=case.xfail)] if case.xfail else []
        out.append(pytest.param(case, id=case.file, marks=marks))
    return out


def _commands(case: Case, path: Path, folder: Path):
    """(validate argv, check argv, the check's results folder) for a case's file."""
    results = folder / "results"
    if case.is_schedule:
        problem, schedule = (CORPUS / case.problem if case.problem else OK_PROBLEM), path
        validate = ["validate", str(problem), "--schedule", str(schedule)]
    else:
        problem, schedule = path, OK_SCHEDULE
        validate = ["validate", str(problem)]
    check = ["check", str(problem), "--schedule", str(schedule), "--results", str(results)]
    return validate, check, results


def _in_own_process(case: Case) -> bool:
    """FIFOs and device links run as separate processes (a regression there could
    block a reader for good); every other case runs in the one batch process."""
    return case.file in MADE


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    """Every case not run in its own process, run through tests/cli_batch.py (one
    interpreter for all): case file -> (folder, path, files before, [(code, out, err)] x 2)."""
    import json

    cases = [c for c in CASES if not _in_own_process(c)]
    prepared, jobs = {}, []
    for case in cases:
        folder = tmp_path_factory.mktemp("case")
        path = _input_path(case, folder)
        validate, check, _ = _commands(case, path, folder)
        prepared[case.file] = (folder, path, _files_under(folder))
        jobs += [{"argv": validate, "cwd": str(folder)}, {"argv": check, "cwd": str(folder)}]
    out = tmp_path_factory.mktemp("batch") / "results.json"
    done = subprocess.run([sys.executable, str(Path(__file__).parent / "cli_batch.py"), str(out)],
                          input=json.dumps(jobs), env=_env(), text=True, capture_output=True,
                          timeout=TIMEOUT * 5)
    assert done.returncode == 0, done.stderr[-4000:]
    results = json.loads(out.read_text())
    return {c.file: (*prepared[c.file], results[2 * i:2 * i + 2]) for i, c in enumerate(cases)}


@pytest.mark.parametrize("case", _params())
def test_bad_input_is_refused_cleanly(case: Case, tmp_path: Path, batch):
    if _in_own_process(case):
        path = _input_path(case, tmp_path)
        folder = tmp_path
        before = _files_under(tmp_path)
        validate, check, results = _commands(case, path, tmp_path)
        (v_code, v_out, v_err), (c_code, c_out, c_err) = _run_all([validate, check], cwd=tmp_path)
    else:
        folder, path, before, ((v_code, v_out, v_err), (c_code, c_out, c_err)) = batch[case.file]
        results = folder / "results"

    named = CORPUS / case.reported if case.reported else path
    _assert_clean_refusal("validate", v_code, v_out, v_err, named, case)
    _assert_clean_refusal("check", c_code, c_out, c_err, named, case)
    assert not results.exists() or not any(results.iterdir()), f"files written: {sorted(_files_under(results))}"
    assert _files_under(folder) == before, f"new files: {sorted(_files_under(folder) - before)}"


# ---------------------------------------------------------------- the corpus itself


def test_corpus_lists_every_file():
    on_disk = {p.name for p in CORPUS.iterdir() if p.is_file() and not p.name.startswith("ok_")}
    in_table = {c.file for c in CASES}
    assert len({c.file for c in CASES}) == len(CASES), "a file is listed twice"
    made = set(GENERATED) | set(MADE)
    assert on_disk == in_table - made, (
        f"not in the table: {sorted(on_disk - in_table)}; missing on disk: {sorted(in_table - made - on_disk)}"
    )
    assert len(CASES) >= 20


def test_generated_binaries_hold_nul_bytes():
    for data in GENERATED.values():
        assert b"\x00" in data and len(data) >= 200


def test_ok_files_are_valid(tmp_path):
    """The base every case is a variant of is itself fine, so each failure is its defect's."""
    [(code, stdout, stderr)] = _run_all(
        [["validate", str(OK_PROBLEM), "--schedule", str(OK_SCHEDULE)]], cwd=tmp_path)
    assert code == 0, stderr
    assert "valid" in stdout and stderr == ""
    assert _files_under(tmp_path) == set()


# ---------------------------------------------------------------- the Python API


def _one_issue(excinfo):
    issues = excinfo.value.issues
    return issues[0]


def test_api_unknown_name():
    path = CORPUS / "problem_unknown_name.yaml"
    with pytest.raises(optfeed.InputError, match=r"unknown name 'mu_mx'; did you mean 'mu_max'") as ei:
        optfeed.load_problem(path)
    issue = _one_issue(ei)
    assert (issue.file, issue.line, issue.key) == (str(path), 12, "rates.mu")


def test_api_volume_order():
    path = CORPUS / "problem_volume_order.yaml"
    with pytest.raises(InputError, match=r"is above the working volume") as ei:
        load_problem(path)
    issue = _one_issue(ei)
    assert (issue.line, issue.key) == (21, "vessel.initial_volume")


def test_api_python_tag_is_not_run(capfd):
    with pytest.raises(InputError, match=r"YAML tag .*python/object/apply:os\.system.* is not allowed"):
        load_problem(CORPUS / "problem_python_tag.yaml")
    assert "hi" not in capfd.readouterr().out


def test_api_alias_bomb_stops_early():
    with pytest.raises(InputError, match=r"alias bomb"):
        load_problem(CORPUS / "problem_alias_bomb.yaml")


def test_api_dunder_and_attribute():
    with pytest.raises(InputError, match=r"names starting with '_' are not allowed: '__import__'"):
        load_problem(CORPUS / "problem_dunder.yaml")
    with pytest.raises(InputError, match=r"attribute access"):
        load_problem(CORPUS / "problem_attribute.yaml")


def test_api_empty_and_binary(tmp_path):
    with pytest.raises(InputError, match=r"file is empty"):
        load_problem(CORPUS / "problem_empty.yaml")
    path = tmp_path / "problem_binary.yaml"
    path.write_bytes(GENERATED["problem_binary.yaml"])
    with pytest.raises(InputError, match=r"is a binary file"):
        load_problem(path)


def test_api_input_error_is_a_value_error():
    with pytest.raises(ValueError, match=r"required key is missing"):
        load_problem(CORPUS / "problem_missing_initial.yaml")


def test_api_schedule_overlap():
    path = CORPUS / "schedule_overlap.csv"
    with pytest.raises(InputError, match=r"rows overlap or are out of order") as ei:
        load_schedule(path, ["glucose"], 10.0)
    issue = _one_issue(ei)
    assert (issue.line, issue.key) == (6, "glucose")


# ---------------------------------------------------------------- runs files of optfeed fit

FIT = CORPUS / "fit"

# Each runs_*.yaml in bad_input/fit/ is a copy of ok_runs.yaml (for ok_problem.yaml) with
# one defect; a fault inside a data file is reported at that file's line and column.
FIT_CASES = [
    Case("runs_unknown_species.yaml", 2, "Q [g/L]",
         r"^'Q' is not a species, V, a named rate, OUR or heat_load of the problem",
         reported="fit/data_unknown_species.csv"),
    Case("runs_data_unit.yaml", 2, "X [g/h]", r"^unit 'g/h' has dimension \[mass\] / \[time\], but 'X' is in g/L",
         reported="fit/data_wrong_unit.csv"),
    Case("runs_bound_unit.yaml", 3, "estimate.mu_max.min",
         r"^'0\.1 g/L' has dimension \[mass\] / \[length\] \*\* 3 .*, but 'mu_max' is in 1/h"),
    Case("runs_time_outside.yaml", 15, "runs[1].end_time",
         r"^the data file has samples up to 10 h, after the run's end \(8 h\)"),
    Case("runs_few_samples.yaml", 7, "runs",
         r"^1 measured value\(s\) for 2 parameter\(s\) to estimate: a fit needs more measurements than parameters"),
    Case("runs_missing_schedule.yaml", 13, "runs[1].schedule", r"^no_such_schedule\.csv: file not found"),
    Case("runs_unknown_parameter.yaml", 3, "estimate.mu_mx",
         r"^'mu_mx' is not a parameter of .*ok_problem\.yaml; did you mean 'mu_max'\?"),
    Case("runs_bounds.yaml", 4, "estimate.K_s", r"^min '2 g/L' is not below max '0\.01 g/L'"),
    Case("runs_path.yaml", 10, "runs[0].data",
         r"^'\.\./\.\./outside\.csv' leads outside .*; a data file named in runs_path\.yaml must lie in its folder"),
]


@pytest.mark.parametrize("case", [pytest.param(c, id=c.file) for c in FIT_CASES])
def test_bad_runs_file_is_refused_cleanly(case: Case, tmp_path: Path):
    """optfeed fit: exit 2, one message naming the file, line and key, nothing written."""
    results = tmp_path / "results"
    path = FIT / case.file
    [(code, stdout, stderr)] = _run_all([["fit", str(OK_PROBLEM), str(path), "--results", str(results)]],
                                        cwd=tmp_path)
    named = CORPUS / case.reported if case.reported else path
    _assert_clean_refusal("fit", code, stdout, stderr, named, case)
    assert len(stderr.splitlines()) == 2, f"one message expected:\n{stderr}"
    assert not results.exists() or not any(results.iterdir()), f"files written: {sorted(_files_under(results))}"
    assert _files_under(tmp_path) == set()


def test_fit_corpus_lists_every_runs_file():
    on_disk = {p.name for p in FIT.glob("runs_*.yaml")}
    assert on_disk == {c.file for c in FIT_CASES}


def test_ok_runs_file_is_valid():
    """The base every runs case is a variant of loads (so each refusal is its defect's)."""
    from optfeed.fit import load_runs
    from optfeed.model import build_model

    problem = load_problem(OK_PROBLEM)
    runs = load_runs(FIT / "ok_runs.yaml", problem, build_model(problem))
    assert [r.name for r in runs.runs] == ["batch", "fed"] and runs.n_samples == 21


def test_fit_refuses_a_problem_with_phases_or_additions(tmp_path):
    """A fit models every run as one phase with no additions: a problem with phases
    (the shipped induced-protein example) is refused before anything is read or
    written, naming the file, the line and the key (exit 2)."""
    problem = REPO / "configs" / "induced_protein.yaml"
    results = tmp_path / "results"
    [(code, stdout, stderr)] = _run_all([["fit", str(problem), str(REPO / "configs" / "inhibited_product_runs.yaml"),
                                          "--results", str(results)]], cwd=tmp_path)
    assert code == 2 and "Traceback" not in stderr and stdout.strip() == ""
    line = next(i for i, text in enumerate(problem.read_text().splitlines(), 1) if text.startswith("phases:"))
    assert stderr.splitlines()[1].startswith(f"  {problem}:{line}: phases: optfeed fit models each run as one phase")
    assert not results.exists()
