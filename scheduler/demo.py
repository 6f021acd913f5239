"""`nightplan demo`: the whole job on the invented scenario (package data, data/demo_queue/), in a
fresh folder.

Runs the real commands in this process (the same click commands a user types, with --db and
--config pointing into the folder), so the demo goes through exactly the CLI's code paths. The
command group is passed in by `nightplan demo`, so this module never imports the command line:
init, program add, request import, conditions load, almanac, plan build, plan show, plan
chart, plan export, plan why, next; then the changed forecast, a re-plan with a reason naming
the change, and what moved between the two plan versions.
"""

from __future__ import annotations

import csv
import json
import shlex
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import click

from scheduler.model.errors import InputError

DATA_DIR = Path(__file__).resolve().parent / "data" / "demo_queue"  # shipped in the wheel
BEFORE_NIGHT = "T18:00:00Z"  # the first build "happens" the afternoon before, so the whole night is planned
UPDATE_AT = "01:00:00Z"  # the forecast update arrives mid-night, the next UTC day: re-plan from then on


def _data_dir() -> Path:
    if not (DATA_DIR / "scenario.json").is_file():
        raise InputError("demo", f"the demo scenario was not found in {DATA_DIR}; this nightplan installation "
                                 "is incomplete (reinstall it)")
    return DATA_DIR


def _out_dir(out: str | None) -> Path:
    if out is None:
        return Path(tempfile.mkdtemp(prefix="nightplan-demo-"))
    p = Path(out)
    if p.exists() and not p.is_dir():
        raise InputError("out", f"{out} exists and is not a folder")
    if (p / "nightplan.sqlite").exists() or (p / "observatory.toml").exists():
        raise InputError("out", f"{out} already holds a nightplan database or observatory.toml; give an empty or "
                                "new folder")
    p.mkdir(parents=True, exist_ok=True)
    return p


def past_flag(requests_csv: Path, now: datetime) -> list[str]:
    """["--allow-past"] once ``now`` has passed a not_after of the scenario (its night is fixed,
    the demo plans it as if the afternoon before), else nothing."""
    from scheduler.model.timegrid import parse_time

    with open(requests_csv, encoding="utf-8", newline="") as f:
        ends = [parse_time(r["not_after"], "not_after") for r in csv.DictReader(f) if r.get("not_after")]
    return ["--allow-past"] if ends and min(ends) <= now else []


