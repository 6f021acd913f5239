"""Commands for principal investigators: `program add|list|show` and `request add|import|list|show|withdraw`."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from scheduler.cli.common import Ctx, console, echo_json, parse_night, pass_ctx, warn
from scheduler.model.config import ObservatoryConfig
from scheduler.model.errors import InputError
from scheduler.model.request import RequestStatus
from scheduler.report.safe_text import clean

MAX_IMPORT_BYTES = 10_000_000
MAX_IMPORT_ROWS = 20_000
MAX_EPHEMERIS_BYTES = 5_000_000


def read_ephemeris(path: str | Path, shown: str) -> str:
    """The text of a PI's ephemeris table; errors name the ephemeris_file field and the file."""
    from scheduler.textfile import read_text_file

    try:
        return read_text_file(path, MAX_EPHEMERIS_BYTES)
    except InputError as e:
        raise InputError("ephemeris_file", f"{shown}: {e.message}") from None


@click.group()
def program() -> None:
    """Science programs: code, PI, tier, allocated hours, weight; hours charged and completion."""


@program.command("add")
@click.argument("code")
@click.option("--pi", required=True, help="principal investigator")
@click.option("--hours", default="0", show_default=True, help="allocated hours (0 to 10000; 0: no allocation)")
@click.option("--weight", default="1", show_default=True, help="rank weight in the objective (0 to 100]")
@click.option("--tier", type=int, default=2, show_default=True, help="tier, 1 (highest) to 9: tiers are strict")
@pass_ctx
def program_add(c: Ctx, code: str, pi: str, hours: str, weight: str, tier: int) -> None:
    """Create a program CODE."""
    from scheduler.db import store

    prog = c.db().retrying(lambda s: store.program_dict(store.add_program(s, code, pi, hours, weight, tier)))
    click.echo(f"program {prog['code']} added (PI {clean(prog['pi'])}, tier {prog['tier']}, {prog['hours']:g} h, "
               f"weight {prog['weight']:g})")


def _hours(x) -> str:
    return "-" if x is None else f"{x:.2f}"


@program.command("list")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def program_list(c: Ctx, as_json: bool) -> None:
    """List programs: tier, allocated, charged and remaining hours, completion."""
    from scheduler.db import store

    with c.db().session() as s:
        rows = store.program_report(s)
    if as_json:
        echo_json(rows)
        return
    from scheduler.report.safe_text import SafeTable as Table

    t = Table("code", "PI", "tier", "weight", "allocated h", "charged h", "remaining h", "completion", title="programs")
    for r in rows:
        t.add_row(r["code"], r["pi"], str(r["tier"]), f"{r['weight']:g}", f"{r['hours']:g}", _hours(r["hours_charged"]),
                  _hours(r["hours_remaining"]), f"{100 * r['completion']:.0f} % ({r['executions_done']}/{r['executions']})")
    console().print(t)


@program.command("show")
@click.argument("code")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def program_show(c: Ctx, code: str, as_json: bool) -> None:
    """One program: tier, allocated, charged and remaining hours, completion; its last stored season outlook."""
    from scheduler.db import outlook, store

    with c.db().session() as s:
        r = store.program_report(s, code)[0]
        season = outlook.program_outlook(s, code)
    if as_json:
        echo_json({**r, "outlook": season} if season is not None else r)
        return
    past = r["hours_remaining"] is not None and r["hours_remaining"] <= 0
    lines = [f"program {r['code']} (PI {clean(r['pi'])}), tier {r['tier']}, weight {r['weight']:g}",
             f"  allocated {r['hours']:g} h" + (" (no allocation: not balanced)" if r["hours"] <= 0 else ""),
             f"  charged {r['hours_charged']:.2f} h, remaining {_hours(r['hours_remaining'])} h"
             + (" - past its allocation: not planned unless planning.allow_overfill" if past else ""),
             f"  completion {100 * r['completion']:.0f} % ({r['executions_done']} of {r['executions']} executions "
             f"done, {r['requests']} requests)"]
    if season is not None:
        lines.append(f"  season outlook: {outlook.outlook_line(season, 'program')}")
    click.echo("\n".join(lines))


# --------------------------------------------------------------------------- requests

@click.group()
def request() -> None:
    """Observation requests: add, import, list, show, withdraw."""


MAX_WARNED = 5  # never-observable requests named one by one; beyond that, a summary


