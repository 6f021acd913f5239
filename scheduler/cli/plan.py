"""Commands for queue observers and operators: `plan build|show|list|export|chart|check|why`,
`next` and `record`. Thin: parse, call the planner or a report, print."""

from __future__ import annotations

import sys
import time
from datetime import date, datetime, timezone

import click

from scheduler.cli.common import Ctx, console, echo_json, now_or, parse_night, pass_ctx, warn
from scheduler.model.errors import InputError, NotFoundError
from scheduler.model.request import OutcomeResult, RequestStatus
from scheduler.model.timegrid import iso
from scheduler.model.untrusted import check_text
from scheduler.report.safe_text import cell, clean

MAX_REASON = 2000  # characters of a plan's or an order's reason
MIN_TABLE_WIDTH = 30  # `plan show` fits its table to the terminal down to this width


# --------------------------------------------------------------------------- helpers

def _version(version: int | None) -> int | None:
    if version is not None and version < 1:
        raise InputError("version", f"{version} is out of range; plan versions start at 1")
    return version


def _command_seconds(t0: float) -> float:
    """Seconds since this process started (interpreter start-up and imports included), read from
    /proc where there is one; elsewhere since ``t0``."""
    try:
        import os

        with open("/proc/self/stat", encoding="ascii") as f:
            start_ticks = int(f.read().rsplit(")", 1)[1].split()[19])
        with open("/proc/uptime", encoding="ascii") as f:
            uptime = float(f.read().split()[0])
        return max(time.perf_counter() - t0, uptime - start_ticks / os.sysconf("SC_CLK_TCK"))
    except (OSError, ValueError, IndexError):
        return time.perf_counter() - t0


def night_of(config, night_date: date):
    from scheduler.sky.night import night_for

    return night_for(config.site, night_date, config.planning.step_s)


def load_document(c: Ctx, version: int | None):
    """(document, plan night, config) of a stored plan version (default: the newest active plan)."""
    from scheduler.db import plans
    from scheduler.report.export import plan_document

    config = c.config()
    with c.db().session() as s:
        plan = plans.get_plan(s, _version(version))
        night = night_of(config, plan.night)
        doc = plan_document(plans.stored_plan(s, plan), config, night)
    return doc, night, config


# --------------------------------------------------------------------------- plan

@click.group()
def plan() -> None:
    """Night plans: build, show, list, export, chart, why."""


@plan.command("build")
@click.option("--night", help="YYYY-MM-DD, the local evening the night begins (default: the night containing now, "
                              "or the coming night)")
@click.option("--time-limit", type=float, help="solver time limit in seconds, 0.1 to 3600 (default: planning.time_limit_s)")
@click.option("--effort", type=int, help="instead of a time limit, a fixed amount of search, 1 to 1000 (the same "
                                        "plan on any machine; default: planning.effort if set)")
@click.option("--seed", type=int, help="seed of the randomized searches, 0 to 2147483647 (default: planning.seed)")
@click.option("--reason", default="plan build (command line)", show_default=True, help="why this plan is built (stored)")
@click.option("--now", "now_text", metavar="ISO", help="plan as if the clock read this time, ISO-8601 UTC (default: the "
                                                      "clock); inside the night nothing new starts before it")
