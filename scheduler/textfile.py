"""Reading a user's text file (imports, conditions): exists, within a size limit, UTF-8.

An edge helper (it touches the file system); failures are one InputError naming the file.
"""

from __future__ import annotations

import os
from pathlib import Path

from scheduler.model.errors import InputError
from scheduler.model.untrusted import safe_name


def read_text_file(path: str | Path, max_bytes: int) -> str:
    text, _size = read_text_file_sized(path, max_bytes)
    return text


def read_text_file_sized(path: str | Path, max_bytes: int) -> tuple[str, int]:
    """The text of a file and the number of bytes read.

    At most ``max_bytes`` + 1 bytes are read, whatever the size said a moment before: a file
    that grows while it is read is refused rather than read without end.
    """
    p = Path(path)
    name = safe_name(p.name, 200)
    if not p.exists():
        raise InputError("file", f"{safe_name(str(p), 200)} not found")
    if not p.is_file():
        raise InputError("file", f"{name} is not a regular file")
    try:
        with open(p, "rb") as f:
            data = f.read(max_bytes + 1)
    except OSError as e:
        raise InputError("file", f"{name}: cannot read ({e.strerror or type(e).__name__})") from None
    if len(data) > max_bytes:
        raise InputError("file", f"{name} is larger than the limit of {max_bytes} bytes")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise InputError("file", f"{name} is not UTF-8 text (byte {e.start + 1} is not valid UTF-8)") from None
    # universal newlines, as text-mode reading gives: the CSV readers downstream expect them
    return text.replace("\r\n", "\n").replace("\r", "\n"), len(data)


def file_state(path: str | Path) -> tuple[int, int] | None:
    """(size, modification time in ns) of a file, or None if it is gone. What a reader compares
    before and after to know the file did not change under it."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns
