"""The observer's page: a read-only ASGI application (Starlette) over the nightplan database.

Routes (GET and HEAD only; the page changes nothing):
  /               the page (Jinja2), night style by default
  /view           the page's changing parts as HTML fragments (JSON), fetched on every change
  /chart.svg      the plan chart (report.chart) in the page's style with the now line
  /api/plan       the active plan: exactly the `nightplan plan export --format json` document
  /api/status     exactly the `nightplan status --json` document
  /events         server-sent events: one `change` event whenever the plan, an outcome, the
                  conditions, the requests, the orders or the service's state change
  /static/...     scripts, styles and fonts shipped in the package (no other host is contacted)

Live updates: one watcher per process reads a few maxima (plan, outcome, conditions report,
order ids; the service lock row) every ``poll_s`` seconds while at least one page listens,
and wakes every open event stream when they change.

Access: with a token, every request needs it (``Authorization: Bearer``, the
``X-Nightplan-Token`` header, or the cookie a ``?token=`` link sets), else 401. Without a token
(loopback only) requests must name a loopback host, which keeps other web sites from reaching
the page through the browser (DNS rebinding).
"""

from __future__ import annotations

import asyncio
import hmac
import json
import threading
import time
from collections import OrderedDict
from contextlib import asynccontextmanager
from datetime import datetime
from http.cookies import SimpleCookie
from pathlib import Path
from typing import Any
from urllib.parse import parse_qsl, urlencode

from scheduler.model.config import ObservatoryConfig

HERE = Path(__file__).resolve().parent
COOKIE = "nightplan_token"
COOKIE_MAX_AGE_S = 30 * 86400
POLL_S = 0.5
KEEPALIVE_S = 15.0
LOOPBACK_HOSTS = {"localhost", "127.0.0.1", "::1", "[::1]"}
SECURITY_HEADERS = [
    (b"content-security-policy", b"default-src 'self'; img-src 'self' data:; style-src 'self'; "
                                 b"style-src-attr 'unsafe-inline'; script-src 'self'; "
                                 b"connect-src 'self'; font-src 'self'; base-uri 'none'; form-action 'none'; "
                                 b"frame-ancestors 'none'"),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"x-frame-options", b"DENY"),
]


# --------------------------------------------------------------------------- access

def _host_of(headers: dict[bytes, bytes]) -> str:
    host = headers.get(b"host", b"").decode("latin-1").strip().lower()
    if host.startswith("["):
        return host[: host.find("]") + 1] if "]" in host else host
    return host.rsplit(":", 1)[0] if host.count(":") == 1 else host


class AccessMiddleware:
    """The token rule, the loopback Host rule, and the security headers on every answer."""

    def __init__(self, app, token: str | None):
        self.app = app
        self.token = token.encode("utf-8") if token else None

    def _ok(self, given: str | None) -> bool:
        # constant time: the comparison does not tell how much of a guess was right
        return given is not None and hmac.compare_digest(given.encode("utf-8", "replace"), self.token)

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        headers = dict(scope.get("headers") or [])

        async def send_secure(message):
            if message["type"] == "http.response.start":
                message = dict(message)
                message["headers"] = list(message.get("headers") or []) + SECURITY_HEADERS
            await send(message)

        if self.token is None:
            if _host_of(headers) not in LOOPBACK_HOSTS:
                return await _plain(send_secure, 403, "403: this page answers only to a loopback host name "
                                                      "(localhost, 127.0.0.1, [::1]); to serve other hosts "
                                                      "use --token-file")
            return await self.app(scope, receive, send_secure)

        auth = headers.get(b"authorization", b"").decode("latin-1")
        given = auth[7:].strip() if auth.lower().startswith("bearer ") else None
        given = given or headers.get(b"x-nightplan-token", b"").decode("latin-1").strip() or None
        if given is None and b"cookie" in headers:
            jar = SimpleCookie()
            try:
                jar.load(headers[b"cookie"].decode("latin-1"))
            except Exception:  # noqa: BLE001 - a malformed cookie header is no token
                jar = SimpleCookie()
            given = jar[COOKIE].value if COOKIE in jar else None
        if self._ok(given):
            return await self.app(scope, receive, send_secure)

        query = parse_qsl(scope.get("query_string", b"").decode("latin-1"), keep_blank_values=True)
        link = next((v for k, v in query if k == "token"), None)
        if link is not None and self._ok(link) and scope["method"] in ("GET", "HEAD"):
            # the ?token= link: set the cookie and drop the token from the address bar
            rest = urlencode([(k, v) for k, v in query if k != "token"])
            path = scope.get("path", "/")
            location = (path.rsplit("/", 1)[-1] or "./") + (f"?{rest}" if rest else "")
            secure = scope.get("scheme") == "https"
            cookie = (f"{COOKIE}={link}; Path=/; Max-Age={COOKIE_MAX_AGE_S}; HttpOnly; SameSite=Strict"
                      + ("; Secure" if secure else ""))
            await send_secure({"type": "http.response.start", "status": 303,
                               "headers": [(b"location", location.encode("latin-1")),
                                           (b"set-cookie", cookie.encode("latin-1")),
                                           (b"cache-control", b"no-store"), (b"content-length", b"0")]})
            await send_secure({"type": "http.response.body", "body": b""})
            return
        await _plain(send_secure, 401, "401: this page needs its access token: open the ?token=... link you "
                                       "were given once, or send the header 'Authorization: Bearer TOKEN'",
                     extra=[(b"www-authenticate", b'Bearer realm="nightplan"')])


