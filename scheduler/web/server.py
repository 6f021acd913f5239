"""Running the observer's page: option checks (the loopback and token rule), binding, uvicorn.

Used by `nightplan web` (uvicorn in the main thread, its own signal handling) and by
`nightplan serve --web` (uvicorn in a thread of the service process, stopped by the service).
"""

from __future__ import annotations

import ipaddress
import socket
import stat
import threading
from dataclasses import dataclass
from pathlib import Path

from scheduler.model.errors import InputError

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8080
MIN_TOKEN_CHARS = 43  # 32 random bytes written in base64 (43 characters) or hex (64)
TOKEN_ALPHABET = set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-_+/=.~")
TOKEN_HINT = "make one with: python3 -c \"import secrets; print(secrets.token_urlsafe(32))\" > FILE"


@dataclass(frozen=True)
class WebOptions:
    host: str
    port: int
    token: str | None = None

    def url(self, port: int | None = None) -> str:
        h = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{h}:{port if port is not None else self.port}/"


def is_loopback(host: str) -> bool:
    """127.0.0.0/8, ::1 and the name localhost; every other address or name is not."""
    if host.strip().lower() in ("localhost", "localhost."):
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def read_token_file(path: str, *, field: str = "token-file") -> tuple[str, str | None]:
    """The token in FILE (its first line) and a warning if others may read the file."""
    p = Path(path)
    try:
        raw = p.read_bytes()[:4096]
        mode = p.stat().st_mode
    except OSError as e:
        raise InputError(field, f"{path}: cannot read ({e.strerror})") from None
    try:
        lines = raw.decode("ascii").strip().splitlines()
    except UnicodeDecodeError:
        raise InputError(field, f"{path}: the token must be one line of ASCII letters, digits and -_+/=.~ "
                                f"({TOKEN_HINT})") from None
    token = lines[0].strip() if lines else ""
    if len(token) < MIN_TOKEN_CHARS or not set(token) <= TOKEN_ALPHABET or len(set(token)) < 10:
        raise InputError(field, f"{path}: the token must hold at least 32 random bytes: {MIN_TOKEN_CHARS} or more "
                                f"characters from A-Z a-z 0-9 -_+/=.~, not repetitive ({TOKEN_HINT})")
    warning = None
    if mode & (stat.S_IRGRP | stat.S_IROTH):
        warning = f"{path} can be read by other users; chmod 600 it"
    return token, warning


def web_options(host: str, port: int, token_file: str | None, *, prefix: str = "") -> tuple[WebOptions, str | None]:
    """Check --host/--port/--token-file; returns the options and a warning to show (or None)."""
    host = (host or "").strip()
    if not host:
        raise InputError(f"{prefix}host", "must be an address or name to listen on, e.g. 127.0.0.1")
    if not (0 <= port <= 65535):
        raise InputError(f"{prefix}port", f"{port} is out of range; allowed 1 to 65535 (0: any free port)")
    token, warning = (None, None)
    if token_file:
        token, warning = read_token_file(token_file, field=f"{prefix}token-file")
    elif not is_loopback(host):
        raise InputError(f"{prefix}host", f"{host} is not a loopback address: listening beyond this machine needs "
                                          f"--{prefix}token-file FILE (a secret of at least 32 random bytes)")
    return WebOptions(host, port, token), warning


def bind(opts: WebOptions, *, field: str = "port") -> socket.socket:
    """A listening socket for the options (the error is one line: address in use, no such address)."""
    try:
        infos = socket.getaddrinfo(opts.host.strip("[]"), opts.port, type=socket.SOCK_STREAM,
                                   flags=socket.AI_PASSIVE)
    except socket.gaierror as e:
        raise InputError("host", f"{opts.host}: not an address of this machine ({e.strerror})") from None
    family, kind, proto, _, addr = infos[0]
    sock = socket.socket(family, kind, proto)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(addr)
        sock.listen(128)
    except OSError as e:
        sock.close()
        raise InputError(field, f"cannot listen on {opts.host}:{opts.port} ({e.strerror})") from None
    sock.set_inheritable(True)
    return sock


def bound_port(sock: socket.socket) -> int:
    return int(sock.getsockname()[1])


def _uvicorn_server(app):
    import uvicorn

    config = uvicorn.Config(
        app, log_level="warning", access_log=False,  # an access log would record ?token= links
        timeout_graceful_shutdown=2, lifespan="on", proxy_headers=True, server_header=False,
        date_header=True,
    )
    return uvicorn.Server(config)  # off the main thread it installs no signal handlers


def serve_forever(app, sock: socket.socket) -> None:
    """Serve until SIGINT/SIGTERM (uvicorn's own handlers; open event streams are closed)."""
    server = _uvicorn_server(app)
    server.run(sockets=[sock])


class WebThread:
    """The page served from a thread of another process (the re-planning service)."""

    def __init__(self, app, sock: socket.socket, opts: WebOptions | None = None):
        self.server = _uvicorn_server(app)
        self.sock = sock
        self.url = opts.url(bound_port(sock)) if opts is not None else f"port {bound_port(sock)}"
        self.thread = threading.Thread(target=self._run, name="nightplan-web", daemon=True)
        self.error: BaseException | None = None

    def _run(self) -> None:
        try:
            self.server.run(sockets=[self.sock])
        except BaseException as e:  # noqa: BLE001 - reported by the owner
            self.error = e

    def start(self) -> None:
        self.thread.start()

    def stop(self, timeout: float = 10.0) -> None:
        self.server.should_exit = True
        self.thread.join(timeout)
        try:
            self.sock.close()
        except OSError:
            pass
