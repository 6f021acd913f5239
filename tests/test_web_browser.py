"""The observer's page in a real browser: Chromium from the operating system's packages, driven by
Selenium with the system's chromedriver, against the real `nightplan web` / `nightplan serve`
processes on loopback.

The rehearsal night and the service set-up are tests/test_service.py's (clock fixed to
2026-12-17 01:30 UTC, a 2 s solver limit, four invented requests).
"""

from __future__ import annotations

import json
import os
import re
import select
import signal
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import pytest

from conftest import ROOT, run_cli
from test_service import CLOCK, forecast_csv, night, served  # noqa: F401 - the service fixtures, reused

pytestmark = pytest.mark.slow

CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]
LIVE_LIMIT_S = 2.0  # a stored plan reaches every open page within this


def _browser_missing() -> str | None:
    for p in (CHROMIUM, CHROMEDRIVER):
        if not os.access(p, os.X_OK):
            return f"{p} is not installed (Debian packages chromium and chromium-driver; .ci/run installs them)"
    try:
        import selenium  # noqa: F401
    except ImportError:
        return "selenium is not installed (pip install -e '.[test]')"
    return None


_MISSING = _browser_missing()
needs_browser = pytest.mark.skipif(_MISSING is not None, reason=f"no browser for the page tests: {_MISSING}")


@pytest.fixture
def browser(tmp_path):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for flag in FLAGS:
        opts.add_argument(flag)
    opts.add_argument(f"--user-data-dir={tempfile.mkdtemp(dir=tmp_path, prefix='chromium-')}")
    opts.add_argument("--window-size=1280,800")
    opts.set_capability("goog:loggingPrefs", {"performance": "ALL"})
    driver = webdriver.Chrome(options=opts, service=Service(CHROMEDRIVER))
    driver.set_page_load_timeout(60)
    yield driver
    driver.quit()


class WebProcess:
    """`nightplan web ...` in a subprocess; its address read from the line it prints."""

    def __init__(self, folder: Path, *args: str):
        env = dict(os.environ)
        env.pop("NIGHTPLAN_DB", None)
        env.pop("NIGHTPLAN_CONFIG", None)
        env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
        self.err_path = folder / f"web-{time.monotonic_ns()}.err"
        self._err = open(self.err_path, "w")
        self.proc = subprocess.Popen([sys.executable, "-m", "scheduler", "web", "--port", "0", *args], cwd=folder,
                                     env=env, stdout=subprocess.PIPE, stderr=self._err, text=True)
        line = self._first_line(60)
        m = re.search(r"serving (http://[^/\s]+)/", line)
        assert m, f"unexpected first line {line!r}: {self.err_path.read_text()}"
        self.base = m.group(1)
        self.port = int(self.base.rsplit(":", 1)[1])

    def _first_line(self, timeout: float) -> str:
        ready, _, _ = select.select([self.proc.stdout], [], [], timeout)
        assert ready, f"nightplan web printed nothing in {timeout:g} s: {self.err_path.read_text()}"
        return self.proc.stdout.readline()

    def stop(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self._err.close()
        return self.proc.returncode


@pytest.fixture
def web_process():
    started = []

    def start(folder: Path, *args: str) -> WebProcess:
        w = WebProcess(folder, *args)
        started.append(w)
        return w

    yield start
    for w in started:
        w.stop()


def http_get(url: str, headers: dict | None = None) -> tuple[int, dict, bytes]:
    req = urllib.request.Request(url, headers=headers or {})
    opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))  # loopback only, never a proxy
    try:
        with opener.open(req, timeout=30) as r:
            return r.status, dict(r.headers), r.read()
    except urllib.error.HTTPError as e:
        return e.code, dict(e.headers), e.read()


def relative_luminance(css_rgb: str) -> float:
    """WCAG 2 relative luminance of a CSS rgb()/rgba() colour (W3C formula)."""
    nums = [float(x) for x in re.findall(r"[\d.]+", css_rgb)[:3]]
    c = np.array(nums) / 255.0
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(lin @ [0.2126, 0.7152, 0.0722])