async def _plain(send, status: int, text: str, extra: list | None = None) -> None:
    body = (text + "\n").encode("utf-8")
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-type", b"text/plain; charset=utf-8"),
                            (b"content-length", str(len(body)).encode()), (b"cache-control", b"no-store")]
                + (extra or [])})
    await send({"type": "http.response.body", "body": body})


# --------------------------------------------------------------------------- live updates

class ChangeWatcher:
    """Polls the database's change key while someone listens; wakes every listener on a change."""

    def __init__(self, db, poll_s: float = POLL_S):
        self.db = db
        self.poll_s = poll_s
        self.key: dict[str, Any] | None = None
        self.version = 0  # bumped on every change
        self._changed: asyncio.Event | None = None  # replaced by a fresh one at every change
        self._listeners = 0
        self._task: asyncio.Task | None = None
        self.stopping = False

    def read_key(self) -> dict[str, Any]:
        from scheduler.web.view import change_key

        with self.db.session() as s:
            return change_key(s)

    async def start(self) -> None:
        self._changed = asyncio.Event()
        self._task = asyncio.create_task(self._run())

    def _wake(self) -> None:
        old, self._changed = self._changed, asyncio.Event()
        old.set()

    async def stop(self) -> None:
        self.stopping = True
        if self._task is not None:
            self._task.cancel()
            try:
                await self._task
            except (asyncio.CancelledError, Exception):  # noqa: BLE001 - shutting down
                pass
        if self._changed is not None:
            self._wake()

    async def _run(self) -> None:
        from starlette.concurrency import run_in_threadpool

        while not self.stopping:
            if self._listeners > 0 or self.key is None:
                try:
                    key = await run_in_threadpool(self.read_key)
                except Exception:  # noqa: BLE001 - the database may be busy or gone: try again
                    key = None
                if key is not None and key != self.key:
                    self.key = key
                    self.version += 1
                    self._wake()
            await asyncio.sleep(self.poll_s)

    async def stream(self):
        """One listener's events: the current state first, then one event per change."""
        self._listeners += 1
        try:
            seen = -1
            yield "retry: 1000\n\n"
            while not self.stopping:
                changed = self._changed  # taken before looking, so no change slips between
                if self.version != seen and self.key is not None:
                    seen = self.version
                    yield f"event: change\nid: {seen}\ndata: {json.dumps(self.key, separators=(',', ':'))}\n\n"
                    continue
                try:
                    await asyncio.wait_for(changed.wait(), KEEPALIVE_S)
                except asyncio.TimeoutError:
                    yield ": keep-alive\n\n"
        finally:
            self._listeners -= 1


# --------------------------------------------------------------------------- the application

class ChartCache:
    """Rendered charts by (plan version, conditions, style, minute): one render for every page."""

    def __init__(self, size: int = 8):
        self.size = size
        self._items: OrderedDict = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key, make):
        with self._lock:  # one render at a time; the others wait and reuse it
            if key in self._items:
                self._items.move_to_end(key)
                return self._items[key]
            value = make()
            self._items[key] = value
            while len(self._items) > self.size:
                self._items.popitem(last=False)
            return value