def run_demo(out: str | None, time_limit: float, cli: click.Group) -> dict:
    from sqlalchemy import select

    from scheduler.db import plans
    from scheduler.db.models import Plan, Request
    from scheduler.db.session import open_db

    data = _data_dir()
    scen = json.loads((data / "scenario.json").read_text(encoding="utf-8"))
    folder = _out_dir(out).resolve()
    db_path = folder / "nightplan.sqlite"
    base = ["--db", str(db_path), "--config", str(folder / "observatory.toml")]
    night = scen["night"]
    t_start = time.perf_counter()

    def run(*args: str, show: str | None = None) -> None:
        click.secho(f"\n$ nightplan {show or shlex.join(args)}", bold=True)
        cli.main(args=[*base, *args], prog_name="nightplan", standalone_mode=False)

    def rel(p: Path) -> str:
        try:
            return str(p.relative_to(data.parent))
        except ValueError:
            return str(p)

    click.secho(f"nightplan demo: an invented observatory, five invented programs, 150 requests from the optical "
                f"to the mid-infrared, the night of {night} (local evening).", bold=True)
    click.echo(f"working folder: {folder}")

    run("init")
    with open(data / scen["programs"], encoding="utf-8", newline="") as f:
        for row in csv.DictReader(f):
            run("program", "add", row["code"], "--pi", row["pi"], "--hours", row["hours"], "--weight", row["weight"],
                show=f"program add {row['code']} --pi {row['pi']!r} --hours {row['hours']} --weight {row['weight']}")
    past = past_flag(data / scen["requests"], datetime.now(timezone.utc))
    if past:
        click.echo("(the scenario's night is past and its time windows have ended: the import takes --allow-past)")
    run("request", "import", str(data / scen["requests"]), *past,
        show=f"request import {rel(data / scen['requests'])}{' ' + past[0] if past else ''}")
    run("conditions", "load", str(data / scen["forecast"]), "--source", scen["forecast_source"],
        show=f"conditions load {rel(data / scen['forecast'])} --source {scen['forecast_source']!r}")
    run("almanac", "--night", night)

    reason1 = f"demo: first plan of the night on {scen['forecast_source']}"
    run("plan", "build", "--night", night, "--time-limit", f"{time_limit:g}", "--now", night + BEFORE_NIGHT,
        "--reason", reason1)
    run("plan", "show")
    chart1, json1, csv1 = folder / "plan_v1.png", folder / "plan_v1.json", folder / "plan_v1.csv"
    run("plan", "chart", "-o", str(chart1), show=f"plan chart -o {chart1.name}")
    run("plan", "export", "--format", "json", "-o", str(json1), show=f"plan export --format json -o {json1.name}")
    run("plan", "export", "--format", "csv", "-o", str(csv1), show=f"plan export --format csv -o {csv1.name}")

    # Why is a request left out? One that never rises here, and the best-valued displaced one.
    db = open_db(str(db_path))
    with db.session() as s:
        v1 = plans.active_plan(s)
        v1_id = v1.id
        unscheduled = plans.plan_summary(v1).get("unscheduled", [])
        never = next((u["request_id"] for u in unscheduled if u["reason"].endswith(": altitude")),
                     next((u["request_id"] for u in unscheduled if u["reason"].startswith("never")), None))
        displaced = next((u["request_id"] for u in unscheduled if not u["reason"].startswith("never")), None)
        first_entry = min(v1.entries, key=lambda e: e.start) if v1.entries else None
        at = (first_entry.start.timestamp() + 3 * 3600) if first_entry else None
    for rid in (never, displaced):
        if rid is not None:
            run("plan", "why", str(rid))
    if at is not None:
        from scheduler.model.timegrid import iso

        run("next", "--at", iso(datetime.fromtimestamp(at, tz=timezone.utc)))

    # The sky changes: a new forecast, a re-plan naming the change, and what moved.
    upd = data / scen["forecast_update"]
    run("conditions", "load", str(upd), show=f"conditions load {rel(upd)}")
    from datetime import date, timedelta

    update_at = f"{(date.fromisoformat(night) + timedelta(days=1)).isoformat()}T{UPDATE_AT}"
    run("plan", "build", "--night", night, "--time-limit", f"{time_limit:g}", "--now", update_at,
        "--reason", scen["update_reason"])
    run("next", "--at", update_at)
    chart2, json2 = folder / "plan_v2.png", folder / "plan_v2.json"
    run("plan", "chart", "-o", str(chart2), show=f"plan chart -o {chart2.name}")
    run("plan", "export", "--format", "json", "-o", str(json2), show=f"plan export --format json -o {json2.name}")

    with db.session() as s:
        v2 = plans.active_plan(s)
        diff = plans.plan_diff_of(v2)
        ids = {d["request_id"] for k in ("added", "dropped", "moved") for d in diff.get(k, [])}
        names = {r.id: f"{r.target} ({r.program.code}, {r.band})"
                 for r in s.scalars(select(Request).where(Request.id.in_(ids)))} if ids else {}
        v2_id, v2_prev = v2.id, v2.previous_id
        why_dropped = {u["request_id"]: u["reason"] for u in plans.plan_summary(v2).get("unscheduled", [])}
        n_plans = len(list(s.scalars(select(Plan.id))))
    click.secho(f"\nWhat moved from plan version {v2_prev} to {v2_id} ({scen['update_reason']}):", bold=True)
    for kind in ("added", "dropped", "moved"):
        items = diff.get(kind, [])
        click.echo(f"  {kind:<8}{len(items):>3}")
        for d in items:
            name = names.get(d["request_id"], "?")
            if kind == "moved":
                click.echo(f"      #{d['request_id']:<4} {name:<28} {d['from'][11:16]} -> {d['to'][11:16]} UTC "
                           f"({d['minutes']:+.0f} min)")
            elif kind == "dropped":
                click.echo(f"      #{d['request_id']:<4} {name:<28} {d['start'][11:16]} UTC  "
                           f"({why_dropped.get(d['request_id'], '?')})")
            else:
                click.echo(f"      #{d['request_id']:<4} {name:<28} {d['start'][11:16]} UTC")

    elapsed = time.perf_counter() - t_start
    click.secho("\nFiles:", bold=True)
    for label, p in (("database", db_path), ("config", folder / "observatory.toml"), ("chart v1", chart1),
                     ("export v1 JSON", json1), ("export v1 CSV", csv1), ("chart v2", chart2),
                     ("export v2 JSON", json2)):
        click.echo(f"  {label:<15} {p}")
    click.echo(f"\nDemo finished in {elapsed:.0f} s: {n_plans} plan versions (v{v1_id}, v{v2_id}). Look around with "
               f"`nightplan --db {db_path} --config {folder / 'observatory.toml'} plan show`.")
    return {"folder": str(folder), "plans": [v1_id, v2_id], "diff": diff, "elapsed_s": elapsed}