def _visibility_warnings(config: ObservatoryConfig, specs) -> None:
    """Warn about requests that can never be observed from the site: each one while they are
    few, then a summary by cause (a 20,000-row import must not print thousands of lines)."""
    from scheduler.model.request import never_observable_reason

    found = []
    for i, spec in enumerate(specs):
        why = never_observable_reason(spec, config)
        if why:
            found.append((f"request {spec.id}" if spec.id else f"row {i + 1}", spec, why))
    for label, spec, why in found[:MAX_WARNED]:
        warn(f"{label} ({spec.target}): never observable from {config.site.name}: {why}")
    rest = found[MAX_WARNED:]
    if rest:
        causes: dict[str, int] = {}
        for _label, _spec, why in rest:
            cause = "culminate below the telescope's altitude limit" if why.startswith("it culminates") else \
                "never reach their max_airmass" if why.startswith("its best airmass") else "for other reasons"
            causes[cause] = causes.get(cause, 0) + 1
        ids = [sp.id for _l, sp, _w in rest if sp.id is not None]
        span = f"ids {min(ids)} to {max(ids)}: " if ids else ""
        warn(f"{len(found)} of {len(specs)} requests are never observable from {config.site.name}: the "
             f"{MAX_WARNED} above and {len(rest)} more ({span}"
             + ", ".join(f"{n} {cause}" for cause, n in causes.items())
             + "); `nightplan request show ID` shows one")


def _allow_past_option(f):
    return click.option("--allow-past", is_flag=True,
                        help="accept a not_after that has already passed (e.g. recording last night's requests); "
                             "otherwise such a request is refused, as it could never run")(f)


@request.command("add")
@click.option("--program", required=True, help="program code")
@click.option("--target", required=True, help="target name")
@click.option("--ra", help="ICRS right ascension: degrees or hh:mm:ss.s (a fixed target)")
@click.option("--dec", help="ICRS declination: degrees or ±dd:mm:ss (a fixed target)")
@click.option("--body", help="a moving target instead of --ra/--dec: mercury venus mars jupiter saturn uranus "
                             "neptune pluto (computed offline)")
@click.option("--ephemeris", "ephemeris_file", type=click.Path(dir_okay=False),
              help="a moving target instead of --ra/--dec: CSV time,ra,dec[,delta_au] (geocentric ICRS), "
                   "stored with the request")
@click.option("--guide-star-sep", help="adaptive optics: guide star distance from the target, arcsec (0: on axis)")
@click.option("--band", required=True, help="band name from observatory.toml (starter: U B V R I J H K N Q)")
@click.option("--exposure", required=True, help="exposure time in seconds (> 0)")
@click.option("--instrument", help="instrument (default: the first that offers the band)")
@click.option("--resolution", help="delivered image FWHM the science needs, arcsec, in this band at the target's airmass")
@click.option("--max-seeing", help="worst site seeing tolerated, arcsec at 500 nm at zenith (as conditions report it)")
@click.option("--max-pwv", help="worst precipitable water vapour tolerated, mm")
@click.option("--max-airmass", help="largest airmass tolerated (>= 1)")
@click.option("--min-moon-sep", help="smallest Moon separation tolerated, degrees")
@click.option("--max-moon-illum", help="largest Moon illuminated fraction tolerated while the Moon is up, 0..1")
@click.option("--min-sky-mag", help="sky must be at least this dark in the band, mag/arcsec^2")
@click.option("--max-cloud", help="largest cloud extinction tolerated, mag")
@click.option("--not-before", help="earliest start, ISO-8601 UTC")
@click.option("--not-after", help="latest end, ISO-8601 UTC")
@click.option("--period-epoch", help="periodic window: time of phase 0, ISO-8601 UTC")
@click.option("--period-days", help="periodic window: period in days")
@click.option("--phase-min", help="periodic window: phase range start, 0..1")
@click.option("--phase-max", help="periodic window: phase range end, 0..1 (may wrap past 1)")
@click.option("--priority", help="1 (lowest) to 10 (highest), default 5")
@click.option("--repeats", help="number of executions, default 1")
@click.option("--min-spacing", help="minimum time between executions, seconds")
@click.option("--too", is_flag=True, help="target of opportunity")
@_allow_past_option
@pass_ctx
def request_add(c: Ctx, allow_past: bool, **opts: Any) -> None:
    """Submit one request; prints its id.

    --max-seeing is the site seeing at 500 nm at zenith, as the conditions report it;
    --resolution is the delivered image FWHM the science needs in the request's band at the
    target's airmass (seeing scaled by wavelength^-1/5 airmass^3/5, combined with diffraction;
    with adaptive optics, the corrected core where the predicted Strehl ratio allows it).
    The target is --ra/--dec, or --body, or --ephemeris FILE.
    """
    from scheduler.model.request import EPHEMERIS_KEY, validate_request
    from scheduler.model.timegrid import utcnow

    names = {"exposure": "exposure_s", "resolution": "resolution_arcsec", "max_seeing": "max_seeing_arcsec",
             "max_pwv": "max_pwv_mm", "min_moon_sep": "min_moon_sep_deg", "max_cloud": "max_cloud_mag",
             "min_spacing": "min_spacing_s", "guide_star_sep": "guide_star_sep_arcsec"}
    raw = {names.get(k, k): v for k, v in opts.items() if v is not None and v is not False}
    if raw.get("ephemeris_file"):
        raw[EPHEMERIS_KEY] = read_ephemeris(raw["ephemeris_file"], raw["ephemeris_file"])
    config = c.config()
    now = utcnow()

    def specs(codes: set[str]) -> list:
        return [validate_request(raw, config, codes, now=now, allow_past=allow_past)]

    def added(db):
        from scheduler.db import store

        def work(s):
            found = specs(store.program_codes(s))
            return found, store.add_requests(s, found)

        return db.retrying(work)

    (spec,), (rid,) = c.either(lambda d: d.add_requests(specs), added)
    _visibility_warnings(config, [spec.with_(id=rid)])
    click.echo(rid)


