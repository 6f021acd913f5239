"""`nightplan demo`: the whole job on the invented scenario (the driver is scheduler.demo)."""

from __future__ import annotations

import click

from scheduler.model.errors import InputError


@click.command("demo")
@click.option("--out", "out_dir", metavar="DIR", help="folder for the demo's database, config, chart and exports "
                                                      "(default: a new temporary folder)")
@click.option("--time-limit", type=float, default=8.0, show_default=True, help="solver time limit per build, seconds")
@click.pass_context
def demo(ctx: click.Context, out_dir: str | None, time_limit: float) -> None:
    """The whole job on the invented scenario: queue, forecast, plan, chart, export, re-plan."""
    from scheduler.demo import run_demo

    if not (0.1 <= time_limit <= 600):
        raise InputError("time-limit", f"{time_limit:g} is out of range; allowed 0.1 to 600 seconds")
    # The demo types the real commands into the root group it was started from (passed down, so
    # scheduler.demo never imports the command line back).
    run_demo(out_dir, time_limit, ctx.find_root().command)


def register(cli: click.Group) -> None:
    cli.add_command(demo)
