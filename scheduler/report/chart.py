"""The plan chart: one picture a queue observer reads at a glance on a control-room screen.

`nightplan plan chart -o FILE` writes it as PNG, SVG or PDF (by the file's extension); the
observer's page shows the same drawing as SVG.

Top panel: altitude against time (UTC below, site local time above, with the date wherever
it changes) of every planned target, its whole track thin (once per target, however many
repeats) and each planned entry thick, labelled with the request id (a request's repeats that
would crowd share one label, "17 ×2"; labels never overlap); twilight shaded lighter as the sky
gets brighter; the Moon dashed grey; the telescope's altitude limits; a "now" line. Middle
row: the timeline, one block per entry with its request id, the entry in progress outlined
and entries kept from the previous plan (in progress or frozen) hatched. Bottom strip: the
seeing and PWV the plan assumed (forecast), measured samples as dots, times the forecast did
not cover (defaults used) hatched and dome closures marked.

Two styles: ``day`` (white paper) and ``night`` (dark background, dim red text, nothing
bright: for eyes adapted to the dark). Band colours stay distinguishable for red-green colour
blindness (deuteranopia, protanopia) and from the Moon's grey in both styles
(tests/test_chart.py checks this with an independent colour-vision simulation).

Matplotlib's object API (no pyplot, no display, no global state).
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Mapping, Sequence
from zoneinfo import ZoneInfo

import numpy as np

from scheduler.conditions.grid import conditions_on_grid
from scheduler.model.config import ObservatoryConfig
from scheduler.model.errors import InputError
from scheduler.model.timegrid import runs
from scheduler.sky.night import Night

WIDTH_IN, HEIGHT_IN, DPI = 16.0, 9.0, 110  # 1760 x 990 px: a console screen, no scrolling
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}


def _t(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


def chart_format(path: str) -> str:
    """The file format a chart file name asks for (png, svg or pdf), else an InputError."""
    ext = "." + path.rsplit(".", 1)[-1].lower() if "." in path.rsplit("/", 1)[-1] else ""
    if ext not in FORMATS:
        raise InputError("output", f"{path!r}: the chart is written as PNG, SVG or PDF; give a file name ending "
                                   "in .png, .svg or .pdf")
    return FORMATS[ext]


# --------------------------------------------------------------------------- styles

@dataclass(frozen=True)
class Style:
    name: str
    background: str  # figure and daylight
    shades: tuple[str, str, str, str]  # night, astronomical, nautical, civil twilight: lighter as the sky brightens
    text: str
    muted: str  # secondary text, frames
    grid: str
    accent: str  # the now line, the entry in progress
    moon: str
    limit: str  # telescope limits
    closure: str
    seeing: str
    pwv: str
    bands: tuple[str, ...]  # in wavelength order


# Band colours were picked by farthest-point search in CAM02-UCS over the normal view and the
# simulated deuteranope and protanope views at once (with the background and the Moon's grey as
# fixed points), then ordered by hue; the night set is also capped in lightness.
DAY = Style(
    name="day", background="#ffffff", shades=("#c9ced8", "#d8dce4", "#e6e9ee", "#f2f4f7"),
    text="#1a1a1a", muted="#555555", grid="#ffffff", accent="#c00000", moon="#8f8f8f", limit="#555555",
    closure="#d62728", seeing="#1f4e9c", pwv="#1a8a5a",
    bands=("#b45aff", "#3c6987", "#78b478", "#690f00", "#783c4b", "#b4a500", "#87692d", "#4bb4d2", "#780fd2",
           "#4b1e78"),
)
NIGHT = Style(
    name="night", background="#0e0e13", shades=("#0e0e13", "#15151c", "#1d1d26", "#272731"),
    text="#b04848", muted="#7a3a3a", grid="#241414", accent="#d04040", moon="#858585", limit="#5a3030",
    closure="#8a2020", seeing="#7878ff", pwv="#a59600",
    bands=("#7800f0", "#4b78b4", "#787800", "#e12d5a", "#784b78", "#a59600", "#695a1e", "#3ca5e1", "#7878ff",
           "#5aa5b4"),
)
STYLES = {"day": DAY, "night": NIGHT}


def style_of(name: str) -> Style:
    try:
        return STYLES[name]
    except KeyError:
        raise InputError("style", f"{name!r} is not a chart style; allowed: day, night") from None


def band_colours(config: ObservatoryConfig, style: str = "day") -> dict[str, Any]:
    """One colour per band, in wavelength order (more bands than the palette: a colour map)."""
    st = style_of(style)
    names = sorted(config.bands, key=lambda b: config.bands[b].wavelength_um)
    if len(names) <= len(st.bands):
        return {b: st.bands[i] for i, b in enumerate(names)}
    from matplotlib import colormaps

    cmap = colormaps["cividis"]  # perceptually ordered and readable with red-green colour blindness
    n = max(len(names) - 1, 1)
    return {b: cmap(0.1 + 0.8 * i / n) for i, b in enumerate(names)}


def twilight_shades(style: str = "day") -> list[tuple[float, float, str, str]]:
    """(Sun altitude from, to, colour, label), darkest sky first: each shade lighter than the one before."""
    st = style_of(style)
    return [(-90.0, -18.0, st.shades[0], "night (Sun below -18°)"),
            (-18.0, -12.0, st.shades[1], "astronomical twilight"),
            (-12.0, -6.0, st.shades[2], "nautical twilight"),
            (-6.0, 90.0, st.shades[3], "civil twilight")]


# --------------------------------------------------------------------------- pieces (pure)

def tick_labels(times: Sequence[datetime], tz) -> list[str]:
    """'HH:MM' in ``tz``, with the date added under the first tick and wherever the date changes."""
    out, last = [], None
    for t in times:
        loc = t.astimezone(tz)
        day = loc.date()
        out.append(loc.strftime("%H:%M") + (loc.strftime("\n%d %b") if day != last else ""))
        last = day
    return out


def entry_state(e: dict[str, Any], now: datetime | None) -> str:
    """'past', 'in progress' or 'coming' for a plan entry at ``now`` (no now: 'coming')."""
    if now is None:
        return "coming"
    if _t(e["end"]) <= now:
        return "past"
    return "in progress" if _t(e["start"]) <= now else "coming"


def label_groups(entries: Sequence[dict[str, Any]], min_gap_s: float) -> list[list[dict[str, Any]]]:
    """Entries of one request closer than ``min_gap_s`` (centre to centre) share one label."""
    by_req: dict[int, list] = {}
    for e in sorted(entries, key=lambda e: e["start"]):
        by_req.setdefault(e["request_id"], []).append(e)
    groups = []
    for rid, es in by_req.items():
        cur = [es[0]]
        for e in es[1:]:
            c_prev = (_t(cur[-1]["start"]).timestamp() + _t(cur[-1]["end"]).timestamp()) / 2
            c_this = (_t(e["start"]).timestamp() + _t(e["end"]).timestamp()) / 2
            if c_this - c_prev < min_gap_s:
                cur.append(e)
            else:
                groups.append(cur)
                cur = [e]
        groups.append(cur)
    return groups


def _overlaps(a, b) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def place_boxes(wanted: Sequence[tuple[float, float, float, float]], bounds: tuple[float, float, float, float],
                step: float) -> list[tuple[float, float]]:
    """Place boxes (x centre, y bottom, width, height; pixels) without overlap: each tries its own
    spot, then steps up and down alternately, and stays inside ``bounds`` (x0, y0, x1, y1).
    Returns the (x centre, y bottom) chosen for each, in order."""
    placed: list[tuple[float, float, float, float]] = []
    out = []
    x0b, y0b, x1b, y1b = bounds
    for xc, yb, w, h in wanted:
        xc = min(max(xc, x0b + w / 2), x1b - w / 2)
        choice = None
        for k in range(0, 80):
            dy = step * ((k + 1) // 2) * (1 if k % 2 == 0 else -1)
            y = yb + dy
            if y < y0b or y + h > y1b:
                continue
            box = (xc - w / 2, y, xc + w / 2, y + h)
            if not any(_overlaps(box, p) for p in placed):
                choice = box
                break
        if choice is None:  # nowhere free: keep the wanted spot (never seen on a real night)
            choice = (xc - w / 2, min(max(yb, y0b), y1b - h), xc + w / 2, min(max(yb, y0b), y1b - h) + h)
        placed.append(choice)
        out.append((xc, choice[1]))
    return out


# --------------------------------------------------------------------------- the figure

class _Target:
    """What sky_for needs of an entry's target: its position, and its track if it moves."""

    def __init__(self, ra: float, dec: float, track=None):
        self.ra_deg, self.dec_deg, self.track = ra, dec, track