def screenshot_luminance(path: Path) -> np.ndarray:
    import matplotlib.image as mpimg

    img = mpimg.imread(path)[..., :3]
    lin = np.where(img <= 0.04045, img / 12.92, ((img + 0.055) / 1.055) ** 2.4)
    return lin @ np.array([0.2126, 0.7152, 0.0722])


def requested_urls(driver) -> list[tuple[str, str]]:
    """(URL, URL of the document that asked) of every request, from Chromium's performance
    (DevTools network) log."""
    urls = []
    for entry in driver.get_log("performance"):
        msg = json.loads(entry["message"])["message"]
        if msg.get("method") == "Network.requestWillBeSent":
            urls.append((msg["params"]["request"]["url"], msg["params"].get("documentURL", "")))
    return urls


def foreign_requests(requests: list[tuple[str, str]], base: str) -> list[str]:
    """Requests the page made to anything but its own server, and any network request at all to
    another host (the browser's own start page loads chrome:// resources; those are not ours)."""
    own = base + "/"
    from_page = [u for u, doc in requests if doc.startswith(own) and not u.startswith((own, "data:"))]
    to_network = [u for u, _ in requests if u.startswith(("http:", "https:", "ws:", "wss:")) and not u.startswith(own)]
    return from_page + to_network


def wait_for(driver, script: str, timeout: float, what: str):
    end = time.monotonic() + timeout
    while True:
        value = driver.execute_script(script)
        if value:
            return value
        assert time.monotonic() < end, f"timed out after {timeout:g} s waiting for {what}"
        time.sleep(0.05)


WATCH_VERSION = """
window.__pageLoad = window.__pageLoad || Math.random();
window.__seen = window.__seen || [];
const record = () => {
  const el = document.getElementById('plan-version');
  const v = el ? el.dataset.version : null;
  if (!window.__seen.length || window.__seen[window.__seen.length - 1][0] !== v) window.__seen.push([v, Date.now()]);
};
record();
new MutationObserver(record).observe(document.getElementById('page'), {childList: true, subtree: true});
return window.__pageLoad;
"""


def shown_entries(driver) -> set[tuple[int, str]]:
    rows = driver.execute_script(
        "return [...document.querySelectorAll('#entries tbody tr')].map(r => [r.dataset.rid, r.dataset.start]);")
    return {(int(r), s) for r, s in rows}


# --------------------------------------------------------------------------- live updates

