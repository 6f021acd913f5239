"""Reading a conditions file from disk (the CLI's `conditions load` and the service's feed)."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .ingest import MAX_BYTES, ParsedReport, parse_conditions


def read_conditions_file(path: str | Path, fmt: str | None = None) -> ParsedReport:
    """Size-checked, UTF-8, parsed and validated; at least one sample. InputError otherwise."""
    p = Path(path)
    if not p.is_file():
        raise InputError("file", f"{p} not found")
    if p.stat().st_size > MAX_BYTES:
        raise InputError("file", f"{p.name} is larger than the limit of {MAX_BYTES} bytes")
    try:
        text = p.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("file", f"{p.name} is not UTF-8 text") from None
    report = parse_conditions(text, fmt, source_name=p.name)
    if len(report) == 0:
        raise InputError("file", f"{p.name} holds no samples")
    return report