def read_import_file(path: str) -> list[tuple[int, dict[str, Any]]]:
    """(row number, raw fields) of a request import file, with a size limit.

    Parsed by model.request.parse_import_text, the one home of the file checks (a CSV column
    twice, duplicate JSON keys, deep or huge-number JSON, oversized cells: refused naming the
    column and row). Row numbers are what a user finds in the file: for CSV the line (the
    header is line 1), for JSON the position in the list (from 1).
    """
    from scheduler.model.request import parse_import_text
    from scheduler.model.untrusted import safe_name
    from scheduler.textfile import read_text_file

    p = Path(path)
    text = read_text_file(p, MAX_IMPORT_BYTES)
    return parse_import_text(text, safe_name(path, 200), json_format=True if p.suffix.lower() == ".json" else None)


@request.command("import")
@click.argument("file", type=click.Path(dir_okay=False))
@_allow_past_option
@pass_ctx
def request_import(c: Ctx, file: str, allow_past: bool) -> None:
    """Import requests from CSV (header row) or a JSON list; all rows or none.

    Columns: program,target,ra,dec,band,exposure_s,resolution_arcsec,max_seeing_arcsec,
    max_pwv_mm,max_airmass,min_moon_sep_deg,max_cloud_mag,not_before,not_after,priority,repeats
    (optional ones may be absent or empty), plus instrument, min_spacing_s, max_moon_illum,
    min_sky_mag, period_epoch, period_days, phase_min, phase_max, too, guide_star_sep_arcsec,
    and for a moving target instead of ra/dec: body (a planet or Pluto) or ephemeris_file (a
    CSV time,ra,dec[,delta_au], its path relative to the imported file).
    """
    from scheduler.db import store
    from scheduler.model.request import EPHEMERIS_KEY, validate_request
    from scheduler.model.timegrid import utcnow
    from scheduler.model.untrusted import check_text, safe_name

    shown_file = safe_name(file, 200)
    rows = read_import_file(file)
    if not rows:
        raise InputError("file", f"{shown_file} holds no requests")
    if len(rows) > MAX_IMPORT_ROWS:
        raise InputError("file", f"{shown_file} has {len(rows)} rows; at most {MAX_IMPORT_ROWS} per import")
    base = Path(file).resolve().parent
    for i, raw in rows:
        if raw.get("ephemeris_file") not in (None, ""):
            try:
                name = check_text(raw["ephemeris_file"], "ephemeris_file", max_len=1000)
                raw[EPHEMERIS_KEY] = read_ephemeris(base / name, name)
            except InputError as e:
                raise InputError(e.field, e.message, row=i, source=shown_file) from None
    config = c.config()
    db = c.db()
    now = utcnow()

    def work(s):
        codes = store.program_codes(s)
        specs = []
        for i, raw in rows:
            try:
                specs.append(validate_request(raw, config, codes, now=now, allow_past=allow_past))
            except InputError as e:
                raise InputError(e.field, e.message, row=i, source=shown_file) from None
        return specs, store.add_requests(s, specs)

    specs, ids = db.retrying(work)
    _visibility_warnings(config, [sp.with_(id=i) for sp, i in zip(specs, ids)])
    click.echo(f"imported {len(ids)} requests (ids {ids[0]}-{ids[-1]})")


