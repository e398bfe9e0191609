"""The command line on the shipped examples: exit codes, files, report text."""

import json
import subprocess
import sys

import pytest

from optfeed.cli import main

from conftest import CONFIGS, EXAMPLES


@pytest.mark.parametrize("problem,schedule,code", EXAMPLES)
def test_check_each_example(tmp_path, capsys, problem, schedule, code):
    out = tmp_path / "run"
    rc = main(["check", str(CONFIGS / problem), "--schedule", str(CONFIGS / schedule), "--out", str(out)])
    assert rc == code
    text = capsys.readouterr().out
    assert "STATUS: " + ("LIMIT BROKEN" if code else "WITHIN LIMITS") in text
    assert "verify it at small scale first" in text.lower()
    assert sorted(p.name for p in out.iterdir()) == [
        "figure-culture.svg", "figure-feeds.svg", "figure-limits.svg", "limits.csv", "report.html", "report.txt",
        "schedule.csv", "summary.json", "trajectory.csv"]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == ("limit broken" if code else "within limits")
    assert summary["exit_code"] == code
    assert len(summary["record"]["problem_digest"]) == 64
    assert summary["objective"]["value"] > 0
    for svg in out.glob("figure-*.svg"):
        assert svg.read_text(encoding="utf-8").startswith("<svg")
    assert not list(tmp_path.glob(".run.*")), "temporary folder left behind"


def test_png_on_request_beside_each_svg(tmp_path, capsys):
    """--png adds a PNG of every figure (the same drawing, through matplotlib)."""
    out = tmp_path / "run"
    rc = main(["check", str(CONFIGS / "animal_cell.yaml"), "--schedule", str(CONFIGS / "animal_cell_plan.csv"),
               "--out", str(out), "--png", "--quiet"])
    assert rc == 0
    svgs = sorted(p.stem for p in out.glob("figure-*.svg"))
    assert svgs and svgs == sorted(p.stem for p in out.glob("figure-*.png"))
    for png in out.glob("figure-*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_violation_report_names_first_break(tmp_path, capsys):
    rc = main(["check", str(CONFIGS / "fast_microbe.yaml"), "--schedule", str(CONFIGS / "fast_microbe_plan.csv"),
               "--out", str(tmp_path / "r"), "--json"])
    assert rc == 1
    summary = json.loads(capsys.readouterr().out)
    broken = [lim for lim in summary["limits"] if lim["first_violation_h"] is not None]
    assert broken[0]["name"] == "OTR ceiling"
    assert 10 < broken[0]["first_violation_h"] < 20
    assert broken[0]["worst_violation"] > 0


def test_validate_examples(capsys):
    for problem, schedule, _ in EXAMPLES:
        assert main(["validate", str(CONFIGS / problem), "--schedule", str(CONFIGS / schedule)]) == 0
    assert "valid" in capsys.readouterr().out


def test_existing_out_folder_is_refused(tmp_path, capsys):
    out = tmp_path / "taken"
    out.mkdir()
    rc = main(["check", str(CONFIGS / "animal_cell.yaml"), "--schedule", str(CONFIGS / "animal_cell_plan.csv"),
               "--out", str(out)])
    assert rc == 2
    assert "already exists" in capsys.readouterr().err
    assert list(out.iterdir()) == []


def test_console_entry_point_runs(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "optfeed.cli", "--version"], capture_output=True, text=True)
    assert proc.returncode == 0 and proc.stdout.startswith("optfeed ")
