"""Commands about the re-planning service: `serve`, `replan`, `status`."""

from __future__ import annotations

import getpass
import os
import sys
from pathlib import Path

import click

from scheduler.cli.common import Ctx, echo_json, pass_ctx
from scheduler.model.errors import InputError
from scheduler.model.untrusted import check_text
from scheduler.report.safe_text import clean

POLL_RANGE = (0.2, 600.0)
DAMAGED_EXIT = 3  # `serve` refused a damaged database


def _use_db(c: Ctx, db_url: str | None) -> None:
    if db_url:
        c.db_url = db_url


def _who() -> str:
    try:
        user = getpass.getuser()
    except Exception:  # noqa: BLE001 - no user name in some containers
        user = str(os.getuid())
    from scheduler.service.lock import this_host

    return f"{user}@{this_host()}"


def _clock_option(f):
    return click.option("--clock", "clock_text", metavar="ISO",
                        help="rehearsal/testing: pretend now is this UTC time, advancing with the wall clock "
                             "(env NIGHTPLAN_CLOCK); default real time")(f)


def _db_option(f):
    return click.option("--db", "db_url", metavar="URL", help="database URL or SQLite file (as the global --db)")(f)


@click.command()
@_db_option
@click.option("--watch", metavar="PATH", help="folder to watch for conditions files (.csv/.json, as `conditions load`)")
@click.option("--poll", "poll_s", type=float, default=2.0, show_default=True,
              help="seconds between looks at the folder, orders and conditions (0.2 to 600)")
@click.option("--log-file", metavar="FILE", help="append the event log to FILE instead of stdout")
@click.option("--once", is_flag=True, help="run every job once and exit (for cron or a check)")
@_clock_option
@click.option("--web", is_flag=True, help="also serve the observer's page from this process (as `nightplan web`)")
@click.option("--web-host", default="127.0.0.1", show_default=True, help="with --web: address to listen on")
@click.option("--web-port", type=int, default=8080, show_default=True, help="with --web: port (0: any free port)")
@click.option("--web-token-file", metavar="FILE", help="with --web: access token file (needed beyond loopback)")
@pass_ctx
def serve(c: Ctx, db_url: str | None, watch: str | None, poll_s: float, log_file: str | None, once: bool,
          clock_text: str | None, web: bool, web_host: str, web_port: int, web_token_file: str | None) -> None:
    """Run the re-planning service: one per database; stop it with SIGTERM or Ctrl-C.

    It stores conditions files dropped in --watch (moved to done/ or, if bad, rejected/),
    re-plans from now when the active plan no longer holds, takes `nightplan replan` orders,
    re-plans on the planning.heartbeat_min heartbeat and expires requests whose windows have
    passed. Logs one event a line. Plans are advisory: the observatory's interlocks and its
    licensed operators decide.
    """
    from scheduler.service.clock import Clock
    from scheduler.service.daemon import DatabaseDamaged, Service
    from scheduler.service.lock import STALE_AFTER_S, LockHeld
    from scheduler.service.log import create_log_file, setup_logging

    _use_db(c, db_url)
    lo, hi = POLL_RANGE
    if not (lo <= poll_s <= hi):
        raise InputError("poll", f"{poll_s:g} is out of range; allowed {lo:g} to {hi:g} seconds")
    folder = None
    if watch:
        folder = Path(watch)
        if not folder.is_dir():
            raise InputError("watch", f"{watch} is not a folder; create it first")
        if not os.access(folder, os.W_OK | os.X_OK):
            raise InputError("watch", f"{watch} is not writable (processed files move to done/ and rejected/)")
    clock = Clock.from_option(clock_text)
    config = c.config()
    db = c.db()
    if log_file:
        try:
            create_log_file(log_file)  # owner-only (0600), like the database
        except OSError as e:
            raise InputError("log-file", f"{log_file}: cannot append ({e.strerror})") from None
    page = _web_thread(db, config, clock, web, once, web_host, web_port, web_token_file)
    log = setup_logging(log_file)
    svc = Service(db, config, log=log, clock=clock, watch=folder, poll_s=poll_s, web=page)
    try:
        code = svc.run_once() if once else svc.run_forever()
    except LockHeld as e:
        raise InputError("service", f"another nightplan service already runs on {db.url} ({e.info.describe()}); "
                                    f"stop it first (a dead one is taken over after {STALE_AFTER_S:g} s "
                                    f"without heartbeat)") from None
    except DatabaseDamaged as e:
        click.echo(f"nightplan: error: db: {db.url} is damaged ({e.what}: {clean(e.problems[0])}"
                   f"{f' and {len(e.problems) - 1} more' if len(e.problems) > 1 else ''}); the service does not run "
                   "on a damaged database: `nightplan db check` lists the damage; restore the latest backup",
                   err=True)
        sys.exit(DAMAGED_EXIT)  # its own status: restarting will not help (systemd: RestartPreventExitStatus)
    if code:
        if once:
            where = f"the log ({log_file})" if log_file else "the log above"
            click.echo(f"nightplan: error: serve --once: a job or re-plan failed; see {where}", err=True)
        sys.exit(code)


def _web_thread(db, config, clock, web: bool, once: bool, host: str, port: int, token_file: str | None):
    """--web: the observer's page on a thread of the service (bound now, so a busy port is exit 2)."""
    if not web:
        return None
    if once:
        raise InputError("web", "cannot be combined with --once (the page needs a running service)")
    from scheduler.cli.web import web_options_from_cli
    from scheduler.web.app import create_app
    from scheduler.web.server import WebThread, bind

    opts = web_options_from_cli(host, port, token_file, prefix="web-")
    sock = bind(opts, field="web-port")
    return WebThread(create_app(db, config, clock=clock, token=opts.token), sock, opts)