@request.command("list")
@click.option("--status", type=click.Choice([s.value for s in RequestStatus]))
@click.option("--program", help="only this program")
@click.option("--json", "as_json", is_flag=True, help="print a JSON array")
@pass_ctx
def request_list(c: Ctx, status: str | None, program: str | None, as_json: bool) -> None:
    """List requests."""
    from scheduler.db.documents import request_dict

    def listed(db):
        from scheduler.db import store

        with db.session() as s:
            return [request_dict(r) for r in store.list_requests(s, status, program)]

    rows = c.either(lambda d: [request_dict(r) for r in d.requests(status, program)], listed)
    if as_json:
        echo_json(rows)
        return
    from scheduler.report.safe_text import SafeTable as Table

    t = Table("id", "program", "target", "RA", "Dec", "band", "exp s", "prio", "limits", "status",
              title=f"requests ({len(rows)})")
    for r in rows:
        if r.get("body") or r.get("ephemeris_rows"):  # moving: the listed position is only a reference
            ra, dec = (r["body"], "(moving)") if r.get("body") else ("table", f"({r['ephemeris_rows']} rows)")
        else:
            ra, dec = f"{r['ra_deg']:.4f}", f"{r['dec_deg']:+.4f}"
        t.add_row(str(r["id"]), r["program"], r["target"], ra, dec,
                  r["band"], f"{r['exposure_s']:g}", str(r["priority"]), _limits_text(r), r["status"])
    console().print(t)


def _limits_text(r: dict[str, Any]) -> str:
    parts = []
    for key, label in (("resolution_arcsec", "res<={}\""), ("max_seeing_arcsec", "see<={}\""),
                       ("max_pwv_mm", "pwv<={}mm"), ("max_airmass", "X<={}"), ("min_moon_sep_deg", "moon>={}°"),
                       ("max_cloud_mag", "cloud<={}")):
        if r.get(key) is not None:
            parts.append(label.format(f"{r[key]:g}"))
    return " ".join(parts) or "-"


@request.command("show")
@click.argument("request_id", type=int)
@click.option("--night", help="also list the feasible windows on this night (YYYY-MM-DD, local evening)")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def request_show(c: Ctx, request_id: int, night: str | None, as_json: bool) -> None:
    """Show one request (and, with --night, when it can be observed), and its last stored season outlook."""
    from scheduler.db import store
    from scheduler.db.documents import request_dict
    from scheduler.db.outlook import outlook_line, request_outlook

    with c.db().session() as s:
        row = store.get_request(s, request_id)
        d = request_dict(row)
        spec = store.to_spec(row)
        report = store.latest_conditions(s)
        samples = list(report.samples) if report is not None else []
        season = request_outlook(s, request_id)
    if night:
        from scheduler.constraints.windows import feasible_windows

        d["windows"] = feasible_windows(c.config(), spec, parse_night(night), samples)
    if as_json:
        echo_json({**d, "outlook": season} if season is not None else d)
        return
    for k, v in d.items():
        if k == "windows" or v is None:
            continue
        click.echo(f"{k:>20}: {clean(v)}")
    if season is not None:
        click.echo(f"{'outlook':>20}: {outlook_line(season, 'request')}")
    if night:
        w = d["windows"]
        click.echo(f"{'night':>20}: {night}")
        if w["windows"]:
            for win in w["windows"]:
                click.echo(f"{'feasible':>20}: {win['start']} to {win['end']} (starts possible until {win['last_start']})")
        else:
            click.echo(f"{'feasible':>20}: never; binding constraint: {w['binding']}")


@request.command("withdraw")
@click.argument("request_id", type=int)
@pass_ctx
def request_withdraw(c: Ctx, request_id: int) -> None:
    """Withdraw a request from the queue (kept for the record)."""
    from scheduler.db import store

    c.db().retrying(lambda s: store.withdraw_request(s, request_id))
    click.echo(f"request {request_id} withdrawn")


def register(cli: click.Group) -> None:
    cli.add_command(program)
    cli.add_command(request)
