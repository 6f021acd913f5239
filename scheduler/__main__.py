"""`python -m scheduler` is the `nightplan` command."""

from scheduler.cli.main import main

if __name__ == "__main__":
    main()
