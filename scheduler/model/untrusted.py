"""Checks for what arrives from people and feeds: text, numbers, JSON documents and CSV tables.

Pure. Every refusal is one ``InputError`` naming the field (and the row, where there is one)
with what is allowed, so nothing malformed reaches the database or a terminal. Values shown
back in a message go through ``shown``, which escapes what a terminal would act on.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
import sys
import unicodedata
from typing import Any, Iterator

from scheduler.model.errors import InputError

MAX_CELL = 131_072  # characters in one CSV cell (the csv module's own limit, kept as ours)
MAX_NUMBER_CHARS = 64  # a number typed as text; longer is refused before conversion
MAX_JSON_INT_DIGITS = 4000  # longer JSON integers make the whole document unusable

# Characters that reorder text on screen (bidirectional embeddings, overrides, isolates and marks):
# a name holding one can display as something else.
BIDI_CONTROLS = frozenset("\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069")

# A plain decimal number, ASCII digits only: no '1_0', no other scripts' digits, no 'nan'/'inf'.
_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


# --------------------------------------------------------------------------- showing values

def type_name(value: Any) -> str:
    """What a value is, in the words of the JSON a user wrote."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "text"
    if isinstance(value, dict):
        return "a JSON object"
    if isinstance(value, (list, tuple)):
        return "a JSON array"
    return type(value).__name__


def shown(value: Any, limit: int = 60) -> str:
    """A value for an error message: quoted, with every non-printable character escaped
    (control characters, C1, bidi controls, zero-width characters, lone surrogates), cut short."""
    if isinstance(value, bool) or value is None:
        return type_name(value)
    if isinstance(value, int):
        if value.bit_length() > 100:  # repr of a huge int is refused by Python itself
            return f"an integer of about {int(value.bit_length() * math.log10(2)) + 1} digits"
        return str(value)
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, (dict, list, tuple)):
        return type_name(value)
    s = value if isinstance(value, str) else str(value)
    if len(s) > limit:
        return repr(s[:limit]) + f"... ({len(s)} characters)"
    return repr(s)


def safe_name(name: Any, limit: int = 40) -> str:
    """A key or column name as a field label: itself when plain, else escaped like ``shown``."""
    s = name if isinstance(name, str) else str(name)
    if s and len(s) <= limit and s.isprintable() and not any(c in BIDI_CONTROLS for c in s):
        return s
    return shown(s, limit)


# --------------------------------------------------------------------------- text

def text_problem(s: str) -> str | None:
    """Why a piece of text may not be stored or shown as a name, or None when it is fine."""
    visible = False
    for ch in s:
        cat = unicodedata.category(ch)
        if cat == "Cs":
            return "holds a lone surrogate (invalid UTF-8 or an unpaired \\ud800-\\udfff escape)"
        if cat == "Cc":
            return f"holds the control character U+{ord(ch):04X}"
        if ch in BIDI_CONTROLS:
            return f"holds the bidirectional control U+{ord(ch):04X}"
        if cat in ("Zl", "Zp"):
            return f"holds the line separator U+{ord(ch):04X}"
        if cat[0] in "LNPS":
            visible = True
    if not visible:
        return "has no visible character"
    return None


def check_text(value: Any, field: str, *, max_len: int = 200, required: bool = True,
               row: int | None = None, source: str | None = None) -> str | None:
    """A name or label: text (not a JSON number, object or array), 1..max_len characters after
    trimming, no control characters (C0, DEL, C1), no bidi controls, not only invisible ones."""
    if value is None or (isinstance(value, str) and not value.strip()):
        if required:
            raise InputError(field, "is required", row=row, source=source)
        return None
    allowed = f"allowed: text of 1 to {max_len} printable characters"
    if not isinstance(value, str):
        raise InputError(field, f"must be text, not {type_name(value)}; {allowed}", row=row, source=source)
    s = value.strip()
    if len(s) > max_len:
        raise InputError(field, f"has {len(s)} characters; {allowed}", row=row, source=source)
    why = text_problem(s)
    if why:
        raise InputError(field, f"{shown(s)} {why}; {allowed}", row=row, source=source)
    return s


# --------------------------------------------------------------------------- numbers

def parse_number(value: Any, field: str, allowed: str, *, row: int | None = None,
                 source: str | None = None) -> float | None:
    """A number from text or JSON: None when empty. ``allowed`` is the range, for messages.

    Text must be a plain decimal number in ASCII digits ('1_0', other scripts' digits, 'nan',
    hex are refused). A subnormal value (below 2.2e-308 in size, not zero) is refused: no
    quantity here is that small, and it is a sign of a unit or typing mistake.
    """
    if value is None or (isinstance(value, str) and not value.strip()):
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise InputError(field, f"must be a number, not {type_name(value)}; allowed {allowed}", row=row, source=source)
    if isinstance(value, str):
        s = value.strip()
        if len(s) > MAX_NUMBER_CHARS or not _NUMBER.fullmatch(s):
            raise InputError(field, f"{shown(value)} is not a number; allowed {allowed}", row=row, source=source)
        x = float(s)
    else:
        try:
            x = float(value)
        except OverflowError:
            raise InputError(field, f"{shown(value)} is out of range; allowed {allowed}", row=row, source=source) from None
    if not math.isfinite(x):
        raise InputError(field, f"{shown(value)} is out of range; allowed {allowed}", row=row, source=source)
    if x != 0.0 and abs(x) < sys.float_info.min:
        raise InputError(field, f"{shown(value)} is too close to zero; allowed {allowed}", row=row, source=source)
    return x


