"""Conditions reports: ingest and refusal of bad files, interpolation onto the grid, change detection."""

from __future__ import annotations

import json
from datetime import datetime, timezone

import numpy as np
import pytest

from scheduler.conditions.change import compare
from scheduler.conditions.grid import ConditionsGrid, conditions_on_grid, default_conditions
from scheduler.conditions.ingest import MAX_BYTES, MAX_ROWS, Sample, parse_conditions, samples_to_csv
from scheduler.model.config import ConditionDefaults, Safety
from scheduler.model.errors import InputError

HEADER = "time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome"
DEFAULTS = ConditionDefaults(seeing_arcsec=1.5, pwv_mm=8.0, cloud_mag=0.3, wind_ms=5.0, humidity_pct=50.0,
                             dome_open=True)
SAFETY = Safety(sun_avoidance_deg=45.0, max_wind_ms=15.0, max_humidity_pct=85.0)
T0 = datetime(2026, 3, 10, 0, 0, tzinfo=timezone.utc).timestamp()


def utc(h: int, m: int = 0) -> datetime:
    return datetime(2026, 3, 10, h, m, tzinfo=timezone.utc)


def csv_text(*rows: str) -> str:
    return "\n".join((HEADER,) + rows) + "\n"


# --------------------------------------------------------------------------- ingest: good input

def test_csv_parses_values_blanks_and_offsets():
    rep = parse_conditions(csv_text(
        "2026-03-10T01:00:00Z,0.8,2.5,0.0,6,40,open",
        "2026-03-10T01:30:00Z,,3.0,,,,",
        "2026-03-10T04:00:00+02:00,1.1,,,,,Closed",  # = 02:00Z
    ), source_name="night.csv")
    assert len(rep) == 3 and rep.format == "csv" and rep.source == "night.csv"
    assert rep[0] == Sample(utc(1), 0.8, 2.5, 0.0, 6.0, 40.0, True)
    assert rep[1] == Sample(utc(1, 30), None, 3.0, None, None, None, None)
    assert rep[2].time == utc(2) and rep[2].seeing_arcsec == 1.1 and rep[2].dome_open is False


def test_csv_subset_of_columns_in_any_order():
    rep = parse_conditions("pwv_mm,time\n1.5,2026-03-10T01:00:00Z\n2.0,2026-03-10T02:00:00Z\n")
    assert [s.pwv_mm for s in rep] == [1.5, 2.0]
    assert rep[0].seeing_arcsec is None


def test_json_list_and_report_object():
    rows = [{"time": "2026-03-10T01:00:00Z", "seeing_arcsec": 0.7, "dome": "open"},
            {"time": "2026-03-10T02:00:00Z", "pwv_mm": 1.2, "seeing_arcsec": None}]
    rep = parse_conditions(json.dumps(rows))
    assert rep.format == "json" and rep.issued is None and len(rep) == 2
    assert rep[1].pwv_mm == 1.2 and rep[1].seeing_arcsec is None
    doc = {"issued": "2026-03-09T18:00:00Z", "source": "site mast forecast", "samples": rows}
    rep = parse_conditions(json.dumps(doc), "json", "fc.json")
    assert rep.issued == datetime(2026, 3, 9, 18, tzinfo=timezone.utc)
    assert rep.source == "site mast forecast"
    assert rep[0].dome_open is True


def test_csv_round_trip():
    samples = (Sample(utc(1), 0.8, 2.5, 0.1, 6.0, 40.0, True), Sample(utc(2), None, 3.25, None, 12.5, None, False))
    assert tuple(parse_conditions(samples_to_csv(samples))) == samples


# --------------------------------------------------------------------------- ingest: refusals

