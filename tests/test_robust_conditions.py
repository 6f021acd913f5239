"""Conditions reports at the edge, and several reports on one night.

Bad files through the real CLI (`conditions load`) on a real SQLite file: exit 2, one line
naming field and row, nothing stored. The newest-covering-report rule in-process.
"""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from conftest import run_cli
from scheduler.conditions.grid import conditions_on_grid
from scheduler.conditions.ingest import Sample, parse_conditions
from scheduler.conditions.merge import Report, choose_reports, conditions_from_reports, coverage_warning, forecast_share
from scheduler.model.config import starter_config
from scheduler.model.errors import InputError

T = "2026-12-16T23:00:00Z"

BAD_FILES = [
    ("deep.json", "[" * 100_000 + "]" * 100_000, "file", None),
    ("bigint.json", '[{"time": "%s", "pwv_mm": %s}]' % (T, "9" * 400), "pwv_mm", "row 1"),
    ("bigint5000.json", '[{"time": "%s", "pwv_mm": %s}]' % (T, "9" * 5000), "file", None),
    ("surrogate.json", '{"source": "ok\\udc80", "samples": [{"time": "%s"}]}' % T, "source", None),
    ("wrongtype.json", '[{"time": "%s", "seeing_arcsec": {"v": 1}}]' % T, "seeing_arcsec", "row 1"),
    ("dupkey.json", '[{"time": "%s", "pwv_mm": 1, "pwv_mm": 9}]' % T, "pwv_mm", "row 1"),
    ("bigcell.csv", f"time,pwv_mm\n{T},{'1' * 140_000}\n", "pwv_mm", "row 2"),
    ("twice.csv", f"time,pwv_mm,pwv_mm\n{T},1,2\n", "pwv_mm", "row 1"),
    ("nozone.csv", "time,pwv_mm\n2026-12-16T23:00:00,1\n", "time", "row 2"),
    ("year1.csv", "time,pwv_mm\n0001-01-01T00:00:00+05:00,1\n", "time", "row 2"),
    ("digits.csv", f"time,pwv_mm\n{T},1_0\n", "pwv_mm", "row 2"),
    ("subnormal.csv", f"time,seeing_arcsec\n{T},1e-320\n", "seeing_arcsec", "row 2"),
    ("ctrlsource.json", '{"source": "met\\u001b]0;x\\u0007", "samples": [{"time": "%s"}]}' % T, "source", None),
]


@pytest.mark.slow
@pytest.mark.parametrize("name, text, field, row", BAD_FILES, ids=[b[0] for b in BAD_FILES])
def test_bad_conditions_file_is_refused_naming_field_and_row(workdir, name, text, field, row):
    f = workdir / name
    f.write_text(text, encoding="utf-8", errors="surrogatepass")
    proc = run_cli("conditions", "load", str(f), cwd=workdir)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert f"{field}: " in lines[0] and (row is None or row in lines[0]), lines[0]
    assert "\x1b" not in proc.stderr
    shown = run_cli("conditions", "show", cwd=workdir)
    assert shown.returncode == 2 and "no report stored yet" in shown.stderr  # nothing stored


def test_control_characters_in_a_file_name_do_not_reach_messages_or_the_stored_source():
    with pytest.raises(InputError) as e:
        parse_conditions("time,pwv_mm\n2026-12-16T23:00:00Z,x\n", None, "feed\x1b]0;t\x07.csv")
    assert "\x1b" not in str(e.value) and "\\x1b" in str(e.value)
    rep = parse_conditions("time,pwv_mm\n2026-12-16T23:00:00Z,1\n", None, "feed\u202e.csv")
    assert "\u202e" not in rep.source


# ---------------------------------------------------------------- several reports, one night

CFG = starter_config()
NIGHT0 = datetime(2026, 12, 16, 23, 0, tzinfo=timezone.utc)
GRID = np.array([(NIGHT0 + timedelta(minutes=10 * k)).timestamp() for k in range(43)])  # 23:00 to 06:00


def _report(rid: int, issued_h: float, start: datetime, hours: int, pwv: float, dome: bool | None = None) -> Report:
    samples = tuple(Sample(time=start + timedelta(hours=h), pwv_mm=pwv, seeing_arcsec=0.7,
                           dome_open=dome if h == hours else None) for h in range(hours + 1))
    return Report(rid, NIGHT0 - timedelta(hours=24) + timedelta(hours=issued_h), samples)


