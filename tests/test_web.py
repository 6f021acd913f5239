"""The observer's page through Starlette's test client: endpoints, documents, access rules, events.

A real SQLite queue (the invented starter site, night of 2026-12-16) with a plan built by the
real planner in this process; the CLI documents are produced by the real click commands
(in-process runner) and compared with what the page serves.
"""

from __future__ import annotations

import json
import os
import shutil
import threading
import warnings
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from click.testing import CliRunner

from scheduler.db import store
from scheduler.db.session import open_db
from scheduler.model.config import load_config
from scheduler.model.errors import InputError
from scheduler.model.request import validate_request
from scheduler.service.clock import Clock

starlette = pytest.importorskip("starlette")
with warnings.catch_warnings():  # newer Starlette prefers the httpx2 package; httpx works the same here
    warnings.simplefilter("ignore")
    from starlette.testclient import TestClient  # noqa: E402

from scheduler.web.app import create_app  # noqa: E402

NIGHT = "2026-12-16"
CLOCK = datetime(2026, 12, 17, 1, 30, tzinfo=timezone.utc)  # after astronomical dusk (00:52 UTC)
LOOPBACK = "http://127.0.0.1:8080"
TOKEN = "Vq3xM1c0rT9pZ7yLkA2eN5hW8uJ4sB6dF0gH1iK3lQ-_"  # 44 characters, invented for the tests

# Invented targets placed around the meridian at the clock time; one with three repeats.
REQUESTS = [
    dict(target="PAGE-Q-1", ra=60.0, dec=-40.0, band="Q", exposure_s=1800, max_pwv_mm=4.0, priority=9),
    dict(target="PAGE-K-1", ra=85.0, dec=-45.0, band="K", exposure_s=1200, priority=5),
    dict(target="PAGE-R-1", ra=30.0, dec=-55.0, band="R", exposure_s=1200, priority=5),
    dict(target="PAGE-I-1", ra=95.0, dec=-15.0, band="I", exposure_s=1200, priority=4),
    dict(target="PAGE-V-REP", ra=70.0, dec=-30.0, band="V", exposure_s=600, priority=7, repeats=3,
         min_spacing_s=900),
    dict(target="PAGE-NEVER", ra=105.0, dec=70.0, band="R", exposure_s=900, priority=5),
]


def forecast_samples(pwv_mm: float = 1.5):
    from scheduler.conditions.ingest import parse_conditions

    rows = ["time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome"]
    t = CLOCK - timedelta(hours=3)
    for _ in range(25):
        rows.append(f"{t:%Y-%m-%dT%H:%M:%SZ},0.7,{pwv_mm},0.0,5.0,20,open")
        t += timedelta(minutes=30)
    return list(parse_conditions("\n".join(rows) + "\n"))


def make_planned_folder(folder: Path, template: Path) -> Path:
    """A nightplan folder with the requests above, a forecast and one plan built from 01:30 UTC."""
    from scheduler.planning.planner import Planner

    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(template / name, folder / name)
    cfg = folder / "observatory.toml"
    cfg.write_text(cfg.read_text(encoding="utf-8").replace("time_limit_s = 10", "time_limit_s = 2"), encoding="utf-8")
    config = load_config(cfg)
    db = open_db(str(folder / "nightplan.sqlite"), create_file=False)
    specs = [validate_request({"program": "STAR-1", **r}, config, {"STAR-1"}) for r in REQUESTS]
    db.retrying(lambda s: store.add_requests(s, specs))
    db.retrying(lambda s: store.store_conditions(s, forecast_samples(), "page test forecast (invented)"))
    built = Planner(config).build_and_store(db, night_date=datetime.fromisoformat(NIGHT).date(),
                                            reason="page test plan", now=CLOCK)
    assert built.version is not None and built.result.entries, "the test queue should give a plan with entries"
    db.dispose()
    return folder


