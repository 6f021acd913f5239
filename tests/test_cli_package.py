"""The command line as a package: explicit registration, no way back into the root, and an
`init` that leaves nothing behind when it fails."""

from __future__ import annotations

import ast
import sqlite3
from pathlib import Path

from conftest import ROOT, run_cli

CLI_DIR = ROOT / "scheduler" / "cli"


def _imports(path: Path) -> set[str]:
    """Every module a file imports, at module level or inside functions."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
            names.update(f"{node.module}.{a.name}" for a in node.names)
    return names


def test_command_modules_never_import_the_root_and_nothing_is_loaded_by_name():
    modules = sorted(p for p in CLI_DIR.glob("*.py") if p.name not in ("__init__.py", "main.py"))
    assert {p.stem for p in modules} >= {"common", "database", "queue", "sky", "plan", "service", "demo"}
    for p in modules:
        imported = _imports(p)
        assert "scheduler.cli.main" not in imported, f"{p.name} imports the root (a cycle)"
        assert "importlib" not in imported, p.name
    assert "importlib" not in _imports(CLI_DIR / "main.py")


def test_only_the_command_line_imports_the_command_line():
    """The flow is one way: the CLI calls the core, the core (the demo driver included) never
    imports the CLI back."""
    for p in sorted((ROOT / "scheduler").rglob("*.py")):
        if CLI_DIR in p.parents or p.name == "__main__.py" and p.parent.name == "scheduler":
            continue
        hits = sorted(m for m in _imports(p) if m == "scheduler.cli" or m.startswith("scheduler.cli."))
        assert not hits, f"{p.relative_to(ROOT)} imports {hits}"


def test_every_command_module_is_registered():
    from scheduler.cli import main

    with_register = {p.stem for p in CLI_DIR.glob("*.py")
                     if "def register(cli" in p.read_text(encoding="utf-8")}
    registered = {m.__name__.rsplit(".", 1)[1] for m in main.COMMAND_MODULES}
    assert with_register == registered
    assert {"init", "program", "request", "db", "conditions", "almanac", "plan", "next", "record", "serve",
            "replan", "status", "demo"} <= set(main.cli.commands)


def test_failed_init_removes_what_it_created(tmp_path):
    """The config cannot be written (its folder is a file): the database and the folders made for
    it are removed again, one error line, exit 2."""
    (tmp_path / "afile").write_text("", encoding="utf-8")
    proc = run_cli("--db", "new/sub/nightplan.sqlite", "--config", "afile/observatory.toml", "init", cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nightplan: error: config: cannot write afile/observatory.toml")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["afile"]


def test_failed_upgrade_writes_no_config_and_keeps_the_database(tmp_path):
    """A database this nightplan cannot upgrade (an unknown schema revision): no starter config is
    left behind and the existing database keeps what it had."""
    db = tmp_path / "nightplan.sqlite"
    con = sqlite3.connect(db)
    con.execute("create table alembic_version (version_num varchar(32) primary key)")
    con.execute("insert into alembic_version values ('9999_unknown')")
    con.commit()
    con.close()
    proc = run_cli("init", cwd=tmp_path)
    assert proc.returncode != 0
    assert "9999_unknown" in proc.stderr
    assert not (tmp_path / "observatory.toml").exists()
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith("nightplan.sqlite-")) == \
        ["nightplan.sqlite"]
    con = sqlite3.connect(db)
    try:  # what was there is all there is (opening it switched the journal to WAL, nothing more)
        tables = [r[0] for r in con.execute("select name from sqlite_master where type = 'table'")]
        versions = [r[0] for r in con.execute("select version_num from alembic_version")]
    finally:
        con.close()
    assert tables == ["alembic_version"] and versions == ["9999_unknown"]


def test_init_in_an_empty_folder_then_again(tmp_path):
    first = run_cli("init", cwd=tmp_path, check=True).stdout
    assert "(starter file for an invented site; edit it)" in first and "(created, schema " in first
    again = run_cli("init", cwd=tmp_path, check=True).stdout
    assert "observatory.toml (kept)" in again and "(up to date, schema " in again


# Libraries a command that only reads or writes the queue has no use for; each costs 0.05-1 s
# to import (numpy 0.1 s, rich's tables 0.06 s, astropy and OR-Tools far more).
_HEAVY = ("numpy", "rich", "astropy", "ortools", "pandas", "matplotlib", "scheduler.sky.bodies")


def _loaded(proc) -> set[str]:
    """Modules a command imported, from Python's own import log (PYTHONPROFILEIMPORTTIME)."""
    assert proc.returncode == 0, proc.stderr
    return {line.rsplit("|", 1)[1].strip() for line in proc.stderr.splitlines() if line.startswith("import time:")}


def test_queue_commands_load_only_what_they_use(workdir):
    """`request list --json` and `status` answer without numpy, rich, astropy or OR-Tools, and on
    a SQLite file without SQLAlchemy (db/sqlite_direct.py): a fixed target needs no moving-target
    code, and rich loads only when a table is drawn."""
    run_cli("request", "add", "--program", "STAR-1", "--target", "Invented field 3", "--ra", "05:35:17.3",
            "--dec", "-05:23:28", "--band", "K", "--exposure", "600", cwd=workdir, check=True)
    log = {"PYTHONPROFILEIMPORTTIME": "1"}
    for args in (("request", "list", "--json"), ("status",), ("--help",)):
        loaded = _loaded(run_cli(*args, cwd=workdir, env=log))
        assert "click" in loaded  # the log is read, not empty
        heavy = sorted(m for m in loaded if m.split(".")[0] in (*_HEAVY, "sqlalchemy") or m in _HEAVY)
        assert not heavy, f"{' '.join(args)} imported {heavy[:5]}"
    # a table on the terminal does load rich, and only then
    assert "rich.table" in _loaded(run_cli("request", "list", cwd=workdir, env=log))
