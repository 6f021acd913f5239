"""Commands about the sky: `conditions load|show` and `almanac`."""

from __future__ import annotations

from pathlib import Path

import click

from scheduler.cli.common import Ctx, console, echo_json, parse_night, pass_ctx, warn
from scheduler.model.errors import InputError
from scheduler.model.timegrid import iso
from scheduler.report.safe_text import clean


@click.group()
def conditions() -> None:
    """Forecast or measured conditions: seeing, PWV, cloud, wind, humidity, dome."""


@conditions.command("load")
@click.argument("file", type=click.Path(dir_okay=False))
@click.option("--source", help="who issued the report (default: the report's own, else the file name)")
@click.option("--format", "fmt", type=click.Choice(["csv", "json"]), help="default: from the content")
@pass_ctx
def conditions_load(c: Ctx, file: str, source: str | None, fmt: str | None) -> None:
    """Store a conditions report from CSV or JSON (all samples or none).

    Columns: time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome (time ISO-8601 UTC;
    the rest optional; dome is open or closed). Seeing is at 500 nm at zenith.
    """
    from scheduler.conditions.files import read_conditions_file
    from scheduler.db import store
    from scheduler.model.untrusted import check_text

    if source is not None:  # shown by `status` and `conditions show`: no terminal controls
        source = check_text(source, "source", max_len=200)
    p = Path(file)
    report = read_conditions_file(p, fmt)
    src = source or report.source or p.name
    db = c.db()
    rep_id = db.retrying(lambda s: store.store_conditions(s, list(report), src, report.issued).id)
    first, last = report.samples[0].time, report.samples[-1].time
    click.echo(f"conditions report {rep_id} stored: {len(report)} samples from {iso(first)} to {iso(last)} ({clean(src)})")


@conditions.command("show")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def conditions_show(c: Ctx, as_json: bool) -> None:
    """Show the latest conditions report."""
    from scheduler.db import store

    with c.db().session() as s:
        rep = store.latest_conditions(s)
        if rep is None:
            raise InputError("conditions", "no report stored yet; load one with `nightplan conditions load FILE`")
        data = {
            "id": rep.id, "source": rep.source, "issued_at": iso(rep.issued_at), "received_at": iso(rep.received_at),
            "samples": [
                {"time": iso(x.time), "seeing_arcsec": x.seeing_arcsec, "pwv_mm": x.pwv_mm, "cloud_mag": x.cloud_mag,
                 "wind_ms": x.wind_ms, "humidity_pct": x.humidity_pct,
                 "dome": None if x.dome_open is None else ("open" if x.dome_open else "closed")}
                for x in rep.samples
            ],
        }
    if as_json:
        echo_json(data)
        return
    from scheduler.report.safe_text import SafeTable as Table

    t = Table("time (UTC)", "seeing \"", "PWV mm", "cloud mag", "wind m/s", "humidity %", "dome",
              title=f"conditions report {data['id']} from {data['source']}, issued {data['issued_at']}")

    def f(v, fmt="{:.2f}"):
        return "-" if v is None else fmt.format(v)

    for x in data["samples"]:
        t.add_row(x["time"], f(x["seeing_arcsec"]), f(x["pwv_mm"]), f(x["cloud_mag"]), f(x["wind_ms"], "{:.1f}"),
                  f(x["humidity_pct"], "{:.0f}"), x["dome"] or "-")
    console().print(t)


@click.command()
@click.option("--night", help="YYYY-MM-DD, the local evening the night begins (default: tonight)")
@click.option("--json", "as_json", is_flag=True, help="print JSON")
@pass_ctx
def almanac(c: Ctx, night: str | None, as_json: bool) -> None:
    """Sunset, twilights, sunrise, the Moon and the dark hours for the site."""
    from scheduler.sky.almanac import almanac_for
    from scheduler.sky.night import night_date_for

    config = c.config()
    if night:
        d = parse_night(night)
    else:
        from datetime import datetime, timezone

        d = night_date_for(config.site, datetime.now(timezone.utc))
    data = almanac_for(config, d)
    if as_json:
        echo_json(data)
        return
    click.echo(f"{clean(data['site']['name'])}  lat {data['site']['lat_deg']:+.3f}  lon {data['site']['lon_deg']:+.3f}  "
               f"{data['site']['elevation_m']:.0f} m   night of {data['night']} ({data['site']['timezone']})")
    for key in ("sunset", "civil_dusk", "nautical_dusk", "astronomical_dusk",
                "astronomical_dawn", "nautical_dawn", "civil_dawn", "sunrise"):
        utc = data[key] or "-"
        loc = data["local"].get(key) or ""
        click.echo(f"  {key:<18} {utc:<22} {loc}")
    click.echo(f"  dark hours         {data['dark_hours']:.2f} h (Sun below -18 deg)")
    click.echo(f"  moon               illumination {data['moon_illumination']:.2f} at midnight; "
               f"up {data['moon_up_hours']:.1f} h of the night; up during darkness {data['moon_up_dark_hours']:.1f} h")
    if data.get("warning"):
        warn(data["warning"])


def register(cli: click.Group) -> None:
    cli.add_command(conditions)
    cli.add_command(almanac)
