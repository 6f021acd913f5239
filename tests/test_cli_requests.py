"""The PI command line, run as a real subprocess on a real SQLite file."""

from __future__ import annotations

import json

import pytest

from conftest import cli_json, run_cli

GOOD = ["--program", "STAR-1", "--target", "Invented field 3", "--ra", "05:35:17.3", "--dec", "-05:23:28",
        "--band", "K", "--exposure", "600"]


def _add(workdir, *extra):
    return run_cli("request", "add", *GOOD, *extra, cwd=workdir)


@pytest.mark.slow
def test_add_list_show_withdraw(workdir):
    proc = _add(workdir, "--max-pwv", "3", "--priority", "8", "--repeats", "2", "--resolution", "0.5")
    assert proc.returncode == 0, proc.stderr
    rid = int(proc.stdout.strip())
    rows = cli_json("request", "list", cwd=workdir)
    assert len(rows) == 1
    r = rows[0]
    for key in ("id", "program", "target", "ra_deg", "dec_deg", "band", "exposure_s", "status",
                "resolution_arcsec", "max_seeing_arcsec", "max_pwv_mm", "max_airmass", "min_moon_sep_deg",
                "max_cloud_mag", "not_before", "not_after", "priority", "repeats"):
        assert key in r
    assert r["id"] == rid and r["status"] == "queued" and r["max_pwv_mm"] == 3 and r["priority"] == 8
    # 05:35:17.3 = 5.588139 h = 83.82208 deg; -05:23:28 = -5.391111 deg
    assert r["ra_deg"] == pytest.approx(83.822083, abs=1e-5)
    assert r["dec_deg"] == pytest.approx(-5.391111, abs=1e-5)
    assert cli_json("request", "show", str(rid), cwd=workdir) == r
    assert run_cli("request", "withdraw", str(rid), cwd=workdir).returncode == 0
    assert cli_json("request", "show", str(rid), cwd=workdir)["status"] == "withdrawn"


BAD = [
    (["--program", "NOPE"], "program"),
    (["--band", "Z"], "band"),
    (["--ra", "25:00:00"], "ra"),
    (["--ra", "abc"], "ra"),
    (["--ra", "360"], "ra"),
    (["--dec", "+91:00:00"], "dec"),
    (["--dec", "north"], "dec"),
    (["--exposure", "0"], "exposure_s"),
    (["--exposure", "-5"], "exposure_s"),
    (["--max-airmass", "0.9"], "max_airmass"),
    (["--max-pwv", "-1"], "max_pwv_mm"),
    (["--max-seeing", "-0.5"], "max_seeing_arcsec"),
    (["--max-seeing", "0"], "max_seeing_arcsec"),
    (["--priority", "11"], "priority"),
    (["--not-before", "2026-12-05T05:00:00Z", "--not-after", "2026-12-05T04:00:00Z"], "not_after"),
    (["--not-before", "yesterday"], "not_before"),
]


@pytest.mark.slow
@pytest.mark.parametrize("override, field", BAD)
def test_bad_input_is_one_line_exit_2_and_nothing_written(workdir, override, field):
    args = list(GOOD)
    for i in range(0, len(override), 2):
        flag, value = override[i], override[i + 1]
        if flag in args:
            args[args.index(flag) + 1] = value
        else:
            args += [flag, value]
    proc = run_cli("request", "add", *args, cwd=workdir)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert lines[0].startswith(f"nightplan: error: {field}:")
    assert cli_json("request", "list", cwd=workdir) == []


def test_resolution_finer_than_diffraction_shows_both_numbers(workdir):
    # Starter telescope 3.8 m; band K 2.2 um: 1.22 * 2.2e-6 / 3.8 rad = 0.1457 arcsec.
    proc = _add(workdir, "--resolution", "0.1")
    assert proc.returncode == 2
    assert "0.1 arcsec" in proc.stderr and "0.146 arcsec" in proc.stderr
    assert cli_json("request", "list", cwd=workdir) == []
    assert _add(workdir, "--resolution", "0.15").returncode == 0


