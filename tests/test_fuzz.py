"""Bad input, fuzzed: every case is a valid record or one clear InputError; never a crash.

In-process for the many cases (validation is pure), then a sample through the real CLI to
prove the one-line / exit 2 / nothing written behaviour end to end.
"""

from __future__ import annotations

import csv
import io
import json
import math
import tomllib

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from conftest import cli_json, run_cli
from scheduler.conditions.ingest import parse_conditions
from scheduler.model.config import parse_config, starter_config, starter_config_text
from scheduler.model.errors import InputError
from scheduler.model.request import ALL_COLUMNS, IMPORT_COLUMNS, RequestSpec, validate_request

CONFIG = starter_config()
FUZZ_CASES = {"requests": 400, "conditions": 300, "config": 300}  # reported in docs/reliability.md

junk_text = st.one_of(
    st.text(max_size=30),
    st.sampled_from(["", " ", "nan", "inf", "-inf", "1e400", "-0", "0", "-1", "12:00:00", "-91:00:00",
                     "25:61:61", "+00:00:00", "2026-13-01T00:00:00Z", "2026-12-05T00:00:00Z", "true",
                     "K", "V", "Q", "STAR-1", "\x00", "é", "1,5", "0x10", "1_000"]),
)
numberish = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**6, 10**6), junk_text,
                      st.none(), st.booleans())
request_field = st.sampled_from(list(ALL_COLUMNS) + ["ra_deg", "dec_deg", "colour"])


def _valid_base() -> dict:
    return {"program": "STAR-1", "target": "fz", "ra": "10", "dec": "-30", "band": "V", "exposure_s": "300"}


def _check_spec(spec: RequestSpec) -> None:
    assert 0 <= spec.ra_deg < 360 and -90 <= spec.dec_deg <= 90
    assert spec.exposure_s > 0 and 1 <= spec.priority <= 10 and spec.repeats >= 1
    assert spec.band in CONFIG.bands
    for name in ("max_pwv_mm", "max_seeing_arcsec", "resolution_arcsec"):
        v = getattr(spec, name)
        assert v is None or (math.isfinite(v) and v > 0)
    assert spec.max_airmass is None or spec.max_airmass >= 1
    if spec.not_before and spec.not_after:
        assert spec.not_after > spec.not_before
    if spec.resolution_arcsec is not None:
        assert spec.resolution_arcsec >= CONFIG.diffraction_limit_arcsec(spec.band)


@settings(max_examples=FUZZ_CASES["requests"], deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(request_field, numberish, max_size=6))
def test_request_fields_fuzzed(overrides):
    raw = _valid_base()
    raw.update(overrides)
    try:
        spec = validate_request(raw, CONFIG, {"STAR-1"})
    except InputError as e:
        assert e.field and "\n" not in str(e)
        return
    _check_spec(spec)


def _csv_text(rows: list[list[str]]) -> str:
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    for r in rows:
        w.writerow(r)
    return out.getvalue()


cond_value = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr), junk_text, st.just(""))


@settings(max_examples=FUZZ_CASES["conditions"], deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    header=st.lists(st.sampled_from(["time", "seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct",
                                     "dome", "wind", "pwv"]), min_size=1, max_size=7),
    rows=st.lists(st.lists(cond_value, min_size=0, max_size=8), max_size=6),
    as_json=st.booleans(),
)
def test_conditions_files_fuzzed(header, rows, as_json):
    if as_json:
        text = json.dumps([dict(zip(header, r)) for r in rows])
    else:
        text = _csv_text([header] + rows)
    try:
        rep = parse_conditions(text, None, "fuzz.csv")
    except InputError as e:
        assert e.field and "\n" not in str(e)
        return
    times = [s.time for s in rep.samples]
    assert times == sorted(set(times))
    for s in rep.samples:
        assert s.pwv_mm is None or s.pwv_mm >= 0
        assert s.seeing_arcsec is None or s.seeing_arcsec > 0


def _config_mutations():
    base = tomllib.loads(starter_config_text())
    paths = [("site", k) for k in base["site"]] + [("telescope", k) for k in base["telescope"]] + \
            [("safety", k) for k in base["safety"]] + [("defaults", k) for k in base["defaults"]] + \
            [("planning", k) for k in base["planning"]]
    return base, paths