@pytest.fixture(scope="module")
def planned(tmp_path_factory, _initialised_template) -> Path:
    return make_planned_folder(tmp_path_factory.mktemp("web"), _initialised_template)


@pytest.fixture
def folder(planned, tmp_path) -> Path:
    """A private copy of the planned folder (tests that write get their own database)."""
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(planned / name, tmp_path / name)
    return tmp_path


def _app(folder: Path, token: str | None = None, poll_s: float = 0.1):
    db = open_db(str(folder / "nightplan.sqlite"), create_file=False)
    config = load_config(folder / "observatory.toml")
    return create_app(db, config, clock=Clock(CLOCK), token=token, poll_s=poll_s), db


@pytest.fixture
def client(planned):
    app, db = _app(planned)
    with TestClient(app, base_url=LOOPBACK) as c:
        yield c
    db.dispose()


def cli_out(folder: Path, *args: str) -> str:
    """The real click command, in this process (no subprocess): its standard output."""
    from scheduler.cli.main import cli

    res = CliRunner().invoke(cli, ["--db", str(folder / "nightplan.sqlite"), "--config",
                                   str(folder / "observatory.toml"), *args], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    return res.stdout


# --------------------------------------------------------------------------- documents

def test_api_plan_is_the_export_document_byte_for_byte(client, planned):
    exported = cli_out(planned, "plan", "export", "--format", "json")
    r = client.get("/api/plan")
    assert r.status_code == 200 and r.headers["content-type"].startswith("application/json")
    assert r.text == exported
    doc = r.json()
    assert doc["plan"]["version"] == 1 and doc["plan"]["reason"] == "page test plan"
    assert doc["entries"] and doc["unscheduled"]


def test_api_status_is_the_status_document(client, planned):
    r = client.get("/api/status")
    assert r.status_code == 200
    assert r.json() == json.loads(cli_out(planned, "status", "--json"))
    assert r.json()["service"]["state"] == "stopped"


def test_api_status_with_a_live_lock_holder(folder):
    """A service holding the lock (this process, alive): the same document, heartbeat age aside."""
    from scheduler.service.lock import DatabaseLock

    app, db = _app(folder)
    lock = DatabaseLock(db)
    lock.acquire()
    try:
        with TestClient(app, base_url=LOOPBACK) as c:
            page = c.get("/api/status").json()
        cli = json.loads(cli_out(folder, "status", "--json"))
        assert page["service"]["state"] == "running" and page["service"]["pid"] == os.getpid()
        age_page, age_cli = page["service"].pop("heartbeat_age_s"), cli["service"].pop("heartbeat_age_s")
        assert abs(age_page - age_cli) < 5
        assert page == cli
    finally:
        lock.release()
        db.dispose()


def test_api_plan_without_a_plan_is_404(tmp_path, _initialised_template):
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(_initialised_template / name, tmp_path / name)
    app, db = _app(tmp_path)
    with TestClient(app, base_url=LOOPBACK) as c:
        r = c.get("/api/plan")
        assert r.status_code == 404 and "no plan yet" in r.json()["error"]
        page = c.get("/")
        assert page.status_code == 200 and "No plan yet" in page.text
    db.dispose()


# --------------------------------------------------------------------------- the page

def test_page_lists_every_entry_and_the_night(client):
    doc = client.get("/api/plan").json()
    html = client.get("/").text
    assert '<html lang="en" data-style="night">' in html  # night style by default
    for e in doc["entries"]:
        assert f'data-rid="{e["request_id"]}" data-start="{e["start"]}"' in html, e
        assert e["target"] in html
    for u in doc["unscheduled"]:
        assert f"#{u['request_id']}</span> {u['target']}" in html
    assert f'id="plan-version" data-version="{doc["plan"]["version"]}"' in html
    for word in ("astronomical dusk", "Moon", "dark hours used", doc["site"]["name"], "Plan versions tonight",
                 "Unscheduled requests", "interlocks"):
        assert word in html, word
    # the clock is inside the night: an entry is in progress or one is next, with its slew
    assert "time left" in html or "starts in" in html
    assert "slew " in html


def test_page_coordinates_and_times(client):
    """Sexagesimal and decimal coordinates, UTC and local times with dates, in each row."""
    from scheduler.web.view import dec_dms, ra_hms

    doc = client.get("/api/plan").json()
    html = client.get("/").text
    e = doc["entries"][0]
    assert ra_hms(e["ra_deg"]) in html and dec_dms(e["dec_deg"]) in html
    assert f"{e['ra_deg']:.4f}°" in html
    assert f"{e['start'][:10]} {e['start'][11:16]}" in html  # UTC with its date
    assert f"{e['start_local'][:10]} {e['start_local'][11:16]}" in html  # local with its date


def test_sexagesimal_agrees_with_astropy():
    """Reference: astropy's Angle.to_string (independent formatting, same rounding)."""
    from astropy import units as u
    from astropy.coordinates import Angle

    from scheduler.web.view import dec_dms, ra_hms

    for ra in (0.0, 60.0, 83.63308, 187.70593, 359.99999, 201.365063, 14.999998):
        ref = Angle(ra, u.deg).wrap_at(360 * u.deg).to_string(unit=u.hour, sep=":", precision=1, pad=True)
        assert ra_hms(ra) == ("00:00:00.0" if ref == "24:00:00.0" else ref), ra
    for dec in (-89.99999, -45.5, -0.5, 0.0, 12.391123, 41.269, 89.9999):
        ref = Angle(dec, u.deg).to_string(unit=u.deg, sep=":", precision=0, pad=True, alwayssign=True)
        assert dec_dms(dec) == ref, dec


def test_view_fragments_and_day_style(client):
    v = client.get("/view?style=day").json()
    assert set(v) >= {"top", "bottom", "now", "chart_key", "version", "key"}
    assert v["now"].startswith("2026-12-17T01:3")  # the clock given to the app
    assert v["version"] == 1 and 'id="entries"' in v["bottom"]
    page = client.get("/?style=day")
    assert '<html lang="en" data-style="day">' in page.text
    client.cookies.set("nightplan_style", "day")
    remembered = client.get("/")
    client.cookies.clear()
    assert '<html lang="en" data-style="day">' in remembered.text


def test_chart_svg_in_both_styles(client):
    night = client.get("/chart.svg?style=night")
    day = client.get("/chart.svg?style=day")
    for r in (night, day):
        assert r.status_code == 200 and r.headers["content-type"].startswith("image/svg+xml")
        assert b"<svg" in r.content[:400] and b'id="now-line"' in r.content
    assert night.content != day.content
    assert b"#0e0e13" in night.content  # the night style's background


def test_static_files_are_served_from_the_package(client):
    html = client.get("/").text
    for path in ("static/style.css", "static/app.js", "static/fonts/DejaVuSans.woff"):
        r = client.get("/" + path)
        assert r.status_code == 200 and len(r.content) > 1000, path
    assert "http://" not in client.get("/static/style.css").text and "https://" not in html.split("<footer>")[0]


# --------------------------------------------------------------------------- read only, headers

def test_read_only_and_security_headers(client, planned):
    db = open_db(str(planned / "nightplan.sqlite"), create_file=False)
    from scheduler.web.view import change_key

    with db.session() as s:
        before = change_key(s)
    for path in ("/", "/view", "/api/plan", "/api/status", "/chart.svg"):
        r = client.get(path)
        assert r.status_code == 200, path
        csp = r.headers["content-security-policy"]
        assert "default-src 'self'" in csp and "connect-src 'self'" in csp
        assert r.headers["x-content-type-options"] == "nosniff"
    for method in ("POST", "PUT", "DELETE", "PATCH"):
        assert client.request(method, "/api/plan").status_code == 405
        assert client.request(method, "/").status_code == 405
    with db.session() as s:
        assert change_key(s) == before  # nothing written
    db.dispose()


def test_loopback_without_token_refuses_other_host_names(client):
    assert client.get("/api/status", headers={"host": "localhost:8080"}).status_code == 200
    assert client.get("/api/status", headers={"host": "[::1]:8080"}).status_code == 200
    r = client.get("/api/status", headers={"host": "attacker.example:8080"})
    assert r.status_code == 403 and "loopback" in r.text


# --------------------------------------------------------------------------- the token rule

@pytest.fixture
def guarded(planned):
    app, db = _app(planned, token=TOKEN)
    with TestClient(app, base_url="http://192.0.2.10:8080", follow_redirects=False) as c:
        yield c
    db.dispose()


def test_token_required_everywhere(guarded):
    for path in ("/", "/view", "/api/plan", "/api/status", "/events", "/chart.svg", "/static/app.js"):
        r = guarded.get(path)
        assert r.status_code == 401, path
        assert "access token" in r.text and r.headers["www-authenticate"].startswith("Bearer")
    assert guarded.get("/api/plan", headers={"authorization": "Bearer " + TOKEN[:-1] + "x"}).status_code == 401
    assert guarded.get("/api/plan", headers={"authorization": "Bearer " + TOKEN[:-1]}).status_code == 401
    guarded.cookies.set("nightplan_token", "wrong")
    assert guarded.get("/api/plan").status_code == 401
    guarded.cookies.clear()
    assert guarded.get("/?token=wrong").status_code == 401


def test_token_by_header(guarded):
    assert guarded.get("/api/plan", headers={"authorization": "Bearer " + TOKEN}).status_code == 200
    assert guarded.get("/api/status", headers={"x-nightplan-token": TOKEN}).status_code == 200


def test_token_link_sets_a_cookie_once(guarded):
    r = guarded.get("/?token=" + TOKEN + "&style=day")
    assert r.status_code == 303
    assert r.headers["location"] == "./?style=day"  # the token leaves the address bar
    cookie = r.headers["set-cookie"]
    assert cookie.startswith(f"nightplan_token={TOKEN};") and "HttpOnly" in cookie and "SameSite=Strict" in cookie
    guarded.cookies.set("nightplan_token", TOKEN)
    page = guarded.get("/")
    guarded.cookies.clear()
    assert page.status_code == 200 and "Entries" in page.text
    # any host name is fine once the token is checked (the page may sit behind a proxy)
    assert guarded.get("/api/status", headers={"authorization": "Bearer " + TOKEN,
                                               "host": "plan.example.org"}).status_code == 200


def test_token_comparison_is_constant_time():
    """The comparison is hmac.compare_digest (its timing does not depend on where a guess differs)."""
    import inspect

    from scheduler.web import app as web_app

    src = inspect.getsource(web_app.AccessMiddleware._ok)
    assert "hmac.compare_digest" in src and "==" not in src


# --------------------------------------------------------------------------- options

def test_loopback_rule_and_token_file(tmp_path):
    from scheduler.web.server import is_loopback, web_options

    for host in ("127.0.0.1", "127.1.2.3", "::1", "[::1]", "localhost"):
        assert is_loopback(host), host
    for host in ("0.0.0.0", "::", "192.0.2.4", "observatory.example", "10.0.0.1"):
        assert not is_loopback(host), host
    assert web_options("127.0.0.1", 8080, None)[0].token is None
    with pytest.raises(InputError) as e:
        web_options("0.0.0.0", 8080, None)
    assert e.value.field == "host" and "--token-file" in str(e.value)
    with pytest.raises(InputError) as e:
        web_options("127.0.0.1", 70000, None)
    assert e.value.field == "port"

    short = tmp_path / "short"
    short.write_text("abc123\n")
    weak = tmp_path / "weak"
    weak.write_text("a" * 64 + "\n")
    good = tmp_path / "good"
    good.write_text(TOKEN + "\n")
    os.chmod(good, 0o600)
    for bad in (short, weak, tmp_path / "missing"):
        with pytest.raises(InputError) as e:
            web_options("0.0.0.0", 8080, str(bad))
        assert e.value.field == "token-file"
    opts, warning = web_options("0.0.0.0", 8080, str(good))
    assert opts.token == TOKEN and warning is None
    os.chmod(good, 0o644)
    assert "chmod 600" in web_options("0.0.0.0", 8080, str(good))[1]


def test_busy_port_is_one_clear_error():
    from scheduler.web.server import WebOptions, bind, bound_port

    first = bind(WebOptions("127.0.0.1", 0))
    try:
        with pytest.raises(InputError) as e:
            bind(WebOptions("127.0.0.1", bound_port(first)))
        assert e.value.field == "port" and "cannot listen" in str(e.value)
    finally:
        first.close()


# --------------------------------------------------------------------------- live updates

def _next_change(lines, limit: int = 200) -> dict:
    for _ in range(limit):
        line = next(lines)
        if line.startswith("data: "):
            return json.loads(line[6:])
    raise AssertionError("no change event")


def test_events_follow_outcomes_plans_and_conditions(folder):
    from scheduler.planning.planner import Planner

    app, db = _app(folder, poll_s=0.1)
    config = load_config(folder / "observatory.toml")
    failure: list = []

    def watchdog(done: threading.Event):
        if not done.wait(60):
            failure.append("timed out")
            os._exit(3)  # a hung stream must not hang the suite

    done = threading.Event()
    threading.Thread(target=watchdog, args=(done,), daemon=True).start()
    try:
        with TestClient(app, base_url=LOOPBACK) as c, c.stream("GET", "/events") as r:
            assert r.headers["content-type"].startswith("text/event-stream")
            lines = r.iter_lines()
            first = _next_change(lines)
            assert first["plan"] == 1 and first["service"] == "stopped" and first["outcome"] is None

            rid = c.get("/api/plan").json()["entries"][0]["request_id"]
            db.retrying(lambda s: store.record_outcome(s, rid, "done"))
            ev = _next_change(lines)
            assert ev["outcome"] == 1 and ev["plan"] == 1

            db.retrying(lambda s: store.store_conditions(s, forecast_samples(6.0), "wetter (invented)"))
            assert _next_change(lines)["conditions"] == first["conditions"] + 1

            Planner(config).build_and_store(db, night_date=datetime.fromisoformat(NIGHT).date(),
                                            reason="page test re-plan", now=CLOCK + timedelta(minutes=5))
            ev = _next_change(lines)
            assert ev["plan"] == 2
            assert c.get("/api/plan").json()["plan"]["reason"] == "page test re-plan"
    finally:
        done.set()
        db.dispose()
    assert not failure


# --------------------------------------------------------------------------- the command line

@pytest.mark.slow
def test_web_command_refuses_non_loopback_without_token(workdir):
    from conftest import run_cli

    r = run_cli("web", "--host", "0.0.0.0", "--port", "0", cwd=workdir, timeout=60)
    assert r.returncode == 2 and r.stdout == ""
    assert len(r.stderr.strip().splitlines()) == 1
    assert r.stderr.startswith("nightplan: error: host: 0.0.0.0 is not a loopback address")
    assert "--token-file" in r.stderr
    (workdir / "t").write_text("short\n")
    r = run_cli("web", "--host", "0.0.0.0", "--token-file", "t", cwd=workdir, timeout=60)
    assert r.returncode == 2 and r.stderr.startswith("nightplan: error: token-file:")
    r = run_cli("serve", "--web", "--web-host", "0.0.0.0", cwd=workdir, timeout=60)
    assert r.returncode == 2 and r.stderr.startswith("nightplan: error: web-host:")
    r = run_cli("serve", "--web", "--once", cwd=workdir, timeout=60)
    assert r.returncode == 2 and r.stderr.startswith("nightplan: error: web:")
