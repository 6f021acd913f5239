"""Terminal views of a plan document (rich): the night's summary, the entry table, `next`.

Reads only the plain document from report.export.plan_document; prints, computes nothing new.
Names, reasons and sources in it are user text: shown through report.safe_text.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from scheduler.report.safe_text import SafeTable, clean


def _t(s: str | None) -> datetime | None:
    return None if s is None else datetime.fromisoformat(s.replace("Z", "+00:00"))


def hm(s: str | None) -> str:
    """'HH:MM' of an ISO time (UTC or with an offset, shown in its own zone)."""
    t = _t(s)
    return "--:--" if t is None else t.strftime("%H:%M")


def _f(x: Any, fmt: str, dash: str = "-") -> str:
    return dash if x is None else fmt.format(x)


def _pct(x: float | None) -> str:
    return "-" if x is None else f"{100.0 * x:.1f} %"


def summary_lines(doc: dict[str, Any]) -> list[str]:
    """The night's summary above the table: what was planned, how well, on what assumptions."""
    p, n, sm, c = doc["plan"], doc["night"], doc["summary"], doc["plan"]["conditions"]
    state = "active" if p["active"] else f"superseded {p['superseded_at'] or ''}".strip()
    lines = [
        f"Plan version {p['version']} ({state}) for the night of {n['date']} at {doc['site']['name']}",
        f"  reason: {p['reason']}   built {p['created_at']}, planned from {p['planned_from']}",
        f"  night {hm(n['start'])}-{hm(n['end'])} UTC ({hm(n['start_local'])}-{hm(n['end_local'])} local, "
        f"{doc['site']['timezone']}); dark {hm(n['astronomical_dusk'])}-{hm(n['astronomical_dawn'])} UTC = "
        f"{n['dark_hours']:.2f} h",
        f"  {sm['entries']} entries, {sm['scheduled_hours']:.2f} h scheduled; {sm['dark_hours_used']:.2f} h of the "
        f"{sm['dark_hours']:.2f} dark hours used ({_pct(sm['dark_fraction_used'])}); transitions "
        f"{sm['transition_hours']:.2f} h (slew {sm['slew_hours']:.2f} h); idle {sm['idle_hours']:.2f} h",
        f"  solver {p['solver_status']}: objective {_f(p['objective'], '{:.3f}')}, bound {_f(p['bound'], '{:.3f}')}, "
        f"gap {_pct(p['gap'])}, greedy {_f(p['greedy_objective'], '{:.3f}')}, {_f(p['runtime_s'], '{:.1f}')} s; "
        f"{sm['unscheduled']} request{'' if sm['unscheduled'] == 1 else 's'} unscheduled"
        + (f" of {sm['queue_size']} in the queue" if sm.get("queue_size") is not None else ""),
    ]
    if c["report_id"] is None:
        lines.append(f"  conditions: {c['note']}")
    else:
        cov = c["covered_fraction"]
        older = [str(i) for i in c.get("report_ids") or [] if i != c["report_id"]]
        lines.append(f"  conditions assumed: report {c['report_id']} from {c['source']}, issued {c['issued_at']}"
                     + (f" (and, where it is silent, report{'s' if len(older) > 1 else ''} {', '.join(older)})"
                        if older else "")
                     + f"; covers {_pct(cov)} of the night" + ("" if cov is None or cov >= 0.999 else
                                                              " (defaults elsewhere)"))
    if c.get("warning"):
        lines.append(f"  warning: {c['warning']}")
    return lines


# Columns of the entry table in the order shown. Ids and start times always show; at a
# narrower width the others go first in DROP_ORDER, then the end times, and the target wraps.
_COLUMNS = (("utc", "UTC", "left"), ("local", "local", "left"), ("id", "id", "right"), ("target", "target", "left"),
            ("prog", "prog", "left"), ("band", "band", "left"), ("exp", "exp s", "right"),
            ("airmass", "airmass", "right"), ("fwhm", "FWHM\"", "right"), ("pwv", "PWV mm", "right"),
            ("trans", "trans", "right"), ("moon", "moon°", "right"), ("merit", "merit", "right"))
DROP_ORDER = ("merit", "moon", "trans", "pwv", "fwhm", "airmass", "prog", "exp", "local", "band")
_TARGET_MIN = 8  # the target column wraps down to this width before end times are dropped


def _crosses_midnight(start: str | None, end: str | None) -> bool:
    a, b = _t(start), _t(end)
    return a is not None and b is not None and a.date() != b.date()


def _times(start: str | None, end: str | None, dated: bool, with_end: bool) -> str:
    t = _t(start)
    day = f"{t.strftime('%m-%d')} " if dated and t is not None else ""
    return day + hm(start) + (f"-{hm(end)}" if with_end else "")


def _table_width(widths: list[int]) -> int:
    # cell widths, one space of padding inside each separator (none at the outer edges: pad_edge
    # False) and the separators themselves, the two edges included
    n = len(widths)
    return sum(widths) + 2 * n - 2 + n + 1


