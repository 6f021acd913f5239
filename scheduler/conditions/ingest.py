"""Conditions reports (forecast or measured samples) from CSV or JSON text, validated.

Pure: takes the text, returns samples; reading files and storing reports is the caller's job.

CSV: a header line, then one sample per line. Columns (any order; only ``time`` is required):

    time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome,coherence_time_ms

``coherence_time_ms`` (optional) is the atmospheric coherence time tau0 at 500 nm, zenith
(trade convention, as turbulence monitors report it); adaptive optics uses it for its
temporal error term.

JSON: either a list of sample objects with those keys, or an object
``{"issued": ISO-8601, "source": text, "samples": [...]}``.

``time`` is ISO-8601 with its zone: ``Z`` for UTC or an offset, which is converted to UTC. A
time without a zone is refused (a local time read as UTC would shift the report by hours).
Every other field may be empty (CSV) or null/absent (JSON): that quantity is simply not part
of that sample. ``dome`` is ``open`` or ``closed``. Samples must be in strictly increasing time.

Errors are ``InputError`` naming the row and the field. Row numbers: for CSV the line number
in the file (the header is line 1, as a spreadsheet shows it); for JSON the 1-based position in
the samples list.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Iterator, Sequence

from scheduler.model.errors import InputError
from scheduler.model.timegrid import iso, parse_time
from scheduler.model.untrusted import (
    check_duplicates, check_text, csv_table, load_json, parse_number, safe_name, shown, type_name,
)

COLUMNS = ("time", "seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome", "coherence_time_ms")
REPORT_KEYS = ("issued", "source", "samples")

MAX_BYTES = 5_000_000
MAX_ROWS = 100_000

# Allowed ranges: (low, high, low is exclusive). Upper limits are sanity bounds that no real
# site reports (common practice); they catch unit mistakes (e.g. PWV in micrometres, wind in km/h
# beyond any plausible value) rather than judge the weather.
LIMITS: dict[str, tuple[float, float, bool, str]] = {
    "seeing_arcsec": (0.0, 20.0, True, "arcsec"),
    "pwv_mm": (0.0, 100.0, False, "mm"),
    "cloud_mag": (0.0, 20.0, False, "mag"),
    "wind_ms": (0.0, 150.0, False, "m/s"),  # above any recorded surface gust (~113 m/s, from memory)
    "humidity_pct": (0.0, 100.0, False, "%"),
    "coherence_time_ms": (0.0, 1000.0, True, "ms"),  # tau0 at 500 nm is a few ms at good sites (from memory)
}
DOME_VALUES = {"open": True, "closed": False}


@dataclass(frozen=True)
class Sample:
    """One time's conditions. None: the report says nothing about that quantity at that time."""

    time: datetime  # aware, UTC
    seeing_arcsec: float | None = None  # site seeing at 500 nm, zenith
    pwv_mm: float | None = None
    cloud_mag: float | None = None  # extinction by cloud
    wind_ms: float | None = None
    humidity_pct: float | None = None
    dome_open: bool | None = None
    coherence_time_ms: float | None = None  # tau0 at 500 nm, zenith


@dataclass(frozen=True)
class ParsedReport:
    """A parsed conditions report. Iterating over it (or len/index) gives its samples."""

    samples: tuple[Sample, ...]
    issued: datetime | None = None  # when the forecast was issued, if the report says
    source: str | None = None  # who issued it (report's own "source", else the caller's name)
    format: str = "csv"

    def __iter__(self) -> Iterator[Sample]:
        return iter(self.samples)

    def __len__(self) -> int:
        return len(self.samples)

    def __getitem__(self, i: int) -> Sample:
        return self.samples[i]


