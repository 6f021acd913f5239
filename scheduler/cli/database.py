"""Commands that set up and move the database: `init` and `db copy`."""

from __future__ import annotations

from pathlib import Path

import click

from scheduler.cli.common import Ctx, pass_ctx
from scheduler.model.config import starter_config_text


@click.command()
@pass_ctx
def init(c: Ctx) -> None:
    """Create or upgrade the database; write a starter observatory.toml if there is none."""
    from scheduler.db import migrate

    cfg_path = Path(c.config_path)
    if not cfg_path.exists():
        cfg_path.parent.mkdir(parents=True, exist_ok=True)
        cfg_path.write_text(starter_config_text(), encoding="utf-8")
        click.echo(f"config:   {cfg_path.resolve()} (starter file for an invented site; edit it)")
    else:
        c.config()  # validate what is there
        click.echo(f"config:   {cfg_path.resolve()} (kept)")
    db = c.db(must_exist=False)
    before = migrate.current_revision(db)
    migrate.upgrade(db)
    after = migrate.current_revision(db)
    where = str(db.path.resolve()) if db.path is not None else db.url
    state = "created" if before is None else ("upgraded" if before != after else "up to date")
    click.echo(f"database: {where} ({state}, schema {after})")


@click.group("db")
def db_group() -> None:
    """Database housekeeping."""


@db_group.command("copy")
@click.option("--to", "to_url", required=True, metavar="URL", help="destination database URL (a new, empty database)")
@pass_ctx
def db_copy(c: Ctx, to_url: str) -> None:
    """Copy this queue, its plans and history to another database (e.g. SQLite to PostgreSQL)."""
    from scheduler.db.session import open_db
    from scheduler.db.transfer import copy_database

    src = c.db()
    dst = open_db(to_url)
    counts = copy_database(src, dst)
    total = sum(counts.values())
    click.echo(f"copied {total} rows to {dst.url}: " + ", ".join(f"{k} {v}" for k, v in counts.items() if v))


def register(cli: click.Group) -> None:
    cli.add_command(init)
    cli.add_command(db_group)
