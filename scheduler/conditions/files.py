"""Reading a conditions file from disk (the CLI's `conditions load` and the service's feed).

The feed takes a file only when it is complete. Producers write under another name (a
``.part`` suffix or a leading dot, which the feed ignores) and rename when done; and because
not every producer does, a file is also taken only once its size and modification time have
stayed the same for ``service.feed_settle_s`` seconds. A file that changes while it is read is
put back for a later poll, neither stored nor rejected.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

from scheduler.conditions.ingest import MAX_BYTES, ParsedReport, parse_conditions
from scheduler.model.errors import InputError
from scheduler.textfile import file_state, read_text_file, read_text_file_sized

FEED_SUFFIXES = (".csv", ".json")


def read_conditions_file(path: str | Path, fmt: str | None = None) -> ParsedReport:
    """Size-checked, UTF-8, parsed and validated; at least one sample. InputError otherwise."""
    p = Path(path)
    text = read_text_file(p, MAX_BYTES)
    report = parse_conditions(text, fmt, source_name=p.name)
    if len(report) == 0:
        raise InputError("file", f"{p.name} holds no samples")
    return report


def is_feed_candidate(name: str) -> bool:
    """A name the feed reads: ``*.csv`` or ``*.json``, not hidden. ``report.csv.part`` and
    ``.report.csv`` are files still being written under the rename protocol."""
    return not name.startswith(".") and Path(name).suffix.lower() in FEED_SUFFIXES


class FileChanged(Exception):
    """The file changed while it was read: not complete yet."""


@dataclass(frozen=True)
class TakenFile:
    report: ParsedReport
    size: int  # bytes read
    sha256: str  # of the text as read, for the log: which version of the file was stored


def take_feed_file(path: Path, state: tuple[int, int]) -> TakenFile:
    """Read and parse a settled feed file whose (size, mtime_ns) was ``state`` when judged settled.

    FileChanged if it is no longer that file (still being written, replaced); InputError if
    it is complete but bad.
    """
    text, size = read_text_file_sized(path, MAX_BYTES)
    if file_state(path) != state or size != state[0]:
        raise FileChanged(path.name)
    report = parse_conditions(text, None, source_name=path.name)
    digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()
    return TakenFile(report, size, digest)


class SettleWatch:
    """Which feed files have stopped changing.

    A file is settled when its size and modification time have stayed the same for
    ``settle_s`` seconds: by its modification time (so `serve --once` from cron, which looks
    once, can take a file written a while ago), or by the service's own clock since it first
    saw that state (should the file's time stamp come from a skewed clock). Any change of
    size or time stamp starts the wait again.
    """

    def __init__(self, settle_s: float):
        self.settle_s = float(settle_s)
        self._seen: dict[str, tuple[tuple[int, int], float]] = {}

    def settled(self, name: str, state: tuple[int, int], now_mono: float, now_wall: float) -> bool:
        prev = self._seen.get(name)
        if prev is None or prev[0] != state:
            prev = (state, now_mono)
            self._seen[name] = prev
        mtime_age = now_wall - state[1] / 1e9
        return max(now_mono - prev[1], mtime_age) >= self.settle_s

    def forget(self, name: str) -> None:
        self._seen.pop(name, None)

    def keep_only(self, names: set[str]) -> None:
        """Drop what is no longer in the folder (moved away, renamed)."""
        for n in [n for n in self._seen if n not in names]:
            del self._seen[n]