@needs_browser
def test_page_shows_a_replan_within_two_seconds(served, night, web_process, browser, tmp_path):  # noqa: F811
    (night / "feed" / "forecast.csv").write_text(forecast_csv(1.0), encoding="utf-8")
    svc = served()
    first = svc.wait(lambda: (a := svc.active()) and a["report"] == 1 and a, "a plan on the forecast")
    web = web_process(night, "--clock", CLOCK)

    browser.get(web.base + "/")
    wait_for(browser, f"return document.getElementById('plan-version').dataset.version === '{first['version']}'", 30,
             "the page to show the first plan")
    wait_for(browser, "return document.getElementById('live').textContent === 'live'", 30, "the event stream")
    marker = browser.execute_script(WATCH_VERSION)

    # every entry of the active plan is listed
    status, _, body = http_get(web.base + "/api/plan")
    doc = json.loads(body)
    assert status == 200 and doc["plan"]["version"] == first["version"]
    assert shown_entries(browser) == {(e["request_id"], e["start"]) for e in doc["entries"]}
    assert len(doc["entries"]) >= 2

    r = run_cli("replan", "--reason", "page test: dome reopened", "--wait", "--timeout", "60", cwd=night)
    assert r.returncode == 0, r.stderr
    new = svc.active()
    assert new["version"] > first["version"] and new["reason"] == "page test: dome reopened"
    stored_ms = new["created_at"].timestamp() * 1000.0

    seen = wait_for(browser, f"return (window.__seen || []).find(s => s[0] === '{new['version']}')", 15,
                    "the new plan version on the page")
    delay_s = (seen[1] - stored_ms) / 1000.0
    print(f"page showed plan version {new['version']} {delay_s:.2f} s after it was stored")
    assert delay_s <= LIVE_LIMIT_S, f"the page showed version {new['version']} {delay_s:.2f} s after it was stored"
    assert browser.execute_script("return window.__pageLoad") == marker, "the page was reloaded"
    assert "page test: dome reopened" in browser.find_element("id", "plan-card").text
    status, _, body = http_get(web.base + "/api/plan")
    assert shown_entries(browser) == {(e["request_id"], e["start"]) for e in json.loads(body)["entries"]}

    # an outcome recorded by an observer reaches the page too (without reload)
    before = browser.execute_script("return window.__seen.length")
    rid = json.loads(body)["entries"][0]["request_id"]
    assert run_cli("record", str(rid), "--result", "failed", "--note", "page test", cwd=night).returncode == 0
    wait_for(browser, "return document.querySelector('#updated').textContent.length > 0", 10, "a refresh")
    assert browser.execute_script("return window.__pageLoad") == marker

    # the service's state on the page, and the page asked no other host for anything
    assert "running" in browser.find_element("id", "service-card").text
    browser.save_screenshot(str(tmp_path / "page-live.png"))
    requests = requested_urls(browser)
    assert requests, "the performance log recorded no request"
    assert not foreign_requests(requests, web.base)
    urls = [u for u, _ in requests]
    assert any(u.startswith(web.base + "/events") for u in urls) and any("/chart.svg" in u for u in urls)
    assert any(u.startswith(web.base + "/static/fonts/") for u in urls)
    assert before >= 1
    assert web.stop() == 0


# --------------------------------------------------------------------------- styles and layout

@pytest.fixture
def planned_page(tmp_path, _initialised_template, web_process):
    from test_web import make_planned_folder

    folder = tmp_path / "queue"
    folder.mkdir()
    make_planned_folder(folder, _initialised_template)
    return folder, web_process(folder, "--clock", "2026-12-17T02:10:00Z")


@needs_browser
def test_night_style_is_dark_day_style_one_click_and_layouts(planned_page, browser, tmp_path):
    folder, web = planned_page
    browser.get(web.base + "/")
    wait_for(browser, "return document.getElementById('chart').complete && "
                      "document.getElementById('chart').naturalWidth > 0", 60, "the chart")
    wait_for(browser, "return document.fonts.status === 'loaded'", 30, "the fonts")
    css = browser.execute_script("""
        const bg = e => getComputedStyle(e).backgroundColor;
        return {html: bg(document.documentElement), body: bg(document.body),
                cards: [...document.querySelectorAll('.card')].map(bg),
                font: getComputedStyle(document.body).fontFamily,
                fontsLoaded: [...document.fonts].filter(f => f.status === 'loaded').map(f => f.family)};""")
    assert browser.find_element("tag name", "html").get_attribute("data-style") == "night"
    for colour in [css["html"], css["body"], *css["cards"]]:
        assert relative_luminance(colour) < 0.02, colour  # no bright background anywhere
    assert "Page Sans" in css["font"] and css["fontsLoaded"], css  # the shipped fonts, not the system's
    shot = tmp_path / "page-night-1280x800.png"
    browser.save_screenshot(str(shot))
    lum = screenshot_luminance(shot)
    assert float(np.median(lum)) < 0.02 and float((lum > 0.4).mean()) < 0.01
    assert browser.execute_script("return document.documentElement.scrollWidth <= window.innerWidth + 1")

    browser.find_element("id", "style-toggle").click()
    wait_for(browser, "return document.documentElement.dataset.style === 'day'", 5, "the day style")
    day_bg = browser.execute_script("return getComputedStyle(document.body).backgroundColor")
    assert relative_luminance(day_bg) > 0.8
    wait_for(browser, "return document.getElementById('chart').getAttribute('src').includes('style=day')", 5,
             "the day chart")
    browser.refresh()  # the choice is remembered
    assert browser.find_element("tag name", "html").get_attribute("data-style") == "day"
    browser.find_element("id", "style-toggle").click()

    browser.set_window_size(390, 844)  # a phone
    time.sleep(0.5)
    assert browser.execute_script("return document.documentElement.scrollWidth <= window.innerWidth + 1"), \
        "the page scrolls sideways on a phone"
    rows = browser.find_elements("css selector", "#entries tbody tr")
    status, _, body = http_get(web.base + "/api/plan")
    assert len(rows) == len(json.loads(body)["entries"])
    browser.save_screenshot(str(tmp_path / "page-night-phone.png"))
    assert not foreign_requests(requested_urls(browser), web.base)