# --------------------------------------------------------------------------- JSON

class JsonObject(dict):
    """A JSON object as read; ``duplicates`` lists keys that appeared more than once."""

    duplicates: tuple[str, ...] = ()


def _object(pairs: list[tuple[str, Any]]) -> JsonObject:
    obj = JsonObject()
    dup: list[str] = []
    for k, v in pairs:
        if k in obj and k not in dup:
            dup.append(k)
        obj[k] = v
    if dup:
        obj.duplicates = tuple(dup)
    return obj


def _json_int(digits: str) -> int:
    # Python refuses int() of more than 4300 digits with a message about its own settings;
    # say instead what is wrong with the file. Shorter huge integers are refused by the field.
    if len(digits) > MAX_JSON_INT_DIGITS:
        raise ValueError(f"it holds an integer of {len(digits)} digits; every number here is far smaller")
    return int(digits)


def load_json(text: str, *, field: str = "file", source: str | None = None) -> Any:
    """json.loads with one-line refusals: bad syntax, nesting deeper than Python can follow,
    numbers too long to convert. Objects come back as ``JsonObject`` (duplicate keys noted)."""
    try:
        return json.loads(text, object_pairs_hook=_object, parse_int=_json_int)
    except json.JSONDecodeError as e:
        raise InputError(field, f"not valid JSON: {e.msg} at line {e.lineno} column {e.colno}", source=source) from None
    except RecursionError:
        raise InputError(field, "not usable JSON: nested too deeply (expected a list of flat objects)",
                         source=source) from None
    except (ValueError, OverflowError) as e:
        raise InputError(field, f"not usable JSON: {str(e).splitlines()[0][:120]}", source=source) from None


def check_duplicates(obj: Any, *, row: int | None = None, source: str | None = None) -> None:
    """Refuse a JSON object that gave one key twice (JSON keeps the last silently)."""
    dup = getattr(obj, "duplicates", ())
    if dup:
        raise InputError(safe_name(dup[0]), "appears twice in one object; give each key once", row=row, source=source)


# --------------------------------------------------------------------------- CSV

def _column_at(line: str, names: list[str]) -> str:
    """The column whose cell is too long in a raw CSV line (a guess that ignores quoting)."""
    for i, cell in enumerate(line.split(",")):
        if len(cell) > MAX_CELL:
            return names[i] if i < len(names) else "cell"
    return "cell"


def csv_table(text: str, *, source: str | None = None) -> tuple[list[str], Iterator[tuple[int, list[str]]]]:
    """The header (names trimmed) and an iterator of (line number, cells) of a CSV text.

    Refused, naming the column: an empty header, a column name given twice, a name with
    control characters. Refused, naming the row: a cell over MAX_CELL characters, broken quoting.
    Line numbers are those a user sees in the file (the header is line 1).
    """
    text = text.lstrip("\ufeff")
    reader = csv.reader(io.StringIO(text, newline=""))
    lines: list[str] | None = None

    def too_long(row: int, names: list[str]) -> InputError:
        nonlocal lines
        if lines is None:
            lines = text.split("\n")
        raw = lines[row - 1] if 0 < row <= len(lines) else ""
        return InputError(_column_at(raw, names), f"a cell is longer than the limit of {MAX_CELL} characters",
                          row=row, source=source)

    try:
        header = next(reader)
    except StopIteration:
        raise InputError("header", "the file is empty; expected a CSV header row", row=1, source=source) from None
    except csv.Error as e:
        if "field limit" in str(e):
            raise too_long(1, []) from None
        raise InputError("header", f"not valid CSV: {e}", row=1, source=source) from None
    names = [h.strip() for h in header]
    if not any(names):
        raise InputError("header", "the first line must name the columns", row=1, source=source)
    seen: set[str] = set()
    for i, name in enumerate(names):
        if not name:
            raise InputError("header", f"column {i + 1} has no name", row=1, source=source)
        if text_problem(name):
            raise InputError(safe_name(name), f"column name {text_problem(name)}", row=1, source=source)
        if name in seen:
            raise InputError(name, "column appears twice in the header; give each column once", row=1, source=source)
        seen.add(name)

    def rows() -> Iterator[tuple[int, list[str]]]:
        try:
            for cells in reader:
                yield reader.line_num, cells
        except csv.Error as e:
            line = reader.line_num  # the line the reader stopped on
            if "field limit" in str(e):
                raise too_long(line, names) from None
            raise InputError("row", f"not valid CSV: {e}", row=line, source=source) from None

    return names, rows()
