"""`nightplan season simulate`: the season outlook. Thin: validate, read the queue once, hand
the realizations to Dask, aggregate, print and write."""

from __future__ import annotations

import json
import sys
import time
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import click

from scheduler.cli.common import Ctx, console, echo_json, pass_ctx
from scheduler.model.errors import InputError
from scheduler.season import DEFAULT_EFFORT

DEFAULT_REALIZATIONS = 20
MAX_REALIZATIONS = 10_000
MAX_NIGHTS = 366
MAX_WORKERS = 256
MAX_SEED = 2**31 - 1
CAUTION = ("Outlook from the site's weather statistics, not a forecast: it tells how likely, not what will "
           "happen. Plans are advisory: the observatory's interlocks and licensed operators decide, and local "
           "rules prevail.")


def _date(text: str, field: str) -> date:
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise InputError(field, f"{text!r} is not a date; allowed YYYY-MM-DD (the local evening a night begins)") from None


def _check_range(field: str, value: int, lo: int, hi: int, unit: str = "") -> int:
    if not lo <= value <= hi:
        raise InputError(field, f"{value} is out of range; allowed {lo} to {hi}{unit}")
    return value


def _n(k: int, what: str) -> str:
    return f"{k} {what}{'' if k == 1 else 's'}"


def _out_dir(text: str | None) -> Path | None:
    if text is None:
        return None
    p = Path(text)
    if p.exists() and not p.is_dir():
        raise InputError("out", f"{text} exists and is not a folder; allowed a folder (created if missing)")
    return p


class _Progress:
    """Realizations done, on stderr: one redrawn line on a terminal, a line per change otherwise."""

    def __init__(self):
        self.tty = sys.stderr.isatty()
        self.t0 = time.perf_counter()
        self.last = None

    def __call__(self, done: int, total: int, nights: int, all_nights: int) -> None:
        width = 30
        fill = int(width * nights / max(all_nights, 1))
        line = (f"realizations {done}/{total} done [{'#' * fill}{'.' * (width - fill)}] "
                f"nights {nights}/{all_nights}, {time.perf_counter() - self.t0:.0f} s")
        if self.tty:
            click.echo("\r" + line, err=True, nl=done == total)
        elif done != self.last or nights == all_nights:
            click.echo(line, err=True)
        self.last = done


@click.group()
def season() -> None:
    """Season outlook: the queue simulated night by night under the site's weather statistics."""


@season.command("simulate")
@click.option("--from", "date_from", required=True, metavar="DATE", help="first night, YYYY-MM-DD (local evening)")
@click.option("--to", "date_to", required=True, metavar="DATE", help="last night, YYYY-MM-DD (included)")
@click.option("--realizations", type=int, default=DEFAULT_REALIZATIONS, show_default=True,
              help=f"weather histories to simulate, 1 to {MAX_REALIZATIONS}")
@click.option("--seed", type=int, default=0, show_default=True, help=f"master seed, 0 to {MAX_SEED}: same seed, same outlook")
@click.option("--weather", metavar="FILE", help="climatology CSV (default: [climatology] file in observatory.toml)")
@click.option("--effort", type=int, default=DEFAULT_EFFORT, show_default=True,
              help="work budget of each night's plan, 1 to 1000 (deterministic; re-plans get the service's share)")
@click.option("--scheduler", "scheduler_address", metavar="ADDRESS",
              help="an existing Dask scheduler, tcp://host:port (default: a local cluster for this command)")