HEADER = ("program,target,ra,dec,band,exposure_s,resolution_arcsec,max_seeing_arcsec,max_pwv_mm,max_airmass,"
          "min_moon_sep_deg,max_cloud_mag,not_before,not_after,priority,repeats")


def test_import_csv_all_or_nothing(workdir):
    good = workdir / "good.csv"
    good.write_text(HEADER + "\n"
                    "STAR-1,Field A,10.5,-30,V,300,,1.0,,2.0,30,0.3,,,7,1\n"
                    "STAR-1,Field B,12:00:00,-45:00:00,N,900,,,2.5,,,,2026-12-05T00:00:00Z,2026-12-06T00:00:00Z,,\n")
    bad = workdir / "bad.csv"
    bad.write_text(HEADER + "\n"
                   "STAR-1,Field C,10.5,-30,V,300,,,,,,,,,,\n"
                   "STAR-1,Field D,10.5,-30,V,300,,,-2,,,,,,,\n")
    proc = run_cli("request", "import", str(bad), cwd=workdir)
    assert proc.returncode == 2
    assert "row 3" in proc.stderr and "max_pwv_mm" in proc.stderr  # line 3 of the file
    assert cli_json("request", "list", cwd=workdir) == []
    proc = run_cli("request", "import", str(good), cwd=workdir)
    assert proc.returncode == 0, proc.stderr
    rows = cli_json("request", "list", cwd=workdir)
    assert [r["target"] for r in rows] == ["Field A", "Field B"]
    assert rows[1]["ra_deg"] == pytest.approx(180.0) and rows[1]["dec_deg"] == pytest.approx(-45.0)
    assert rows[1]["not_before"] == "2026-12-05T00:00:00Z" and rows[1]["priority"] == 5


def test_import_json_list_and_unknown_column(workdir):
    f = workdir / "reqs.json"
    f.write_text(json.dumps([{"program": "STAR-1", "target": "J1", "ra": 1.0, "dec": -20.0, "band": "J",
                              "exposure_s": 120}]))
    assert run_cli("request", "import", str(f), cwd=workdir).returncode == 0
    f.write_text(json.dumps([{"program": "STAR-1", "target": "J2", "ra": 1.0, "dec": -20.0, "band": "J",
                              "exposure_s": 120, "colour": "red"}]))
    proc = run_cli("request", "import", str(f), cwd=workdir)
    assert proc.returncode == 2 and "colour: unknown column" in proc.stderr
    assert len(cli_json("request", "list", cwd=workdir)) == 1


def test_program_list_and_duplicate(workdir):
    progs = cli_json("program", "list", cwd=workdir)
    assert progs[0]["code"] == "STAR-1" and progs[0]["weight"] == 2
    proc = run_cli("program", "add", "STAR-1", "--pi", "Someone", cwd=workdir)
    assert proc.returncode == 2 and "already exists" in proc.stderr


def test_env_database_and_config(tmp_path):
    db = tmp_path / "elsewhere" / "queue.sqlite"
    cfg = tmp_path / "conf" / "obs.toml"
    env = {"NIGHTPLAN_DB": f"sqlite:///{db}", "NIGHTPLAN_CONFIG": str(cfg)}
    out = run_cli("init", cwd=tmp_path, env=env, check=True).stdout
    assert str(db) in out and db.exists() and cfg.exists()
    run_cli("program", "add", "P2", "--pi", "Dr. Env", cwd=tmp_path, env=env, check=True)
    assert cli_json("program", "list", cwd=tmp_path, env=env)[0]["code"] == "P2"
    # without the env the folder has no database
    proc = run_cli("program", "list", cwd=tmp_path)
    assert proc.returncode == 2 and "nightplan init" in proc.stderr


def test_never_observable_target_warns(workdir):
    proc = run_cli("request", "add", *GOOD[:6], "--dec", "+80", "--band", "V", "--exposure", "60", cwd=workdir)
    assert proc.returncode == 0
    assert "never observable" in proc.stderr and "culminates" in proc.stderr
