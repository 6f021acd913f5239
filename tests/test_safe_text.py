"""User text never breaks a listing and never reaches the terminal as a control sequence.

A name holding ``[/]`` used to be read as table markup (every listing exited 1 for everyone); ESC,
C1 controls, bidi overrides and DEL in stored text were printed raw. Checked on the helper and
through the real CLI on a real SQLite file.
"""

from __future__ import annotations

import io
import re

import pytest
from rich.console import Console

from conftest import cli_json, run_cli
from scheduler.report.safe_text import SafeTable, clean

# What a terminal would act on or hide: C0 (but newline, which our own lines use), DEL, C1,
# bidi embeddings/overrides/isolates, zero-width space and BOM, line/paragraph separators.
RAW = re.compile("[\x00-\x09\x0b-\x1f\x7f\x80-\x9f\u200b\u200e\u200f\u202a-\u202e\u2066-\u2069\ufeff\u2028\u2029]")

NASTY = "a\x1b]0;owned\x07b\x9b31mc\u202ed\x7fe"  # window title, C1 CSI, right-to-left override, DEL


def test_clean_escapes_controls_and_keeps_ordinary_text():
    assert clean(NASTY) == "a\\x1b]0;owned\\x07b\\x9b31mc\\u202ed\\x7fe"
    assert clean("tab\there\nnew") == "tab\\x09here\\x0anew"
    assert clean("\ud800") == "\\ud800"  # a lone surrogate cannot be written to a terminal at all
    assert clean("\U000e0041") == "\\U000e0041"  # a tag character: invisible
    for fine in ("NGC 1976", "[/] [bold]x[/bold]", "Ōkafor–Dürr", "東京", "a\u00a0b", "👩\u200d🔬", ""):
        assert clean(fine) == fine
    assert clean(None) == "" and clean(3.5) == "3.5"


def render(table) -> str:
    buf = io.StringIO()
    Console(file=buf, width=120, force_terminal=False).print(table)
    return buf.getvalue()


def test_safe_table_shows_markup_literally_and_escapes_controls():
    t = SafeTable("target", "PI", title="report from [/]")
    t.add_row("[/]", "[bold red]x[/bold red]")
    t.add_row(NASTY, "fine")
    t.caption = "caption [/] \x1b[2J"
    out = render(t)
    for literal in ("report from [/]", "[/]", "[bold red]x[/bold red]", "caption [/] \\x1b[2J",
                    "\\x1b]0;owned\\x07b\\x9b31mc\\u202ed\\x7fe"):
        assert literal in out
    assert not RAW.search(out)


def _no_raw(proc) -> None:
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    assert not RAW.search(proc.stdout) and not RAW.search(proc.stderr)


@pytest.mark.slow
def test_markup_in_a_name_breaks_no_listing(workdir):
    """The reproduction: a target named [/], then `request list` (it used to exit 1)."""
    run_cli("program", "add", "P1", "--pi", "[/] Dr. [bold]Brace", cwd=workdir, check=True)
    rid = run_cli("request", "add", "--program", "P1", "--target", "[/]", "--ra", "10", "--dec", "-20",
                  "--band", "V", "--exposure", "100", cwd=workdir, check=True).stdout.strip()
    proc = run_cli("request", "list", cwd=workdir)
    _no_raw(proc)
    assert re.search(rf"│ +{rid} +│ P1 +│ \[/\] +│", proc.stdout)
    proc = run_cli("program", "list", cwd=workdir)
    _no_raw(proc)
    assert "[/] Dr. [bold]Brace" in proc.stdout
    proc = run_cli("request", "show", rid, cwd=workdir)
    _no_raw(proc)
    assert "target: [/]" in proc.stdout
    assert cli_json("request", "show", rid, cwd=workdir)["target"] == "[/]"  # stored as given


def _stored_as_is(workdir, target: str, ra: float = 10.0) -> str:
    """A request whose target holds what input checks now refuse (C1, bidi, DEL), written straight
    to the SQLite file as a database filled before those checks could hold it; returns its id."""
    from scheduler.db import store
    from scheduler.db.session import open_db
    from scheduler.model.config import load_config
    from scheduler.model.request import validate_request

    spec = validate_request({"program": "STAR-1", "target": "placeholder", "ra": ra, "dec": -20, "band": "V",
                             "exposure_s": 600}, load_config(workdir / "observatory.toml"), {"STAR-1"})
    db = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    try:
        return str(db.retrying(lambda s: store.add_requests(s, [spec.with_(target=target)]))[0])
    finally:
        db.dispose()


