"""`nightplan web`: the observer's page (read-only) on the same database as every other command."""

from __future__ import annotations

import signal
import sys

import click

from scheduler.cli.common import Ctx, pass_ctx, warn


def web_options_from_cli(host: str, port: int, token_file: str | None, *, prefix: str = ""):
    """Checked options (one-line errors, exit 2) and a warning about the token file, printed here."""
    from scheduler.web.server import web_options

    opts, warning = web_options(host, port, token_file, prefix=prefix)
    if warning:
        warn(warning)
    return opts


def page_url(opts, port: int) -> str:
    """The address to open; with a token, the one-time link that sets the page's cookie."""
    url = opts.url(port)
    if opts.host in ("0.0.0.0", "::"):
        url = url.replace(f"//{opts.host}:", "//HOST:").replace(f"//[{opts.host}]:", "//HOST:")
    return url + ("?token=<the token in the file>" if opts.token else "")


@click.command("web")
@click.option("--host", default="127.0.0.1", show_default=True,
              help="address to listen on; anything but loopback needs --token-file")
@click.option("--port", type=int, default=8080, show_default=True, help="port, 1 to 65535 (0: any free port)")
@click.option("--token-file", metavar="FILE", help="file holding the access token (at least 32 random bytes); "
                                                  "then every request needs it")
@click.option("--db", "db_url", metavar="URL", help="database URL or SQLite file (as the global --db)")
@click.option("--clock", "clock_text", metavar="ISO",
              help="rehearsal/testing: pretend now is this UTC time, advancing with the wall clock "
                   "(env NIGHTPLAN_CLOCK); default real time")
@pass_ctx
def web(c: Ctx, host: str, port: int, token_file: str | None, db_url: str | None, clock_text: str | None) -> None:
    """Serve the observer's page: tonight's plan, updated live as the service re-plans.

    Read-only: it changes nothing in the queue. JSON for scripts at /api/plan (the `plan
    export --format json` document) and /api/status (the `status --json` document); server-sent
    events at /events. Stop it with Ctrl-C or SIGTERM.
    """
    from scheduler.service.clock import Clock
    from scheduler.web.app import create_app
    from scheduler.web.server import bind, bound_port, serve_forever

    if db_url:
        c.db_url = db_url
    opts = web_options_from_cli(host, port, token_file)
    clock = Clock.from_option(clock_text)
    config = c.config()
    db = c.db()
    sock = bind(opts)
    app = create_app(db, config, clock=clock, token=opts.token)
    click.echo(f"nightplan web: serving {page_url(opts, bound_port(sock))} from {db.url} "
               f"(read-only; clock {clock.describe()}; Ctrl-C stops)", err=False)
    sys.stdout.flush()
    for sig in (signal.SIGTERM, signal.SIGINT):  # after uvicorn's clean shutdown: exit 0
        signal.signal(sig, lambda *_: sys.exit(0))
    serve_forever(app, sock)


def register(cli: click.Group) -> None:
    cli.add_command(web)