@settings(max_examples=FUZZ_CASES["config"], deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_observatory_toml_fuzzed(data):
    base, paths = _config_mutations()
    doc = json.loads(json.dumps(base))
    for _ in range(data.draw(st.integers(1, 3))):
        table, key = data.draw(st.sampled_from(paths))
        action = data.draw(st.sampled_from(["set", "delete", "rename"]))
        if action == "delete":
            doc[table].pop(key, None)
        elif action == "rename":
            if key in doc[table]:
                doc[table][key + "_x"] = doc[table].pop(key)
        else:
            doc[table][key] = data.draw(st.one_of(st.floats(allow_nan=True), st.integers(-10**9, 10**9),
                                                  st.text(max_size=12), st.booleans(), st.lists(st.integers(), max_size=2)))
    try:
        cfg = parse_config(doc)
    except InputError as e:
        assert "." in e.field or e.field in ("band", "instrument"), e.field
        assert "\n" not in str(e)
        return
    assert cfg.telescope.aperture_m > 0 and cfg.telescope.max_altitude_deg > cfg.telescope.min_altitude_deg
    assert 0 < cfg.safety.max_humidity_pct <= 100 and cfg.planning.step_s >= 10


# ---- a sample through the real CLI: exit 2, one line, nothing written

CLI_CASES = [
    {"ra": "nan"}, {"dec": "inf"}, {"exposure_s": "1e400"}, {"priority": "5.5"}, {"repeats": "0"},
    {"band": ""}, {"target": "x" * 500}, {"not_before": "2026-02-30T00:00:00Z"}, {"max_cloud_mag": "-0.1"},
    {"max_airmass": "40.1"}, {"phase_min": "0.2"}, {"min_moon_sep_deg": "181"},
]


@pytest.mark.slow
@pytest.mark.parametrize("case", CLI_CASES, ids=[next(iter(c)) for c in CLI_CASES])
def test_cli_import_fuzz_sample_is_refused_cleanly(workdir, case):
    good = _valid_base()
    bad = dict(good, **case)
    cols = list(IMPORT_COLUMNS) + [k for k in bad if k not in IMPORT_COLUMNS]
    f = workdir / "fz.csv"
    f.write_text(_csv_text([cols, [good.get(c, "") for c in cols], [bad.get(c, "") for c in cols]]))
    proc = run_cli("request", "import", str(f), cwd=workdir)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "Traceback" not in proc.stderr
    assert "row 3" in proc.stderr  # the bad row is line 3 of the file
    assert cli_json("request", "list", cwd=workdir) == []


# =====================================================================================
# The slow run: 10,000+ generated commands and files through the CLI's own code paths.
#
# Most cases call the click app in-process (scheduler.cli.main.main, exactly what the
# `nightplan` script runs, SystemExit caught) on a fresh SQLite file made by the real CLI; a
# smaller share runs `nightplan` as a real subprocess. For every case: exit 0 with a valid
# record, or exit 2 with one line naming the field; never another exit code, never a
# traceback, never a partial write, never a character on the terminal that drives it.
# Cases are drawn with a fixed seed (derandomize) so every run tries the same ones.

import contextlib  # noqa: E402
import os  # noqa: E402
import re  # noqa: E402
import shutil  # noqa: E402
import sqlite3  # noqa: E402
import unicodedata  # noqa: E402
from datetime import datetime, timedelta, timezone  # noqa: E402
from pathlib import Path  # noqa: E402

from scheduler.conditions.ingest import LIMITS  # noqa: E402
from scheduler.model.untrusted import text_problem  # noqa: E402

# NIGHTPLAN_FUZZ_SCALE=0.05 for a quick look while developing; the figures in docs/reliability.md are of the full run.
FUZZ_SCALE = float(os.environ.get("NIGHTPLAN_FUZZ_SCALE", "1"))
FULL_CASES = {"request add": 3500, "request import": 2000, "conditions load": 2500, "observatory.toml": 2000,
              "subprocess": 40}
SLOW_CASES = {k: max(1, round(v * FUZZ_SCALE)) for k, v in FULL_CASES.items()}
COUNTS: dict[str, dict[str, int]] = {}  # family -> {"exit 0": n, "exit 2": n}

SLOW = settings(deadline=None, derandomize=True, database=None, print_blob=True,
                phases=(Phase.explicit, Phase.generate, Phase.shrink), suppress_health_check=list(HealthCheck))

NASTY = ["\x1b[31m", "\x1b]0;t\x07", "\x9b", "\x85", "\u202e", "\u2066", "\u200f", "\x7f", "\x00", "\u200b",
         "\ufeff", "\u2060", "\udcff", "\ud800", "\u2028", "[/]", "[bold]", "%s", "{}", "'", '"', ",", "\n", "\r",
         "\t", " ", "é", "日本", "\U0001f642", "a", "Z", "7", "-", "_", "."]
text_st = st.one_of(
    st.text(max_size=16),
    st.lists(st.sampled_from(NASTY), min_size=1, max_size=6).map("".join),
    st.sampled_from(["x" * 201, "y" * 200, "Invented field 7", "STAR-1", "V", "K", "optical_imager"]),
)
num_text_st = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-10 ** 6, 10 ** 6).map(str),
    st.integers(10 ** 15, 10 ** 600).map(str),
    st.sampled_from(["1_0", "\u0661\u0660", "\uff11\uff10", "1e-320", "5e-324", "-0", "0x10", "1,5", "nan", "inf",
                     "1e400", "", " 12 ", "+5", ".5", "5.", "0.001", "0.0009", "43200", "43200.1", "1", "10",
                     "100", "0.5"]),
    text_st,
)
angle_st = st.one_of(
    num_text_st,
    st.sampled_from(["4h12m30s", "12:30:00", "23:59:59.9", "24:00:00", "-10d30m", "10°30′15″", "1.1rad", "12h-3m",
                     "4h70m", "\u0664h12m", "+4h", "12 30 00", "-00:30:00", "90d", "-90:00:01", "359.9999999999"]),
    st.tuples(st.integers(-30, 400), st.integers(0, 70), st.floats(0, 70)).map(lambda t: f"{t[0]}:{t[1]:02d}:{t[2]:04.1f}"),
)
time_st = st.one_of(
    st.sampled_from(["2026-12-20T00:00:00Z", "2026-12-20T00:00:00", "0001-01-01T00:00:00+05:00",
                     "9999-12-31T23:00:00-05:00", "2026-02-30T00:00:00Z", "2030-01-01T00:00:00+14:00", "2026-12-20",
                     "", "yesterday", "2026-12-20T00:00:00z", "20261220T000000Z"]),
    st.datetimes(min_value=datetime(1, 1, 2), max_value=datetime(9999, 12, 30),
                 timezones=st.one_of(st.none(), st.just(timezone.utc))).map(lambda d: d.isoformat()),
    text_st,
)
# Plausible values (often valid, near the edges of their ranges) half the time, junk the other
# half, so both the accepted and the refused paths are exercised in volume.
def _decimal(lo: float, hi: float) -> st.SearchStrategy[str]:
    return st.one_of(st.floats(lo, hi).map(repr), st.floats(lo, hi).map(lambda x: f"{x:.3f}"),
                     st.floats(lo, hi).map(lambda x: f"{x:.4e}"), st.sampled_from([repr(lo), repr(hi)]))


