"""Sweep files that must be refused before anything runs: paths leaving the sweep's
folder, globs matching nothing or too much, values that are not numbers, seeds,
empty sweeps, and sweeps too large to expand. Each is an InputError naming the sweep
file, its line and key; nothing is written.

References: glob semantics of Python's ``glob`` module; numpy's rule that a seed is
a non-negative integer (``numpy.random.default_rng``).
"""

import subprocess
import sys

import pytest

from optfeed.errors import InputError
from optfeed.sweep import load_sweep

from conftest import CONFIGS

HEAD = "problems: animal_cell.yaml\njob: check\nschedule: plan.csv\n"


def folder(tmp_path):
    d = tmp_path / "project"
    d.mkdir(parents=True)
    (d / "animal_cell.yaml").write_text((CONFIGS / "animal_cell.yaml").read_text())
    (d / "plan.csv").write_text((CONFIGS / "animal_cell_plan.csv").read_text())
    return d


def sweep(tmp_path, body, head=HEAD):
    d = folder(tmp_path)
    path = d / "s.yaml"
    path.write_text(head + body)
    return path


def refused(path, pattern, **kw):
    with pytest.raises(InputError, match=pattern) as ei:
        load_sweep(path, **kw)
    assert ei.value.issues[0].file == str(path)
    return ei.value.issues[0]


# ---------------------------------------------------------------- paths stay in the folder


@pytest.mark.parametrize("name", ["../../escaped", "/tmp/escaped", ".hidden", "a/b", "", "x" * 81, True])
def test_sweep_name_is_a_plain_folder_name(tmp_path, name):
    path = sweep(tmp_path, f"name: {name!r}\n" if isinstance(name, str) else f"name: {str(name).lower()}\n")
    issue = refused(path, r"name .* is used for result folders")
    assert (issue.line, issue.key) == (4, "name")


def test_problem_files_outside_the_folder_are_refused(tmp_path):
    d = folder(tmp_path)
    (tmp_path / "outside.yaml").write_text((CONFIGS / "animal_cell.yaml").read_text())
    for spec in ["../outside.yaml", str(tmp_path / "outside.yaml"), "../*.yaml", "/etc/passwd"]:
        (d / "s.yaml").write_text(HEAD.replace("animal_cell.yaml", repr(spec)))
        issue = refused(d / "s.yaml", r"problems: .*(leads outside|must be relative)")
        assert issue.line == 1
    # a link inside the folder that leads out is followed, and refused
    (d / "link.yaml").symlink_to(tmp_path / "outside.yaml")
    (d / "s.yaml").write_text(HEAD.replace("animal_cell.yaml", "link.yaml"))
    refused(d / "s.yaml", r"problems: 'link.yaml' leads outside")
    # below the folder is fine
    (d / "sub").mkdir()
    (d / "sub" / "p.yaml").write_text((CONFIGS / "animal_cell.yaml").read_text())
    (d / "s.yaml").write_text(HEAD.replace("animal_cell.yaml", "sub/*.yaml"))
    assert len(load_sweep(d / "s.yaml").cases) == 1


def test_globs_matching_nothing_or_too_much_and_empty_lists(tmp_path):
    d = folder(tmp_path)
    (d / "s.yaml").write_text(HEAD.replace("animal_cell.yaml", "nothing_*.yaml"))
    refused(d / "s.yaml", r"s.yaml:1: problems: no problem file matches 'nothing_\*.yaml'")
    many = d / "many"
    many.mkdir()
    for i in range(1001):
        (many / f"p{i}.yaml").write_text("")
    (d / "s.yaml").write_text(HEAD.replace("animal_cell.yaml", "many/*.yaml"))
    refused(d / "s.yaml", r"s.yaml:1: problems: 'many/\*.yaml' matches more than 1000 files; at most 1000 problem files")
    (d / "s.yaml").write_text(HEAD.replace("animal_cell.yaml", "[]"))
    refused(d / "s.yaml", r"s.yaml:1: problems: the list is empty")


def test_schedule_path_problems_are_named_at_the_sweep_key(tmp_path):
    for value, pattern in [("/etc/passwd", r"s.yaml:3: schedule: '/etc/passwd' leads outside"),
                           ("../plan.csv", r"s.yaml:3: schedule: '../plan.csv' leads outside"),
                           ("null", r"s.yaml:3: schedule: expected the name of a schedule file, got None"),
                           ("missing.csv", r"s.yaml:3: schedule: missing.csv: file not found")]:
        path = sweep(tmp_path / value.replace("/", "_").replace(".", "_"), "", head=HEAD.replace("plan.csv", value))
        issue = refused(path, pattern)
        assert "root:" not in issue.message  # never a line of the file it names


