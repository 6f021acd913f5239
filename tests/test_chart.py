"""The plan chart: what an observer at 3 a.m. needs to see, checked on the drawing itself.

A real plan (tests/test_web.py's invented queue, built by the real planner) drawn in both
styles; elements are found by their SVG ids and label boxes measured in pixels.
"""

from __future__ import annotations

import copy
import io
import itertools
import re
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from scheduler.db.session import open_db
from scheduler.model.config import load_config
from scheduler.model.errors import InputError
from scheduler.report import chart
from test_web import make_planned_folder


@pytest.fixture(scope="module")
def planned(tmp_path_factory, _initialised_template):
    return make_planned_folder(tmp_path_factory.mktemp("chart"), _initialised_template)


@pytest.fixture(scope="module")
def inputs(planned):
    """(doc, night, config, samples, sky) of the plan, read once."""
    from scheduler.db import plans, store
    from scheduler.report.export import plan_document
    from scheduler.sky.night import compute_night

    config = load_config(planned / "observatory.toml")
    db = open_db(str(planned / "nightplan.sqlite"), create_file=False)
    with db.session() as s:
        plan = plans.get_plan(s)
        night = compute_night(config.site, plan.night, config.planning.step_s)
        doc = plan_document(plans.stored_plan(s, plan), config, night)
        samples = store.report_samples(s, doc["plan"]["conditions"]["report_id"])
    db.dispose()
    keys = list(dict.fromkeys((e["ra_deg"], e["dec_deg"]) for e in doc["entries"]))
    return doc, night, config, samples, keys


def _render(inputs, doc=None, **kw) -> bytes:
    d, night, config, samples, _ = inputs
    return chart.render_chart(doc or d, night, config, samples, **kw)