def _whole(lo: int, hi: int) -> st.SearchStrategy[str]:
    return st.integers(lo - 1, hi + 1).map(str)


name_st = st.text(st.characters(categories=("L", "N", "P", "Zs", "S"), exclude_characters="\u2028\u2029"),
                  min_size=1, max_size=40)
zone_time_st = st.datetimes(min_value=datetime(2026, 12, 3), max_value=datetime(2027, 12, 31),
                            timezones=st.sampled_from([timezone.utc, timezone(timedelta(hours=-3)),
                                                       timezone(timedelta(hours=5, minutes=30))])
                            ).map(lambda d: d.isoformat())
ra_ok_st = st.one_of(_decimal(0, 359.999), st.tuples(st.integers(0, 23), st.integers(0, 59), st.integers(0, 59)).map(
    lambda t: st.sampled_from([f"{t[0]:02d}:{t[1]:02d}:{t[2]:02d}", f"{t[0]}h{t[1]}m{t[2]}s",
                               f"{t[0]} {t[1]} {t[2]}.5"])).flatmap(lambda x: x))
dec_ok_st = st.one_of(_decimal(-90, 90), st.tuples(st.integers(-89, 89), st.integers(0, 59), st.integers(0, 59)).map(
    lambda t: f"{t[0]:+03d}:{t[1]:02d}:{t[2]:02d}"), st.integers(-89, 89).map(lambda d: f"{d}d30m15s"))
PLAUSIBLE = {
    "program": st.just("STAR-1"), "target": name_st, "ra": ra_ok_st, "dec": dec_ok_st,
    "band": st.sampled_from(list(CONFIG.bands)), "instrument": st.sampled_from(["optical_imager", "nir_camera"]),
    "exposure_s": _decimal(0.001, 43200), "resolution_arcsec": _decimal(0.05, 100), "max_seeing_arcsec": _decimal(0.05, 20),
    "max_pwv_mm": _decimal(0.01, 100), "max_airmass": _decimal(1, 40), "min_moon_sep_deg": _decimal(0, 180),
    "max_moon_illum": _decimal(0, 1), "min_sky_mag": _decimal(0, 30), "max_cloud_mag": _decimal(0, 20),
    "not_before": zone_time_st, "not_after": zone_time_st, "period_epoch": zone_time_st,
    "period_days": _decimal(0.001, 1e5), "phase_min": _decimal(0, 1), "phase_max": _decimal(0, 1),
    "priority": _whole(1, 10), "repeats": _whole(1, 100), "min_spacing_s": _decimal(0, 30 * 86400),
    "too": st.sampled_from(["true", "false", "yes", "0"]),
}
JUNK = {"program": text_st, "target": text_st, "ra": angle_st, "dec": angle_st, "band": text_st, "instrument": text_st,
        "not_before": time_st, "not_after": time_st, "period_epoch": time_st, "too": text_st}
