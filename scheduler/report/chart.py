"""`nightplan plan chart`: one PNG a queue observer reads at a glance on a console screen.

Top panel: altitude against time (UTC below, site local time above) of every planned target,
its whole track thin and its planned entry thick, labelled with the request id; twilight
shaded; the Moon's altitude; the telescope's altitude limits. A timeline row at the foot of
the panel repeats the entries as blocks. Bottom strip: the seeing and PWV the plan assumed,
with times the forecast did not cover (defaults used) and dome closures marked.

Matplotlib's object API on an Agg canvas (no pyplot, no display, no global state).
"""

from __future__ import annotations

import io
import math
from datetime import datetime, timezone
from typing import Any, Sequence
from zoneinfo import ZoneInfo

import numpy as np

from scheduler.conditions.grid import conditions_on_grid
from scheduler.model.config import ObservatoryConfig
from scheduler.sky.night import Night
from scheduler.model.timegrid import runs

WIDTH_IN, HEIGHT_IN, DPI = 16.0, 9.0, 110  # 1760 x 990 px: a console screen, no scrolling


def _t(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


# Distinct colours in wavelength order (blue to red, then the infrared); more bands: a colour map.
_PALETTE = ("#7b3fb0", "#1f5fbf", "#2e9e3e", "#d62728", "#8c564b", "#ff7f0e", "#c9b400", "#e377c2",
            "#17a2b8", "#222222")


def band_colours(config: ObservatoryConfig) -> dict[str, Any]:
    """One colour per band, in wavelength order."""
    names = sorted(config.bands, key=lambda b: config.bands[b].wavelength_um)
    if len(names) <= len(_PALETTE):
        return {b: _PALETTE[i] for i, b in enumerate(names)}
    from matplotlib import colormaps

    cmap = colormaps["turbo"]
    n = max(len(names) - 1, 1)
    return {b: cmap(0.05 + 0.9 * i / n) for i, b in enumerate(names)}


def render_chart(doc: dict[str, Any], night: Night, config: ObservatoryConfig, samples: Sequence,
                 *, sky=None) -> bytes:
    """PNG bytes of the chart for plan document ``doc`` on ``night`` with the plan's ``samples``."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib import dates as mdates
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    from scheduler.sky.ephemeris import compute_sky

    tz = ZoneInfo(config.site.timezone)
    entries = doc["entries"]
    keys = list(dict.fromkeys((e["ra_deg"], e["dec_deg"]) for e in entries if e["ra_deg"] is not None))
    if sky is None:
        sky = compute_sky(config.site, night, np.array([k[0] for k in keys], dtype=np.float64),
                          np.array([k[1] for k in keys], dtype=np.float64))
    row_of = {k: i for i, k in enumerate(keys)}
    times = [datetime.fromtimestamp(float(x), tz=timezone.utc) for x in night.times_unix]
    x = mdates.date2num(times)
    step_d = night.step_s / 86400.0
    cond = conditions_on_grid(samples, night.times_unix, config.defaults)
    colours = band_colours(config)

    fig = Figure(figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(2, 1, height_ratios=[4.2, 1.15])
    ax = fig.add_subplot(gs[0])
    axc = fig.add_subplot(gs[1], sharex=ax)

    # Twilight: shade by the Sun's altitude (darker shade = brighter sky, worse for most bands).
    sun = sky.sun_alt_deg
    shades = [((-6.0, 90.0), "#8c9bb0", "civil twilight"), ((-12.0, -6.0), "#b3bfd0", "nautical twilight"),
              ((-18.0, -12.0), "#d9e0ea", "astronomical twilight")]
    handles = []
    for (lo, hi), colour, label in shades:
        for a, b in runs((sun > lo) & (sun <= hi)):
            for axis in (ax, axc):
                axis.axvspan(x[a], x[min(b, len(x) - 1)] + (step_d if b >= len(x) else 0), color=colour, lw=0,
                             zorder=0)
        handles.append(Patch(color=colour, label=label))

    # Telescope limits.
    tel = config.telescope
    ax.axhspan(0, tel.min_altitude_deg, color="#555555", alpha=0.18, lw=0, zorder=1)
    ax.axhline(tel.min_altitude_deg, color="#444444", lw=1.2, ls="--", zorder=2)
    ax.text(x[0], tel.min_altitude_deg + 0.8, f" telescope lower limit {tel.min_altitude_deg:g}°", fontsize=10,
            color="#333333", va="bottom", zorder=6)
    if tel.max_altitude_deg < 90:
        ax.axhspan(tel.max_altitude_deg, 90, color="#555555", alpha=0.18, lw=0, zorder=1)
        ax.text(x[-1], 0.5 * (tel.max_altitude_deg + 90), f"zenith blind spot > {tel.max_altitude_deg:g}° ",
                fontsize=9, color="#333333", ha="right", va="center", zorder=6)

    # Moon.
    illum = float(sky.moon_illum[len(sky.moon_illum) // 2]) if len(sky.moon_illum) else 0.0
    moon = np.where(sky.moon_alt_deg > -2, sky.moon_alt_deg, np.nan)
    (mline,) = ax.plot(x, moon, color="#b8860b", lw=2.4, ls=(0, (6, 3)), zorder=3,
                       label=f"Moon altitude ({100 * illum:.0f} % lit)")
    handles.append(mline)

    # Targets: thin whole-night track, thick planned segment, request id label.
    label_slots: list[tuple[float, float]] = []
    for e in entries:
        r = row_of.get((e["ra_deg"], e["dec_deg"]))
        if r is None:
            continue
        c = colours.get(e["band"], "black")
        alt = np.asarray(sky.alt_deg[r], dtype=np.float64)
        alt = np.where(alt > -1, alt, np.nan)
        ax.plot(x, alt, color=c, lw=0.8, alpha=0.35, zorder=3)
        i0 = min(night.step_of(_t(e["start"])), night.n_times - 1)
        i1 = max(min(night.step_of(_t(e["end"])), night.n_times - 1), i0 + 1)
        seg = slice(i0, min(i1 + 1, len(x)))
        ax.plot(x[seg], alt[seg], color=c, lw=5.5, solid_capstyle="butt", zorder=5)
        xm = 0.5 * (x[seg.start] + x[seg.stop - 1])
        ym = float(np.nanmax(alt[seg])) if np.isfinite(alt[seg]).any() else tel.min_altitude_deg
        y = ym + 2.2
        for _ in range(6):  # nudge labels of neighbouring entries apart
            if any(abs(xm - px) < 0.012 and abs(y - py) < 3.2 for px, py in label_slots):
                y += 3.4
        label_slots.append((xm, y))
        ax.text(xm, min(y, 88.5), str(e["request_id"]), fontsize=9.5, ha="center", va="bottom", zorder=7,
                color="black", fontweight="bold",
                bbox={"boxstyle": "round,pad=0.12", "fc": "white", "ec": c, "lw": 1.0, "alpha": 0.85})

    # Timeline row: each entry as a block (what runs when, at a glance).
    for e in entries:
        x0, x1 = mdates.date2num(_t(e["start"])), mdates.date2num(_t(e["end"]))
        ax.add_patch(matplotlib.patches.Rectangle((x0, 2.0), x1 - x0, 6.0, color=colours.get(e["band"], "k"),
                                                  ec="white", lw=0.6, zorder=5))
    ax.text(x[0], 8.6, " planned entries", fontsize=9, color="#222222", va="bottom", zorder=6)
    closed = ~cond.dome_open | (cond.wind_ms > config.safety.max_wind_ms) | (cond.humidity_pct > config.safety.max_humidity_pct)
    for a, b in runs(closed):
        ax.axvspan(x[a], x[min(b, len(x) - 1)], ymin=0, ymax=10 / 90, color="#d62728", alpha=0.35, lw=0, zorder=4)
        ax.text(0.5 * (x[a] + x[min(b, len(x) - 1)]), 5.0, "dome\nclosed", fontsize=9, ha="center", va="center",
                color="#7a0000", zorder=6)

    present = sorted({e["band"] for e in entries if e["band"]}, key=lambda b: config.bands[b].wavelength_um
                     if b in config.bands else math.inf)
    band_handles = [Patch(color=colours[b], label=f"{b} {config.bands[b].wavelength_um:g} µm")
                    for b in present if b in colours]
    # Legends sit in the band below the telescope's limit, where no entry can be.
    leg1 = ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 10.5 / 90), fontsize=9.5,
                     framealpha=0.95, ncol=2, borderaxespad=0.2)
    ax.add_artist(leg1)
    if band_handles:
        ax.legend(handles=band_handles, loc="lower right", bbox_to_anchor=(1.0, 10.5 / 90), fontsize=9.5,
                  framealpha=0.95, ncol=min(len(band_handles), 5), borderaxespad=0.2)

    ax.set_ylim(0, 90)
    ax.set_yticks(range(0, 91, 10))
    ax.set_ylabel("altitude (deg)", fontsize=12)
    ax.grid(True, color="white", lw=0.6, alpha=0.7, zorder=1)
    ax.set_xlim(x[0], x[-1] + step_d)
    ax.tick_params(labelsize=11, labelbottom=False)
    top = ax.secondary_xaxis("top")
    top.xaxis.set_major_locator(mdates.HourLocator(tz=timezone.utc))
    top.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=tz))
    top.set_xlabel(f"local time ({config.site.timezone})", fontsize=11)
    top.tick_params(labelsize=11)

    p, sm = doc["plan"], doc["summary"]
    gap = f"{100 * p['gap']:.1f} %" if p["gap"] is not None else "-"
    ax.set_title(f"Plan v{p['version']}, night of {doc['night']['date']}, {doc['site']['name']}: {sm['entries']} entries, "
                 f"{sm['dark_hours_used']:.1f} of {sm['dark_hours']:.1f} dark hours used; solver {p['solver_status']}, "
                 f"gap {gap}\nAdvisory: the observatory's interlocks and licensed operators decide; local rules prevail.",
                 fontsize=12.5, loc="left")

    # Conditions strip.
    see_c, pwv_c = "#1f4e9c", "#1a8a5a"
    axc.plot(x, cond.seeing_arcsec, color=see_c, lw=2.2)
    axc.set_ylabel("seeing (\")", color=see_c, fontsize=11)
    axc.tick_params(axis="y", colors=see_c, labelsize=10)
    smax = float(np.nanmax(cond.seeing_arcsec)) if cond.seeing_arcsec.size else 1.0
    axc.set_ylim(0, max(1.0, smax * 1.2))
    axp = axc.twinx()
    axp.plot(x, cond.pwv_mm, color=pwv_c, lw=2.2, ls=(0, (4, 2)))
    axp.set_ylabel("PWV (mm)", color=pwv_c, fontsize=11)
    axp.tick_params(axis="y", colors=pwv_c, labelsize=10)
    pmax = float(np.nanmax(cond.pwv_mm)) if cond.pwv_mm.size else 1.0
    axp.set_ylim(0, max(1.0, pmax * 1.2))
    for a, b in runs(~cond.covered):
        axc.axvspan(x[a], x[min(b, len(x) - 1)], facecolor="none", hatch="//", edgecolor="#888888", lw=0, zorder=1)
    for a, b in runs(closed):
        axc.axvspan(x[a], x[min(b, len(x) - 1)], color="#d62728", alpha=0.25, lw=0, zorder=1)
    c = p["conditions"]
    src = f"report {c['report_id']} ({c['source']})" if c["report_id"] is not None else "no report: defaults"
    axc.set_title(f"conditions assumed: {src}: seeing at 500 nm zenith (solid), PWV (dashed); "
                  "hatched = no forecast (defaults), red = dome closed", fontsize=10.5, loc="left")
    axc.xaxis.set_major_locator(mdates.HourLocator(tz=timezone.utc))
    axc.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=timezone.utc))
    axc.set_xlabel("UTC", fontsize=11)
    axc.tick_params(axis="x", labelsize=11)
    axc.grid(True, axis="x", color="white", lw=0.6, alpha=0.7)

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()