# --------------------------------------------------------------------------- the token rule

@needs_browser
def test_non_loopback_needs_the_token(planned_page, web_process, browser, tmp_path):
    folder, _ = planned_page
    token_file = folder / "page.token"
    import secrets

    token = secrets.token_urlsafe(32)
    token_file.write_text(token + "\n")
    os.chmod(token_file, 0o600)
    web = web_process(folder, "--host", "0.0.0.0", "--token-file", str(token_file))
    # requests go to this machine's loopback address only; the server itself listens beyond it
    base = f"http://127.0.0.1:{web.port}"
    for path in ("/", "/api/plan", "/api/status", "/events", "/static/app.js"):
        status, headers, _ = http_get(base + path)
        assert status == 401, path
    assert http_get(base + "/api/plan", {"Authorization": "Bearer " + token})[0] == 200
    assert http_get(base + "/api/plan", {"Authorization": "Bearer " + token[:-2]})[0] == 401

    browser.get(base + "/")
    assert "401" in browser.find_element("tag name", "body").text
    browser.get(base + "/?token=" + token)  # the link an operator is given once
    wait_for(browser, "return document.getElementById('live')?.textContent === 'live'", 30,
             "the page with its live stream")
    assert "token" not in browser.current_url
    browser.get(base + "/")  # the cookie carries the token from now on
    assert browser.find_element("id", "entries") is not None
    cookie = browser.get_cookie("nightplan_token")
    assert cookie["httpOnly"] and cookie["sameSite"] == "Strict"
    browser.save_screenshot(str(tmp_path / "page-token.png"))


# --------------------------------------------------------------------------- one process: serve --web

def test_serve_web_runs_the_page_inside_the_service(served, night):  # noqa: F811
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    (night / "feed" / "forecast.csv").write_text(forecast_csv(1.0), encoding="utf-8")
    svc = served("--web", "--web-port", str(port))
    svc.wait(lambda: "web_started" in svc.log(), "the page's server")
    plan = svc.wait(lambda: (a := svc.active()) and a["report"] == 1 and a, "a plan on the forecast")
    base = f"http://127.0.0.1:{port}"
    st = json.loads(http_get(base + "/api/status")[2])
    assert st["service"]["alive"] is True and st["service"]["pid"] == svc.proc.pid
    assert json.loads(http_get(base + "/api/plan")[2])["plan"]["version"] >= plan["version"]
    for _ in range(5):  # the same document as the command line's (unless a re-plan lands in between)
        before = http_get(base + "/api/plan")[2].decode()
        exported = run_cli("plan", "export", "--format", "json", cwd=night, check=True).stdout
        if http_get(base + "/api/plan")[2].decode() == before:
            assert exported == before
            break
    else:
        raise AssertionError("the plan kept changing")
    page = http_get(base + "/")[2].decode()
    assert 'data-style="night"' in page and "Service" in page
    svc.proc.send_signal(signal.SIGTERM)
    assert svc.proc.wait(60) == 0, svc.log()
    assert "service_stopped" in svc.log()
    with pytest.raises(OSError):
        urllib.request.build_opener(urllib.request.ProxyHandler({})).open(base + "/api/status", timeout=5)