OPTION_FIELD = {"--exposure": "exposure_s", "--resolution": "resolution_arcsec", "--max-seeing": "max_seeing_arcsec",
                "--max-pwv": "max_pwv_mm", "--min-moon-sep": "min_moon_sep_deg", "--max-cloud": "max_cloud_mag",
                "--min-spacing": "min_spacing_s"}


def field_st(field: str) -> st.SearchStrategy[str]:
    return st.one_of(PLAUSIBLE[field], JUNK.get(field, num_text_st))


ADD_OPTIONS = {opt: field_st(OPTION_FIELD.get(opt, opt[2:].replace("-", "_"))) for opt in (
    "--program", "--target", "--ra", "--dec", "--band", "--exposure", "--instrument", "--resolution", "--max-seeing",
    "--max-pwv", "--max-airmass", "--min-moon-sep", "--max-moon-illum", "--min-sky-mag", "--max-cloud",
    "--not-before", "--not-after", "--period-epoch", "--period-days", "--phase-min", "--phase-max", "--priority",
    "--repeats", "--min-spacing")}
GOOD_ADD = {"--program": "STAR-1", "--target": "Invented field 7", "--ra": "10", "--dec": "-30", "--band": "V",
            "--exposure": "300"}
FIELD_NAMES = set(ALL_COLUMNS) | {"ra_deg", "dec_deg", "file", "columns", "header", "row", "request", "sample",
                                  "samples", "issued", "source", "time", "config", "cell", "db"}
CONFIG_KEY = re.compile(r"[a-z_]+(?:\[\d+\])?(?:\.[a-z_]+)?")
_TERMINAL_BAD = set("\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069\u2028\u2029")


def terminal_safe(text: str) -> bool:
    return not any((unicodedata.category(c) in ("Cc", "Cs") and c not in "\n\t") or c in _TERMINAL_BAD for c in text)


def run_in_process(argv: list[str]) -> tuple[int, str, str]:
    """`nightplan ARGV` through the click app in this process: (exit status, stdout, stderr)."""
    from scheduler.cli.main import main

    out, err = io.StringIO(), io.StringIO()
    code = 0
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            main(argv)
        except SystemExit as e:
            code = e.code if isinstance(e.code, int) else (0 if e.code is None else 1)
    return code, out.getvalue(), err.getvalue()


class Queue:
    """A fresh SQLite queue (copied from one made by the real CLI) and the counts that show a write."""

    def __init__(self, template: Path, folder: Path):
        for name in ("observatory.toml", "nightplan.sqlite"):
            shutil.copy2(template / name, folder / name)
        self.folder = folder
        self.db = folder / "nightplan.sqlite"
        self.base = ["--db", str(self.db), "--config", str(folder / "observatory.toml")]
        self._sql: sqlite3.Connection | None = None
        self._orm = None

    def _con(self) -> sqlite3.Connection:
        if self._sql is None:  # one reader for the family, as the counts are read twice per case
            self._sql = sqlite3.connect(self.db, isolation_level=None)
        return self._sql

    def counts(self) -> tuple[int, int, int]:
        con = self._con()
        return tuple(con.execute(f"SELECT count(*) FROM {t}").fetchone()[0]  # type: ignore[return-value]
                     for t in ("request", "conditions_report", "conditions_sample"))

    def requests_since(self, after_id: int):
        from sqlalchemy import select

        from scheduler.db import store
        from scheduler.db.models import Request
        from scheduler.db.session import open_db

        if self._orm is None:
            self._orm = open_db(str(self.db), create_file=False)
        with self._orm.session() as s:
            return [store.to_spec(r) for r in s.scalars(select(Request).where(Request.id > after_id)
                                                         .order_by(Request.id))]

    def max_request_id(self) -> int:
        return self._con().execute("SELECT coalesce(max(id), 0) FROM request").fetchone()[0]