def entry_table(doc: dict[str, Any], width: int | None = None) -> Table:
    """The plan's entries as a table, fitted to ``width`` columns when given.

    Ids and start times always show. When the night crosses midnight the times carry the date
    (MM-DD). To fit, columns are left out in DROP_ORDER, then the end times; the target wraps.
    The caption names what was left out.
    """
    from rich.cells import cell_len

    tz = doc["site"]["timezone"]
    n = doc["night"]
    dated_utc = _crosses_midnight(n["start"], n["end"])
    dated_local = _crosses_midnight(n["start_local"], n["end_local"])

    def cells(with_end: bool) -> dict[str, list[str]]:
        out: dict[str, list[str]] = {k: [] for k, _h, _j in _COLUMNS}
        for e in doc["entries"]:
            out["utc"].append(_times(e["start"], e["end"], dated_utc, with_end))
            out["local"].append(_times(e["start_local"], e["end_local"], dated_local, with_end))
            out["id"].append(f"{e['request_id']}{'*' if e.get('fixed') else ''}")
            out["target"].append(clean(e["target"] or "?"))
            out["prog"].append(clean(e["program"] or "?"))
            out["band"].append(clean(e["band"] or "?"))
            out["exp"].append(_f(e["exposure_s"], "{:.0f}"))
            out["airmass"].append(f"{e['airmass_start']:.2f}-{e['airmass_end']:.2f}"
                                  if e["airmass_start"] is not None else "-")
            out["fwhm"].append(_f(e["predicted_fwhm_arcsec"], "{:.2f}"))
            out["pwv"].append(_f(e["predicted_pwv_mm"], "{:.1f}"))
            out["trans"].append(_f(e["transmission"], "{:.2f}"))
            out["moon"].append(_f(e["moon_sep_deg"], "{:.0f}"))
            out["merit"].append(_f(e["merit"], "{:.2f}"))
        return out

    def widths(data: dict[str, list[str]], keys: list[str]) -> list[int]:
        got = []
        for k, head, _j in _COLUMNS:
            if k in keys:
                w = max([cell_len(head)] + [cell_len(x) for x in data[k]])
                got.append(min(w, _TARGET_MIN) if k == "target" else w)
        return got

    with_end = True
    data = cells(with_end)
    keys = [k for k, _h, _j in _COLUMNS]
    dropped: list[str] = []
    if width is not None:
        for k in DROP_ORDER:
            if _table_width(widths(data, keys)) <= width:
                break
            keys.remove(k)
            dropped.append(k)
        if _table_width(widths(data, keys)) > width:
            with_end = False
            data = cells(with_end)
    t = SafeTable(title=None, show_lines=False, header_style="bold", pad_edge=False)
    for k, head, just in _COLUMNS:
        if k in keys:
            if k == "target":  # wraps when space is short; everything else stays whole
                t.add_column(head, justify=just, overflow="fold", min_width=min(_TARGET_MIN, cell_len(head) + 2))
            else:
                t.add_column(head, justify=just, no_wrap=True)
    for i in range(len(doc["entries"])):
        t.add_row(*(data[k][i] for k in keys))
    caption = f"times: UTC and local ({tz})" if "local" in keys else "times: UTC"
    if dated_utc or (dated_local and "local" in keys):
        caption += ", dated MM-DD as the night crosses midnight"
    caption += "; * = kept from the previous plan (in progress or frozen)"
    if dropped or not with_end:
        names = [h for k, h, _j in _COLUMNS if k in dropped] + ([] if with_end else ["end times"])
        caption += f"; left out at this width: {', '.join(names)} (`plan show --json` has every field)"
    t.caption = caption
    return t


def print_plan(console: Console, doc: dict[str, Any], *, unscheduled: bool = False) -> None:
    for line in summary_lines(doc):
        console.print(Text(clean(line)))
    console.print(Text(doc["caution"], style="yellow"))
    console.print(entry_table(doc, width=console.width))
    if unscheduled and doc["unscheduled"]:
        t = SafeTable("id", "target", "prog", "band", "why not", title="unscheduled", header_style="bold")
        for u in doc["unscheduled"]:
            t.add_row(str(u["request_id"]), u["target"] or "?", u["program"] or "?", u["band"] or "?", u["reason"])
        console.print(t)
    elif doc["unscheduled"]:
        console.print(Text(f"{len(doc['unscheduled'])} unscheduled requests: `nightplan plan show --unscheduled` "
                           f"lists them; `nightplan plan why ID` explains one."))


def entry_line(e: dict[str, Any]) -> str:
    """One entry on one line, for plain printing (user text escaped)."""
    return (f"#{e['request_id']} {clean(e['target'])} ({clean(e['program'])}) band {e['band']} {e['exposure_s']:.0f} s; "
            f"{hm(e['start'])}-{hm(e['end'])} UTC ({hm(e['start_local'])}-{hm(e['end_local'])} local); "
            f"RA {e['ra_deg']:.4f} Dec {e['dec_deg']:+.4f}; airmass {e['airmass_start']:.2f}->{e['airmass_end']:.2f}, "
            f"FWHM {_f(e['predicted_fwhm_arcsec'], '{:.2f}')}\", PWV {_f(e['predicted_pwv_mm'], '{:.1f}')} mm")