def _stored_as_is_sql(workdir, what: str, text: str) -> None:
    """A conditions report with ``text`` as its source, or the plan's reason set to ``text``,
    written straight to the SQLite file (what input checks refuse now, stored earlier)."""
    import sqlite3

    con = sqlite3.connect(workdir / "nightplan.sqlite")
    try:
        if what == "conditions":
            con.execute("INSERT INTO conditions_report (issued_at, received_at, source, n_samples) "
                        "VALUES ('2026-12-16 12:00:00', '2026-12-16 12:00:00', ?, 2)", (text,))
            rid = con.execute("SELECT max(id) FROM conditions_report").fetchone()[0]
            for t, seeing in (("2026-12-16 22:00:00", 0.8), ("2026-12-16 23:00:00", 0.9)):
                con.execute("INSERT INTO conditions_sample (report_id, time, seeing_arcsec, pwv_mm) VALUES (?, ?, ?, 2.0)",
                            (rid, t, seeing))
        else:
            con.execute("UPDATE plan SET reason = ?", (text,))
        con.commit()
    finally:
        con.close()


@pytest.mark.slow
def test_control_characters_in_stored_text_are_shown_escaped(workdir):
    # input checks refuse such targets now; a database filled earlier may still hold them
    target = "x\x9b31my\u202ez\x7f"
    rid = _stored_as_is(workdir, target)
    for args in (("request", "list"), ("request", "show", rid)):
        proc = run_cli(*args, cwd=workdir)
        _no_raw(proc)
        assert "x\\x9b31my\\u202ez\\x7f" in proc.stdout
    assert cli_json("request", "show", rid, cwd=workdir)["target"] == target  # JSON keeps the value, escaped by JSON

    (workdir / "c.csv").write_text("time,seeing_arcsec,pwv_mm\n2026-12-16T22:00:00Z,0.8,2.0\n"
                                   "2026-12-16T23:00:00Z,0.9,2.1\n", encoding="utf-8")
    source = "[/] feed \x1b]0;owned\x07 \u202eecruos"
    assert run_cli("conditions", "load", "c.csv", "--source", source, cwd=workdir).returncode == 2  # refused now
    _stored_as_is_sql(workdir, "conditions", source)  # a database filled before the check
    proc = run_cli("conditions", "show", cwd=workdir)
    _no_raw(proc)
    assert "[/] feed \\x1b]0;owned\\x07" in proc.stdout
    proc = run_cli("status", cwd=workdir)
    _no_raw(proc)
    assert "from [/] feed \\x1b]0;owned\\x07 \\u202eecruos, issued" in proc.stdout


@pytest.mark.slow
def test_plan_with_markup_and_controls_in_its_reason_and_names(workdir):
    """`plan build` stores its plan and prints it (it used to store it and then exit 1)."""
    for i, name in enumerate(("[/]", "[bold]B")):
        run_cli("request", "add", "--program", "STAR-1", "--target", name, "--ra", str(30 + 40 * i),
                "--dec", "-30", "--band", "V", "--exposure", "600", cwd=workdir, check=True)
    _stored_as_is(workdir, "C\u202eD", ra=110.0)  # refused at input now; stored earlier
    reason = "[/] re-plan \x1b[31m after \x9b wind"
    build = ("plan", "build", "--night", "2026-12-16", "--now", "2026-12-16T18:00:00Z", "--reason")
    assert run_cli(*build, reason, cwd=workdir).returncode == 2  # controls in a reason are refused now
    proc = run_cli(*build, "[/] re-plan [bold]after wind", cwd=workdir)
    _no_raw(proc)
    assert "plan version 1 stored" in proc.stdout and "[/] re-plan [bold]after wind" in proc.stdout
    _stored_as_is_sql(workdir, "plan", reason)  # a plan stored before the check
    for args in (("plan", "show", "--unscheduled"), ("plan", "list")):
        proc = run_cli(*args, cwd=workdir)
        _no_raw(proc)
        assert "[/] re-plan \\x1b[31m" in proc.stdout
    shown = cli_json("plan", "show", cwd=workdir)
    assert shown["plan"]["reason"] == reason
    table = run_cli("plan", "show", cwd=workdir, check=True).stdout
    for e in shown["entries"]:
        assert clean(e["target"]) in table
    if shown["entries"]:
        first = shown["entries"][0]
        proc = run_cli("next", "--at", first["start"], cwd=workdir)
        _no_raw(proc)
        assert f"#{first['request_id']} {clean(first['target'])} (STAR-1)" in proc.stdout
        proc = run_cli("plan", "why", str(first["request_id"]), cwd=workdir)
        _no_raw(proc)