def check_outcome(family: str, code: int, out: str, err: str) -> None:
    """The contract every case must keep, whatever it was."""
    assert code in (0, 2), f"{family}: exit {code}\n{out}\n{err}"
    assert "Traceback" not in out + err, err
    assert terminal_safe(out) and terminal_safe(err), ascii(out + err)
    if code == 2:
        lines = err.strip().splitlines()
        assert len(lines) == 1, err
        line = lines[0]
        assert line.startswith("nightplan: error: "), line
        body = line[len("nightplan: error: "):]
        # "FIELD: ...", "SOURCE: row N: FIELD: ...", or click's usage line naming the option
        parts = body.split(": ")
        named = False
        for i, part in enumerate(parts[:4]):
            if part.startswith("row ") or i + 1 >= len(parts):
                continue
            if part in FIELD_NAMES or CONFIG_KEY.fullmatch(part) or parts[i + 1].startswith(
                    ("unknown column", "unknown key", "column name", "appears twice")):
                named = True
                break
        assert named or re.search(r"'--[a-z-]+'", body), line
    tally = COUNTS.setdefault(family, {"exit 0": 0, "exit 2": 0})
    tally[f"exit {code}"] += 1


def check_spec_record(spec: RequestSpec) -> None:
    _check_spec(spec)
    assert text_problem(spec.target) is None and spec.program == "STAR-1"
    assert spec.exposure_s >= 0.001 and spec.instrument in {i.name for i in CONFIG.instruments}
    for t in (spec.not_before, spec.not_after, spec.period_epoch):
        assert t is None or 1900 <= t.year <= 2200



@settings(SLOW, max_examples=SLOW_CASES["request add"])
@given(data=st.data())
def _request_add_commands_cases(data, _initialised_template, tmp_path_factory):
    q = _queue(tmp_path_factory, _initialised_template, "add")
    opts = dict(GOOD_ADD)
    for opt in data.draw(st.lists(st.sampled_from(sorted(ADD_OPTIONS)), min_size=1, max_size=3, unique=True)):
        opts[opt] = data.draw(ADD_OPTIONS[opt])
    before, last = q.counts(), q.max_request_id()
    code, out, err = run_in_process(q.base + ["request", "add"] + [x for kv in opts.items() for x in kv])
    check_outcome("request add", code, out, err)
    after = q.counts()
    if code == 0:
        assert after[0] == before[0] + 1 and out.strip().isdigit()
        (spec,) = q.requests_since(last)
        check_spec_record(spec)
    else:
        assert after == before


_QUEUES: dict[str, Queue] = {}


def _queue(factory, template: Path, name: str) -> Queue:
    """One fresh queue per family (created on the family's first case)."""
    if name not in _QUEUES:
        _QUEUES[name] = Queue(template, factory.mktemp(f"fuzz-{name}"))
    return _QUEUES[name]


IMPORT_FIELDS = {k: field_st(k) for k in ("program", "target", "ra", "dec", "band", "exposure_s", "resolution_arcsec",
                                          "max_seeing_arcsec", "max_pwv_mm", "max_airmass", "min_moon_sep_deg",
                                          "max_cloud_mag", "not_before", "not_after", "priority", "repeats", "too")}
IMPORT_FIELDS["colour"] = text_st
json_value_st = st.one_of(st.none(), st.booleans(), st.integers(-10 ** 500, 10 ** 500),
                          st.floats(allow_nan=False), text_st, st.just({"x": 1}), st.just([1, 2]))


# Whole-file shapes every import must refuse (model.request.parse_import_text): a column twice,
# a key twice, JSON nested past what the parser follows, integers too long to read or to be a
# number, a cell over the limit, entries that are not objects.
_ROW = '{"program": "STAR-1", "target": "a", "ra": 10, "dec": -30, "band": "V", "exposure_s": %s}'
IMPORT_REFUSED = [
    "[" * 100_000 + "]" * 100_000,
    "[" + _ROW % ("1" * 5000) + "]",
    "[" + _ROW % ("9" * 400) + "]",
    "[" + _ROW.replace('"target": "a"', '"target": "a", "target": "b"') % "300" + "]",
    "[" + _ROW % "300" + ', "row"]',
    '{"requests": []}',
    "program,target,ra,dec,band,exposure_s\nSTAR-1," + "x" * 140_000 + ",10,-30,V,300\n",
    "program,target,ra,dec,band,exposure_s\nSTAR-1,a,10,-30,V,300,7\n",
]