@click.command()
@click.option("--reason", default="operator re-plan", show_default=True, help="why (1 to 2000 characters); "
              "becomes the new plan's reason")
@click.option("--wait", is_flag=True, help="wait until the service has done the order and print the result")
@click.option("--timeout", "timeout_s", type=float, default=300.0, show_default=True,
              help="with --wait: give up after this many seconds")
@_db_option
@_clock_option
@pass_ctx
def replan(c: Ctx, reason: str, wait: bool, timeout_s: float, db_url: str | None, clock_text: str | None) -> None:
    """Order a re-plan from now. The running service takes it within seconds; if no service is
    alive, the plan is built here (inline) and the command says so. Either way the same re-plan
    runs, within planning.replan_time_limit_s (at most planning.time_limit_s)."""
    from scheduler.db import plans
    from scheduler.db.models import ReplanOrder
    from scheduler.service.clock import Clock
    from scheduler.service.daemon import wait_until
    from scheduler.service.lock import read_lock

    _use_db(c, db_url)
    reason = check_text(reason, "reason", max_len=2000)  # shown by `status` and `plan show`
    if not (1.0 <= timeout_s <= 86400):
        raise InputError("timeout", f"{timeout_s:g} is out of range; allowed 1 to 86400 seconds")
    clock = Clock.from_option(clock_text)
    db = c.db()
    info = read_lock(db)
    stale = info.stale_reason() if info is not None else "no service has run on this database"
    if info is not None and stale is None:
        oid = db.retrying(lambda s: plans.add_order(s, reason, _who()).id)
        click.echo(f"order {oid} queued for the service (pid {info.pid} on {info.host})")
        if not wait:
            return

        def done():
            with db.session() as s:
                o = s.get(ReplanOrder, oid)
                return o is not None and o.done_at is not None

        if not wait_until(done, timeout_s, 0.25):
            click.echo(f"nightplan: error: order {oid} not done after {timeout_s:g} s; see `nightplan status`", err=True)
            sys.exit(1)
        with db.session() as s:
            o = s.get(ReplanOrder, oid)
            result, version = o.result or "", o.plan_id
        click.echo(f"order {oid} done: {clean(result)}")
        if version is None:
            sys.exit(1)
        return

    from scheduler.planning.planner import Planner
    from scheduler.planning.replan import add_taken_order, carry_out_orders, replan as replan_action

    config = c.config()
    click.echo(f"no service is alive ({stale}); re-planning inline")
    oid = add_taken_order(db, reason, _who())
    planner = Planner(config)
    now = clock.now()
    result, version = carry_out_orders(db, [oid], lambda: replan_action(planner, db, now=now, reason=reason),
                                       prefix="inline: ")
    if version is None:
        click.echo(f"nightplan: error: order {oid} {clean(result)}", err=True)
        sys.exit(1)
    click.echo(f"order {oid} done: {clean(result)}")


@click.command()
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@_db_option
@pass_ctx
def status(c: Ctx, as_json: bool, db_url: str | None) -> None:
    """Is the service alive (since when, pid, last heartbeat), the active plan, the last
    conditions report, pending re-plan orders."""
    _use_db(c, db_url)
    from scheduler.service.status import status_document

    data = c.either(lambda d: d.status(), status_document)
    service, plan_d, rep_d = data["service"], data["plan"], data["conditions"]
    pending, last_d = data["pending_orders"], data["last_order"]
    if as_json:
        echo_json(data)
        return
    if service["state"] == "running":
        line = f"running: pid {service['pid']} on {service['host']}, since {service['since']}, " \
               f"heartbeat {service['heartbeat_age_s']:.0f} s ago"
    elif service["state"] == "dead":
        line = f"not running: last holder pid {service['pid']} on {service['host']} ({service['why']})"
    else:
        line = "not running (no service holds this database)"
    click.echo(f"service:    {line}")
    if plan_d:
        click.echo(f"plan:       version {plan_d['version']} for the night of {plan_d['night']}, "
                   f"built {plan_d['created_at']} from {plan_d['planned_from']}, {plan_d['entries']} entries, "
                   f"{plan_d['solver_status']}")
        click.echo(f"reason:     {clean(plan_d['reason'])}")
        if plan_d.get("conditions_warning"):
            click.echo(f"warning:    {clean(plan_d['conditions_warning'])}")
    else:
        click.echo("plan:       none yet")
    if rep_d:
        click.echo(f"conditions: report {rep_d['report']} from {clean(rep_d['source'])}, issued {rep_d['issued_at']}, "
                   f"received {rep_d['received_at']} ({rep_d['samples']} samples)")
    else:
        click.echo("conditions: none stored")
    click.echo(f"orders:     {len(pending)} pending")
    for o in pending:
        taken = f", taken {o['taken_at']}" if o["taken_at"] else ""
        click.echo(f"  #{o['id']} {o['requested_at']} by {clean(o['requested_by'])}{taken}: {clean(o['reason'])}")
    if last_d:
        click.echo(f"last order: #{last_d['id']} done {last_d['done_at']}: {clean(last_d['result'])}")


def register(cli: click.Group) -> None:
    cli.add_command(serve)
    cli.add_command(replan)
    cli.add_command(status)
