"""`python -m scheduler` is the `nightplan` command."""

from scheduler.cli import main

main()