def _import_file(data, folder: Path) -> tuple[Path, list[dict], bool, bool]:
    """(file, rows, JSON?, must be refused whole)."""
    shape = data.draw(st.sampled_from(["csv", "csv", "csv", "json", "json", "json", "refused", "twice"]))
    if shape == "refused":
        text = data.draw(st.sampled_from(IMPORT_REFUSED))
        f = folder / ("in.json" if text.startswith(("[", "{")) else "in.csv")
        f.write_text(text, encoding="utf-8")
        return f, [], f.suffix == ".json", True
    base = {"program": "STAR-1", "target": "Invented 1", "ra": "10", "dec": "-30", "band": "V", "exposure_s": "300"}
    rows = []
    for i in range(data.draw(st.integers(1, 4))):
        row = dict(base, target=f"Invented {i}")
        for k in data.draw(st.lists(st.sampled_from(sorted(IMPORT_FIELDS)), max_size=3, unique=True)):
            row[k] = data.draw(IMPORT_FIELDS[k])
        rows.append(row)
    as_json = shape == "json" or (shape == "twice" and data.draw(st.booleans()))
    if as_json:
        for row in rows:
            for k in data.draw(st.lists(st.sampled_from(sorted(row)), max_size=2, unique=True)):
                row[k] = data.draw(json_value_st)
        objs = [json.dumps(r, ensure_ascii=True) for r in rows]
        if shape == "twice":  # one key twice in the last object
            key = data.draw(st.sampled_from(sorted(rows[-1])))
            objs[-1] = "{" + json.dumps(key) + ": " + json.dumps(base.get(key, "1")) + ", " + objs[-1][1:]
        text = "[" + ", ".join(objs) + "]"
        f = folder / "in.json"
        f.write_text(text, encoding="utf-8")
    else:
        cols = list(dict.fromkeys(k for r in rows for k in r))
        table = [cols] + [[r.get(c, "") for c in cols] for r in rows]
        if shape == "twice":  # a column twice: the second copy holds the same values
            k = data.draw(st.integers(0, len(cols) - 1))
            table = [line + [line[k]] for line in table]
        f = folder / "in.csv"
        f.write_text(_csv_text(table), encoding="utf-8", errors="surrogatepass")
    return f, rows, as_json, shape == "twice"


@settings(SLOW, max_examples=SLOW_CASES["request import"])
@given(data=st.data())
def _request_import_files_cases(data, _initialised_template, tmp_path_factory):
    q = _queue(tmp_path_factory, _initialised_template, "import")
    f, rows, _as_json, must_refuse = _import_file(data, q.folder)
    before, last = q.counts(), q.max_request_id()
    code, out, err = run_in_process(q.base + ["request", "import", str(f)])
    check_outcome("request import", code, out, err)
    after = q.counts()
    if must_refuse:
        assert code == 2, (f.read_text(encoding="utf-8", errors="replace")[:300], out)
    if code == 0:
        assert after[0] == before[0] + len(rows)  # all rows or none
        specs = q.requests_since(last)
        assert [s.target for s in specs] == [validate_request(r, CONFIG, {"STAR-1"}).target
                                             for r in (_as_import_raw(r) for r in rows)]
        for spec in specs:
            check_spec_record(spec)
    else:
        assert after == before


def _as_import_raw(row: dict) -> dict:
    return {k: v for k, v in row.items()}


COND_COLUMNS = ["time", "seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome"]
cond_cell_st = st.one_of(num_text_st, st.sampled_from(["open", "closed", "OPEN", "ajar", ""]), time_st)
COND_PLAUSIBLE = {name: _decimal(lo, hi) for name, (lo, hi, _o, _u) in LIMITS.items()}
COND_PLAUSIBLE["dome"] = st.sampled_from(["open", "closed", " Closed ", ""])