@pass_ctx
def plan_build(c: Ctx, night: str | None, time_limit: float | None, effort: int | None, seed: int | None,
               reason: str, now_text: str | None) -> None:
    """Build a plan from the queue and the latest conditions, check it, store it as a new version."""
    t_start = time.perf_counter()  # planning starts here: the time limit and the reported time count from it
    from scheduler.planning.planner import Planner
    from scheduler.solve.budget import check_effort, check_seed

    if time_limit is not None and not (0.1 <= time_limit <= 3600):
        raise InputError("time-limit", f"{time_limit:g} is out of range; allowed 0.1 to 3600 seconds")
    if effort is not None and time_limit is not None:
        raise InputError("effort", "give either --effort or --time-limit, not both")
    if effort is not None:
        check_effort(effort)
    if seed is not None:
        check_seed(seed)
    reason = check_text(reason, "reason", max_len=MAX_REASON)
    now = now_or(now_text, "now")
    config = c.config()
    db = c.db()
    planner = Planner(config)
    night_date = parse_night(night) if night else planner.coming_night(now)
    the_night = planner.night(night_date)
    if now >= the_night.end:
        if now_text:
            raise InputError("now", f"{iso(now)} is after the night of {night_date} ended ({iso(the_night.end)}); "
                                    f"allowed up to {iso(the_night.end)}")
        warn(f"the night of {night_date} ended at {iso(the_night.end)}: planning it whole, as a rehearsal")
    t0 = t_start

    def progress(msg: str) -> None:
        click.echo(f"  [{time.perf_counter() - t0:5.1f}s] {msg}", err=True)

    with db.session() as s:
        from scheduler.db import store

        n_queue = len(store.active_specs(s))
        has_conditions = store.latest_conditions(s) is not None
    if n_queue == 0:
        warn("the queue is empty: the plan will have no entries")
    if not has_conditions:
        warn("no conditions report stored: the configuration's conservative defaults are assumed all night")
    progress(f"planning the night of {night_date.isoformat()} ({n_queue} requests in the queue)")
    built = planner.build_and_store(db, night_date=night_date, reason=reason, now=now,
                                    time_limit_s=time_limit, progress=progress, started=t_start,
                                    effort=effort, seed=seed)
    r = built.result
    if built.version is None:
        click.echo(f"nightplan: error: the plan checker refused the plan ({len(r.violations)} violations); "
                   f"nothing was stored. First: {r.violations[0]}", err=True)
        for v in r.violations[1:5]:
            click.echo(f"  {v}", err=True)
        sys.exit(1)
    if built.conditions_warning and has_conditions:  # with none stored, the warning above said it
        warn(built.conditions_warning)
    doc, _, _ = load_document(c, built.version)
    sm, p = doc["summary"], doc["plan"]
    out = console()
    out.print(f"plan version {p['version']} stored for the night of {doc['night']['date']} "
              f"({_command_seconds(t0):.1f} s)")
    rows = [
        ("solver status", p["solver_status"]),
        ("objective", f"{p['objective']:.3f}"),
        ("bound", f"{p['bound']:.3f}"),
        ("gap", f"{100 * p['gap']:.2f} %"),
        ("greedy objective", f"{p['greedy_objective']:.3f}" if p["greedy_objective"] is not None else "-"),
        ("entries", f"{sm['entries']} ({sm['scheduled_hours']:.2f} h)"),
        ("dark hours used", f"{sm['dark_hours_used']:.2f} of {sm['dark_hours']:.2f} h"
                            + (f" ({100 * sm['dark_fraction_used']:.1f} %)" if sm["dark_fraction_used"] is not None else "")),
        ("unscheduled", f"{sm['unscheduled']} of {sm['queue_size'] if sm['queue_size'] is not None else n_queue}"),
        ("planned from", p["planned_from"]),
        ("search", _search_line(p["search"])),
        ("reason", p["reason"]),
    ]
    for k, v in rows:
        out.print(cell(f"  {k:<17} {v}"))
    out.print(f"  see: nightplan plan show{'' if p['active'] else ' --version ' + str(p['version'])}")


def _search_line(search: dict) -> str:
    """What bounded the search (the document's plan.search), for the build summary."""
    if search["effort"] is not None:
        bound = f"effort {search['effort']}"
    elif search["time_limit_s"] is not None:
        bound = f"time limit {search['time_limit_s']:g} s"
    else:  # a plan stored before the search was recorded
        return "-"
    return f"{bound}, seed {search['seed']}"


