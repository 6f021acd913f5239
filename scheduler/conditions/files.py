"""Reading a conditions file from disk (the CLI's `conditions load` and the service's feed)."""

from __future__ import annotations

from pathlib import Path

from scheduler.model.errors import InputError
from scheduler.textfile import read_text_file
from scheduler.conditions.ingest import MAX_BYTES, ParsedReport, parse_conditions


def read_conditions_file(path: str | Path, fmt: str | None = None) -> ParsedReport:
    """Size-checked, UTF-8, parsed and validated; at least one sample. InputError otherwise."""
    p = Path(path)
    text = read_text_file(p, MAX_BYTES)
    report = parse_conditions(text, fmt, source_name=p.name)
    if len(report) == 0:
        raise InputError("file", f"{p.name} holds no samples")
    return report
