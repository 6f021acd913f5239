"""Security basics, checked on the product's source: no shell, no SQL built from strings.

(The SQLite file's owner-only mode is tested in test_db.py; the service's lack of sockets in
test_service.py.)
"""

from __future__ import annotations

import re
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "scheduler"
BENCH = SRC / "bench.py"


def _sources():
    for p in sorted(SRC.rglob("*.py")):
        yield p, p.read_text(encoding="utf-8")


def test_no_shell_is_invoked():
    bad = re.compile(r"shell\s*=\s*True|os\.system\(|os\.popen\(|subprocess\.(call|run|Popen|check_output)\(")
    hits = [f"{p.name}:{i + 1}" for p, src in _sources() for i, line in enumerate(src.splitlines()) if bad.search(line)
            and p != BENCH]
    assert hits == []
    # The one exception: the benchmark times the commands as users run them, each a new process of
    # this environment's own `nightplan`, started from an argument list (no shell).
    calls = re.findall(r"subprocess\.(\w+)\(([^,]*)", BENCH.read_text(encoding="utf-8"))
    assert calls and all(fn == "run" and arg.startswith("base + ") for fn, arg in calls), calls
    assert not re.search(r"shell\s*=|os\.system|os\.popen", BENCH.read_text(encoding="utf-8"))


def test_no_sql_is_built_from_strings():
    # Raw SQL through sqlalchemy.text() or a DB-API cursor must be a constant: no f-string, no
    # %-formatting, no concatenation. Queries are built with the SQLAlchemy expression language.
    raw = re.compile(r"""(text|execute|exec_driver_sql)\(\s*(f["']|["'][^"']*["']\s*(%|\+|\.format))""")
    hits = [f"{p.name}:{i + 1}" for p, src in _sources() for i, line in enumerate(src.splitlines()) if raw.search(line)]
    assert hits == []
    # and the only raw statements are the SQLite connection pragmas, but for db/sqlite_direct.py
    stmts = [m.group(0) for _, src in _sources() for m in re.finditer(r"execute\(\"[^\"]*\"\)", src)]
    assert stmts and all(s.startswith('execute("PRAGMA ') for s in stmts)


def test_the_direct_sqlite_statements_are_constants_with_bound_parameters():
    """db/sqlite_direct.py (the quick commands without SQLAlchemy) runs only the statements of
    its SQL table: literal text, values bound as parameters, never formatted in."""
    from scheduler.db.sqlite_direct import SQL

    src = (SRC / "db" / "sqlite_direct.py").read_text(encoding="utf-8")
    calls = re.findall(r"\.execute\(([^,)]*)", src)
    assert len(calls) >= 10 and all(re.fullmatch(r'SQL\[("[a-z_]+"|query)\]', c) for c in calls), calls
    assert all(isinstance(q, str) and not re.search(r"[{}%]", q) for q in SQL.values())
    code = src[src.index("class DirectDb"):]
    assert all(f'"{key}"' in code for key in SQL)  # every statement is used