def test_the_shared_path_rule(tmp_path):
    from optfeed.paths import inside

    # the helper that the sweep uses (and a calibration's data paths will): resolved, then inside
    (tmp_path / "in").mkdir()
    assert inside("a/../b.csv", tmp_path / "in", "f.yaml", 3, "data") == (tmp_path / "in" / "b.csv").resolve()
    with pytest.raises(InputError, match=r"f.yaml:3: data: '../b.csv' leads outside"):
        inside("../b.csv", tmp_path / "in", "f.yaml", 3, "data")


# ---------------------------------------------------------------- values


@pytest.mark.parametrize("spec,pattern", [
    ("{range: [0.003, 0.006, .nan]}", r"range and linspace take three finite numbers"),
    ("{range: [0.003, .inf, 0.001]}", r"range and linspace take three finite numbers"),
    ("{range: [true, 5, 1]}", r"range and linspace take three finite numbers"),
    ("{linspace: [0.003, 0.006, true]}", r"range and linspace take three finite numbers"),
    ("{linspace: [0.003, 0.006, 3], unit: parsec}", r"'parsec' has no use"),
    ("[0.003, .nan]", r"value nan is not a finite number"),
    ("[0.003, null]", r"an empty value \(null\) cannot be swept"),
])
def test_bad_values_are_refused_at_their_key(tmp_path, spec, pattern):
    path = sweep(tmp_path, f"grid:\n  parameters.k_d: {spec}\n")
    issue = refused(path, pattern)
    assert issue.line == 5 and issue.key.startswith("grid.parameters.k_d")


def test_a_swept_yes_no_value_is_named_at_the_sweep_key(tmp_path):
    path = sweep(tmp_path, "grid:\n  feeds.glucose.max_rate: [20 mL/h, yes]\n")
    issue = refused(path, r"s.yaml:5: feeds.glucose.max_rate: a yes/no value \(read as true\)")
    assert "True" in issue.message  # the value as read


@pytest.mark.parametrize("seed,count,pattern", [
    ("-1", "4", r"sample.seed: a whole-number seed from 0 up"),
    ("true", "4", r"sample.seed: a whole-number seed from 0 up"),
    ("1", "true", r"sample.count: a whole number of samples"),
    ("1", "2.5", r"sample.count: a whole number of samples"),
])
def test_sample_seed_and_count(tmp_path, seed, count, pattern):
    path = sweep(tmp_path, f"sample:\n  count: {count}\n  seed: {seed}\n  ranges:\n"
                           "    parameters.k_d: {min: 0.003, max: .nan}\n")
    refused(path, pattern)


def test_sample_range_bounds_must_be_finite(tmp_path):
    path = sweep(tmp_path, "sample:\n  count: 4\n  seed: 1\n  ranges:\n    parameters.k_d: {min: 0.003, max: .nan}\n")
    refused(path, r"sample.ranges.parameters.k_d: min and max must be finite numbers")


def test_a_fullwidth_list_index_is_not_an_index(tmp_path):
    path = sweep(tmp_path, "grid:\n  limits.１.max: [1, 2]\n")
    refused(path, r"limits.１.max: .*no item '１' here")


def test_time_limit_must_be_finite(tmp_path):
    refused(sweep(tmp_path, "time_limit: 1e308 h\n"), r"time_limit: must be above zero and finite")


# ---------------------------------------------------------------- sizes


def test_cases_are_counted_before_they_are_built(tmp_path):
    # two 100,000-value axes: 1e10 cases; refused at once, with the count and the way to raise the cap
    path = sweep(tmp_path, "grid:\n  parameters.k_d: {linspace: [0.003, 0.005, 100000]}\n"
                           "  parameters.mu_max: {linspace: [0.03, 0.05, 100000]}\n")
    issue = refused(path, r"this sweep has 10,000,000,000 cases \(1 problem file\(s\) x 100,000 values of "
                          r"parameters.k_d x 100,000 values of parameters.mu_max\), more than the 10,000 allowed; "
                          r"raise the cap \(--max-cases 10000000000\)")
    assert issue.key == ""
    small = sweep(tmp_path / "small", "grid:\n  parameters.k_d: [0.003, 0.004]\n  feeds.glucose.max_rate: "
                                      "[20 mL/h, 25 mL/h]\n")
    refused(small, r"this sweep has 4 cases .* more than the 3 allowed", max_cases=3)
    assert len(load_sweep(small, max_cases=4).cases) == 4


def test_max_cases_on_the_command_line(tmp_path):
    path = sweep(tmp_path, "grid:\n  parameters.k_d: [0.003, 0.004]\n")
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-m", "optfeed.cli", "sweep", str(path), "--out", str(out),
                           "--max-cases", "1"], capture_output=True, text=True)
    assert proc.returncode == 2 and "this sweep has 2 cases" in proc.stderr and "Traceback" not in proc.stderr
    assert not out.exists()


def test_a_negative_case_cap_is_refused(tmp_path):
    from optfeed.cli import main

    assert main(["sweep", str(sweep(tmp_path, "")), "--max-cases", "0", "--out", str(tmp_path / "o")]) == 2
    assert not (tmp_path / "o").exists()
