"""The issue's reproductions that needed the command line wired to the core's checks.

Each test states the behaviour a command must have, through the real CLI on a real SQLite
file: request import through model.request.parse_import_text, program add through
validate_program, --source and --reason through model.untrusted.check_text, --night through
model.timegrid.parse_date, --allow-past, and the 0600 service log (service.log.create_log_file).
More cases of each are in tests/test_robust_cli.py.
"""

from __future__ import annotations

import os
import stat

import pytest

from conftest import cli_json, run_cli

pytestmark = pytest.mark.slow


def _refused(proc, field: str) -> None:
    assert proc.returncode == 2, (proc.returncode, proc.stderr)
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and f"{field}: " in lines[0], proc.stderr
    assert "\x1b" not in proc.stderr + proc.stdout


GOOD = "STAR-1,Invented 1,10,-20,V,100"


@pytest.mark.parametrize("name, text, field", [
    ("twice.csv", f"program,target,ra,dec,band,exposure_s,ra\n{GOOD},200\n", "ra"),
    ("deep.json", "[" * 100_000 + "]" * 100_000, "file"),
    ("digits.json", '[{"program": "STAR-1", "target": "a", "ra": 10, "dec": -20, "band": "V", "exposure_s": '
                    + "1" * 5000 + "}]", "file"),
    ("cell.csv", "program,target,ra,dec,band,exposure_s\nSTAR-1," + "x" * 140_000 + ",10,-20,V,100\n", "target"),
    ("dupkey.json", '[{"program": "STAR-1", "target": "a", "target": "b", "ra": 10, "dec": -20, "band": "V", '
                    '"exposure_s": 100}]', "target"),
], ids=["column-twice", "json-deep", "json-5000-digits", "cell-140k", "json-key-twice"])
def test_request_import_file_shapes(workdir, name, text, field):
    f = workdir / name
    f.write_text(text, encoding="utf-8")
    _refused(run_cli("request", "import", str(f), cwd=workdir), field)
    assert cli_json("request", "list", cwd=workdir) == []


@pytest.mark.parametrize("args, field", [
    (["NL\n", "--pi", "Dr. X"], "code"),
    (["P2", "--pi", "Dr. \u202eX"], "pi"),
    (["P2", "--pi", "Dr. \u009bX"], "pi"),
    (["P2", "--pi", "\u200b"], "pi"),
    (["P2", "--pi", "Dr. X", "--hours", "1_0"], "hours"),
], ids=["code-newline", "pi-bidi", "pi-c1", "pi-invisible", "hours-1_0"])
def test_program_add_refuses(workdir, args, field):
    _refused(run_cli("program", "add", *args, cwd=workdir), field)
    assert [p["code"] for p in cli_json("program", "list", cwd=workdir)] == ["STAR-1"]


def test_conditions_source_with_escapes_is_refused(workdir):
    f = workdir / "c.csv"
    f.write_text("time,pwv_mm\n2026-12-16T23:00:00Z,1\n", encoding="utf-8")
    _refused(run_cli("conditions", "load", str(f), "--source", "met\x1b]0;owned\x07", cwd=workdir), "source")


def test_replan_reason_with_escapes_is_refused(workdir):
    _refused(run_cli("replan", "--reason", "storm\x1b[2J", cwd=workdir), "reason")


def test_night_at_the_end_of_the_calendar_is_refused(workdir):
    _refused(run_cli("almanac", "--night", "9999-12-31", cwd=workdir), "night")


def test_not_after_in_the_past_needs_allow_past(workdir):
    args = ["request", "add", "--program", "STAR-1", "--target", "a", "--ra", "10", "--dec", "-20", "--band", "V",
            "--exposure", "100", "--not-after", "2020-01-01T00:00:00Z"]
    _refused(run_cli(*args, cwd=workdir), "not_after")
    assert run_cli(*args, "--allow-past", cwd=workdir).returncode == 0


def test_serve_log_file_is_private(workdir):
    old = os.umask(0o022)
    try:
        run_cli("serve", "--once", "--log-file", "svc.log", "--clock", "2026-12-16T20:00:00Z", cwd=workdir,
                timeout=120)
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(workdir / "svc.log").st_mode) == 0o600

