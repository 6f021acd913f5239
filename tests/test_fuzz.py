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
from hypothesis import HealthCheck, given, settings
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
