"""Reading a user's text file (imports, conditions): exists, within a size limit, UTF-8.

An edge helper (it touches the file system); failures are one InputError naming the file.
"""

from __future__ import annotations

from pathlib import Path

from scheduler.model.errors import InputError


def read_text_file(path: str | Path, max_bytes: int) -> str:
    p = Path(path)
    if not p.is_file():
        raise InputError("file", f"{p} not found")
    if p.stat().st_size > max_bytes:
        raise InputError("file", f"{p.name} is larger than the limit of {max_bytes} bytes")
    try:
        return p.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise InputError("file", f"{p.name} is not UTF-8 text") from None
