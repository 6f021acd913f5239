"""What every command module shares: the context object, output helpers and the night argument.

Command modules import from here, never from ``scheduler.cli.main`` (the root imports them, so
an import the other way would be a cycle).
"""

from __future__ import annotations

import json
import os
from datetime import date, datetime, timezone
from typing import Any

import click

from scheduler.model.config import ObservatoryConfig, load_config
from scheduler.model.errors import InputError
from scheduler.model.timegrid import parse_date, parse_time
from scheduler.report.safe_text import clean

CONFIG_FILE = "observatory.toml"


class Ctx:
    """What every command needs: where the database and the configuration are."""

    def __init__(self, db_url: str | None, config_path: str | None):
        self.db_url = db_url
        self.config_path = config_path or os.environ.get("NIGHTPLAN_CONFIG") or CONFIG_FILE
        self._db = None
        self._config: ObservatoryConfig | None = None

    def config(self) -> ObservatoryConfig:
        if self._config is None:
            self._config = load_config(self.config_path)
        return self._config

    def either(self, direct, ordinary):
        """``direct(d)`` when the database is a SQLite file that the standard library's sqlite3 can
        serve without SQLAlchemy (db/sqlite_direct.py; 0.3-0.5 s of import saved), else
        ``ordinary(self.db())`` (nothing was written by the first)."""
        from scheduler.db.sqlite_direct import run_direct

        used, got = run_direct(self.db_url, direct)
        return got if used else ordinary(self.db())

    def db(self, *, must_exist: bool = True):
        if self._db is None:
            from scheduler.db.session import open_db  # SQLAlchemy loads only for commands that need it

            self._db = open_db(self.db_url, create_file=not must_exist)
            if must_exist:
                path = self._db.path
                if path is not None and not path.exists():
                    raise InputError("db", f"{path} does not exist; run `nightplan init` first or pass --db URL")
                if not self._db.is_initialised():
                    raise InputError("db", f"{self._db.url} has no nightplan schema; run `nightplan init`")
        return self._db


pass_ctx = click.make_pass_decorator(Ctx)


def echo_json(obj: Any) -> None:
    click.echo(json.dumps(obj, indent=2, default=str))


def warn(msg: str) -> None:
    click.echo(f"nightplan: warning: {clean(msg)}", err=True)


def console(min_width: int = 100):
    """A rich console as wide as the terminal (COLUMNS, else the terminal's width; 140 when the
    output is not a terminal), at least ``min_width`` and at most 200 columns. A table that fits
    any width itself (`plan show`) asks for a small ``min_width``."""
    from rich.console import Console

    return Console(highlight=False, soft_wrap=False, width=max(min_width, min(200, _term_width())))


def _term_width() -> int:
    cols = os.environ.get("COLUMNS", "")
    if cols.isdigit() and int(cols) > 0:
        return int(cols)
    try:
        return os.get_terminal_size().columns
    except OSError:
        return 140


def parse_night(text: str) -> date:
    """A --night option: a date YYYY-MM-DD within the years the ephemerides are trusted for."""
    return parse_date(text, "night")


def now_or(text: str | None, field: str) -> datetime:
    """The moment an option names (ISO-8601 UTC), or the clock when it is not given."""
    return parse_time(text, field) if text else datetime.now(timezone.utc)
