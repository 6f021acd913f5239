"""`nightplan season simulate` end to end: the real CLI, a real Dask cluster, a real SQLite queue.

Small seasons (5 nights x 2 realizations, effort 1) on an invented queue at the starter
config's fictional site: three easy requests of one program, a request that never rises
above the telescope's altitude limit, and one ordinary request. Weather from a clear-sky
climatology written here (no lost or cloudy nights, no closures, good seeing), so an easy
program should complete.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest

from conftest import cli_json, run_cli
from scheduler.model.config import starter_config
from scheduler.season.weather import COLUMNS
from scheduler.sky.ephemeris import compute_sky
from scheduler.sky.night import night_for

pytestmark = pytest.mark.slow

FIRST = date(2026, 12, 16)
LAST = FIRST + timedelta(days=4)
SEASON = ("season", "simulate", "--from", FIRST.isoformat(), "--to", LAST.isoformat(), "--realizations", "2",
          "--seed", "5", "--weather", "clear.csv", "--effort", "1")
CLEAR_ROW = dict(seeing_median_arcsec=0.6, seeing_sigma_ln=0.1, pwv_median_mm=1.0, pwv_sigma_ln=0.1,
                 lost_night_frac=0, cloudy_frac=0, cloud_median_mag=0.3, cloud_sigma_ln=0.5,
                 wind_closure_frac=0, humidity_closure_frac=0)


def _transiting_ra(dec: float) -> float:
    cfg = starter_config()
    night = night_for(cfg.site, FIRST, cfg.planning.step_s)
    ras = np.arange(0.0, 360.0, 1.0)
    sky = compute_sky(cfg.site, night, ras, np.full(ras.size, dec))
    return float(ras[int(np.argmax(sky.alt_deg[:, night.n_times // 2]))])


def _queue_csv(ra: float) -> str:
    rows = ["program,target,ra,dec,band,exposure_s,max_seeing_arcsec",
            f"EASY,EASY-1,{ra:.1f},-30,V,600,",
            f"EASY,EASY-2,{(ra + 25) % 360:.1f},-35,R,600,",
            f"EASY,EASY-3,{(ra - 25) % 360:.1f},-25,I,600,",
            f"MIXED,NORTH-POLE,{ra:.1f},80,V,600,",  # culminates at -16.6 deg at latitude -26.6
            f"MIXED,MIXED-1,{(ra + 10) % 360:.1f},-50,R,900,1.2"]
    return "\n".join(rows) + "\n"


def _tables(folder: Path) -> dict:
    """Every row of every table, read with the standard library's sqlite3 (read-only)."""
    con = sqlite3.connect(f"file:{folder / 'nightplan.sqlite'}?mode=ro", uri=True)
    try:
        names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
        return {n: con.execute(f'SELECT * FROM "{n}" ORDER BY rowid').fetchall() for n in names}
    finally:
        con.close()


def _fingerprint(folder: Path) -> dict:
    """The database file's bytes (and a WAL's, if one is left) and its rows."""
    out = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.glob("nightplan.sqlite*"))}
    out["tables"] = _tables(folder)
    return out


