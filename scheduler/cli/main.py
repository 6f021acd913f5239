"""The `nightplan` command line: the root group, its command modules, and the error policy.

Parses, calls the core, prints; no science lives here. Errors a user can fix are one line on
stderr (``nightplan: error: FIELD: ...``), exit status 2, and nothing is written: every command
that writes does it in one transaction.

Each command module exposes ``register(cli)`` and imports only ``scheduler.cli.common`` and the
core, never this module; this module imports them all and registers them explicitly below.
"""

from __future__ import annotations

import os
import sys

import click

from scheduler.cli import database, demo, plan, queue, season, service, sky, web
from scheduler.cli.common import Ctx
from scheduler.model.errors import InputError, NotFoundError
from scheduler.report.safe_text import clean


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.option("--db", "db_url", metavar="URL", help="SQLAlchemy database URL or SQLite file (env NIGHTPLAN_DB; default ./nightplan.sqlite)")
@click.option("--config", "config_path", metavar="FILE", help="observatory.toml (env NIGHTPLAN_CONFIG; default ./observatory.toml)")
@click.version_option(package_name="nightplan")
@click.pass_context
def cli(ctx: click.Context, db_url: str | None, config_path: str | None) -> None:
    """nightplan: queue-mode night planning for an observatory.

    Plans are advisory: the observatory's interlocks and its licensed operators decide what the
    telescope does, and local safety rules prevail.
    """
    ctx.obj = Ctx(db_url, config_path)


# The command modules, each adding its commands to the root group. A new module is imported
# above and listed here.
COMMAND_MODULES = (database, queue, sky, plan, service, web, demo, season)

for _module in COMMAND_MODULES:
    _module.register(cli)


def main(argv: list[str] | None = None) -> None:
    try:
        cli.main(args=argv, prog_name="nightplan", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("nightplan: aborted", err=True)
        sys.exit(130)
    except click.exceptions.UsageError as e:
        if type(e).__name__ == "NoArgsIsHelpError":  # a bare group: show its help
            e.show()
            sys.exit(2)
        # one line like every other input error (the option and what it allows are in the message)
        where = f" (see `{e.ctx.command_path} --help`)" if e.ctx is not None else ""
        click.echo(f"nightplan: error: {e.format_message()}{where}", err=True)
        sys.exit(2)
    except click.exceptions.ClickException as e:
        e.show()
        sys.exit(2 if e.exit_code in (1, 2) else e.exit_code)
    except (InputError, NotFoundError) as e:
        msg = e.args[0] if isinstance(e, NotFoundError) else str(e)
        click.echo(f"nightplan: error: {clean(msg)}", err=True)
        sys.exit(2)
    except KeyboardInterrupt:
        click.echo("nightplan: interrupted", err=True)
        sys.exit(130)
    except Exception as e:  # database or library errors: one line unless asked for the trace
        if os.environ.get("NIGHTPLAN_DEBUG"):
            raise
        from sqlalchemy.exc import SQLAlchemyError

        kind = "database" if isinstance(e, SQLAlchemyError) else type(e).__name__
        first = str(e).strip().splitlines()[0] if str(e).strip() else repr(e)
        hint = ""
        if kind == "database" and ("malformed" in first or "not a database" in first):
            hint = "; `nightplan db check` lists the damage"
        elif kind == "database" and "readonly database" in first:
            hint = ("; the database is open read-only: with ?mode=ro SQLite needs the -wal and -shm files beside "
                    "the database (?immutable=1 does not), and writing needs a file and folder this user can write")
        click.echo(f"nightplan: error: {kind}: {clean(first[:300])}{hint} (set NIGHTPLAN_DEBUG=1 for the trace)",
                   err=True)
        sys.exit(1)