def create_app(db, config: ObservatoryConfig, *, clock=None, token: str | None = None, poll_s: float = POLL_S):
    """The page's ASGI app over ``db`` (read only). ``clock``: the service's clock (default real time)."""
    from jinja2 import Environment, FileSystemLoader, select_autoescape
    from starlette.applications import Starlette
    from starlette.concurrency import run_in_threadpool
    from starlette.requests import Request
    from starlette.responses import HTMLResponse, JSONResponse, Response, StreamingResponse
    from starlette.routing import Mount, Route
    from starlette.staticfiles import StaticFiles

    from scheduler.planning.planner import Planner
    from scheduler.web.view import AlmanacCache, page_view

    if clock is None:
        from scheduler.service.clock import Clock

        clock = Clock(None)
    planner = Planner(config)
    almanacs = AlmanacCache(config)
    charts = ChartCache()
    watcher = ChangeWatcher(db, poll_s)
    env = Environment(loader=FileSystemLoader(HERE / "templates"), autoescape=select_autoescape(["html"]),
                      trim_blocks=True, lstrip_blocks=True)
    env.filters["pct"] = lambda x: "-" if x is None else f"{100.0 * x:.1f} %"
    env.filters["num"] = lambda x, fmt="{:.2f}": "-" if x is None else fmt.format(x)
    static_version = str(int(max(p.stat().st_mtime for p in (HERE / "static").rglob("*") if p.is_file())))

    def now() -> datetime:
        return clock.now()

    def view_data() -> dict[str, Any]:
        return page_view(db, config, planner.night, almanacs, now())

    def fragments(v: dict[str, Any], style: str) -> dict[str, Any]:
        ctx = {"v": v, "style": style, "chart_key": chart_key(v)}
        return {"top": env.get_template("_top.html").render(ctx),
                "bottom": env.get_template("_bottom.html").render(ctx),
                "now": v["now"], "chart_key": ctx["chart_key"],
                "version": v["doc"]["plan"]["version"] if v["doc"] else None, "key": v["key"]}

    def chart_key(v: dict[str, Any]) -> str | None:
        if v["doc"] is None:
            return None
        n = now()
        return f"{v['doc']['plan']['version']}-{v['key']['conditions']}-{n:%Y%m%d%H%M}"

    def style_of(request: Request) -> str:
        """?style=, else the page's remembered choice (a cookie), else night."""
        wanted = request.query_params.get("style") or request.cookies.get("nightplan_style")
        return "day" if wanted == "day" else "night"

    async def page(request: Request):
        v = await run_in_threadpool(view_data)
        style = style_of(request)
        html = env.get_template("index.html").render(v=v, style=style, chart_key=chart_key(v),
                                                     static_version=static_version)
        return HTMLResponse(html, headers={"cache-control": "no-store"})

    async def view(request: Request):
        v = await run_in_threadpool(view_data)
        return JSONResponse(fragments(v, style_of(request)), headers={"cache-control": "no-store"})

    def load_plan() -> tuple[dict | None, Any]:
        from scheduler.db import plans
        from scheduler.report.export import plan_document

        with db.session() as s:
            plan = plans.active_plan(s)
            if plan is None:
                return None, None
            night = planner.night(plan.night)
            return plan_document(plans.stored_plan(s, plan), config, night), night

    async def api_plan(request: Request):
        from scheduler.report.export import to_json

        doc, _ = await run_in_threadpool(load_plan)
        if doc is None:
            return JSONResponse({"error": "no plan yet; build one with `nightplan plan build`"}, status_code=404,
                                headers={"cache-control": "no-store"})
        return Response(to_json(doc), media_type="application/json", headers={"cache-control": "no-store"})

    async def api_status(request: Request):
        from scheduler.service.status import status_document

        data = await run_in_threadpool(status_document, db)
        return Response(json.dumps(data, indent=2, default=str) + "\n", media_type="application/json",
                        headers={"cache-control": "no-store"})

    def render_svg(style: str) -> bytes | None:
        from scheduler.db import store
        from scheduler.report.chart import render_chart

        doc, night = load_plan()
        if doc is None:
            return None
        n = now()
        latest = watcher.read_key()["conditions"]  # measured dots come from the newest reports

        def make():
            with db.session() as s:
                samples = store.report_samples(s, doc["plan"]["conditions"]["report_id"])
                measured = store.measured_samples(s, night.start, night.end)
                tracks = store.ephemeris_tables(s, {e["request_id"] for e in doc["entries"]})
            return render_chart(doc, night, config, samples, now=n, style=style, fmt="svg", measured=measured,
                                tracks=tracks)

        return charts.get((doc["plan"]["version"], latest, style, n.strftime("%Y%m%d%H%M")), make)

    async def chart(request: Request):
        data = await run_in_threadpool(render_svg, style_of(request))
        if data is None:
            return Response("no plan yet\n", status_code=404, media_type="text/plain")
        return Response(data, media_type="image/svg+xml", headers={"cache-control": "private, max-age=300"})

    async def events(request: Request):
        return StreamingResponse(watcher.stream(), media_type="text/event-stream",
                                 headers={"cache-control": "no-store", "x-accel-buffering": "no"})

    @asynccontextmanager
    async def lifespan(app):
        await watcher.start()
        try:
            yield
        finally:
            await watcher.stop()

    routes = [
        Route("/", page, methods=["GET"]),
        Route("/view", view, methods=["GET"]),
        Route("/chart.svg", chart, methods=["GET"]),
        Route("/api/plan", api_plan, methods=["GET"]),
        Route("/api/status", api_status, methods=["GET"]),
        Route("/events", events, methods=["GET"]),
        Mount("/static", app=StaticFiles(directory=HERE / "static"), name="static"),
    ]
    app = Starlette(routes=routes, lifespan=lifespan)
    app.state.watcher = watcher
    app.state.started = time.time()
    return AccessMiddleware(app, token)

