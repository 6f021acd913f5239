"""Operators through the real CLI: record outcomes and see the next plan reflect them; clean errors.

Same small invented queue and night as tests/test_report.py (ids follow its CSV order).
"""

from __future__ import annotations

import pytest
from conftest import cli_json, run_cli
from test_report import BEFORE, NIGHT, build, make_queue

FILL_A, FILL_B, FILL_C = 4, 5, 6


def _entries(folder) -> dict[int, dict]:
    return {e["request_id"]: e for e in cli_json("plan", "show", cwd=folder)["entries"]}


@pytest.mark.slow
def test_record_then_build_reflects_outcomes(workdir):
    make_queue(workdir)
    build(workdir, "first")
    first = _entries(workdir)
    assert {FILL_A, FILL_B, FILL_C} <= set(first), "the light test queue should schedule the fillers"

    out = run_cli("record", str(FILL_A), "--result", "done", "--note", "clean frames", cwd=workdir, check=True).stdout
    assert "leaves the queue" in out
    out = run_cli("record", str(FILL_B), "--result", "partial", "--exposure", "500", cwd=workdir, check=True).stdout
    assert "500 s of 1200 s credited" in out
    out = run_cli("record", str(FILL_C), "--result", "failed", "--note", "guide star lost", cwd=workdir,
                  check=True).stdout
    assert "back in the queue" in out

    reqs = {r["id"]: r for r in cli_json("request", "list", cwd=workdir)}
    assert reqs[FILL_A]["status"] == "done"
    assert reqs[FILL_B]["status"] == "queued" and reqs[FILL_B]["partial_exposure_s"] == 500
    assert reqs[FILL_C]["status"] == "queued"

    build(workdir, "after outcomes")
    second = _entries(workdir)
    assert FILL_A not in second  # done: out of the queue, out of the plan
    assert FILL_B in second and second[FILL_B]["exposure_s"] == 700  # only the exposure still owed
    assert FILL_C in second  # failed: back in the queue and planned again
    reqs = {r["id"]: r for r in cli_json("request", "list", cwd=workdir)}
    assert reqs[FILL_A]["status"] == "done"

    again = run_cli("record", str(FILL_A), "--result", "done", cwd=workdir)
    assert again.returncode == 2 and "is done" in again.stderr


@pytest.mark.slow
def test_observer_errors_are_one_line_and_write_nothing(workdir):
    none = run_cli("plan", "show", cwd=workdir)
    assert none.returncode == 2 and "no plan yet" in none.stderr and "Traceback" not in none.stderr
    nxt = run_cli("next", cwd=workdir)
    assert nxt.returncode == 2 and "no plan for the night of" in nxt.stderr

    bad = run_cli("plan", "build", "--night", NIGHT, "--time-limit", "0", "--now", BEFORE, cwd=workdir)
    assert bad.returncode == 2 and "time-limit" in bad.stderr and "0.1 to 3600" in bad.stderr
    bad = run_cli("plan", "build", "--night", "2026-13-01", cwd=workdir)
    assert bad.returncode == 2 and "night" in bad.stderr
    assert cli_json("plan", "list", cwd=workdir) == []  # nothing was stored

    make_queue(workdir)
    part = run_cli("record", "1", "--result", "partial", cwd=workdir)
    assert part.returncode == 2 and "exposure" in part.stderr
    over = run_cli("record", "4", "--result", "partial", "--exposure", "5000", cwd=workdir)
    assert over.returncode == 2 and "exposure" in over.stderr and "0 to 1200" in over.stderr
    assert {r["status"] for r in cli_json("request", "list", cwd=workdir)} == {"queued"}
    missing = run_cli("plan", "export", "--format", "json", "--version", "7", cwd=workdir)
    assert missing.returncode == 2 and "version 7 not found" in missing.stderr


@pytest.mark.slow
def test_an_outcome_ends_the_entry_in_progress(workdir):
    """The observer stops an observation and records it: the re-plan from inside that entry no
    longer holds it until its planned end (the telescope is free: it used to be held, and
    counted among the executions owed); a done request is not planned again."""
    from datetime import datetime, timedelta

    make_queue(workdir)
    build(workdir, "first")
    first = _entries(workdir)
    assert {FILL_A, FILL_C} <= set(first)
    run_cli("record", str(FILL_C), "--result", "failed", "--note", "clouds, stopped", cwd=workdir, check=True)
    run_cli("record", str(FILL_A), "--result", "done", "--note", "stopped early, enough signal", cwd=workdir,
            check=True)
    for rid in (FILL_C, FILL_A):
        start = datetime.fromisoformat(first[rid]["start"].replace("Z", "+00:00"))
        now = start + timedelta(minutes=4)
        run_cli("plan", "build", "--night", NIGHT, "--now", now.isoformat().replace("+00:00", "Z"),
                "--reason", "outcome recorded", cwd=workdir, check=True)
        plan = cli_json("plan", "show", cwd=workdir)
        mine = [e for e in plan["entries"] if e["request_id"] == rid]
        assert all(datetime.fromisoformat(e["start"].replace("Z", "+00:00")) >= now for e in mine), mine
        if rid == FILL_A:
            assert mine == []
