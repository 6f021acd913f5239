"""The science value through the real CLI on a real SQLite file: program tiers, hours charged
by outcomes, allocation and overfill, the factors in `plan why` and `plan show --json`."""

from __future__ import annotations

import pytest

from conftest import cli_json, run_cli

pytestmark = pytest.mark.slow

NIGHT = "2026-12-16"
BEFORE = "2026-12-16T18:00:00Z"
# TOP-1 (tier 1, priority 1) and LOW-10 (tier 2, priority 10) share a 45-minute window and each
# needs 33 min: only one fits. SPENT-* belong to a program whose one hour is charged already.
REQUESTS = """program,target,ra,dec,band,exposure_s,not_before,not_after,priority
TOP,TOP-1,75.0,-30.0,V,1800,2026-12-17T04:00:00Z,2026-12-17T04:45:00Z,1
LOW,LOW-10,76.0,-31.0,V,1800,2026-12-17T04:00:00Z,2026-12-17T04:45:00Z,10
SPENT,SPENT-DONE,30.0,-20.0,R,3600,,,5
SPENT,SPENT-NEXT,60.0,-40.0,R,1200,,,5
"""


def _build(folder):
    run_cli("plan", "build", "--night", NIGHT, "--now", BEFORE, cwd=folder, check=True)
    return cli_json("plan", "show", cwd=folder)


@pytest.fixture
def queue(workdir):
    run_cli("program", "add", "TOP", "--pi", "Dr. Ines Valdivia", "--hours", "20", "--tier", "1", cwd=workdir, check=True)
    run_cli("program", "add", "LOW", "--pi", "Dr. Teo Marangoni", "--hours", "20", cwd=workdir, check=True)
    run_cli("program", "add", "SPENT", "--pi", "Dr. Ada Quispe", "--hours", "1", cwd=workdir, check=True)
    (workdir / "requests.csv").write_text(REQUESTS, encoding="utf-8")
    run_cli("request", "import", "requests.csv", cwd=workdir, check=True)
    ids = {r["target"]: r["id"] for r in cli_json("request", "list", cwd=workdir)}
    out = run_cli("record", str(ids["SPENT-DONE"]), "--result", "done", "--unplanned", cwd=workdir, check=True).stdout
    assert "1.00 h charged to program SPENT" in out  # no plan entry: the request's exposure
    return workdir, ids


def test_tiers_charges_and_allocation_through_the_cli(queue):
    folder, ids = queue
    progs = {p["code"]: p for p in cli_json("program", "list", cwd=folder)}
    assert (progs["TOP"]["tier"], progs["LOW"]["tier"], progs["SPENT"]["tier"]) == (1, 2, 2)
    spent = cli_json("program", "show", "SPENT", cwd=folder)
    assert spent["hours_charged"] == pytest.approx(1.0) and spent["hours_remaining"] == pytest.approx(0.0)
    assert (spent["executions_done"], spent["executions"]) == (1, 2) and spent["completion"] == pytest.approx(0.5)
    text = run_cli("program", "show", "SPENT", cwd=folder, check=True).stdout
    assert "past its allocation" in text

    doc = _build(folder)
    planned = {e["request_id"]: e for e in doc["entries"]}
    assert ids["TOP-1"] in planned and ids["LOW-10"] not in planned  # tiers are strict
    assert ids["SPENT-NEXT"] not in planned  # its program is past its allocation
    why = {u["request_id"]: u["reason"] for u in doc["unscheduled"]}
    assert "past its allocation" in why[ids["SPENT-NEXT"]]
    top = planned[ids["TOP-1"]]
    assert top["tier"] == 1 and top["opportunities_left"] == 1 and top["urgency"] == pytest.approx(4.0)

    out = cli_json("plan", "why", str(ids["TOP-1"]), cwd=folder)
    f = out["factors"][0]
    assert (f["tier"], f["priority_weight"], f["opportunities_left"]) == (1, 1 / 16, 1)
    product = f["program_weight"] * f["priority_weight"] * f["exposure_h"] * f["merit"] * f["urgency"] * f["balance"]
    assert product == pytest.approx(top["value"], rel=1e-3)  # the factors multiply to the entry's value
    assert 0 < f["merit"] <= f["merit_at_start"] + 1e-3  # credited: the lowest merit of its bucket
    text = run_cli("plan", "why", str(ids["TOP-1"]), cwd=folder, check=True).stdout
    assert "tier 1" in text and "urgency 4.000 (1 night left" in text and "balance" in text

    # overfill allowed: the spent program is planned again
    cfg = folder / "observatory.toml"
    cfg.write_text(cfg.read_text(encoding="utf-8").replace("allow_overfill = false", "allow_overfill = true"),
                   encoding="utf-8")
    doc = _build(folder)
    assert ids["SPENT-NEXT"] in {e["request_id"] for e in doc["entries"]}


def test_record_charge_rule(queue):
    folder, ids = queue
    _build(folder)
    out = run_cli("record", str(ids["TOP-1"]), "--result", "failed", cwd=folder, check=True).stdout
    assert "0.00 h charged" in out  # a failure is the telescope's unless said otherwise
    out = run_cli("record", str(ids["TOP-1"]), "--result", "failed", "--charge", "program", cwd=folder, check=True).stdout
    # the time as planned: its entry (180 s setup + 1800 s, on whole minutes) and the transition into it
    hours = float(out.split(" h charged")[0].rsplit(" ", 1)[1])
    assert 0.55 <= hours <= 0.62
    out = run_cli("record", str(ids["TOP-1"]), "--result", "partial", "--exposure", "900", "--charge", "none",
                  cwd=folder, check=True).stdout
    assert "0.00 h charged" in out
    bad = run_cli("record", str(ids["TOP-1"]), "--result", "done", "--charge", "telescope", cwd=folder)
    assert bad.returncode == 2
    assert cli_json("program", "show", "TOP", cwd=folder)["hours_charged"] == pytest.approx(hours)
    bad = run_cli("program", "add", "X", "--pi", "Dr. Y", "--tier", "0", cwd=folder)
    assert bad.returncode == 2 and "tier" in bad.stderr and "1 (highest) to 9" in bad.stderr
