"""Text that users and feeds wrote (targets, PIs, reasons, sources, notes), made safe to show on a
terminal. Every table and every line that prints such text goes through here.

Two dangers. The table printer (rich) reads ``[...]`` as markup: a target named ``[/]`` would
make every listing fail. And a control character reaches the terminal as a command: ESC and
the C1 controls (U+009B is a one-byte ESC-[) change colours or the window title, a bidi
override (U+202E) shows text reversed, DEL and the rest corrupt the line. So user text goes
into tables as ``rich.text.Text`` (never parsed as markup), and every control or invisible
format character is shown as a visible escape (``\\x1b``, ``\\u202e``) rather than dropped:
an operator sees that something odd is stored, and the line stays one line.
"""

from __future__ import annotations

import unicodedata
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from rich.text import Text

# Unicode categories shown as escapes: controls (C0, DEL, C1), format characters (bidi
# embeddings, overrides and isolates, zero-width space, BOM, ...), lone surrogates (which
# cannot even be encoded for output), and the line and paragraph separators.
_ESCAPED_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Zl", "Zp"})
# Zero-width non-joiner and joiner are format characters that some scripts and emoji need.
_ALLOWED_FORMAT = frozenset({"\u200c", "\u200d"})


def _escape(ch: str) -> str:
    o = ord(ch)
    if o < 0x100:
        return f"\\x{o:02x}"
    if o < 0x10000:
        return f"\\u{o:04x}"
    return f"\\U{o:08x}"


def _unsafe(ch: str) -> bool:
    return unicodedata.category(ch) in _ESCAPED_CATEGORIES and ch not in _ALLOWED_FORMAT


def clean(value: Any) -> str:
    """``str(value)`` with every control and invisible format character shown as an escape."""
    s = "" if value is None else str(value)
    if s.isascii() and s.isprintable():  # the common case, and fast
        return s
    return "".join(_escape(ch) if _unsafe(ch) else ch for ch in s)


def cell(value: Any) -> Text:
    """User text for a rich table or console: escaped, and never read as markup."""
    from rich.text import Text

    return value if isinstance(value, Text) else Text(clean(value))


def _safe_table_class() -> type:
    from rich.table import Table
    from rich.text import Text

    class SafeTable(Table):
        """A rich Table whose string cells, title and caption are shown literally and escaped.

        Build it like ``rich.table.Table``; headers are the program's own words and stay as given.
        """

        def add_row(self, *renderables: Any, **kwargs: Any) -> None:
            super().add_row(*(cell(r) if isinstance(r, str) else r for r in renderables), **kwargs)

        def __setattr__(self, name: str, value: Any) -> None:
            if name in ("title", "caption") and isinstance(value, str):  # also when given to __init__
                value = Text(clean(value), style=f"table.{name}")  # rich's own style for a str title
            super().__setattr__(name, value)

    SafeTable.__module__, SafeTable.__qualname__ = __name__, "SafeTable"
    return SafeTable


def __getattr__(name: str) -> Any:
    """``SafeTable`` is made on first use: importing rich's table costs about 60 ms, which a
    command that prints no table (``--json``, ``status``) should not pay."""
    if name == "SafeTable":
        globals()["SafeTable"] = table = _safe_table_class()
        return table
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
