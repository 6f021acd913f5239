"""Requests at the edge: names that fool a terminal, numbers that are not numbers, angles with
units, times without a zone, JSON values of the wrong type. Through the real CLI on a real
SQLite file (exit 2, one line naming the field, nothing written), and the pure parts in-process."""

from __future__ import annotations

import json
import unicodedata
from datetime import datetime, timezone

import pytest

from conftest import cli_json, run_cli
from scheduler.model.config import starter_config
from scheduler.model.errors import InputError
from scheduler.model.request import (
    check_program_code, parse_dec, parse_import_text, parse_ra, validate_program, validate_request,
)

CONFIG = starter_config()
GOOD = {"--program": "STAR-1", "--target": "Invented field 7", "--ra": "10", "--dec": "-20", "--band": "V",
        "--exposure": "100"}


def _args(**over: str) -> list[str]:
    opts = dict(GOOD)
    for k, v in over.items():
        opts["--" + k.replace("_", "-")] = v
    return [x for kv in opts.items() for x in kv]


def terminal_safe(text: str) -> bool:
    """No character a terminal acts on: C0 (but newline and tab), DEL, C1, bidi controls."""
    for ch in text:
        if ch in "\n\t":
            continue
        if unicodedata.category(ch) in ("Cc", "Cs") or ch in "\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e" \
                "\u2066\u2067\u2068\u2069\u2028\u2029":
            return False
    return True


def assert_refused(proc, field: str) -> None:
    assert proc.returncode == 2, proc.stdout + proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert lines[0].startswith("nightplan: error: ") and f"{field}: " in lines[0], lines[0]
    assert terminal_safe(proc.stderr) and terminal_safe(proc.stdout), ascii(proc.stderr)


# ---------------------------------------------------------------- through the real CLI

REFUSED = [
    ({"target": "a\u009b31mb"}, "target"),            # C1 control (CSI)
    ({"target": "\u202eevil.exe"}, "target"),         # right-to-left override
    ({"target": "evil\u2066x"}, "target"),            # bidi isolate
    ({"target": "x\u007f"}, "target"),                 # DEL
    ({"target": "\u200b\u200c\u200d"}, "target"),     # only zero-width characters
    ({"target": "\ufeff\u2060"}, "target"),           # only invisible format characters
    ({"exposure": "1e-320"}, "exposure_s"),            # subnormal
    ({"exposure": "0.0000001"}, "exposure_s"),         # below the 1 ms floor
    ({"exposure": "1_0"}, "exposure_s"),               # Python's digit grouping
    ({"exposure": "\u0661\u0660\u0660"}, "exposure_s"),  # Arabic-Indic digits
    ({"priority": "\uff15"}, "priority"),              # full-width digit
    ({"max_seeing": "1e-300"}, "max_seeing_arcsec"),
    ({"not_after": "2030-01-01T00:00:00"}, "not_after"),  # no zone: refused (documented choice)
    ({"not_before": "0001-01-01T00:00:00+05:00"}, "not_before"),
    ({"not_after": "9999-12-31T23:00:00-05:00"}, "not_after"),
    ({"period_epoch": "9999-12-31T23:59:59-14:00", "period_days": "1", "phase_min": "0", "phase_max": "1"},
     "period_epoch"),
    ({"ra": "24h"}, "ra"),
    ({"ra": "4h70m"}, "ra"),
    ({"ra": "\u0664h12m"}, "ra"),                       # astropy would read other scripts' digits
    ({"dec": "-91d"}, "dec"),
]


@pytest.mark.slow
@pytest.mark.parametrize("over, field", REFUSED, ids=[f"{f}-{i}" for i, (_o, f) in enumerate(REFUSED)])
def test_request_add_refuses_cleanly_and_writes_nothing(workdir, over, field):
    proc = run_cli("request", "add", *_args(**over), cwd=workdir)
    assert_refused(proc, field)
    assert cli_json("request", "list", cwd=workdir) == []


@pytest.mark.slow
def test_invalid_utf8_argument_is_refused_naming_the_field(workdir):
    import os
    import subprocess
    import sys

    from conftest import ROOT

    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("NIGHTPLAN_DB", None)
    env.pop("NIGHTPLAN_CONFIG", None)
    args = [a.encode() for a in _args()]
    args[args.index(b"--target") + 1] = b"caf\xe9"  # Latin-1, not UTF-8
    proc = subprocess.run([sys.executable, "-m", "scheduler", b"request", b"add", *args], cwd=workdir, env=env,
                          capture_output=True)
    assert proc.returncode == 2, proc.stderr
    err = proc.stderr.decode("utf-8", "replace")
    assert len(err.strip().splitlines()) == 1 and "target: " in err and "surrogate" in err
    assert cli_json("request", "list", cwd=workdir) == []


@pytest.mark.slow
def test_ra_with_units_as_astropy_reads_them(workdir):
    # 4h12m30s = 4.208333 h = 63.125 deg; -26d38m50s = -26.647222 deg (arithmetic)
    proc = run_cli("request", "add", *_args(ra="4h12m30s", dec="-26d38m50s"), cwd=workdir)
    assert proc.returncode == 0, proc.stderr
    row = cli_json("request", "list", cwd=workdir)[0]
    assert row["ra_deg"] == pytest.approx(63.125, abs=1e-9)
    assert row["dec_deg"] == pytest.approx(-26.647222, abs=1e-6)