def test_tomorrows_forecast_does_not_replace_tonights():
    tonight = _report(1, 0, NIGHT0, 7, pwv=1.0)
    tomorrow = _report(2, 5, NIGHT0 + timedelta(days=1), 7, pwv=9.0)  # issued later, covers 0 % of tonight
    merged = conditions_from_reports([tonight, tomorrow], GRID, CFG.defaults)
    assert np.all(merged.pwv_mm == 1.0) and merged.covered.all()
    assert merged.report_ids == (1,) and merged.report_id == 1
    # the newest report alone (what was used before) would have left the night on the defaults
    newest_only = conditions_on_grid(tomorrow.samples, GRID, CFG.defaults, 2)
    assert not newest_only.covered.any() and np.all(newest_only.pwv_mm == CFG.defaults.pwv_mm)
    assert forecast_share([tonight, tomorrow], GRID) == 1.0
    assert forecast_share([tomorrow], GRID) == 0.0


def test_where_reports_overlap_the_newest_wins_and_gaps_take_the_defaults():
    old = _report(1, 0, NIGHT0, 7, pwv=2.0)  # whole night
    update = _report(2, 3, NIGHT0 + timedelta(hours=2), 2, pwv=4.0)  # 01:00 to 03:00, newer
    merged = conditions_from_reports([update, old], GRID, CFG.defaults)  # order given does not matter
    covering, _ = choose_reports([update, old], GRID)
    in_update = (GRID >= update.span_unix[0]) & (GRID <= update.span_unix[1])
    assert np.all(merged.pwv_mm[in_update] == 4.0) and np.all(merged.pwv_mm[~in_update] == 2.0)
    assert np.all(covering[in_update] == 0) and np.all(covering[~in_update] == 1)
    assert merged.report_ids == (2, 1)

    early = _report(3, 1, NIGHT0, 2, pwv=1.5, dome=False)  # 23:00 to 01:00, ends with the dome closed
    merged = conditions_from_reports([early], GRID, CFG.defaults)
    after = GRID > early.span_unix[1]
    assert np.all(merged.pwv_mm[after] == CFG.defaults.pwv_mm) and not merged.covered[after].any()
    assert not merged.dome_open[after].any()  # the last reported dome state holds, as for one report
    share = forecast_share([early], GRID)
    assert share == pytest.approx(13 / 43)  # 23:00..01:00 inclusive in 10-min steps
    warning = coverage_warning(share, CFG.planning.min_forecast_share, "2026-12-16")
    assert warning is not None and "30 %" in warning and "min_forecast_share" in warning
    assert coverage_warning(1.0, 0.5, "2026-12-16") is None


def test_one_report_merges_to_exactly_what_it_gives_alone():
    rep = _report(7, 0, NIGHT0 + timedelta(hours=1), 3, pwv=3.0, dome=False)
    alone = conditions_on_grid(rep.samples, GRID, CFG.defaults, 7)
    merged = conditions_from_reports([rep], GRID, CFG.defaults)
    for name in ("seeing_arcsec", "pwv_mm", "cloud_mag", "wind_ms", "humidity_pct", "dome_open", "covered"):
        assert np.array_equal(getattr(alone, name), getattr(merged, name)), name
    empty = conditions_from_reports([], GRID, CFG.defaults)
    assert not empty.covered.any() and empty.report_id is None and forecast_share([], GRID) == 0.0


def test_json_report_wrong_types_name_field_and_row():
    text = json.dumps({"samples": [{"time": T, "pwv_mm": 1}, {"time": "2026-12-17T00:00:00Z", "dome": 1}]})
    with pytest.raises(InputError) as e:
        parse_conditions(text)
    assert (e.value.field, e.value.row) == ("dome", 2)


def test_the_merge_keeps_the_coherence_time():
    """Adaptive optics reads tau0 from the conditions: a merged grid carries it like one report's."""
    samples = tuple(Sample(time=NIGHT0 + timedelta(hours=h), pwv_mm=1.0, coherence_time_ms=2.0 + h)
                    for h in range(4))
    rep = Report(5, NIGHT0 - timedelta(hours=2), samples)
    alone = conditions_on_grid(samples, GRID, CFG.defaults, 5)
    merged = conditions_from_reports([rep], GRID, CFG.defaults)
    assert np.array_equal(alone.coherence_time_ms, merged.coherence_time_ms, equal_nan=True)
    assert merged.coherence_time_ms[6] == pytest.approx(3.0)  # 00:00, between 2 ms and 4 ms
    assert np.isnan(merged.coherence_time_ms[-1])  # after the last sample: unknown, no default