BAD_CSV = [
    # (rows, field named, row named)
    (["not-a-time,0.8,,,,,"], "time", 2),
    (["2026-03-10T01:00:00Z,0.8,,,,,", "2026-03-10T25:00:00Z,0.8,,,,,"], "time", 3),
    ([",0.8,,,,,"], "time", 2),
    (["2026-03-10T01:00:00Z,0.8,-0.1,,,,"], "pwv_mm", 2),
    (["2026-03-10T01:00:00Z,0,,,,,"], "seeing_arcsec", 2),
    (["2026-03-10T01:00:00Z,-1,,,,,"], "seeing_arcsec", 2),
    (["2026-03-10T01:00:00Z,25,,,,,"], "seeing_arcsec", 2),  # over the sanity limit
    (["2026-03-10T01:00:00Z,0.8,150,,,,"], "pwv_mm", 2),
    (["2026-03-10T01:00:00Z,0.8,,-0.2,,,"], "cloud_mag", 2),
    (["2026-03-10T01:00:00Z,0.8,,,-3,,"], "wind_ms", 2),
    (["2026-03-10T01:00:00Z,0.8,,,,101,"], "humidity_pct", 2),
    (["2026-03-10T01:00:00Z,0.8,,,,-1,"], "humidity_pct", 2),
    (["2026-03-10T01:00:00Z,abc,,,,,"], "seeing_arcsec", 2),
    (["2026-03-10T01:00:00Z,nan,,,,,"], "seeing_arcsec", 2),
    (["2026-03-10T01:00:00Z,0.8,,,,,ajar"], "dome", 2),
    (["2026-03-10T02:00:00Z,0.8,,,,,", "2026-03-10T01:00:00Z,0.8,,,,,"], "time", 3),  # unsorted
    (["2026-03-10T02:00:00Z,0.8,,,,,", "2026-03-10T02:00:00Z,0.9,,,,,"], "time", 3),  # duplicate
    (["2026-03-10T01:00:00Z,0.8,,,,,", "", "2026-03-10T01:00:00Z,0.9,,,,,"], "time", 4),  # line 3 blank
    (["2026-03-10T01:00:00Z,0.8,,,,"], "dome", 2),  # too few values
]


@pytest.mark.parametrize("rows,field,row", BAD_CSV)
def test_bad_csv_refused_naming_row_and_field(rows, field, row):
    with pytest.raises(InputError) as e:
        parse_conditions(csv_text(*rows), source_name="bad.csv")
    assert e.value.field == field
    assert e.value.row == row
    assert str(e.value).startswith(f"bad.csv: row {row}: {field}: ")


def test_offset_time_out_of_order_is_refused():
    # 02:30+02:00 is 00:30Z, before the first sample at 01:00Z
    with pytest.raises(InputError) as e:
        parse_conditions(csv_text("2026-03-10T01:00:00Z,0.8,,,,,", "2026-03-10T02:30:00+02:00,0.8,,,,,"))
    assert (e.value.field, e.value.row) == ("time", 3)
    assert "increasing" in e.value.message


def test_unknown_and_duplicate_columns_refused():
    with pytest.raises(InputError) as e:
        parse_conditions("time,seeing,pwv_mm\n2026-03-10T01:00:00Z,0.8,1\n")
    assert (e.value.field, e.value.row) == ("seeing", 1)
    assert "seeing_arcsec" in e.value.message  # lists the allowed columns
    with pytest.raises(InputError) as e:
        parse_conditions("time,pwv_mm,pwv_mm\n2026-03-10T01:00:00Z,1,1\n")
    assert e.value.field == "pwv_mm"
    with pytest.raises(InputError) as e:
        parse_conditions("seeing_arcsec\n0.8\n")
    assert e.value.field == "time"


@pytest.mark.parametrize("text", ["", "   \n\n", HEADER + "\n", HEADER + "\n\n\n", "[]", '{"samples": []}'])
def test_empty_files_refused(text):
    with pytest.raises(InputError) as e:
        parse_conditions(text, source_name="empty")
    assert e.value.field in ("file", "samples")
    assert "empty" in e.value.message or "no samples" in e.value.message


def test_size_limits_stated():
    with pytest.raises(InputError) as e:
        parse_conditions("x" * (MAX_BYTES + 1))
    assert str(MAX_BYTES) in e.value.message
    rows = [f"{datetime.fromtimestamp(T0 + i, timezone.utc).isoformat()}" for i in range(MAX_ROWS + 1)]
    with pytest.raises(InputError) as e:
        parse_conditions("time\n" + "\n".join(rows) + "\n")
    assert str(MAX_ROWS) in e.value.message and e.value.row == MAX_ROWS + 2


@pytest.mark.parametrize("doc,field,row", [
    ([{"time": "2026-03-10T01:00:00Z", "pwv_mm": -1}], "pwv_mm", 1),
    ([{"time": "2026-03-10T01:00:00Z"}, {"time": "2026-03-10T02:00:00Z", "seeing": 1}], "seeing", 2),
    ([{"time": "2026-03-10T01:00:00Z"}, {"time": "2026-03-10T00:00:00Z"}], "time", 2),
    ([{"time": "2026-03-10T01:00:00Z", "dome": True}], "dome", 1),
    ([{"time": "2026-03-10T01:00:00Z", "humidity_pct": True}], "humidity_pct", 1),
    ([{"seeing_arcsec": 0.8}], "time", 1),
    ([["2026-03-10T01:00:00Z", 0.8]], "sample", 1),
])
def test_bad_json_refused_naming_row_and_field(doc, field, row):
    with pytest.raises(InputError) as e:
        parse_conditions(json.dumps(doc), source_name="bad.json")
    assert (e.value.field, e.value.row) == (field, row)