@settings(SLOW, max_examples=SLOW_CASES["conditions load"])
@given(data=st.data())
def _conditions_files_cases(data, _initialised_template, tmp_path_factory):
    q = _queue(tmp_path_factory, _initialised_template, "conditions")
    n = data.draw(st.integers(1, 5))
    rows = [{"time": f"2026-12-16T{19 + k:02d}:00:00Z", "pwv_mm": "1.5", "seeing_arcsec": "0.7", "dome": "open"}
            for k in range(n)]
    for row in rows:
        for k in data.draw(st.lists(st.sampled_from(COND_COLUMNS + ["wind"]), max_size=2, unique=True)):
            row[k] = data.draw(st.one_of(COND_PLAUSIBLE[k], cond_cell_st) if k in COND_PLAUSIBLE else cond_cell_st)
    shape = data.draw(st.sampled_from(["csv", "csv", "json-list", "json-report", "special"]))
    if shape == "csv":
        cols = list(dict.fromkeys(k for r in rows for k in r))
        if data.draw(st.sampled_from([False, False, False, False, True])) and len(cols) > 1:
            cols.append(data.draw(st.sampled_from(cols)))  # a column twice
        text = _csv_text([cols] + [[r.get(c, "") for c in cols] for r in rows])
    elif shape == "special":
        text = data.draw(st.sampled_from([
            "[" * 100_000 + "]" * 100_000, '[{"time": "2026-12-16T23:00:00Z", "pwv_mm": %s}]' % ("9" * 5000),
            '[{"time": "2026-12-16T23:00:00Z", "pwv_mm": %s}]' % ("9" * 400),
            "time,pwv_mm\n2026-12-16T23:00:00Z," + "1" * 140_000 + "\n",
            '[{"time": "2026-12-16T23:00:00Z", "pwv_mm": 1, "pwv_mm": 2}]',
            '{"source": "\\ud800", "samples": [{"time": "2026-12-16T23:00:00Z"}]}', "\ufeff", "time\n",
        ]))
    else:
        for row in rows:
            for k in data.draw(st.lists(st.sampled_from(sorted(row)), max_size=1)):
                row[k] = data.draw(json_value_st)
        doc = rows if shape == "json-list" else {"issued": data.draw(st.one_of(zone_time_st, time_st)),
                                                  "source": data.draw(st.one_of(name_st, text_st)), "samples": rows}
        text = json.dumps(doc, ensure_ascii=True)
    f = q.folder / "report.txt"
    f.write_text(text, encoding="utf-8", errors="surrogatepass")
    before = q.counts()
    code, out, err = run_in_process(q.base + ["conditions", "load", str(f)])
    check_outcome("conditions load", code, out, err)
    after = q.counts()
    if code == 0:
        assert after[1] == before[1] + 1
        con = sqlite3.connect(q.db)
        try:
            rid, src, n_samples = con.execute(
                "SELECT id, source, n_samples FROM conditions_report ORDER BY id DESC LIMIT 1").fetchone()
            got = con.execute("SELECT seeing_arcsec, pwv_mm, cloud_mag, wind_ms, humidity_pct FROM conditions_sample "
                              "WHERE report_id = ? ORDER BY time", (rid,)).fetchall()
        finally:
            con.close()
        assert after[2] == before[2] + n_samples == before[2] + len(got)
        assert text_problem(src) is None
        for sample in got:
            for v, name in zip(sample, ("seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct")):
                lo, hi, lo_open, _u = LIMITS[name]
                assert v is None or (lo < v <= hi if lo_open else lo <= v <= hi)
    else:
        assert after == before


TOML_EDITS = [
    ("settle_s = 20", ["settle_s = {n}", "settle_s = " + "7" * 5000, "settle_s = 1e-300", "settle_s = -1",
                       "settle_s = \"20\"", "settle_s = [20]", "settle_s = inf", "setle_s = 20"]),
    ('timezone = "America/Argentina/Catamarca"', ['timezone = "America"', 'timezone = "../../etc/passwd"',
                                                   'timezone = "UTC"', 'timezone = "Etc/GMT+3"',
                                                   'timezone = "{t}"', 'timezone = ""']),
    ("slew_rate_az_deg_s = 2.0", ["slew_rate_az_deg_s = {n}", "slew_rate_az_deg_s = 1e-300",
                                  "slew_rate_az_deg_s = 5e-324", "slew_rate_az_deg_s = 0.01"]),
    ('name = "QTO 3.8 m"', ['name = "{t}"', 'name = "QTO\\u001b[2J"', 'name = "QTO\\u202e"', 'name = "\\u200b"']),
    ("aperture_m = 3.8", ["aperture_m = {n}", "apperture_m = 3.8", "aperture_m = 1e-300", "aperture_m = " +
                          "[" * 5000 + "]" * 5000]),
    ("max_wind_ms = 15", ["max_wind_ms = {n}", "max_wnd_ms = 15", "max_wind_ms = true"]),
    ("step_s = 60", ["step_s = {n}", "step_s = 59.5", "stepp_s = 60"]),
    ("heartbeat_min = 30", ["heartbeat_min = 30\n[service]\nfeed_settle_s = {n}", "heartbeat_min = 30\n[servce]\n"]),
]


@settings(SLOW, max_examples=SLOW_CASES["observatory.toml"])
@given(data=st.data())
def _observatory_toml_files_cases(data, _initialised_template, tmp_path_factory):
    q = _queue(tmp_path_factory, _initialised_template, "toml")
    text = starter_config_text()
    for old, news in data.draw(st.lists(st.sampled_from(TOML_EDITS), min_size=1, max_size=3, unique_by=lambda e: e[0])):
        new = data.draw(st.sampled_from(news))
        if "{n}" in new:
            new = new.replace("{n}", data.draw(st.one_of(
                st.floats(allow_nan=True).map(repr), st.integers(-10 ** 50, 10 ** 50).map(str),
                st.floats(0, 100).map(repr), st.integers(0, 3600).map(str))))
        if "{t}" in new:
            new = new.replace("{t}", json.dumps(data.draw(text_st), ensure_ascii=True)[1:-1])
        text = text.replace(old, new, 1)
    cfg = q.folder / "fuzz.toml"
    cfg.write_text(text, encoding="utf-8")
    before, last = q.counts(), q.max_request_id()
    argv = ["--db", str(q.db), "--config", str(cfg), "request", "add"] + [x for kv in GOOD_ADD.items() for x in kv]
    code, out, err = run_in_process(argv)
    check_outcome("observatory.toml", code, out, err)
    after = q.counts()
    if code == 0:
        (spec,) = q.requests_since(last)
        check_spec_record(spec)
        cfg_loaded = parse_config(tomllib.loads(text))
        tel = cfg_loaded.telescope
        assert 0.01 <= tel.slew_rate_az_deg_s <= 100 and 0.01 <= tel.aperture_m and 0 <= tel.settle_s <= 3600
        assert text_problem(tel.name) is None and 10 <= cfg_loaded.planning.step_s <= 3600
    else:
        assert after == before