def _t(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


# --------------------------------------------------------------------------- palette

def _luminance(hex_colour: str) -> float:
    """WCAG 2 relative luminance of an sRGB colour (W3C formula)."""
    from matplotlib.colors import to_rgb

    c = np.array(to_rgb(hex_colour))
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(lin @ [0.2126, 0.7152, 0.0722])


@pytest.mark.parametrize("style", ["day", "night"])
def test_band_palette_survives_red_green_colour_blindness(style):
    """Every pair of band colours, and each band against the Moon, stays apart for full
    deuteranopia and protanopia. Reference: colorspacious (an independent implementation of
    the Machado, Oliveira & Fernandes 2009 colour-vision model and the CAM02-UCS colour
    difference). 10 CAM02-UCS units: our threshold (common practice: ~2 is just noticeable,
    ~10 is clearly different at a glance)."""
    from colorspacious import cspace_convert, deltaE
    from matplotlib.colors import to_rgb

    st = chart.STYLES[style]
    colours = list(st.bands) + [st.moon]
    rgb = np.array([to_rgb(c) for c in colours])
    for kind in (None, "deuteranomaly", "protanomaly"):
        seen = rgb if kind is None else np.clip(cspace_convert(rgb, {"name": "sRGB1+CVD", "cvd_type": kind,
                                                                     "severity": 100}, "sRGB1"), 0, 1)
        for i, j in itertools.combinations(range(len(colours)), 2):
            d = float(deltaE(seen[i], seen[j], input_space="sRGB1"))
            assert d >= 10.0, (style, kind, colours[i], colours[j], d)
    # and the Moon is the only grey: every band has colour
    for c in st.bands:
        jab = cspace_convert(to_rgb(c), "sRGB1", "CAM02-UCS")
        assert float(np.hypot(jab[1], jab[2])) > 12, c


def test_band_colours_follow_wavelength_and_fall_back_for_many_bands(inputs):
    _, _, config, _, _ = inputs
    cols = chart.band_colours(config, "night")
    order = sorted(config.bands, key=lambda b: config.bands[b].wavelength_um)
    assert [cols[b] for b in order] == list(chart.NIGHT.bands[:len(order)])
    assert len(set(cols.values())) == len(cols)
    with pytest.raises(InputError):
        chart.band_colours(config, "dusk")


@pytest.mark.parametrize("style", ["day", "night"])
def test_twilight_gets_lighter_as_the_sky_gets_brighter(style):
    shades = chart.twilight_shades(style)
    assert [s[:2] for s in shades] == [(-90.0, -18.0), (-18.0, -12.0), (-12.0, -6.0), (-6.0, 90.0)]
    lum = [_luminance(c) for _, _, c, _ in shades]
    assert all(a < b for a, b in zip(lum, lum[1:])), lum
    if style == "night":
        assert max(lum) < 0.03 and _luminance(chart.NIGHT.background) < 0.01  # nothing bright


# --------------------------------------------------------------------------- pure pieces

def test_time_labels_carry_the_date_across_midnight():
    utc = timezone.utc
    ticks = [datetime(2026, 12, 16, 22, tzinfo=utc) + timedelta(hours=k) for k in range(5)]
    assert chart.tick_labels(ticks, utc) == ["22:00\n16 Dec", "23:00", "00:00\n17 Dec", "01:00", "02:00"]
    # the same ticks in the site's local time (UTC-3): midnight falls on a different tick
    local = chart.tick_labels(ticks, ZoneInfo("America/Argentina/Catamarca"))
    assert local == ["19:00\n16 Dec", "20:00", "21:00", "22:00", "23:00"]
    later = chart.tick_labels([t + timedelta(hours=5) for t in ticks], ZoneInfo("America/Argentina/Catamarca"))
    assert later == ["00:00\n17 Dec", "01:00", "02:00", "03:00", "04:00"]


def test_entry_state_and_repeat_groups():
    e = {"request_id": 5, "start": "2026-12-17T02:00:00Z", "end": "2026-12-17T02:30:00Z"}
    at = lambda h, m: datetime(2026, 12, 17, h, m, tzinfo=timezone.utc)  # noqa: E731
    assert [chart.entry_state(e, t) for t in (at(1, 59), at(2, 0), at(2, 29), at(2, 30))] == \
        ["coming", "in progress", "in progress", "past"]
    assert chart.entry_state(e, None) == "coming"
    reps = [{"request_id": 5, "start": f"2026-12-17T0{h}:00:00Z", "end": f"2026-12-17T0{h}:20:00Z"} for h in (2, 3, 6)]
    other = {"request_id": 6, "start": "2026-12-17T02:20:00Z", "end": "2026-12-17T02:40:00Z"}
    groups = chart.label_groups(reps + [other], min_gap_s=2 * 3600)
    assert sorted([(g[0]["request_id"], len(g)) for g in groups]) == [(5, 1), (5, 2), (6, 1)]


def test_place_boxes_never_overlap():
    rng = np.random.default_rng(7)
    wanted = [(float(x), float(y), 30.0, 14.0) for x, y in zip(rng.uniform(0, 300, 60), rng.uniform(0, 200, 60))]
    spots = chart.place_boxes(wanted, (0, 0, 1000, 1000), 16.0)
    boxes = [(x - 15, y, x + 15, y + 14) for x, y in spots]
    for a, b in itertools.combinations(boxes, 2):
        assert not chart._overlaps(a, b), (a, b)
    assert all(0 <= b[1] and b[3] <= 1000 for b in boxes)


def test_chart_format_by_extension():
    assert [chart.chart_format(p) for p in ("a.png", "b.SVG", "dir.x/c.pdf")] == ["png", "svg", "pdf"]
    for bad in ("a.jpg", "plan", "dir.png/plan"):
        with pytest.raises(InputError) as e:
            chart.chart_format(bad)
        assert e.value.field == "output" and ".svg" in str(e.value)


# --------------------------------------------------------------------------- the drawing

def _marked_doc(inputs):
    """The plan with its second entry in progress at ``now``, kept from a previous plan, and the
    first entry's request repeated twice right after it (repeats close enough to crowd)."""
    doc = copy.deepcopy(inputs[0])
    entries = doc["entries"]
    assert len(entries) >= 3
    entries[1]["fixed"] = True
    now = _t(entries[1]["start"]) + timedelta(minutes=3)
    first = entries[0]
    span = _t(first["end"]) - _t(first["start"])
    for k in (1, 2):
        rep = dict(first, execution=k)
        rep["start"] = (_t(first["start"]) - k * (span + timedelta(minutes=1))).strftime("%Y-%m-%dT%H:%M:%SZ")
        rep["end"] = (_t(rep["start"]) + span).strftime("%Y-%m-%dT%H:%M:%SZ")
        entries.insert(0, rep)
    entries.sort(key=lambda e: e["start"])
    return doc, now, first["request_id"], entries


@pytest.mark.slow
def test_svg_marks_now_in_progress_frozen_and_ids(inputs):
    doc, now, rep_id, entries = _marked_doc(inputs)
    svg = _render(inputs, doc, now=now, fmt="svg").decode()
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg
    cur = next(e for e in entries if _t(e["start"]) <= now < _t(e["end"]))
    assert 'id="now-line"' in svg and 'id="now-label"' in svg
    assert f'id="inprogress-{cur["request_id"]}-{cur["execution"]}"' in svg
    assert f'id="frozen-{cur["request_id"]}-{cur["execution"]}"' in svg
    assert len(re.findall(r'id="frozen-', svg)) == sum(bool(e["fixed"]) for e in entries)
    # every entry is a block on the timeline; ids are written on the blocks that can hold them
    for e in entries:
        assert f'id="block-{e["request_id"]}-{e["execution"]}"' in svg
    on_blocks = re.findall(r'id="blocklabel-(\d+)-\d+"', svg)
    assert len(on_blocks) >= len(entries) - 3 and set(map(int, on_blocks)) <= {e["request_id"] for e in entries}
    # the Moon line and the measured/forecast strip are there
    assert 'id="moon"' in svg
    # no now line when the clock is outside the night
    outside = _render(inputs, doc, now=now - timedelta(days=2), fmt="svg").decode()
    assert 'id="now-line"' not in outside


def test_labels_never_overlap_and_close_repeats_share_one(inputs):
    doc, now, rep_id, entries = _marked_doc(inputs)
    d, night, config, samples, _ = inputs
    fig = chart.build_figure(doc, night, config, samples, now=now, style="night")
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    labels = [t for ax in fig.axes for t in ax.texts if (t.get_gid() or "").startswith("label-")]
    assert labels
    boxes = [t.get_bbox_patch().get_window_extent(renderer) for t in labels]
    for (a, ta), (b, tb) in itertools.combinations(zip(boxes, labels), 2):
        assert not a.overlaps(b), (ta.get_text(), tb.get_text())
    mine = [t.get_text() for t in labels if t.get_gid() == f"label-{rep_id}"]
    assert len(mine) < sum(e["request_id"] == rep_id for e in entries)  # the three executions do not get three labels
    assert any("×" in m for m in mine), mine
    # every request in the plan has its id on the altitude panel
    assert {int(t.get_gid().split("-")[1]) for t in labels} == {e["request_id"] for e in entries}
    # the axes show dates: the local axis and the UTC axis each name a date
    tick_texts = [t.get_text() for ax in fig.axes for axis in (ax.xaxis,) for t in axis.get_ticklabels()]
    tick_texts += [t.get_text() for ax in fig.axes for c in ax.child_axes for t in c.xaxis.get_ticklabels()]
    assert any("17 Dec" in t for t in tick_texts) and any("16 Dec" in t for t in tick_texts)


@pytest.mark.slow
def test_png_night_style_is_dark_and_day_style_light(inputs):
    import matplotlib.image as mpimg

    doc, now, _, _ = _marked_doc(inputs)
    night_png = _render(inputs, doc, now=now, style="night", fmt="png")
    day_png = _render(inputs, doc, now=now, style="day", fmt="png")
    assert night_png[:8] == day_png[:8] == b"\x89PNG\r\n\x1a\n"
    lum = {}
    for name, data in (("night", night_png), ("day", day_png)):
        img = mpimg.imread(io.BytesIO(data), format="png")[..., :3]
        lin = np.where(img <= 0.04045, img / 12.92, ((img + 0.055) / 1.055) ** 2.4)
        lum[name] = lin @ np.array([0.2126, 0.7152, 0.0722])
        assert img.shape[:2] == (990, 1760)
    # night: a dark page; hardly any pixel is bright (WCAG luminance above 0.4)
    assert float(np.median(lum["night"])) < 0.02
    assert float((lum["night"] > 0.4).mean()) < 0.005
    assert float(np.median(lum["day"])) > 0.5


@pytest.mark.slow
def test_pdf_and_svg_bytes(inputs):
    pdf = _render(inputs, fmt="pdf")
    svg = _render(inputs, fmt="svg")
    assert pdf.startswith(b"%PDF-") and b"%%EOF" in pdf[-64:]
    assert b"<svg" in svg[:400]
    with pytest.raises(InputError):
        _render(inputs, fmt="jpg")


@pytest.mark.slow
def test_plan_chart_command_writes_by_extension(planned):
    from conftest import run_cli

    for name, magic in (("c.png", b"\x89PNG"), ("c.svg", b"<?xml"), ("c.pdf", b"%PDF")):
        r = run_cli("plan", "chart", "-o", name, "--style", "night", "--at", "2026-12-17T02:00:00Z", cwd=planned)
        assert r.returncode == 0, r.stderr
        assert (planned / name).read_bytes().startswith(magic)
    assert b'id="now-line"' in (planned / "c.svg").read_bytes()
    bad = run_cli("plan", "chart", "-o", "c.jpg", cwd=planned)
    assert bad.returncode == 2 and "output" in bad.stderr and not (planned / "c.jpg").exists()