def parse_conditions(text: str, fmt: str | None = None, source_name: str = "conditions") -> ParsedReport:
    """Parse a conditions report. ``fmt``: 'csv', 'json', or None to tell from the content.

    ``source_name`` (typically the file name) prefixes every error message.
    """
    source_name = safe_name(source_name, 200)  # a file name can hold anything but a slash
    if fmt is not None and fmt not in ("csv", "json"):
        raise InputError("format", f"{shown(fmt)} not allowed; choose csv or json", source=source_name)
    if not isinstance(text, str):
        raise InputError("file", "must be text (UTF-8)", source=source_name)
    if len(text) > MAX_BYTES or len(text.encode("utf-8", "surrogatepass")) > MAX_BYTES:
        raise InputError("file", f"is larger than the limit of {MAX_BYTES} bytes", source=source_name)
    text = text.lstrip("\ufeff")
    if not text.strip():
        raise InputError("file", "is empty; expected a CSV header and samples, or JSON", source=source_name)
    if fmt is None:
        fmt = "json" if text.lstrip()[:1] in ("[", "{") else "csv"
    if fmt == "json":
        return _parse_json(text, source_name)
    return _parse_csv(text, source_name)


# --------------------------------------------------------------------------- CSV

def _parse_csv(text: str, src: str) -> ParsedReport:
    names, cells_of = csv_table(text, source=src)  # refuses a column twice, an oversized cell
    for name in names:
        if name not in COLUMNS:
            raise InputError(safe_name(name), f"unknown column; allowed: {','.join(COLUMNS)}", row=1, source=src)
    if "time" not in names:
        raise InputError("time", f"column is required; allowed columns: {','.join(COLUMNS)}", row=1, source=src)

    samples: list[Sample] = []
    prev: tuple[datetime, int] | None = None
    for line, cells in cells_of:
        if not cells or all(not c.strip() for c in cells):
            continue  # blank line
        if len(cells) != len(names):
            field = names[len(cells)] if len(cells) < len(names) else "columns"
            raise InputError(field, f"has {len(cells)} values; the header has {len(names)} columns",
                             row=line, source=src)
        if len(samples) >= MAX_ROWS:
            raise InputError("file", f"has more than the limit of {MAX_ROWS} samples", row=line, source=src)
        s = _sample(dict(zip(names, cells)), line, src)
        prev = _check_order(s, prev, line, src)
        samples.append(s)
    if not samples:
        raise InputError("file", "holds a header but no samples", source=src)
    return ParsedReport(tuple(samples), None, src, "csv")


# --------------------------------------------------------------------------- JSON

def _parse_json(text: str, src: str) -> ParsedReport:
    doc = load_json(text, source=src)  # refuses bad syntax, nesting too deep, unreadable numbers
    issued = None
    source = src
    if isinstance(doc, dict):
        check_duplicates(doc, source=src)
        for k in doc:
            if k not in REPORT_KEYS:
                raise InputError(safe_name(k), f"unknown key; allowed: {', '.join(REPORT_KEYS)}", source=src)
        if doc.get("issued") not in (None, ""):
            try:
                issued = parse_time(doc["issued"], "issued", require_zone=True)
            except InputError as e:
                raise InputError("issued", e.message, source=src) from None
        if doc.get("source") not in (None, ""):
            source = check_text(doc["source"], "source", max_len=200, source=src)
        if "samples" not in doc:
            raise InputError("samples", "is required: a list of sample objects", source=src)
        rows = doc["samples"]
    elif isinstance(doc, list):
        rows = doc
    else:
        raise InputError("file", f"JSON must be a list of samples or an object with a samples list, "
                                 f"not {type_name(doc)}", source=src)
    if not isinstance(rows, list):
        raise InputError("samples", f"must be a list of sample objects, not {type_name(rows)}", source=src)
    if not rows:
        raise InputError("samples", "the report holds no samples", source=src)
    if len(rows) > MAX_ROWS:
        raise InputError("samples", f"{len(rows)} samples exceed the limit of {MAX_ROWS}", source=src)

    samples: list[Sample] = []
    prev: tuple[datetime, int] | None = None
    for i, raw in enumerate(rows, start=1):
        if not isinstance(raw, dict):
            raise InputError("sample", f"must be an object with keys {', '.join(COLUMNS)}, not {type_name(raw)}",
                             row=i, source=src)
        check_duplicates(raw, row=i, source=src)
        for k in raw:
            if k not in COLUMNS:
                raise InputError(safe_name(k), f"unknown key; allowed: {', '.join(COLUMNS)}", row=i, source=src)
        s = _sample(raw, i, src)
        prev = _check_order(s, prev, i, src)
        samples.append(s)
    return ParsedReport(tuple(samples), issued, source, "json")