def test_bad_json_report_object_refused():
    with pytest.raises(InputError) as e:
        parse_conditions('{"issued": "yesterday", "samples": [{"time": "2026-03-10T01:00:00Z"}]}')
    assert e.value.field == "issued"
    with pytest.raises(InputError) as e:
        parse_conditions('{"issuer": "x", "samples": []}')
    assert e.value.field == "issuer"
    with pytest.raises(InputError) as e:
        parse_conditions('{"samples": [{"time": "2026-03-10T01:00:00Z"}')
    assert e.value.field == "file" and "JSON" in e.value.message
    with pytest.raises(InputError) as e:
        parse_conditions("time\n2026-03-10T01:00:00Z\n", fmt="xml")
    assert e.value.field == "format"


# --------------------------------------------------------------------------- grid

def grid_times(n: int = 25, step: float = 600.0) -> np.ndarray:
    return T0 + np.arange(n) * step  # 00:00, 00:10, ... 04:00


def test_linear_interpolation_and_coverage():
    samples = [Sample(utc(1), seeing_arcsec=0.6, pwv_mm=2.0, cloud_mag=0.0),
               Sample(utc(2), seeing_arcsec=1.2, pwv_mm=4.0, cloud_mag=0.5)]
    g = conditions_on_grid(samples, grid_times(), DEFAULTS, report_id=7)
    i1, i130, i2 = 6, 9, 12  # 01:00, 01:30, 02:00
    assert g.seeing_arcsec[i1] == pytest.approx(0.6)
    assert g.seeing_arcsec[i130] == pytest.approx(0.9)
    assert g.seeing_arcsec[i1 + 1] == pytest.approx(0.7)
    assert g.pwv_mm[i130] == pytest.approx(3.0)
    assert g.cloud_mag[i2] == pytest.approx(0.5)
    assert g.covered[i1:i2 + 1].all()
    assert not g.covered[:i1].any() and not g.covered[i2 + 1:].any()
    # outside coverage: the conservative defaults
    assert (g.seeing_arcsec[:i1] == 1.5).all() and (g.pwv_mm[i2 + 1:] == 8.0).all()
    assert (g.cloud_mag[:i1] == 0.3).all()
    # quantities never reported: defaults everywhere, without clearing covered
    assert (g.wind_ms == 5.0).all() and (g.humidity_pct == 50.0).all() and g.dome_open.all()
    assert g.report_id == 7 and g.times_unix is not None and g.n_times == 25


def test_field_missing_in_some_samples_interpolates_between_those_that_have_it():
    samples = [Sample(utc(1), seeing_arcsec=0.6, pwv_mm=2.0), Sample(utc(2), seeing_arcsec=1.0),
               Sample(utc(3), seeing_arcsec=0.8, pwv_mm=6.0)]
    g = conditions_on_grid(samples, grid_times(), DEFAULTS)
    assert g.pwv_mm[12] == pytest.approx(4.0)  # 02:00: halfway between 2 (01:00) and 6 (03:00)
    assert g.seeing_arcsec[12] == pytest.approx(1.0)


def test_coverage_is_where_every_reported_quantity_is_covered():
    # seeing from 01:00 to 03:00, PWV only from 02:00 to 03:00
    samples = [Sample(utc(1), seeing_arcsec=0.6), Sample(utc(2), seeing_arcsec=0.7, pwv_mm=3.0),
               Sample(utc(3), seeing_arcsec=0.8, pwv_mm=3.0)]
    g = conditions_on_grid(samples, grid_times(), DEFAULTS)
    assert not g.covered[6:12].any()  # 01:00-01:50: PWV is the default there
    assert (g.pwv_mm[6:12] == 8.0).all() and g.seeing_arcsec[9] == pytest.approx(0.65)
    assert g.covered[12:19].all() and not g.covered[19:].any()


def test_wind_and_humidity_take_the_worse_neighbour_dome_holds_last_state():
    samples = [Sample(utc(1), wind_ms=10.0, humidity_pct=40.0, dome_open=True),
               Sample(utc(2), wind_ms=20.0, humidity_pct=90.0),
               Sample(utc(3), wind_ms=5.0, humidity_pct=30.0, dome_open=False)]
    g = conditions_on_grid(samples, grid_times(), DEFAULTS)
    assert g.wind_ms[6] == 10.0  # exactly at the 01:00 sample
    assert (g.wind_ms[7:18] == 20.0).all()  # 01:10 .. 02:50: the 20 m/s sample on either side
    assert g.wind_ms[18] == 5.0 and (g.wind_ms[19:] == 5.0).all()  # 03:00 sample, then default
    assert (g.humidity_pct[7:18] == 90.0).all()
    assert g.dome_open[:18].all()  # default before 01:00, open from 01:00 (02:00 says nothing)
    assert not g.dome_open[18:].any()  # closed at 03:00 and after: the last state holds