def _entry_targets(entries: Sequence[dict[str, Any]], tracks: Mapping[int, Any] | None) -> list[_Target]:
    """One target per entry: a moving target (the document's body, or a table in ``tracks`` by
    request id) follows its track through the night; a fixed one sits at its position."""
    out = []
    for e in entries:
        track = (tracks or {}).get(e["request_id"]) or e.get("body")
        out.append(_Target(float(e["ra_deg"]), float(e["dec_deg"]), track))
    return out


def build_figure(doc: dict[str, Any], night: Night, config: ObservatoryConfig, samples: Sequence, *,
                 sky=None, now: datetime | None = None, style: str = "day", measured: Sequence = (),
                 tracks: Mapping[int, Any] | None = None):
    """The chart as a matplotlib Figure (Agg canvas attached, layout fixed)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib import dates as mdates
    from matplotlib import ticker
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch, Rectangle

    from scheduler.sky.ephemeris import sky_for

    st = style_of(style)
    tz = ZoneInfo(config.site.timezone)
    entries = sorted(doc["entries"], key=lambda e: e["start"])
    placed = [e for e in entries if e["ra_deg"] is not None]
    sky, rows = sky_for(config.site, night, _entry_targets(placed, tracks), sky)
    row_by_entry = {id(e): int(r) for e, r in zip(placed, rows)}
    times = [datetime.fromtimestamp(float(x), tz=timezone.utc) for x in night.times_unix]
    x = mdates.date2num(times)
    step_d = night.step_s / 86400.0
    x_end = x[-1] + step_d
    cond = conditions_on_grid(samples, night.times_unix, config.defaults)
    colours = band_colours(config, style)
    x_now = mdates.date2num(now) if now is not None else None
    if x_now is not None and not (x[0] <= x_now <= x_end):
        x_now = None  # the line only inside the night; entries still show past / in progress / coming

    fig = Figure(figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI, layout="constrained", facecolor=st.background)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(3, 1, height_ratios=[4.0, 0.62, 1.15])
    ax = fig.add_subplot(gs[0])
    axt = fig.add_subplot(gs[1], sharex=ax)
    axc = fig.add_subplot(gs[2], sharex=ax)
    for a in (ax, axt, axc):
        a.set_facecolor(st.background)
        for sp in a.spines.values():
            sp.set_color(st.muted)
        a.tick_params(colors=st.text, labelcolor=st.text)

    # Twilight: lighter as the sky gets brighter (darkest = full night).
    sun = sky.sun_alt_deg
    handles = []
    for lo, hi, colour, label in twilight_shades(style):
        for a, b in runs((sun > lo) & (sun <= hi)):
            x1 = x[b] if b < len(x) else x_end
            for axis in (ax, axt, axc):
                axis.axvspan(x[a], x1, color=colour, lw=0, zorder=0)
        handles.append(Patch(facecolor=colour, edgecolor=st.muted, lw=0.5, label=label))

    # Telescope limits.
    tel = config.telescope
    ax.axhspan(0, tel.min_altitude_deg, color=st.limit, alpha=0.25, lw=0, zorder=1)
    ax.axhline(tel.min_altitude_deg, color=st.limit, lw=1.2, ls="--", zorder=2)
    ax.text(x[0], tel.min_altitude_deg + 0.8, f" telescope lower limit {tel.min_altitude_deg:g}°", fontsize=10,
            color=st.muted, va="bottom", zorder=6)
    if tel.max_altitude_deg < 90:
        ax.axhspan(tel.max_altitude_deg, 90, color=st.limit, alpha=0.25, lw=0, zorder=1)
        ax.text(x[-1], 0.5 * (tel.max_altitude_deg + 90), f"zenith blind spot > {tel.max_altitude_deg:g}° ",
                fontsize=9, color=st.muted, ha="right", va="center", zorder=6)

    # Moon: grey and dashed, unlike any band.
    illum = float(sky.moon_illum[len(sky.moon_illum) // 2]) if len(sky.moon_illum) else 0.0
    moon = np.where(sky.moon_alt_deg > -2, sky.moon_alt_deg, np.nan)
    (mline,) = ax.plot(x, moon, color=st.moon, lw=2.4, ls=(0, (6, 3)), zorder=3,
                       label=f"Moon altitude ({100 * illum:.0f} % lit)")
    mline.set_gid("moon")
    handles.append(mline)

    # Targets: one thin whole-night track per target, one thick segment per entry.
    alts: dict[int, np.ndarray] = {}
    for e in entries:
        r = row_by_entry.get(id(e))
        if r is None or r in alts:
            continue
        alt = np.asarray(sky.alt_deg[r], dtype=np.float64)
        alts[r] = np.where(alt > -1, alt, np.nan)
        ax.plot(x, alts[r], color=colours.get(e["band"], st.text), lw=0.8, alpha=0.45, zorder=3)
    seg_top: dict[int, tuple[float, float]] = {}  # id(entry) -> (x middle, top altitude)
    for e in entries:
        r = row_by_entry.get(id(e))
        if r is None:
            continue
        c = colours.get(e["band"], st.text)
        state = entry_state(e, now)
        i0 = min(night.step_of(_t(e["start"])), night.n_times - 1)
        i1 = max(min(night.step_of(_t(e["end"])), night.n_times - 1), i0 + 1)
        seg = slice(i0, min(i1 + 1, len(x)))
        alt = alts[r]
        if state == "in progress":
            ax.plot(x[seg], alt[seg], color=st.accent, lw=10, solid_capstyle="butt", zorder=4, alpha=0.8)
        ax.plot(x[seg], alt[seg], color=c, lw=5.5, solid_capstyle="butt", zorder=5,
                alpha=0.45 if state == "past" else 1.0)
        ym = float(np.nanmax(alt[seg])) if np.isfinite(alt[seg]).any() else tel.min_altitude_deg
        seg_top[id(e)] = (0.5 * (x[seg.start] + x[seg.stop - 1]), ym)

    ax.set_ylim(0, 90)
    ax.set_yticks(range(0, 91, 10))
    ax.set_ylabel("altitude (deg)", fontsize=12, color=st.text)
    ax.grid(True, color=st.grid, lw=0.6, alpha=0.6, zorder=1)
    ax.set_xlim(x[0], x_end)
    ax.tick_params(labelsize=11, labelbottom=False)

    # The timeline row.
    axt.set_ylim(0, 1)
    axt.set_yticks([])
    axt.tick_params(labelbottom=False)
    axt.set_ylabel("entries", fontsize=10, color=st.text, rotation=0, ha="right", va="center")
    block_artists = []
    for e in entries:
        x0, x1 = mdates.date2num(_t(e["start"])), mdates.date2num(_t(e["end"]))
        state = entry_state(e, now)
        c = colours.get(e["band"], st.text)
        rect = Rectangle((x0, 0.12), x1 - x0, 0.76, facecolor=c, edgecolor=st.background, lw=0.8, zorder=5,
                         alpha=0.5 if state == "past" else 1.0)
        rect.set_gid(f"block-{e['request_id']}-{e['execution']}")
        axt.add_patch(rect)
        if e.get("fixed"):
            hatch = Rectangle((x0, 0.12), x1 - x0, 0.76, facecolor="none", edgecolor=st.background, lw=0,
                              hatch="///", zorder=6)
            hatch.set_gid(f"frozen-{e['request_id']}-{e['execution']}")
            axt.add_patch(hatch)
        if state == "in progress":
            ring = Rectangle((x0, 0.04), x1 - x0, 0.92, facecolor="none", edgecolor=st.accent, lw=2.6, zorder=7)
            ring.set_gid(f"inprogress-{e['request_id']}-{e['execution']}")
            axt.add_patch(ring)
        block_artists.append((e, x0, x1))
    closed = ~cond.dome_open | (cond.wind_ms > config.safety.max_wind_ms) | (cond.humidity_pct > config.safety.max_humidity_pct)
    for a, b in runs(closed):
        x1 = x[b] if b < len(x) else x_end
        axt.axvspan(x[a], x1, color=st.closure, alpha=0.35, lw=0, zorder=4)
        ax.axvspan(x[a], x1, ymin=0, ymax=tel.min_altitude_deg / 90, color=st.closure, alpha=0.3, lw=0, zorder=2)
        ax.text(0.5 * (x[a] + x1), 0.5 * tel.min_altitude_deg, "dome\nclosed", fontsize=9, ha="center",
                va="center", color=st.text, zorder=6)

    # Legends sit in the band below the telescope's limit, where no entry can be.
    present = sorted({e["band"] for e in entries if e["band"]}, key=lambda b: config.bands[b].wavelength_um
                     if b in config.bands else math.inf)
    band_handles = [Patch(color=colours[b], label=f"{b} {config.bands[b].wavelength_um:g} µm")
                    for b in present if b in colours]
    marks = [Patch(facecolor=st.muted, edgecolor=st.background, hatch="///", label="kept from the previous plan"),
             Patch(facecolor="none", edgecolor=st.accent, lw=2.2, label="in progress")]
    if x_now is not None:
        marks.append(Line2D([], [], color=st.accent, lw=1.8, label="now"))
    legend_kw = {"fontsize": 9.5, "framealpha": 0.95, "borderaxespad": 0.2, "facecolor": st.background,
                 "edgecolor": st.muted, "labelcolor": st.text}
    leg1 = ax.legend(handles=handles + marks, loc="lower left", bbox_to_anchor=(0.0, 0.0), ncol=3, **legend_kw)
    ax.add_artist(leg1)
    if band_handles:
        ax.legend(handles=band_handles, loc="lower right", bbox_to_anchor=(1.0, 0.0),
                  ncol=min(len(band_handles), 5), **legend_kw)

    # Time axes: UTC below, local time above; the date wherever it changes (nights cross midnight).
    def dated(zone):
        class DatedHours(ticker.Formatter):
            def __call__(self, v, pos=None):
                return tick_labels([mdates.num2date(v)], zone)[0]

            def format_ticks(self, values):
                return tick_labels([mdates.num2date(v) for v in values], zone)
        return DatedHours()

    top = ax.secondary_xaxis("top")
    top.xaxis.set_major_locator(mdates.HourLocator(tz=timezone.utc))
    top.xaxis.set_major_formatter(dated(tz))
    top.set_xlabel(f"local time ({config.site.timezone})", fontsize=11, color=st.text)
    top.tick_params(labelsize=10, colors=st.text, labelcolor=st.text)
    top.spines["top"].set_color(st.muted)

    p, sm = doc["plan"], doc["summary"]
    gap = f"{100 * p['gap']:.1f} %" if p["gap"] is not None else "-"
    ax.set_title(f"Plan v{p['version']}, night of {doc['night']['date']}, {doc['site']['name']}: {sm['entries']} entries, "
                 f"{sm['dark_hours_used']:.1f} of {sm['dark_hours']:.1f} dark hours used; solver {p['solver_status']}, "
                 f"gap {gap}\nAdvisory: the observatory's interlocks and licensed operators decide; local rules prevail.",
                 fontsize=12.5, loc="left", color=st.text)

    # Conditions strip.
    axc.plot(x, cond.seeing_arcsec, color=st.seeing, lw=2.2)
    axc.set_ylabel("seeing (\")", color=st.seeing, fontsize=11)
    axc.tick_params(axis="y", colors=st.seeing, labelcolor=st.seeing, labelsize=10)
    m_see = [(mdates.date2num(m.time), m.seeing_arcsec) for m in measured if m.seeing_arcsec is not None]
    m_pwv = [(mdates.date2num(m.time), m.pwv_mm) for m in measured if m.pwv_mm is not None]
    smax = max([float(np.nanmax(cond.seeing_arcsec)) if cond.seeing_arcsec.size else 1.0] + [v for _, v in m_see])
    axc.set_ylim(0, max(1.0, smax * 1.2))
    if m_see:
        axc.plot(*zip(*m_see), ls="none", marker="o", ms=5, color=st.seeing, mec=st.background, zorder=5,
                 gid="measured-seeing")
    axp = axc.twinx()
    axp.plot(x, cond.pwv_mm, color=st.pwv, lw=2.2, ls=(0, (4, 2)))
    if m_pwv:
        axp.plot(*zip(*m_pwv), ls="none", marker="s", ms=5, color=st.pwv, mec=st.background, zorder=5,
                 gid="measured-pwv")
    axp.set_ylabel("PWV (mm)", color=st.pwv, fontsize=11)
    axp.tick_params(axis="y", colors=st.pwv, labelcolor=st.pwv, labelsize=10)
    for sp in axp.spines.values():
        sp.set_color(st.muted)
    pmax = max([float(np.nanmax(cond.pwv_mm)) if cond.pwv_mm.size else 1.0] + [v for _, v in m_pwv])
    axp.set_ylim(0, max(1.0, pmax * 1.2))
    for a, b in runs(~cond.covered):
        axc.axvspan(x[a], x[b] if b < len(x) else x_end, facecolor="none", hatch="//", edgecolor=st.muted, lw=0,
                    zorder=1)
    for a, b in runs(closed):
        axc.axvspan(x[a], x[b] if b < len(x) else x_end, color=st.closure, alpha=0.25, lw=0, zorder=1)
    c = p["conditions"]
    src = f"report {c['report_id']} ({c['source']})" if c["report_id"] is not None else "no report: defaults"
    axc.set_title(f"conditions assumed: {src}: seeing at 500 nm zenith (solid), PWV (dashed); "
                  f"{'dots = measured; ' if m_see or m_pwv else ''}hatched = no forecast (defaults), "
                  "red = dome closed", fontsize=10.5, loc="left", color=st.text)
    axc.xaxis.set_major_locator(mdates.HourLocator(tz=timezone.utc))
    axc.xaxis.set_major_formatter(dated(timezone.utc))
    axc.set_xlabel("UTC", fontsize=11, color=st.text)
    axc.tick_params(axis="x", labelsize=10)
    axc.grid(True, axis="x", color=st.grid, lw=0.6, alpha=0.6)

    # Now.
    if x_now is not None:
        for axis in (ax, axt, axc):
            line = axis.axvline(x_now, color=st.accent, lw=1.8, zorder=8)
            line.set_gid("now-line" if axis is ax else None)
        ax.text(x_now, 89.0, f" now {now.astimezone(timezone.utc):%H:%M} UTC ", fontsize=10, color=st.accent,
                ha="left" if x_now < x[0] + 0.8 * (x_end - x[0]) else "right", va="top", zorder=9,
                gid="now-label", bbox={"boxstyle": "square,pad=0.15", "fc": st.background, "ec": "none",
                                       "alpha": 0.8})

    # Fix the layout, then place labels in pixels so none overlaps another.
    fig.canvas.draw()
    fig.set_layout_engine("none")
    _label_entries(fig, ax, axt, entries, seg_top, block_artists, colours, st)
    return fig


def _label_entries(fig, ax, axt, entries, seg_top, block_artists, colours, st) -> None:
    renderer = fig.canvas.get_renderer()
    px = fig.dpi / 72.0
    font = 9.5
    h = 1.55 * font * px

    def width_of(text: str) -> float:
        return (0.62 * font * len(text) + 5) * px

    # Group repeats that would crowd: closer than one label's width on screen.
    x_per_s = (ax.transData.transform((1.0, 0))[0] - ax.transData.transform((0.0, 0))[0]) / 86400.0
    groups = label_groups(entries, min_gap_s=width_of("0000 ×2") / max(x_per_s, 1e-9))
    bbox = ax.get_window_extent(renderer)
    wanted, texts = [], []
    for g in groups:
        tops = [seg_top[id(e)] for e in g if id(e) in seg_top]
        if not tops:
            continue
        xm = sum(t[0] for t in tops) / len(tops)
        ym = max(t[1] for t in tops)
        text = str(g[0]["request_id"]) + (f" ×{len(g)}" if len(g) > 1 else "")
        xp, yp = ax.transData.transform((xm, ym))
        wanted.append((xp, yp + 4 * px, width_of(text), h))
        texts.append((text, g, (xp, yp)))
    spots = place_boxes(wanted, (bbox.x0, ax.transData.transform((0, 12))[1], bbox.x1, bbox.y1 - 2), h + 2)
    inv = ax.transData.inverted()
    for (text, g, (xa, ya)), (xc, yb) in zip(texts, spots):
        xd, yd = inv.transform((xc, yb + h / 2))
        c = colours.get(g[0]["band"], st.text)
        ax.text(xd, yd, text, fontsize=font, ha="center", va="center", zorder=9, color=st.text,
                    fontweight="bold", gid=f"label-{g[0]['request_id']}",
                    bbox={"boxstyle": "round,pad=0.15", "fc": st.background, "ec": c, "lw": 1.2, "alpha": 0.9})
        if abs(yb - (ya + 4 * px)) > h * 0.6:  # moved away from its entry: a leader line back to it
            xa_d, ya_d = inv.transform((xa, ya))
            ax.plot([xa_d, xd], [ya_d, yd], color=c, lw=0.8, zorder=8)

    # Request ids on the timeline blocks: across when they fit, upright when narrow, else left out
    # (the altitude panel and the table carry every id).
    for e, x0, x1 in block_artists:
        (p0, _), (p1, _) = axt.transData.transform((x0, 0)), axt.transData.transform((x1, 0))
        wpx = p1 - p0
        text = str(e["request_id"])
        size = 8.5
        need = (0.62 * size * len(text) + 2) * px
        tall = axt.get_window_extent(renderer).height * 0.72
        if wpx >= need:
            rot = 0
        elif wpx >= 1.3 * size * px and need <= tall:
            rot = 90
        else:
            continue
        axt.text(0.5 * (x0 + x1), 0.5, text, rotation=rot, fontsize=size, ha="center", va="center", zorder=9,
                 color="#ffffff" if st.name == "day" else "#d8c8c8", fontweight="bold",
                 gid=f"blocklabel-{e['request_id']}-{e['execution']}", clip_on=True,
                 bbox={"boxstyle": "square,pad=0.05", "fc": "#000000", "ec": "none", "alpha": 0.35})


def render_chart(doc: dict[str, Any], night: Night, config: ObservatoryConfig, samples: Sequence, *,
                 sky=None, now: datetime | None = None, style: str = "day", fmt: str = "png",
                 measured: Sequence = (), tracks: Mapping[int, Any] | None = None) -> bytes:
    """The chart for plan document ``doc`` on ``night`` with the plan's ``samples``, as PNG, SVG or PDF bytes."""
    if fmt not in FORMATS.values():
        raise InputError("format", f"{fmt!r} is not a chart format; allowed: png, svg, pdf")
    fig = build_figure(doc, night, config, samples, sky=sky, now=now, style=style, measured=measured, tracks=tracks)
    buf = io.BytesIO()
    meta = {"png": None, "svg": {"Date": None}, "pdf": {"CreationDate": None, "ModDate": None}}[fmt]
    fig.savefig(buf, format=fmt, dpi=DPI, facecolor=fig.get_facecolor(), metadata=meta)
    return buf.getvalue()
