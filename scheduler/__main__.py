"""`python -m scheduler` is the `nightplan` command."""

from scheduler.cli.main import main

main()