@plan.command("show")
@click.option("--version", type=int, help="plan version (default: the newest active plan)")
@click.option("--unscheduled", "show_unscheduled", is_flag=True, help="also list the unscheduled requests and why")
@click.option("--json", "as_json", is_flag=True, help="print the plan document (same as `plan export --format json`)")
@pass_ctx
def plan_show(c: Ctx, version: int | None, show_unscheduled: bool, as_json: bool) -> None:
    """The plan as a table, with the night's summary above it."""
    from scheduler.report.table import print_plan

    doc, _, _ = load_document(c, version)
    if as_json:
        echo_json(doc)
        return
    print_plan(console(min_width=MIN_TABLE_WIDTH), doc, unscheduled=show_unscheduled)


@plan.command("list")
@click.option("--night", help="only this night (YYYY-MM-DD)")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def plan_list(c: Ctx, night: str | None, as_json: bool) -> None:
    """Stored plan versions, newest first."""
    from scheduler.db import plans

    with c.db().session() as s:
        rows = plans.plan_listing(s, parse_night(night) if night else None)
    if as_json:
        echo_json(rows)
        return
    from scheduler.report.safe_text import SafeTable as Table

    t = Table("version", "night", "created (UTC)", "active", "status", "objective", "gap", "entries", "reason",
              title="plans")
    for r in rows:
        t.add_row(str(r["version"]), r["night"], r["created_at"], "yes" if r["active"] else "", r["solver_status"],
                  f"{r['objective']:.3f}", f"{100 * r['gap']:.1f} %", str(r["entries"]), r["reason"][:60])
    console().print(t)


@plan.command("export")
@click.option("--format", "fmt", type=click.Choice(["json", "csv"]), required=True, help="file format")
@click.option("-o", "--output", metavar="FILE", help="write here (atomically); default: standard output")
@click.option("--version", type=int, help="plan version (default: the newest active plan)")
@pass_ctx
def plan_export(c: Ctx, fmt: str, output: str | None, version: int | None) -> None:
    """Export the plan: JSON (the full document other tools read) or CSV (one row per entry)."""
    from scheduler.report.export import CAUTION, to_csv, to_json, write_atomic

    doc, _, _ = load_document(c, version)
    text = to_json(doc) if fmt == "json" else to_csv(doc)
    if output is None:
        click.echo(text, nl=False)
        return
    path = write_atomic(output, text)
    click.echo(f"plan version {doc['plan']['version']} exported as {fmt.upper()}: {path.resolve()} "
               f"({len(doc['entries'])} entries)")
    click.echo(CAUTION, err=True)


@plan.command("chart")
@click.option("-o", "--output", metavar="FILE", required=True, help="file to write: .png, .svg or .pdf")
@click.option("--version", type=int, help="plan version (default: the newest active plan)")
@click.option("--style", type=click.Choice(["day", "night"]), default="day", show_default=True,
              help="night: dark background and dim red text, for eyes adapted to the dark")
@click.option("--at", "at_text", metavar="ISO", help="draw the now line at this ISO-8601 UTC time (default: the clock)")
@pass_ctx
def plan_chart(c: Ctx, output: str, version: int | None, style: str, at_text: str | None) -> None:
    """Altitude against time of the planned targets, the timeline, twilight, the Moon, seeing and PWV."""
    from scheduler.db import store
    from scheduler.report.chart import chart_format, render_chart
    from scheduler.report.export import write_atomic

    fmt = chart_format(output)
    at = now_or(at_text, "at")
    doc, night, config = load_document(c, version)
    with c.db().session() as s:
        samples = store.report_samples(s, doc["plan"]["conditions"]["report_id"])
        measured = store.measured_samples(s, night.start, night.end)
        tracks = store.ephemeris_tables(s, {e["request_id"] for e in doc["entries"]})
    data = render_chart(doc, night, config, samples, now=at, style=style, fmt=fmt, measured=measured, tracks=tracks)
    path = write_atomic(output, data)
    click.echo(f"chart of plan version {doc['plan']['version']}: {path.resolve()}")


