"""`nightplan demo` end to end in a subprocess: it must leave two plans, charts and exports."""

from __future__ import annotations

import csv
import json
import sqlite3

import pytest

from conftest import ROOT, run_cli


def test_demo_data_is_what_the_generator_writes(tmp_path):
    """The committed scenario files are exactly the deterministic generator's output."""
    import importlib.util
    import shutil

    src = ROOT / "scheduler" / "data" / "demo_queue"  # package data (the top-level demo_queue/ points here)
    copy = tmp_path / "demo_queue"
    shutil.copytree(src, copy)
    spec = importlib.util.spec_from_file_location("make_demo_copy", copy / "make_demo.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    mod.main()  # writes beside the copied script
    for name in ("programs.csv", "requests.csv", "forecast.csv", "forecast_update.json", "scenario.json",
                 "climatology.csv", mod.COMET_FILE):
        assert (copy / name).read_bytes() == (src / name).read_bytes(), name
    rows = list(csv.DictReader((src / "requests.csv").open(encoding="utf-8")))
    assert len(rows) == 150
    assert len({r["program"] for r in rows}) == 5
    bands = {r["band"] for r in rows}
    assert {"B", "V", "J", "K", "N", "Q"} <= bands  # optical to mid-infrared
    # a planet, a comet-like target with its ephemeris table, off-axis adaptive optics
    assert any(r["body"] == "saturn" for r in rows)
    assert any(r["ephemeris_file"] == mod.COMET_FILE and not r["ra"] for r in rows)
    assert any(r["guide_star_sep_arcsec"] and float(r["guide_star_sep_arcsec"]) > 0 and r["resolution_arcsec"]
               for r in rows)


@pytest.mark.slow
def test_demo_runs_end_to_end(tmp_path):
    out = tmp_path / "demo"
    proc = run_cli("demo", "--out", str(out), "--time-limit", "2", cwd=tmp_path, timeout=240)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    text = proc.stdout
    for step in ("$ nightplan init", "$ nightplan request import", "$ nightplan conditions load",
                 "$ nightplan plan build", "$ nightplan plan show", "$ nightplan plan chart",
                 "$ nightplan plan export", "What moved from plan version 1 to 2", "Demo finished"):
        assert step in text, step
    for kind in ("added", "dropped", "moved"):
        assert f"  {kind}" in text

    for name in ("plan_v1.png", "plan_v2.png"):
        data = (out / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 40_000
    doc = json.loads((out / "plan_v1.json").read_text(encoding="utf-8"))
    doc2 = json.loads((out / "plan_v2.json").read_text(encoding="utf-8"))
    assert doc["plan"]["version"] == 1 and doc2["plan"]["version"] == 2 and doc["entries"]
    assert "forecast update" in doc2["plan"]["reason"]
    rows = list(csv.DictReader((out / "plan_v1.csv").open(encoding="utf-8")))
    assert len(rows) == len(doc["entries"])

    con = sqlite3.connect(out / "nightplan.sqlite")
    try:
        plans = con.execute("select id, active, previous_id from plan order by id").fetchall()
        n_req = con.execute("select count(*) from request").fetchone()[0]
    finally:
        con.close()
    assert plans == [(1, 0, None), (2, 1, 1)]
    assert n_req == 150

    again = run_cli("demo", "--out", str(out), cwd=tmp_path)
    assert again.returncode == 2 and "already holds" in again.stderr