@pytest.mark.slow
def test_import_json_wrong_types_and_huge_integers_are_refused_by_row_and_field(workdir):
    good = {"program": "STAR-1", "target": "Invented 1", "ra": 10, "dec": -20, "band": "V", "exposure_s": 100}
    cases = [
        ([good, dict(good, target={"name": "x"})], "target", "row 2"),   # once stored as its text
        ([good, dict(good, exposure_s=int("9" * 400))], "exposure_s", "row 2"),  # once exit 1 (OverflowError)
        ([dict(good, ra=[10])], "ra", "row 1"),
        ([good, dict(good, priority=True)], "priority", "row 2"),
        ([dict(good, target="\ud800")], "target", "row 1"),                # lone surrogate from a \u escape
    ]
    for rows, field, row in cases:
        f = workdir / "in.json"
        f.write_text(json.dumps(rows), encoding="utf-8")
        proc = run_cli("request", "import", str(f), cwd=workdir)
        assert_refused(proc, field)
        assert row in proc.stderr
        assert cli_json("request", "list", cwd=workdir) == []


# ---------------------------------------------------------------- in-process

def _raw(**over):
    raw = {"program": "STAR-1", "target": "t", "ra": "10", "dec": "-20", "band": "V", "exposure_s": "100"}
    raw.update(over)
    return raw


def test_sexagesimal_and_unit_forms_agree():
    # 12:30:00 h = 187.5 deg exactly; astropy's parser for the unit forms (arithmetic check values)
    assert parse_ra("12:30:00") == 187.5
    assert parse_ra("12h30m00s") == pytest.approx(187.5, abs=1e-9)
    assert parse_ra("187.5d") == pytest.approx(187.5, abs=1e-9)
    assert parse_dec("-05:23:28") == pytest.approx(-5.391111, abs=1e-6)
    assert parse_dec("-5d23m28s") == pytest.approx(-5.391111, abs=1e-6)
    assert parse_dec("10°30′15″") == pytest.approx(10.504167, abs=1e-6)
    for bad in ("24h", "+4h", "12h-3m", "12:30:60", "nan", "1e400", "4h12m30s" * 10):
        with pytest.raises(InputError) as e:
            parse_ra(bad)
        assert e.value.field == "ra" and "\n" not in str(e.value)


def test_not_after_in_the_past_is_refused_unless_allowed():
    now = datetime(2026, 12, 16, 12, 0, tzinfo=timezone.utc)
    past = _raw(not_after="2026-12-16T11:00:00Z")
    with pytest.raises(InputError, match=r"^not_after: .*already past"):
        validate_request(past, CONFIG, {"STAR-1"}, now=now)
    assert validate_request(past, CONFIG, {"STAR-1"}, now=now, allow_past=True).not_after.hour == 11
    assert validate_request(_raw(not_after="2026-12-16T13:00:00Z"), CONFIG, {"STAR-1"}, now=now).not_after.hour == 13


def test_a_time_offset_is_converted_and_a_time_without_zone_refused():
    spec = validate_request(_raw(not_before="2026-12-16T22:00:00-03:00"), CONFIG, {"STAR-1"})
    assert spec.not_before == datetime(2026, 12, 17, 1, 0, tzinfo=timezone.utc)
    with pytest.raises(InputError, match=r"^not_before: .*no time zone"):
        validate_request(_raw(not_before="2026-12-16T22:00:00"), CONFIG, {"STAR-1"})


def test_program_codes_and_program_fields():
    assert check_program_code("NL-1") == "NL-1"
    for bad in ("NL\n", "NL ", " NL", "", "N\u0130L", "x" * 65):
        with pytest.raises(InputError):
            check_program_code(bad, "code")
    assert validate_program("P1", " Dr. A. Invented ", "12", "2") == ("P1", "Dr. A. Invented", 12.0, 2.0)
    for args, field in ((("P1", "Dr. \u202eX"), "pi"), (("P1", "X", "1_0"), "hours"), (("P1", "X", 1, "1e-320"), "weight")):
        with pytest.raises(InputError) as e:
            validate_program(*args)
        assert e.value.field == field


def test_import_parser_refuses_a_column_twice_and_names_it():
    text = "program,target,ra,dec,band,exposure_s,program\nSTAR-1,a,10,-20,V,100,OTHER\n"
    with pytest.raises(InputError) as e:
        parse_import_text(text, "q.csv")
    assert e.value.field == "program" and e.value.row == 1 and "twice" in e.value.message


def test_import_parser_refuses_deep_json_duplicate_keys_and_oversized_cells():
    with pytest.raises(InputError, match="nested too deeply"):
        parse_import_text("[" * 100_000 + "]" * 100_000, "q.json")
    with pytest.raises(InputError, match="5000 digits"):
        parse_import_text('[{"exposure_s": ' + "1" * 5000 + "}]", "q.json")
    with pytest.raises(InputError) as e:
        parse_import_text('[{"target": "a"}, {"target": "a", "target": "b"}]', "q.json")
    assert (e.value.field, e.value.row) == ("target", 2)
    with pytest.raises(InputError) as e:
        parse_import_text("program,target\nSTAR-1," + "x" * 131_073 + "\n", "q.csv")
    assert (e.value.field, e.value.row) == ("target", 2)
    rows = parse_import_text("program,target\nSTAR-1,a\n\nSTAR-1,b\n", "q.csv")
    assert rows == [(2, {"program": "STAR-1", "target": "a"}), (4, {"program": "STAR-1", "target": "b"})]