@plan.command("check")
@click.option("--version", type=int, help="plan version (default: the newest active plan)")
@pass_ctx
def plan_check(c: Ctx, version: int | None) -> None:
    """Re-verify a stored plan with the independent checker (exit 1 if it fails)."""
    from scheduler.planning.planner import verify_stored_plan

    v, violations = verify_stored_plan(c.db(), c.config(), _version(version))
    if violations:
        for line in violations:
            click.echo(f"plan {v}: {clean(line)}")
        raise SystemExit(1)
    click.echo(f"plan {v}: every entry passes the checker")


@plan.command("why")
@click.argument("request_id", type=int)
@click.option("--version", type=int, help="plan version (default: the newest active plan)")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def plan_why(c: Ctx, request_id: int, version: int | None, as_json: bool) -> None:
    """Why request ID is in the plan, or which constraint or which entries keep it out."""

    from scheduler.db import plans, store
    from scheduler.planning.planner import Planner, stored_plan_reports
    from scheduler.report.why import explain
    from scheduler.sky.ephemeris import sky_for

    with c.db().session() as s:  # an unknown id fails before any sky work
        spec = store.to_spec(store.get_request(s, request_id))
        weights = store.program_states(s)
    doc, night, config = load_document(c, version)
    with c.db().session() as s:  # the conditions the plan was built on: every report it used
        reports = stored_plan_reports(s, plans.get_plan(s, doc["plan"]["version"]))
    solver_reason = next((u["reason"] for u in doc["unscheduled"] if u["request_id"] == request_id), None)
    from scheduler.constraints.opportunities import count_opportunities
    later = int(count_opportunities(config, [spec], night.date).future()[0])
    sky = sky_for(config.site, night, [spec])[0]
    cond = Planner(config).night_conditions(night, reports)
    res = explain(config, spec, night, sky, cond, doc, weights, solver_reason, later)
    if as_json:
        echo_json(res)
        return
    for line in res["explanation"]:
        click.echo(clean(line))
    if res.get("solver_reason") and res["state"] != "scheduled":
        click.echo(f"  solver's note: {clean(res['solver_reason'])}")


# --------------------------------------------------------------------------- next, record

@click.command("next")
@click.option("--at", "at_text", metavar="ISO", help="ISO-8601 UTC time to ask about (default: now)")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def next_cmd(c: Ctx, at_text: str | None, as_json: bool) -> None:
    """What to observe now, until when, and the next two entries."""
    from scheduler.db import plans
    from scheduler.report.export import plan_document
    from scheduler.report.next import what_next
    from scheduler.planning.planner import Planner
    from scheduler.report.table import entry_line, hm

    at = now_or(at_text, "at")
    config = c.config()
    night_d = Planner(config).coming_night(at)
    with c.db().session() as s:
        plan_row = plans.active_plan(s, night_d)
        if plan_row is None:
            others = sorted({p.night.isoformat() for p in plans.active_plans(s)})
            have = f"; active plans exist for the nights of {', '.join(others)} (use --at)" if others else \
                "; build one with `nightplan plan build`"
            raise NotFoundError(f"no plan for the night of {night_d} (the night of {iso(at)}){have}")
        night = night_of(config, plan_row.night)
        doc = plan_document(plans.stored_plan(s, plan_row), config, night)
    res = what_next(doc, at)
    if as_json:
        echo_json(res)
        return
    click.echo(f"at {iso(at)}: plan version {res['plan_version']} for the night of {res['night']}")
    cur = res["current"]
    if cur is not None:
        click.echo(f"NOW   until {hm(cur['end'])} UTC ({hm(cur['end_local'])} local), {res['minutes_left']:.0f} min "
                   f"left: {entry_line(cur)}")
    elif res["state"] == "finished":
        click.echo("NOW   the plan is finished for this night")
    elif res["state"] == "empty":
        click.echo("NOW   the plan has no entries")
    elif not res["night_started"]:
        first = res["upcoming"][0]
        mins = int(round(res["minutes_to_night"]))
        click.echo(f"NOW   the night has not begun: it starts at {hm(res['night_start'])} UTC "
                   f"({hm(res['night_start_local'])} local), in {mins // 60} h {mins % 60:02d} min; the first entry, "
                   f"#{first['request_id']} {clean(first['target'])}, starts at {hm(first['start'])} UTC "
                   f"({hm(first['start_local'])} local)")
    else:
        first = res["upcoming"][0]
        click.echo(f"NOW   nothing in progress: move to #{first['request_id']} {clean(first['target'])}, which starts "
                   f"at {hm(first['start'])} UTC ({hm(first['start_local'])} local)")
    for label, e in zip(("NEXT", "THEN"), res["upcoming"]):
        click.echo(f"{label:<5} {entry_line(e)}")
    click.echo(res["caution"])


