"""The one error type users see: a bad value, named by its field, with what is allowed."""

from __future__ import annotations


class InputError(ValueError):
    """Bad user input. The CLI prints ``str(err)`` as one line and exits with status 2."""

    def __init__(self, field: str, message: str, *, row: int | None = None, source: str | None = None):
        self.field = field
        self.message = message
        self.row = row
        self.source = source
        where = ""
        if source:
            where += f"{source}: "
        if row is not None:
            where += f"row {row}: "
        super().__init__(f"{where}{field}: {message}")


class NotFoundError(LookupError):
    """A named thing (program, request, plan version) does not exist."""


class ConfigError(InputError):
    """observatory.toml is missing a key or holds a value out of range."""
