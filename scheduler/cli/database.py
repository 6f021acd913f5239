"""Commands that set up and move the database: `init` and `db copy`."""

from __future__ import annotations

from pathlib import Path

import click

from scheduler.cli.common import Ctx, pass_ctx
from scheduler.model.config import starter_config_text
from scheduler.model.errors import InputError


class _Created:
    """Files and folders a command is about to create, removed again if it fails."""

    def __init__(self) -> None:
        self.files: list[Path] = []
        self.folders: list[Path] = []  # deepest first

    def note(self, path: Path) -> None:
        """Call before creating ``path``: remembers it and the folders above it not there yet."""
        up = path.parent
        while not up.exists():
            self.folders.append(up)
            up = up.parent
        if not path.exists():
            self.files.append(path)

    def remove(self) -> None:
        for f in self.files:
            for p in (f, f.with_name(f.name + "-wal"), f.with_name(f.name + "-shm"), f.with_name(f.name + "-journal")):
                try:
                    p.unlink(missing_ok=True)
                except OSError:
                    pass
        for d in self.folders:
            try:
                d.rmdir()
            except OSError:  # not empty (someone else wrote there) or already gone
                pass


@click.command()
@pass_ctx
def init(c: Ctx) -> None:
    """Create or upgrade the database; write a starter observatory.toml if there is none.

    All or nothing: if any step fails, the files and folders this run created are removed.
    """
    from scheduler.db import migrate
    from scheduler.db.session import resolve_url, sqlite_path

    cfg_path = Path(c.config_path)
    starter = None
    if cfg_path.exists():
        c.config()  # validate what is there before anything is written
    else:
        starter = starter_config_text()
    created = _Created()
    db_file = sqlite_path(resolve_url(c.db_url))
    if db_file is not None:
        created.note(db_file)
    db = None
    try:
        db = c.db(must_exist=False)
        before = migrate.current_revision(db)
        migrate.upgrade(db)
        after = migrate.current_revision(db)
        if starter is not None:  # last, so a failed upgrade leaves no config behind either
            created.note(cfg_path)
            try:
                cfg_path.parent.mkdir(parents=True, exist_ok=True)
                cfg_path.write_text(starter, encoding="utf-8")
            except OSError as e:
                where = f"{e.filename}: " if e.filename and str(e.filename) != str(cfg_path) else ""
                raise InputError("config", f"cannot write {cfg_path} ({where}{e.strerror or e})") from None
    except BaseException:
        if db is not None:
            db.dispose()  # close the file before removing it
        created.remove()
        raise
    if starter is not None:
        click.echo(f"config:   {cfg_path.resolve()} (starter file for an invented site; edit it)")
    else:
        click.echo(f"config:   {cfg_path.resolve()} (kept)")
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


@db_group.command("check")
@click.option("--quick", is_flag=True, help="SQLite: PRAGMA quick_check (page structure only, faster) instead of the "
                                           "full PRAGMA integrity_check")
@pass_ctx
def db_check(c: Ctx, quick: bool) -> None:
    """Check the database for damage (exit 1 if any is found).

    SQLite: PRAGMA integrity_check, or quick_check with --quick (the service runs the quick
    check when it starts and refuses a damaged file). PostgreSQL offers clients no whole-database
    check: the server must answer a catalog query and every nightplan table must read end to end;
    page-level checks are the server's own (data checksums, the amcheck extension).
    """
    from scheduler.db.session import open_db
    from scheduler.report.safe_text import clean

    db = open_db(c.db_url, create_file=False)
    if db.path is not None and not db.path.exists():
        raise InputError("db", f"{db.path} does not exist; run `nightplan init` first or pass --db URL")
    where = str(db.path.resolve()) if db.path is not None else db.url
    what, problems = db.check_integrity(quick=quick)
    if not problems:
        click.echo(f"database: {where}: {what}: ok")
        return
    click.echo(f"database: {where}: {what}: DAMAGED, {len(problems)} problem{'s' if len(problems) > 1 else ''}")
    for line in problems[:20]:
        click.echo(f"  {clean(line)}")
    if len(problems) > 20:
        click.echo(f"  ... and {len(problems) - 20} more")
    click.echo("Stop the service and every writer, keep a copy of the damaged file, and restore the latest backup "
               "(SQLite's `.recover` command can salvage rows from a copy).")
    raise SystemExit(1)


def register(cli: click.Group) -> None:
    cli.add_command(init)
    cli.add_command(db_group)