@settings(SLOW, max_examples=SLOW_CASES["subprocess"])
@given(data=st.data())
def _real_subprocess_sample_cases(data, _initialised_template, tmp_path_factory):
    """A share of the same kinds of cases through a real `nightplan` process."""
    q = _queue(tmp_path_factory, _initialised_template, "subprocess")
    kind = data.draw(st.sampled_from(["add", "import", "conditions"]))
    before = q.counts()
    if kind == "add":
        opts = dict(GOOD_ADD)
        for opt in data.draw(st.lists(st.sampled_from(sorted(ADD_OPTIONS)), min_size=1, max_size=2, unique=True)):
            opts[opt] = data.draw(ADD_OPTIONS[opt])
        # a NUL cannot be passed to a real process; surrogates reach it as the bytes they stand for
        args = ["request", "add"] + [x.replace("\x00", "") for kv in opts.items() for x in kv]
    elif kind == "import":
        f, _rows, _j, _refuse = _import_file(data, q.folder)
        args = ["request", "import", str(f)]
    else:
        f = q.folder / "c.csv"
        f.write_text(_csv_text([["time", "pwv_mm"], ["2026-12-16T23:00:00Z", data.draw(num_text_st)]]),
                     encoding="utf-8", errors="surrogatepass")
        args = ["conditions", "load", str(f)]
    proc = _run_bytes(q, args)
    out = proc.stdout.decode("utf-8", "surrogateescape")
    err = proc.stderr.decode("utf-8", "surrogateescape")
    check_outcome("subprocess", proc.returncode, out, err)
    after = q.counts()
    if proc.returncode != 0:
        assert after == before
    else:
        assert after != before


def _run_bytes(q: Queue, args: list[str]):
    import os
    import subprocess
    import sys

    from conftest import ROOT

    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("NIGHTPLAN_DB", None)
    env.pop("NIGHTPLAN_CONFIG", None)
    argv = [a.encode("utf-8", "surrogateescape") if not any("\ud800" <= c <= "\udbff" for c in a)
            else a.encode("utf-8", "surrogatepass") for a in q.base + args]
    return subprocess.run([sys.executable, "-m", "scheduler", *argv], cwd=q.folder, env=env, capture_output=True,
                          timeout=120)


def _run_family(family: str, cases, template: Path, factory) -> None:
    """Run one family's generated cases, then hold it to its figures: every case ran and was
    checked (none skipped or lost), and both outcomes occurred. The counts are this test's own,
    so the families need no order and may run in any worker process."""
    before = dict(COUNTS.get(family, {"exit 0": 0, "exit 2": 0}))
    cases(_initialised_template=template, tmp_path_factory=factory)
    tally = COUNTS[family]
    accepted, refused = tally["exit 0"] - before["exit 0"], tally["exit 2"] - before["exit 2"]
    print(f"\nfuzz figures: {family}: {accepted + refused} cases, {accepted} accepted, {refused} refused")
    assert accepted + refused >= SLOW_CASES[family], (family, accepted, refused)
    if FUZZ_SCALE >= 1:  # a quick look at a few cases may see one outcome only
        assert accepted > 0 and refused > 0, (family, accepted, refused)  # both outcomes exercised


FAMILIES = {"request add": _request_add_commands_cases, "request import": _request_import_files_cases,
            "conditions load": _conditions_files_cases, "observatory.toml": _observatory_toml_files_cases,
            "subprocess": _real_subprocess_sample_cases}


@pytest.mark.slow
@pytest.mark.parametrize("family", list(FAMILIES))
def test_slow_fuzz_family(family, _initialised_template, tmp_path_factory):
    _run_family(family, FAMILIES[family], _initialised_template, tmp_path_factory)


def test_the_slow_fuzz_run_is_at_least_ten_thousand_cases():
    # a guard on the budgets themselves (docs/reliability.md reports a full run's figures); each
    # family's test then shows that all its cases ran
    assert set(FULL_CASES) == set(FAMILIES) and sum(FULL_CASES.values()) >= 10_000