def test_no_samples_gives_defaults_uncovered():
    g = default_conditions(grid_times(), DEFAULTS)
    assert not g.covered.any() and (g.seeing_arcsec == 1.5).all() and g.dome_open.all()
    with pytest.raises(ValueError):
        conditions_on_grid([], np.array([[T0]]), DEFAULTS)


def test_samples_in_any_order_give_the_same_grid():
    samples = [Sample(utc(1), seeing_arcsec=0.6), Sample(utc(2), seeing_arcsec=1.2), Sample(utc(3), seeing_arcsec=0.9)]
    a = conditions_on_grid(samples, grid_times(), DEFAULTS)
    b = conditions_on_grid(samples[::-1], grid_times(), DEFAULTS)
    assert np.array_equal(a.seeing_arcsec, b.seeing_arcsec)


# --------------------------------------------------------------------------- change detection

def flat(n: int = 25, seeing: float = 0.8, pwv: float = 2.0, **kw) -> ConditionsGrid:
    vals = dict(seeing_arcsec=np.full(n, seeing), pwv_mm=np.full(n, pwv), cloud_mag=np.zeros(n),
                wind_ms=np.full(n, 5.0), humidity_pct=np.full(n, 40.0), dome_open=np.ones(n, bool),
                covered=np.ones(n, bool), times_unix=grid_times(n))
    vals.update(kw)
    return ConditionsGrid(**vals)


def test_no_material_change_is_empty():
    old = flat()
    new = flat(seeing_arcsec=np.full(25, 0.8) + 0.1, pwv_mm=np.full(25, 2.5))
    assert compare(old, new, 0, 0.2, 1.0, safety=SAFETY) == []
    assert compare(old, old, 0, 0.2, 1.0) == []


def test_seeing_rise_named_with_amount_and_time():
    s = np.full(25, 0.8)
    s[15] = 1.3  # 02:30
    msgs = compare(flat(), flat(seeing_arcsec=s), 0, 0.2, 1.0)
    assert len(msgs) == 1
    assert msgs[0].startswith("seeing rose by 0.50 arcsec at 02:30 UTC")
    # a change before from_index does not count
    assert compare(flat(), flat(seeing_arcsec=s), 16, 0.2, 1.0) == []


def test_seeing_improvement_and_pwv_change_reported():
    s = np.full(25, 0.8)
    s[20:] = 0.5
    p = np.full(25, 2.0)
    p[3] = 4.0
    msgs = compare(flat(), flat(seeing_arcsec=s, pwv_mm=p), 0, 0.2, 1.0)
    assert any(m.startswith("seeing fell by 0.30 arcsec at 03:20 UTC") for m in msgs)
    assert any(m.startswith("PWV rose by 2.0 mm at 00:30 UTC") for m in msgs)


def test_dome_and_weather_closure_reported_first():
    dome = np.ones(25, bool)
    dome[12:18] = False  # 02:00 .. 02:50
    wind = np.full(25, 5.0)
    wind[20:] = 18.0
    s = np.full(25, 0.8)
    s[0] = 1.5
    msgs = compare(flat(), flat(dome_open=dome, wind_ms=wind, seeing_arcsec=s), 0, 0.2, 1.0, safety=SAFETY)
    assert msgs[0] == "dome closed from 02:00 UTC until 03:00 UTC"
    assert msgs[1] == "wind over the 15 m/s closure limit from 03:20 UTC to the end of the grid"
    assert msgs[2].startswith("seeing rose")
    back = compare(flat(dome_open=dome), flat(), 0, 0.2, 1.0)
    assert back == ["dome reopened from 02:00 UTC until 03:00 UTC"]
    # without safety limits, wind alone is not judged
    assert compare(flat(), flat(wind_ms=wind), 0, 0.2, 1.0) == []


def test_compare_refuses_grids_of_different_length_and_labels_steps_without_times():
    with pytest.raises(ValueError):
        compare(flat(25), flat(24), 0, 0.2, 1.0)
    s = np.full(25, 0.8)
    s[5] = 1.5
    old, new = flat(times_unix=None), flat(seeing_arcsec=s, times_unix=None)
    assert "at step 5" in compare(old, new, 2, 0.2, 1.0)[0]


def test_wrong_number_of_values_refused():
    with pytest.raises(InputError) as e:
        parse_conditions("time,seeing_arcsec\n2026-03-10T01:00:00Z,0.8\n2026-03-10T02:00:00Z,0.8,1\n")
    assert (e.value.field, e.value.row) == ("columns", 3)
    assert "3 values" in e.value.message and "2 columns" in e.value.message