@click.command("record")
@click.argument("request_id", type=int)
@click.option("--result", type=click.Choice([r.value for r in OutcomeResult]), required=True, help="what happened")
@click.option("--exposure", type=float, help="exposure actually achieved, seconds (required for partial)")
@click.option("--note", help="observer's note (at most 2000 characters)")
@click.option("--charge", type=click.Choice(["none", "program"]),
              help="who pays the time: program (default for done and partial: the time as planned, or the "
                   "exposure achieved) or none (default for failed: the telescope's or the weather's fault)")
@click.option("--unplanned", is_flag=True, help="the request is in no active plan (observed outside the plan): "
                                                "record it anyway")
@pass_ctx
def record(c: Ctx, request_id: int, result: str, exposure: float | None, note: str | None,
           charge: str | None, unplanned: bool) -> None:
    """Record what was observed: done leaves the queue, partial keeps the rest, failed goes back.

    The request must be in an active plan (a mistyped id is refused) unless --unplanned."""
    from scheduler.db import plans, store

    if result == OutcomeResult.PARTIAL and exposure is None:
        raise InputError("exposure", "required with --result partial: the seconds of exposure achieved")
    now = datetime.now(timezone.utc)

    def work(s):
        entry_id = None
        # this request's entries in the active plans (any night): the one in progress or the
        # latest started, else the first still to come
        mine = sorted((e for p in plans.active_plans(s) for e in p.entries if e.request_id == request_id),
                      key=lambda e: e.start)
        if mine:
            started = [e for e in mine if e.start <= now]
            entry_id = (started[-1] if started else mine[0]).id
        out = store.record_outcome(s, request_id, result, exposure, note, entry_id, charge)
        if not mine and not unplanned:  # after the outcome's own checks; the transaction rolls back
            raise InputError("id", f"request {request_id} is in no active plan, so no outcome is expected for it "
                                   "(a mistyped id?); if it was observed outside the plan, add --unplanned")
        row = store.get_request(s, request_id)
        return (out.id, row.status, row.completed_repeats, row.repeats, row.partial_exposure_s, row.exposure_s,
                out.charged_h, row.program.code)

    oid, status, done_n, reps, part, exp, charged_h, code = c.db().retrying(work)
    if status == RequestStatus.DONE:
        tail = "all executions done; it leaves the queue"
    elif result == OutcomeResult.PARTIAL:
        tail = (f"{part:g} s of {exp:g} s credited; the remaining {exp - part:g} s stay queued" if part > 0 else
                f"execution {done_n} of {reps} complete; the next stays queued")
    elif result == OutcomeResult.FAILED:
        tail = "back in the queue"
    else:
        tail = f"{done_n} of {reps} executions done; the rest stay queued"
    click.echo(f"outcome {oid} recorded: request {request_id} {result}; {tail} (status {status}); "
               f"{charged_h:.2f} h charged to program {code}. The next plan build reflects it.")


def register(cli: click.Group) -> None:
    cli.add_command(plan)
    cli.add_command(next_cmd)
    cli.add_command(record)