# --------------------------------------------------------------------------- one sample

def _blank(v: Any) -> bool:
    return v is None or (isinstance(v, str) and not v.strip())


def _number(raw: dict[str, Any], name: str, row: int, src: str) -> float | None:
    v = raw.get(name)
    lo, hi, lo_open, unit = LIMITS[name]
    rng = f"greater than {lo:g} and at most {hi:g} {unit}" if lo_open else f"from {lo:g} to {hi:g} {unit}"
    x = parse_number(v, name, rng, row=row, source=src)  # ASCII decimal text or a JSON number
    if x is None:
        return None
    if x < lo or x > hi or (lo_open and x == lo):
        raise InputError(name, f"{shown(v)} is out of range; allowed {rng}", row=row, source=src)
    return x


def _sample(raw: dict[str, Any], row: int, src: str) -> Sample:
    if _blank(raw.get("time")):
        raise InputError("time", "is required (ISO-8601 with a zone, e.g. 2026-12-05T03:30:00Z)", row=row, source=src)
    try:
        t = parse_time(raw["time"], "time", require_zone=True)
    except InputError as e:
        raise InputError("time", e.message, row=row, source=src) from None
    dome = raw.get("dome")
    dome_open: bool | None = None
    if not _blank(dome):
        key = dome.strip().lower() if isinstance(dome, str) else None
        if key not in DOME_VALUES:
            what = shown(dome) if isinstance(dome, str) else type_name(dome)
            raise InputError("dome", f"{what} not allowed; use open or closed (or leave empty)", row=row, source=src)
        dome_open = DOME_VALUES[key]
    return Sample(
        time=t,
        seeing_arcsec=_number(raw, "seeing_arcsec", row, src),
        pwv_mm=_number(raw, "pwv_mm", row, src),
        cloud_mag=_number(raw, "cloud_mag", row, src),
        wind_ms=_number(raw, "wind_ms", row, src),
        humidity_pct=_number(raw, "humidity_pct", row, src),
        dome_open=dome_open,
        coherence_time_ms=_number(raw, "coherence_time_ms", row, src),
    )


def _check_order(s: Sample, prev: tuple[datetime, int] | None, row: int, src: str) -> tuple[datetime, int]:
    if prev is not None and s.time <= prev[0]:
        what = "repeats" if s.time == prev[0] else "is earlier than"
        raise InputError(
            "time",
            f"{iso(s.time)} {what} the previous sample's time {iso(prev[0])} (row {prev[1]}); "
            "samples must be in strictly increasing time order",
            row=row, source=src,
        )
    return s.time, row


def samples_to_csv(samples: Sequence[Sample]) -> str:
    """The CSV form of samples (inverse of parse_conditions for CSV), e.g. for export."""
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(COLUMNS)
    for s in samples:
        dome = "" if s.dome_open is None else ("open" if s.dome_open else "closed")
        vals = [s.seeing_arcsec, s.pwv_mm, s.cloud_mag, s.wind_ms, s.humidity_pct]
        tau = "" if s.coherence_time_ms is None else f"{s.coherence_time_ms:.10g}"
        w.writerow([iso(s.time)] + ["" if v is None else f"{v:.10g}" for v in vals] + [dome, tau])
    return out.getvalue()