@pytest.fixture(scope="module")
def queue_folder(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("season")
    run_cli("init", cwd=folder, check=True)
    run_cli("program", "add", "EASY", "--pi", "Dr. Ada Quillfeather", "--hours", "5", cwd=folder, check=True)
    run_cli("program", "add", "MIXED", "--pi", "Dr. Bram Oteleku", "--hours", "3", "--tier", "1", cwd=folder,
            check=True)
    (folder / "q.csv").write_text(_queue_csv(_transiting_ra(-30.0)), encoding="utf-8")
    run_cli("request", "import", "q.csv", cwd=folder, check=True)
    run_cli("plan", "build", "--night", FIRST.isoformat(), cwd=folder, check=True)
    lines = ["# clear skies every night (test climatology)", ",".join(COLUMNS)]
    lines += [",".join([str(m)] + [str(CLEAR_ROW[c]) for c in COLUMNS[1:]]) for m in range(1, 13)]
    (folder / "clear.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return folder


@pytest.fixture(scope="module")
def one_worker(queue_folder):
    before = _fingerprint(queue_folder)
    proc = run_cli(*SEASON, "--workers", "1", "--out", "out", "--json", cwd=queue_folder)
    assert proc.returncode == 0, proc.stderr
    return proc, json.loads(proc.stdout), before, _fingerprint(queue_folder)


def test_five_nights_two_realizations_end_to_end(queue_folder, one_worker):
    proc, doc, _, _ = one_worker
    assert (doc["from"], doc["to"], doc["realizations"], doc["seed"], doc["nights"]) == \
        (FIRST.isoformat(), LAST.isoformat(), 2, 5, 5)
    assert [(p["code"], p["tier"]) for p in doc["programs"]] == [("MIXED", 1), ("EASY", 2)]  # by tier
    for p in doc["programs"]:
        assert set(p) >= {"code", "tier", "allocated_h", "charged_h", "completion"}
        for k in ("charged_h", "completion"):
            assert set(p[k]) == {"mean", "p10", "p90"} and p[k]["p10"] <= p[k]["mean"] <= p[k]["p90"]
    assert [p["allocated_h"] for p in doc["programs"]] == [3.0, 5.0]
    assert set(doc["cumulative_charged_h_by_tier"]["tiers"]) == {"1", "2"}
    assert {r["id"] for r in doc["requests"]} == {1, 2, 3, 4, 5}
    assert all(0.0 <= r["p_complete"] <= 1.0 for r in doc["requests"])
    assert set(doc["hours_by_band"]) <= {"V", "R", "I"} and doc["hours_by_band"]
    assert doc["weather_lost_h"] == {"mean": 0.0, "p10": 0.0, "p90": 0.0}  # no closures in this climate
    assert doc["idle_dark_h"]["mean"] > 0  # five requests cannot fill five nights
    assert doc["effort"] == 1 and doc["weather"] == "clear.csv"
    # hours charged are what the nights observed, at least the exposures done
    charged = sum(p["charged_h"]["mean"] for p in doc["programs"])
    observed = sum(v["mean"] for v in doc["hours_by_band"].values())
    assert charged >= observed - 1e-3
    # progress on stderr, the JSON and the files agree
    assert "realizations 2/2 done" in proc.stderr
    out = queue_folder / "out"
    assert json.loads((out / "season.json").read_text()) == doc
    assert (out / "programs.csv").read_text().splitlines()[0].startswith("code,tier,allocated_h,charged_h_mean")
    assert len((out / "requests.csv").read_text().splitlines()) == 6
    for chart in ("completion.png", "charged_by_tier.png"):
        assert (out / chart).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_the_live_queue_and_plans_are_unchanged(one_worker):
    _, _, before, after = one_worker
    assert after == before


def test_a_never_observable_request_never_completes(one_worker):
    doc = one_worker[1]
    p = {r["id"]: r["p_complete"] for r in doc["requests"]}
    assert p[4] == 0.0  # NORTH-POLE


def test_an_easy_program_completes_under_clear_skies(one_worker):
    doc = one_worker[1]
    easy = next(p for p in doc["programs"] if p["code"] == "EASY")
    assert easy["completion"]["mean"] >= 0.9 and easy["completion"]["p10"] >= 0.9
    assert easy["charged_h"]["mean"] >= 3 * 600 / 3600


def test_same_seed_same_json_with_two_workers(queue_folder, one_worker):
    proc = run_cli(*SEASON, "--workers", "2", "--json", cwd=queue_folder)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == json.dumps(one_worker[1], indent=2, default=str) + "\n"
    assert "local Dask cluster of 2 worker processes" in proc.stderr


def test_store_on_an_existing_cluster_then_show(queue_folder, one_worker):
    from distributed import LocalCluster

    before = _fingerprint(queue_folder)
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=":0") as cluster:
        proc = run_cli(*SEASON, "--scheduler", cluster.scheduler_address, "--store", cwd=queue_folder)
    assert proc.returncode == 0, proc.stderr
    assert cluster.scheduler_address in proc.stderr and "stored the outlook" in proc.stderr
    after = _fingerprint(queue_folder)["tables"]
    grew = {n for n in after if after[n] != before["tables"][n]}
    assert grew == {"season_outlook"} and len(after["season_outlook"]) == 5 + 2  # a row per request and program
    assert before["tables"]["plan"] and before["tables"]["request"]  # the queue and its plan were there
    shown = run_cli("request", "show", "4", cwd=queue_folder, check=True).stdout
    assert "outlook: probability of completion 0.00 (computed " in " ".join(shown.split())
    easy = next(p for p in one_worker[1]["programs"] if p["code"] == "EASY")["completion"]
    got = cli_json("program", "show", "EASY", cwd=queue_folder)["outlook"]
    assert got["completion"] == easy and got["realizations"] == 2 and got["from"] == FIRST.isoformat()
    assert "season outlook: completion " in run_cli("program", "show", "EASY", cwd=queue_folder, check=True).stdout


BAD = [
    (["--from", "2027-01-10", "--to", "2027-01-01"], "to", None),
    (["--from", "2027-01-01", "--to", "2027-01-02", "--realizations", "0"], "realizations", None),
    (["--from", "2027-01-01", "--to", "2027-01-02", "--weather", "odd.csv"], "humid", "month,humid\n1,2\n"),
    (["--from", "2027-01-01", "--to", "2027-01-02", "--effort", "0"], "effort", None),
    (["--from", "2027-01-01", "--to", "2027-01-02", "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"], "workers", None),
]


@pytest.mark.parametrize("args,field,weather", BAD)
def test_bad_input_is_refused_with_one_line(tmp_path, queue_folder, args, field, weather):
    for name in ("observatory.toml", "nightplan.sqlite", "clear.csv"):
        shutil.copy2(queue_folder / name, tmp_path / name)
    if weather:
        (tmp_path / "odd.csv").write_text(weather, encoding="utf-8")
    before = hashlib.sha256((tmp_path / "nightplan.sqlite").read_bytes()).hexdigest()
    args = list(args) if "--weather" in args else list(args) + ["--weather", "clear.csv"]
    proc = run_cli("season", "simulate", *args, "--out", "out", cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nightplan: error: ") and field in lines[0], proc.stderr
    assert proc.stdout == "" and not (tmp_path / "out").exists()
    assert hashlib.sha256((tmp_path / "nightplan.sqlite").read_bytes()).hexdigest() == before