@click.option("--workers", type=int, help=f"local worker processes, 1 to {MAX_WORKERS} (default: the number of cores)")
@click.option("--out", "out_dir", metavar="DIR", help="write season.json, CSV tables and charts into DIR")
@click.option("--json", "as_json", is_flag=True, help="print the outlook as JSON")
@click.option("--store", is_flag=True, help="store the outlook for `request show` / `program show` (its own table)")
@pass_ctx
def simulate(c: Ctx, date_from: str, date_to: str, realizations: int, seed: int, weather: str | None, effort: int,
             scheduler_address: str | None, workers: int | None, out_dir: str | None, as_json: bool,
             store: bool) -> None:
    """Run the real nightly planner over every night from --from to --to in many weather
    histories drawn from the site's statistics; report each program's completion and charged
    hours, each request's probability of completion, hours by band, weather losses and idle
    dark time. Never writes to the queue; --store adds the outlook to its own table."""
    import os

    from scheduler.db import outlook as outlook_db
    from scheduler.season.engine import SeasonSetup
    from scheduler.season.weather import read_climatology_file
    from scheduler.solve.budget import check_effort

    start, end = _date(date_from, "from"), _date(date_to, "to")
    if end < start:
        raise InputError("to", f"{end} is before --from {start}; allowed {start} or later")
    n_nights = (end - start).days + 1
    if n_nights > MAX_NIGHTS:
        raise InputError("to", f"{n_nights} nights from {start} is out of range; allowed at most {MAX_NIGHTS} "
                               f"(up to {start + timedelta(days=MAX_NIGHTS - 1)})")
    _check_range("realizations", realizations, 1, MAX_REALIZATIONS)
    _check_range("seed", seed, 0, MAX_SEED)
    check_effort(effort)
    if scheduler_address is not None and workers is not None:
        raise InputError("workers", "applies to the local cluster only; with --scheduler the cluster's own workers run")
    if workers is not None:
        _check_range("workers", workers, 1, MAX_WORKERS)
    n_workers = workers or os.cpu_count() or 1
    out = _out_dir(out_dir)
    config = c.config()
    path = Path(weather) if weather else config.climatology_path()
    if path is None:
        raise InputError("weather", "no climatology file: pass --weather FILE or set [climatology] file = \"...\" "
                                    "in observatory.toml (columns: docs/season.md)")
    clim = read_climatology_file(path)
    db = c.db()
    if store:
        from scheduler.db import migrate

        if migrate.current_revision(db) != migrate.head_revision(db):
            raise InputError("db", "the schema is older than this nightplan; run `nightplan init` to upgrade it "
                                   "before --store")
    with db.session() as s:
        specs, programs = outlook_db.read_queue(s)
    if not specs:
        raise InputError("queue", "has no active requests (queued, planned or failed); nothing to simulate")
    dates = tuple(start + timedelta(days=k) for k in range(n_nights))
    setup = SeasonSetup(config, clim, tuple(specs), tuple(programs), dates, seed, effort)

    from scheduler.season.distribute import dask_client, run_realizations
    from scheduler.season.simulate import aggregate

    where = scheduler_address or f"a local Dask cluster of {n_workers} worker process{'es' if n_workers > 1 else ''}"
    with dask_client(scheduler_address, n_workers) as client:
        click.echo(f"season {start} to {end}: {_n(n_nights, 'night')} x {_n(realizations, 'realization')}, "
                   f"{_n(len(specs), 'request')}, effort {effort}, seed {seed}, weather {clim.source}; on {where}",
                   err=True)
        outcomes, info = run_realizations(client, setup, realizations, progress=_Progress())
    doc = aggregate(setup.program_infos(), setup.request_infos(), outcomes, start=start, end=end, seed=seed)
    doc.update({"effort": effort, "weather": clim.source, "caution": CAUTION})
    click.echo(f"peak memory per worker: {', '.join(f'{v:.0f} MiB' for v in info.peak_rss_mib.values())}", err=True)

    if out is not None:
        _write_outputs(out, doc)
    if store:
        now = datetime.now(timezone.utc)
        n = db.retrying(lambda s: outlook_db.store_outlook(s, doc, now, effort=effort, weather=clim.source))
        click.echo(f"stored the outlook ({n} rows) for `request show` and `program show`", err=True)
    if as_json:
        echo_json(doc)
    else:
        _print_summary(doc, out)


def _write_outputs(out: Path, doc: dict) -> None:
    from scheduler.report.season_chart import charged_by_tier_chart, completion_chart
    from scheduler.season.simulate import outlook_tables

    out.mkdir(parents=True, exist_ok=True)
    (out / "season.json").write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    for name, text in outlook_tables(doc).items():
        (out / name).write_text(text, encoding="utf-8")
    completion_chart(doc, out / "completion.png")
    charged_by_tier_chart(doc, out / "charged_by_tier.png")


def _fmt_spread(v: dict, pct: bool = False) -> str:
    if v["mean"] is None:
        return "-"
    if pct:
        return f"{100 * v['mean']:.0f} % ({100 * v['p10']:.0f}-{100 * v['p90']:.0f})"
    return f"{v['mean']:.1f} ({v['p10']:.1f}-{v['p90']:.1f})"


def _print_summary(doc: dict, out: Path | None) -> None:
    from rich.table import Table

    t = Table("program", "tier", "allocated h", "charged h: mean (10-90 %)", "completion: mean (10-90 %)",
              title=f"season outlook {doc['from']} to {doc['to']}: {doc['nights']} nights, "
                    f"{doc['realizations']} realizations, seed {doc['seed']}")
    for p in doc["programs"]:
        t.add_row(p["code"], "-" if p["tier"] is None else str(p["tier"]), f"{p['allocated_h']:g}",
                  _fmt_spread(p["charged_h"]), _fmt_spread(p["completion"], pct=True))
    con = console()
    con.print(t)
    reqs = doc["requests"]
    likely = sum(1 for r in reqs if r["p_complete"] >= 0.9)
    unlikely = sum(1 for r in reqs if r["p_complete"] < 0.5)
    click.echo(f"requests: {len(reqs)}; {likely} complete in 90 % of realizations or more, "
               f"{unlikely} in fewer than half")
    click.echo(f"hours lost to weather (dark): {_fmt_spread(doc['weather_lost_h'])}; idle dark hours: "
               f"{_fmt_spread(doc['idle_dark_h'])}")
    bands = ", ".join(f"{b} {v['mean']:.1f}" for b, v in doc["hours_by_band"].items())
    click.echo(f"hours observed by band (mean): {bands or 'none'}")
    if out is not None:
        click.echo(f"written: {out}/season.json, programs.csv, requests.csv, bands.csv, completion.png, "
                   "charged_by_tier.png")
    click.echo(doc["caution"])


def register(cli: click.Group) -> None:
    cli.add_command(season)
